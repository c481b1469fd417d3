"""Converter measurements in the manner of AES17: sine fits, THD+N, THD, dynamic range, noise.

Every function takes one channel as a ``(frames,)`` float array (full scale ±1.0) with the
sample rate passed as ``rate_hz=``, and returns a small frozen result (or a float whose unit
is in the function's name).

The fundamental is removed by a least-squares sine fit (IEEE Std 1057 / 1241) rather than by
an analog-style notch; the residual is noise plus distortion. The noise and THD+N path has a
block form (:func:`start_residual_meter`, :func:`update_residual_meter`,
:func:`read_residual_meter`) for signals too long to hold in memory; the one-shot functions
run the same code on a single block, so both give the same numbers.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import signal as _sig

from audiodsm.errors import ParameterError
from audiodsm.measure.spectrum import (
    _as_signal,
    _check_rate,
    averaged_spectrum,
    power_to_dbfs,
)

__all__ = [
    "WEIGHTINGS",
    "AES17_TEST_HZ",
    "SineFit",
    "interpolated_peak_hz",
    "fit_sine",
    "ResidualMeterState",
    "ResidualReadings",
    "start_residual_meter",
    "update_residual_meter",
    "read_residual_meter",
    "ThdN",
    "thd_plus_noise",
    "HarmonicLevel",
    "Thd",
    "thd",
    "sinad_db",
    "enob_bits",
    "DynamicRange",
    "dynamic_range",
    "NoiseLevel",
    "idle_channel_noise",
    "LevelLinearity",
    "level_linearity",
    "FrequencyResponse",
    "frequency_response",
    "stepped_frequency_response",
    "IntermodProduct",
    "Intermodulation",
    "imd_smpte",
    "imd_difference_frequency",
    "BandPower",
    "out_of_band_power_dbfs",
    "NoiseModulation",
    "noise_modulation",
]

#: The noise weightings every noise measurement accepts.
WEIGHTINGS = ("unweighted", "a", "ccir")
#: The AES17 test frequency (a prime number of hertz).
AES17_TEST_HZ = 997.0

_TWO_PI = 2.0 * math.pi


def _check_weighting(weighting, name="weighting"):
    if not isinstance(weighting, str) or weighting.lower() not in WEIGHTINGS:
        raise ParameterError(name, weighting, f"one of {', '.join(WEIGHTINGS)}")
    return weighting.lower()


def _check_positive(value, name, *, allow_zero=False):
    ok = isinstance(value, int | float) and math.isfinite(value)
    ok = ok and (value >= 0 if allow_zero else value > 0)
    if not ok:
        raise ParameterError(name, value, "a number >= 0" if allow_zero else "a number > 0")
    return float(value)


def _settle_frames(settle_s, rate):
    """The number of frames in ``settle_s`` seconds (checked: zero or more) at ``rate``."""
    return round(_check_positive(settle_s, "settle_s", allow_zero=True) * rate)


def _check_frequency(freq, rate, name="frequency_hz"):
    if not (isinstance(freq, int | float) and math.isfinite(freq) and 0 < freq < rate / 2):
        raise ParameterError(name, freq, f"a frequency between 0 and {rate / 2:g} Hz")
    return float(freq)


def _dot(a, b):
    """Inner product of two 1-D arrays without BLAS.

    BLAS may split a long dot product across threads, which is slow on a busy machine and
    makes the rounding depend on the thread count; einsum's loop does neither.
    """
    return float(np.einsum("i,i->", a, b))


def _phase_columns(start_index, count, freq_hz, rate_hz):
    """Cosine and sine of 2*pi*f*n/rate for n = start_index .. start_index+count-1.

    The phase is reduced to whole cycles in float64 before the trigonometry, so indices in
    the tens of millions keep the phase accurate to about 1e-9 rad.
    """
    n = np.arange(start_index, start_index + count, dtype=np.float64)
    cycles = np.mod(n * (freq_hz / rate_hz), 1.0)
    ph = _TWO_PI * cycles
    return np.cos(ph), np.sin(ph)


# ---------------------------------------------------------------------------------------------
# Sine fit (IEEE Std 1057 / 1241)
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class SineFit:
    """A least-squares sine fit ``x[n] ~ amplitude * cos(2*pi*f*n/rate + phase) + offset``.

    Attributes
    ----------
    amplitude : float
        Peak amplitude (full scale 1.0); ``>= 0``.
    phase_rad : float
        Phase at the first sample, in (-pi, pi].
    offset : float
        DC offset.
    frequency_hz : float
        Frequency (the given one for a 3-parameter fit, the fitted one for 4 parameters).
    rate_hz : float
    residual : numpy.ndarray
        ``x`` minus the fitted sine: noise plus distortion.
    residual_rms : float
    iterations : int
        Frequency iterations of the 4-parameter fit (0 for 3 parameters).
    converged : bool
        Whether the 4-parameter iteration met its tolerance (always True for 3 parameters);
        when it did not, :func:`fit_sine` also warns (``RuntimeWarning``).
    """

    amplitude: float
    phase_rad: float
    offset: float
    frequency_hz: float
    rate_hz: float
    residual: np.ndarray = field(repr=False)
    residual_rms: float
    iterations: int
    converged: bool

    @property
    def amplitude_dbfs(self):
        """The fitted amplitude in dBFS (a full-scale sine has amplitude 1.0)."""
        return 20.0 * math.log10(self.amplitude) if self.amplitude > 0 else -math.inf

    def model(self, frames, *, start_index=0):
        """The fitted sine over ``frames`` samples starting at ``start_index``."""
        n = np.arange(start_index, start_index + frames, dtype=np.float64)
        cycles = np.mod(n * (self.frequency_hz / self.rate_hz), 1.0)
        return self.amplitude * np.cos(_TWO_PI * cycles + self.phase_rad) + self.offset


def interpolated_peak_hz(x, *, rate_hz, min_hz=None):
    """Frequency of the strongest spectral line, interpolated between DFT bins.

    The signal's mean is removed, a periodic Hann window applied, and the fractional bin
    offset taken from the three bins around the peak magnitude with the Hann-window
    estimator ``delta = 2 (|X[k+1]| - |X[k-1]|) / (|X[k-1]| + 2|X[k]| + |X[k+1]|)``.

    Parameters
    ----------
    x : array_like
        One channel.
    rate_hz : float
    min_hz : float, optional
        Ignore lines below this frequency (default: three bins, to skip DC leakage).

    Returns
    -------
    float
        Frequency in Hz.

    References
    ----------
    .. [1] E. Jacobsen and P. Kootsookos, "Fast, accurate frequency estimators", IEEE Signal
       Processing Magazine 24(3), 2007, pp. 123-125 (Hann-window three-bin estimator).
    """
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    n = len(arr)
    if n < 16:
        raise ParameterError("x", f"{n} frames", "at least 16 frames to find a tone")
    w = _sig.get_window("hann", n, fftbins=True)
    mag = np.abs(np.fft.rfft((arr - arr.mean()) * w))
    first = 3 if min_hz is None else max(1, math.ceil(min_hz * n / rate))
    if first >= len(mag) - 1:
        raise ParameterError("x", f"{n} frames", "a record long enough to resolve the tone")
    k = first + int(np.argmax(mag[first:-1]))
    a, b, c = mag[k - 1], mag[k], mag[k + 1]
    den = a + 2.0 * b + c
    delta = 0.0 if den == 0 else 2.0 * (c - a) / den
    return float((k + delta) * rate / n)


def fit_sine(x, *, rate_hz, frequency_hz=None, four_parameter=True, max_iterations=40):
    """Least-squares fit of one sine (plus DC) to a record.

    The 3-parameter fit solves for the cosine, sine and DC terms at a known frequency. The
    4-parameter fit also adjusts the frequency by Gauss-Newton iteration, linearising the
    model in the angular frequency at each step (IEEE Std 1057, 4-parameter algorithm),
    starting from ``frequency_hz`` or, when that is not given, from the interpolated peak of
    a Hann-windowed DFT. Time is measured from the record centre during the iteration, which
    keeps the normal equations well conditioned; the reported phase refers to the first
    sample.

    Parameters
    ----------
    x : array_like
        One channel, shape ``(frames,)``, at least 16 frames and a few cycles of the tone.
    rate_hz : float
        Sample rate.
    frequency_hz : float, optional
        Known (3-parameter) or starting (4-parameter) frequency.
    four_parameter : bool
        Fit the frequency as well. With ``four_parameter=False`` and no ``frequency_hz``, the
        interpolated DFT peak is used as the known frequency.
    max_iterations : int
        Cap on the frequency iterations.

    Returns
    -------
    SineFit

    References
    ----------
    .. [1] IEEE Std 1057-2017, "IEEE Standard for Digitizing Waveform Recorders", sine-fit
       algorithms (3-parameter and 4-parameter), clause 4.1.3 (from memory).
    .. [2] IEEE Std 1241-2010, "IEEE Standard for Terminology and Test Methods for
       Analog-to-Digital Converters", clause 4.1.4 (from memory).
    """
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    n = len(arr)
    if n < 16:
        raise ParameterError("x", f"{n} frames", "at least 16 frames for a sine fit")
    if frequency_hz is None:
        f0 = interpolated_peak_hz(arr, rate_hz=rate)
    else:
        f0 = _check_frequency(frequency_hz, rate)
    if not (isinstance(max_iterations, int) and max_iterations >= 1):
        raise ParameterError("max_iterations", max_iterations, "an integer >= 1")

    mid = (n - 1) / 2.0
    tc = np.arange(n, dtype=np.float64) - mid
    omega = _TWO_PI * f0 / rate  # rad per sample

    def three(om):
        c, s = np.cos(om * tc), np.sin(om * tc)
        d = np.column_stack([c, s, np.ones(n)])
        coef = np.linalg.lstsq(d, arr, rcond=None)[0]
        return coef, c, s

    coef, c, s = three(omega)
    iterations = 0
    converged = True
    if four_parameter:
        converged = False
        for iterations in range(1, max_iterations + 1):  # noqa: B007
            a, b = coef[0], coef[1]
            # derivative of a cos(w t) + b sin(w t) with respect to w
            deriv = tc * (b * c - a * s)
            d = np.column_stack([c, s, np.ones(n), deriv])
            sol = np.linalg.lstsq(d, arr, rcond=None)[0]
            step = sol[3]
            omega_new = omega + step
            if not (0 < omega_new < math.pi):
                break
            omega = omega_new
            coef, c, s = three(omega)
            # stop when the step moves the phase at the record ends by < 1e-11 rad
            if abs(step) * n < 1e-11:
                converged = True
                break
    if not converged:
        warnings.warn(
            f"fit_sine: the 4-parameter fit did not converge in {max_iterations} iterations "
            f"(frequency left at {omega * rate / _TWO_PI:.6f} Hz); is there a tone?",
            RuntimeWarning,
            stacklevel=2,
        )
    a, b, dc = (float(v) for v in coef)
    amplitude = math.hypot(a, b)
    theta = math.atan2(-b, a)  # phase at the record centre
    phase = math.remainder(theta - omega * mid, _TWO_PI)
    residual = arr - (a * c + b * s + dc)
    return SineFit(
        amplitude=amplitude,
        phase_rad=phase,
        offset=dc,
        frequency_hz=float(omega * rate / _TWO_PI),
        rate_hz=rate,
        residual=residual,
        residual_rms=float(np.sqrt(np.mean(residual * residual))),
        iterations=iterations,
        converged=converged,
    )


# ---------------------------------------------------------------------------------------------
# Residual meter: band-limited, weighted noise with the fundamental removed, block by block
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class ResidualMeterState:
    """Everything the residual meter carries from one block to the next (a value).

    Attributes
    ----------
    rate_hz, frequency_hz, upper_hz, lower_hz : float
        ``frequency_hz`` is None when nothing is removed (idle-channel noise).
    weightings : tuple of str
    segment_frames, settle_frames : int
    pending : numpy.ndarray
        Frames received but not yet processed (fewer than two segments).
    next_index : int
        Index, from the start of the signal, of ``pending[0]``.
    total_filter, residual_filter : object or None
        Band-limit filter states for the total signal and the residual.
    weighting_filters : tuple
        One weighting-filter state per weighting (None for "unweighted").
    total_sum : float
        Sum of squares of the band-limited total after the settling time.
    residual_sums : tuple of float
        Sum of squares of the band-limited, weighted residual, one per weighting.
    counted : int
        Frames included in the sums.
    amplitude_sum, offset_sum : float
        Segment-length-weighted sums of the fitted amplitude and DC offset.
    fitted : int
        Frames covered by fits.
    basis : tuple of numpy.ndarray or None
        Cosine and sine of the fundamental over two segments (read-only), the fit's columns.
    """

    rate_hz: float
    frequency_hz: float | None
    upper_hz: float | None
    lower_hz: float | None
    weightings: tuple
    segment_frames: int
    settle_frames: int
    pending: np.ndarray = field(repr=False)
    next_index: int = 0
    total_filter: object = field(default=None, repr=False)
    residual_filter: object = field(default=None, repr=False)
    weighting_filters: tuple = field(default=(), repr=False)
    total_sum: float = 0.0
    residual_sums: tuple = ()
    counted: int = 0
    amplitude_sum: float = 0.0
    offset_sum: float = 0.0
    fitted: int = 0
    basis: tuple | None = field(default=None, repr=False)


@dataclass(frozen=True)
class ResidualReadings:
    """What the residual meter measured.

    Attributes
    ----------
    frequency_hz : float or None
        Frequency of the removed fundamental (None when nothing was removed).
    fundamental_dbfs : float or None
        Mean fitted fundamental amplitude in dBFS (None when nothing was removed).
    total_dbfs : float
        Band-limited, unweighted level of the whole signal, in dBFS.
    noise_dbfs : dict
        Weighting -> band-limited, weighted residual level in dBFS.
    thd_n_db : dict
        Weighting -> ``noise_dbfs - total_dbfs`` (THD+N ratio in dB); empty when nothing was
        removed.
    frames, counted_frames : int
        Frames received, and frames after the settling time that the levels average.
    upper_hz, lower_hz : float or None
        The band.
    """

    frequency_hz: float | None
    fundamental_dbfs: float | None
    total_dbfs: float
    noise_dbfs: dict
    thd_n_db: dict
    frames: int
    counted_frames: int
    upper_hz: float | None
    lower_hz: float | None


def start_residual_meter(
    *,
    rate_hz,
    frequency_hz=None,
    weightings=WEIGHTINGS,
    upper_hz=20000.0,
    lower_hz=20.0,
    segment_s=1.0,
    settle_s=0.1,
):
    """Start a block-wise measurement of band-limited noise with the fundamental removed.

    The signal is cut into segments of ``segment_s`` seconds (the last segment takes the
    remainder, so it is one to two segments long). In each segment a 3-parameter sine fit at
    ``frequency_hz`` (IEEE Std 1057) is subtracted; the residual and the whole signal run
    through the AES17 band-limit filter (``audiodsm.measure.bands.band_limit``) and the
    residual through each weighting filter, with filter state carried across segments, and
    the squares are summed after ``settle_s`` seconds of filter settling.

    Parameters
    ----------
    rate_hz : float
        Sample rate (44.1 kHz or more, for the 20 kHz band).
    frequency_hz : float or None
        Frequency of the fundamental to remove (estimate it with :func:`fit_sine` on a
        leading stretch). None removes nothing: the meter then reads idle-channel noise.
    weightings : sequence of str
        Any of "unweighted", "a", "ccir"; each gets its own reading.
    upper_hz, lower_hz : float or None
        Band edges (None for no limit on that side).
    segment_s : float
        Length of the stretches fitted separately. Refitting the phase and amplitude every
        segment lets the removal follow a frequency known only to a few parts per billion.
    settle_s : float
        Seconds at the start excluded from the sums while the filters settle.

    Returns
    -------
    ResidualMeterState
    """
    rate = _check_rate(rate_hz)
    freq = None if frequency_hz is None else _check_frequency(frequency_hz, rate)
    kinds = tuple(_check_weighting(k, "weightings") for k in weightings)
    if not kinds:
        raise ParameterError("weightings", weightings, "at least one weighting")
    seg = _check_positive(segment_s, "segment_s")
    settle = _check_positive(settle_s, "settle_s", allow_zero=True)
    segment_frames = max(16, round(seg * rate))
    # check the band against the rate once, here
    from audiodsm.measure.bands import band_limit_filter

    band_limit_filter(rate_hz=rate, upper_hz=upper_hz, lower_hz=lower_hz)
    return ResidualMeterState(
        rate_hz=rate,
        frequency_hz=freq,
        upper_hz=upper_hz,
        lower_hz=lower_hz,
        weightings=kinds,
        segment_frames=segment_frames,
        settle_frames=round(settle * rate),
        pending=np.zeros(0),
        weighting_filters=(None,) * len(kinds),
        residual_sums=(0.0,) * len(kinds),
        basis=_basis(freq, rate, 2 * segment_frames),
    )


def _basis(freq, rate, frames):
    if freq is None:
        return None
    c, s = _phase_columns(0, frames, freq, rate)
    c.setflags(write=False)
    s.setflags(write=False)
    return (c, s)


def _meter_segment(st, seg):
    """Process one segment; return the updated state (pending is left to the caller)."""
    from audiodsm.measure.bands import band_limit
    from audiodsm.measure.weighting import apply_weighting

    count = len(seg)
    start = st.next_index
    amp_sum, off_sum, fitted = st.amplitude_sum, st.offset_sum, st.fitted
    total_bl, total_filter = band_limit(
        seg, rate_hz=st.rate_hz, upper_hz=st.upper_hz, lower_hz=st.lower_hz, state=st.total_filter
    )
    if st.frequency_hz is None:
        resid_bl, resid_filter = total_bl, None
    else:
        # The span of cos, sin and 1 does not depend on where the phase is counted from, so
        # the columns are taken from the segment start: one table serves every segment.
        c, s = st.basis[0][:count], st.basis[1][:count]
        gram = np.array(
            [
                [_dot(c, c), _dot(c, s), c.sum()],
                [_dot(c, s), _dot(s, s), s.sum()],
                [c.sum(), s.sum(), float(count)],
            ]
        )
        rhs = np.array([_dot(c, seg), _dot(s, seg), seg.sum()])
        a, b, dc = np.linalg.lstsq(gram, rhs, rcond=None)[0]
        resid = seg - a * c
        resid -= b * s
        resid -= dc
        amp_sum += math.hypot(a, b) * count
        off_sum += dc * count
        fitted += count
        resid_bl, resid_filter = band_limit(
            resid,
            rate_hz=st.rate_hz,
            upper_hz=st.upper_hz,
            lower_hz=st.lower_hz,
            state=st.residual_filter,
        )
    skip = min(count, max(0, st.settle_frames - start))
    counted = count - skip
    total_sum = st.total_sum + _dot(total_bl[skip:], total_bl[skip:])
    sums, wstates = [], []
    for kind, wstate, acc in zip(
        st.weightings, st.weighting_filters, st.residual_sums, strict=True
    ):
        if kind == "unweighted":
            y = resid_bl
        else:
            y, wstate = apply_weighting(resid_bl, rate_hz=st.rate_hz, kind=kind, state=wstate)
        tail = y[skip:]
        sums.append(acc + _dot(tail, tail))
        wstates.append(wstate)
    return replace(
        st,
        next_index=start + count,
        total_filter=total_filter,
        residual_filter=resid_filter,
        weighting_filters=tuple(wstates),
        total_sum=total_sum,
        residual_sums=tuple(sums),
        counted=st.counted + counted,
        amplitude_sum=amp_sum,
        offset_sum=off_sum,
        fitted=fitted,
    )


def update_residual_meter(x, state):
    """Feed one block of samples to the residual meter.

    Parameters
    ----------
    x : array_like
        The next block of the channel, ``(frames,)``; any length, including zero.
    state : ResidualMeterState
        From :func:`start_residual_meter` or the previous update.

    Returns
    -------
    ResidualMeterState
        The segments are cut from the concatenated blocks, so the readings do not depend on
        the block sizes (block-wise equals one call bit for bit).
    """
    if not isinstance(state, ResidualMeterState):
        raise ParameterError("state", type(state).__name__, "a ResidualMeterState")
    arr = _as_signal(x) if np.size(x) else np.zeros(0)
    data = np.concatenate([state.pending, arr]) if len(state.pending) else arr
    seg = state.segment_frames
    pos = 0
    st = state
    # keep at least one whole segment back, so the final segment is 1..2 segments long
    while len(data) - pos >= 2 * seg:
        st = _meter_segment(st, data[pos : pos + seg])
        pos += seg
    return replace(st, pending=np.array(data[pos:], copy=True))


def read_residual_meter(state):
    """Finish the measurement and read the levels.

    Parameters
    ----------
    state : ResidualMeterState

    Returns
    -------
    ResidualReadings

    Raises
    ------
    ParameterError
        When no frame lies beyond the settling time.
    """
    if not isinstance(state, ResidualMeterState):
        raise ParameterError("state", type(state).__name__, "a ResidualMeterState")
    st = state
    if len(st.pending):
        st = _meter_segment(st, st.pending)
    frames = st.next_index
    if st.counted == 0:
        raise ParameterError(
            "x",
            f"{frames} frames",
            f"more than the {st.settle_frames} frames of filter settling time",
        )
    total_dbfs = power_to_dbfs(st.total_sum / st.counted)
    noise = {
        k: power_to_dbfs(s / st.counted)
        for k, s in zip(st.weightings, st.residual_sums, strict=True)
    }
    if st.frequency_hz is None:
        ratio, fund = {}, None
    else:
        ratio = {k: v - total_dbfs for k, v in noise.items()}
        mean_amp = st.amplitude_sum / st.fitted
        fund = 20.0 * math.log10(mean_amp) if mean_amp > 0 else -math.inf
    return ResidualReadings(
        frequency_hz=st.frequency_hz,
        fundamental_dbfs=fund,
        total_dbfs=total_dbfs,
        noise_dbfs=noise,
        thd_n_db=ratio,
        frames=frames,
        counted_frames=st.counted,
        upper_hz=st.upper_hz,
        lower_hz=st.lower_hz,
    )


def _lead_frequency(arr, rate, frequency_hz, lead_s):
    if frequency_hz is not None:
        return _check_frequency(frequency_hz, rate)
    lead = max(16, round(_check_positive(lead_s, "lead_s") * rate))
    return fit_sine(arr[:lead], rate_hz=rate).frequency_hz


# ---------------------------------------------------------------------------------------------
# THD+N, THD, SINAD, ENOB
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ThdN:
    """A THD+N ratio (AES17).

    Attributes
    ----------
    ratio_db : float
        ``20 log10(rms(band-limited, weighted residual) / rms(band-limited total))``.
    percent : float
        The same ratio in percent.
    weighting : str
        Weighting applied to the residual (the total is band-limited only).
    fundamental_hz : float
    fundamental_dbfs : float
        Fitted fundamental level.
    total_dbfs : float
        Band-limited level of the whole signal.
    noise_dbfs : float
        Band-limited, weighted residual level (noise plus distortion) in dBFS.
    upper_hz, lower_hz : float or None
    """

    ratio_db: float
    percent: float
    weighting: str
    fundamental_hz: float
    fundamental_dbfs: float
    total_dbfs: float
    noise_dbfs: float
    upper_hz: float | None
    lower_hz: float | None


def thd_plus_noise(
    x,
    *,
    rate_hz,
    weighting="unweighted",
    upper_hz=20000.0,
    lower_hz=20.0,
    frequency_hz=None,
    lead_s=1.0,
    segment_s=1.0,
    settle_s=0.1,
):
    """THD+N ratio of a tone, in dB and percent, following AES17.

    The fundamental's frequency comes from a 4-parameter sine fit on the first ``lead_s``
    seconds (unless given). The fundamental is then removed by 3-parameter fits segment by
    segment, and the ratio is the rms of the band-limited (and weighted) residual over the
    rms of the band-limited total, both after ``settle_s`` seconds. This is the one-shot
    form of the residual meter (:func:`start_residual_meter`).

    Parameters
    ----------
    x : array_like
        One channel holding a single tone.
    rate_hz : float
    weighting : {"unweighted", "a", "ccir"}
        Weighting applied to the residual.
    upper_hz, lower_hz : float or None
        Measurement band (AES17: 20 kHz low-pass, 20 Hz high-pass).
    frequency_hz : float, optional
        The fundamental, when known exactly.
    lead_s, segment_s, settle_s : float
        See above and :func:`start_residual_meter`.

    Returns
    -------
    ThdN

    Notes
    -----
    AES17 removes the fundamental with a notch filter; a least-squares fit removes it with
    far less damage to the noise near the fundamental (three degrees of freedom per
    segment, a bias of about ``-13/segment_frames`` dB). Weighting applies to the residual
    only; the reference is the band-limited, unweighted total, so a weighted THD+N ratio
    does not depend on the weighting's gain at the test frequency.

    References
    ----------
    .. [1] AES17-2015, THD+N ratio and measurement band (clauses 6.3 and 5.2.5, from memory).
    .. [2] IEEE Std 1057-2017, 3- and 4-parameter sine fits.
    """
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    kind = _check_weighting(weighting)
    freq = _lead_frequency(arr, rate, frequency_hz, lead_s)
    st = start_residual_meter(
        rate_hz=rate,
        frequency_hz=freq,
        weightings=(kind,),
        upper_hz=upper_hz,
        lower_hz=lower_hz,
        segment_s=segment_s,
        settle_s=settle_s,
    )
    r = read_residual_meter(update_residual_meter(arr, st))
    if r.total_dbfs == -math.inf or r.fundamental_dbfs == -math.inf:
        raise ParameterError("x", "a silent signal", "a signal holding a tone")
    ratio = r.thd_n_db[kind]
    return ThdN(
        ratio_db=ratio,
        percent=100.0 * 10.0 ** (ratio / 20.0),
        weighting=kind,
        fundamental_hz=freq,
        fundamental_dbfs=r.fundamental_dbfs,
        total_dbfs=r.total_dbfs,
        noise_dbfs=r.noise_dbfs[kind],
        upper_hz=upper_hz,
        lower_hz=lower_hz,
    )


def _fit_lines(arr, freqs_hz, rate):
    """Joint least-squares fit of DC and sinusoids at fixed frequencies.

    Returns (complex amplitudes, dc): ``x ~ dc + sum(Re(c_k exp(j 2 pi f_k n / rate)))``.
    A line at exactly Nyquist gets only a cosine term.
    """
    n = len(arr)
    cols = [np.ones(n)]
    kinds = []
    for f in freqs_hz:
        c, s = _phase_columns(0, n, f, rate)
        cols.append(c)
        if abs(f - rate / 2) < 1e-9 * rate:
            kinds.append(1)
        else:
            cols.append(s)
            kinds.append(2)
    d = np.column_stack(cols)
    coef = np.linalg.lstsq(d, arr, rcond=None)[0]
    out = []
    i = 1
    for k in kinds:
        if k == 1:
            out.append(complex(coef[i], 0.0))
            i += 1
        else:
            # a cos + b sin = Re((a - j b) e^{j w n})
            out.append(complex(coef[i], -coef[i + 1]))
            i += 2
    return np.array(out), float(coef[0])


def _fold(freq, rate):
    """Alias a frequency into [0, rate/2]."""
    f = math.fmod(abs(freq), rate)
    return rate - f if f > rate / 2 else f


@dataclass(frozen=True)
class HarmonicLevel:
    """One harmonic: its order, frequency, and level relative to the fundamental and in dBFS."""

    order: int
    frequency_hz: float
    level_db: float
    level_dbfs: float


@dataclass(frozen=True)
class Thd:
    """Total harmonic distortion from fitted harmonic amplitudes.

    Attributes
    ----------
    ratio_db : float
        ``20 log10(sqrt(sum of harmonic amplitudes squared) / fundamental amplitude)``.
    percent : float
    fundamental_hz, fundamental_dbfs : float
    harmonics : tuple of HarmonicLevel
        The harmonics included (those inside the band and below Nyquist).
    excluded_orders : tuple of int
        Requested orders left out because they lie above ``upper_hz`` or Nyquist.
    """

    ratio_db: float
    percent: float
    fundamental_hz: float
    fundamental_dbfs: float
    harmonics: tuple
    excluded_orders: tuple


def thd(x, *, rate_hz, harmonics=range(2, 11), upper_hz=20000.0, frequency_hz=None):
    """Total harmonic distortion from harmonics of the fitted fundamental.

    The fundamental frequency is found by a 4-parameter sine fit (unless given); then the
    fundamental, DC and every harmonic ``k * f`` inside the band are fitted jointly by least
    squares at their exact frequencies, so each harmonic's amplitude is read without window
    leakage.

    Parameters
    ----------
    x : array_like
        One channel holding a single tone.
    rate_hz : float
    harmonics : iterable of int
        Harmonic orders (>= 2) to include; orders whose frequency is above ``upper_hz`` or
        Nyquist are excluded and listed as such.
    upper_hz : float or None
        Upper band edge (None: Nyquist).
    frequency_hz : float, optional
        The fundamental, when known exactly.

    Returns
    -------
    Thd

    References
    ----------
    .. [1] IEEE Std 1241-2010, total harmonic distortion (clause 9.1, from memory).
    .. [2] AES17-2015, harmonic distortion measured within the 20 kHz band (from memory).
    """
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    orders = [int(k) for k in harmonics]
    if not orders or any(k < 2 for k in orders):
        raise ParameterError("harmonics", harmonics, "harmonic orders of 2 or more")
    fit = fit_sine(arr, rate_hz=rate, frequency_hz=frequency_hz)
    f0 = fit.frequency_hz
    top = rate / 2 if upper_hz is None else min(float(upper_hz), rate / 2)
    used = [k for k in orders if k * f0 < top]
    excluded = tuple(k for k in orders if k not in used)
    amps, _ = _fit_lines(arr, [f0] + [k * f0 for k in used], rate)
    a1 = abs(amps[0])
    levels = []
    for k, amp in zip(used, amps[1:], strict=True):
        rel = 20.0 * math.log10(abs(amp) / a1) if abs(amp) > 0 else -math.inf
        levels.append(HarmonicLevel(k, k * f0, rel, 20.0 * math.log10(max(abs(amp), 1e-300))))
    total = math.sqrt(float(np.sum(np.abs(amps[1:]) ** 2)))
    ratio = 20.0 * math.log10(total / a1) if total > 0 else -math.inf
    return Thd(
        ratio_db=ratio,
        percent=100.0 * total / a1,
        fundamental_hz=f0,
        fundamental_dbfs=20.0 * math.log10(a1),
        harmonics=tuple(levels),
        excluded_orders=excluded,
    )


def sinad_db(x, *, rate_hz, frequency_hz=None):
    """Signal to noise-and-distortion ratio over the full Nyquist band, in dB.

    ``10 log10((A**2 / 2) / mean(residual**2))`` with ``A`` and the residual from a
    4-parameter sine fit.

    References
    ----------
    .. [1] IEEE Std 1241-2010, SINAD (clause 9.2, from memory).
    """
    fit = fit_sine(x, rate_hz=rate_hz, frequency_hz=frequency_hz)
    if fit.residual_rms == 0:
        return math.inf
    return 10.0 * math.log10((fit.amplitude**2 / 2.0) / fit.residual_rms**2)


def enob_bits(x, *, rate_hz, frequency_hz=None, full_scale_range=2.0):
    """Effective number of bits from the rms noise and distortion of a sine fit.

    ``ENOB = log2(FSR / (NAD_rms * sqrt(12)))`` with ``NAD_rms`` the rms residual of a
    4-parameter sine fit and ``FSR`` the full-scale range (2.0 for ±1.0).

    References
    ----------
    .. [1] IEEE Std 1241-2010, effective number of bits (clause 9.3, from memory).
    """
    fsr = _check_positive(full_scale_range, "full_scale_range")
    fit = fit_sine(x, rate_hz=rate_hz, frequency_hz=frequency_hz)
    if fit.residual_rms == 0:
        return math.inf
    return math.log2(fsr / (fit.residual_rms * math.sqrt(12.0)))


# ---------------------------------------------------------------------------------------------
# Dynamic range and idle-channel noise
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class DynamicRange:
    """Dynamic range by the AES17 -60 dBFS method.

    Attributes
    ----------
    dynamic_range_db : float
        ``-noise_dbfs``: full scale over the band-limited, weighted noise and distortion
        measured in the presence of the -60 dBFS tone. The AES17 formula
        ``-(THD+N ratio) + 60 dB`` gives the same value when the band-limited total reads
        exactly -60.00 dBFS; in general the two differ by ``total + 60 dB`` (at most about
        1 dB, since the tone must be within ±1 dB of -60 dBFS).
    weighting : str
    tone_dbfs : float
        Fitted level of the tone.
    noise_dbfs : float
    thd_n_db : float
    fundamental_hz : float
    """

    dynamic_range_db: float
    weighting: str
    tone_dbfs: float
    noise_dbfs: float
    thd_n_db: float
    fundamental_hz: float


def dynamic_range(
    x,
    *,
    rate_hz,
    weighting="unweighted",
    upper_hz=20000.0,
    lower_hz=20.0,
    frequency_hz=None,
    lead_s=1.0,
    segment_s=1.0,
    settle_s=0.1,
):
    """Dynamic range from a -60 dBFS tone (AES17 method), in dB.

    Parameters are those of :func:`thd_plus_noise`.

    Returns
    -------
    DynamicRange

    Raises
    ------
    ParameterError
        When the fitted tone is not within ±1 dB of -60 dBFS.

    References
    ----------
    .. [1] AES17-2015, dynamic range (clause 6.4.1, from memory): the THD+N ratio with a
       -60 dBFS 997 Hz stimulus, plus 60 dB.
    """
    r = thd_plus_noise(
        x,
        rate_hz=rate_hz,
        weighting=weighting,
        upper_hz=upper_hz,
        lower_hz=lower_hz,
        frequency_hz=frequency_hz,
        lead_s=lead_s,
        segment_s=segment_s,
        settle_s=settle_s,
    )
    if not abs(r.fundamental_dbfs + 60.0) <= 1.0:
        raise ParameterError(
            "x",
            f"a tone at {r.fundamental_dbfs:.2f} dBFS",
            "a tone within ±1 dB of -60 dBFS (AES17 dynamic-range method)",
        )
    return DynamicRange(
        dynamic_range_db=-r.noise_dbfs,
        weighting=r.weighting,
        tone_dbfs=r.fundamental_dbfs,
        noise_dbfs=r.noise_dbfs,
        thd_n_db=r.ratio_db,
        fundamental_hz=r.fundamental_hz,
    )


@dataclass(frozen=True)
class NoiseLevel:
    """A band-limited, weighted noise level in dBFS."""

    noise_dbfs: float
    weighting: str
    upper_hz: float | None
    lower_hz: float | None


def idle_channel_noise(
    x, *, rate_hz, weighting="unweighted", upper_hz=20000.0, lower_hz=20.0, settle_s=0.1
):
    """Idle-channel noise: the band-limited, weighted level of a signal with no tone, in dBFS.

    Parameters
    ----------
    x : array_like
        One channel recorded with no signal applied.
    rate_hz : float
    weighting : {"unweighted", "a", "ccir"}
    upper_hz, lower_hz : float or None
    settle_s : float
        Seconds excluded at the start while the filters settle.

    Returns
    -------
    NoiseLevel

    References
    ----------
    .. [1] AES17-2015, idle channel noise / signal-to-noise ratio (clause 6.4.2, from memory).
    """
    arr = _as_signal(x)
    kind = _check_weighting(weighting)
    st = start_residual_meter(
        rate_hz=rate_hz,
        frequency_hz=None,
        weightings=(kind,),
        upper_hz=upper_hz,
        lower_hz=lower_hz,
        settle_s=settle_s,
    )
    r = read_residual_meter(update_residual_meter(arr, st))
    return NoiseLevel(r.noise_dbfs[kind], kind, upper_hz, lower_hz)


# ---------------------------------------------------------------------------------------------
# Level linearity, frequency response
# ---------------------------------------------------------------------------------------------


def _third_octave_sos(centre_hz, rate):
    """Design the 1/3-octave band-pass around ``centre_hz``.

    Sixth-order Butterworth (3rd-order prototype) with base-2 band edges ``f * 2**(±1/6)``
    (IEC 61260-1 band edges; the order is common practice).
    """
    lo, hi = centre_hz * 2.0 ** (-1.0 / 6.0), centre_hz * 2.0 ** (1.0 / 6.0)
    if hi >= rate / 2:
        raise ParameterError("frequency_hz", centre_hz, f"a 1/3-octave band below {rate / 2:g} Hz")
    return _sig.butter(3, [lo, hi], btype="bandpass", output="sos", fs=rate)


@dataclass(frozen=True)
class LevelLinearity:
    """Gain deviation against level.

    Attributes
    ----------
    levels_dbfs : tuple of float
        Stimulus levels as given.
    measured_dbfs : tuple of float
        Level of each capture in the 1/3-octave band at the test frequency.
    deviation_db : tuple of float
        ``(measured - level) - (measured_ref - level_ref)``: the change of gain relative to
        the gain at the reference level.
    reference_dbfs : float
    frequency_hz : float
    max_deviation_db : float
        Largest absolute deviation.
    """

    levels_dbfs: tuple
    measured_dbfs: tuple
    deviation_db: tuple
    reference_dbfs: float
    frequency_hz: float
    max_deviation_db: float


def level_linearity(
    captures,
    *,
    rate_hz,
    levels_dbfs,
    frequency_hz=AES17_TEST_HZ,
    reference_dbfs=None,
    settle_s=0.1,
):
    """Gain deviation against level, read in a 1/3-octave band at the test frequency.

    Parameters
    ----------
    captures : sequence of array_like
        One capture per stimulus level, each a tone at ``frequency_hz``.
    rate_hz : float
    levels_dbfs : sequence of float
        The stimulus level of each capture (e.g. 0 to -120 dBFS).
    frequency_hz : float
        Test frequency, the centre of the 1/3-octave band.
    reference_dbfs : float, optional
        The level whose gain is the reference (must be one of ``levels_dbfs``); the highest
        level by default.
    settle_s : float
        Seconds excluded at the start of each capture while the band-pass settles.

    Returns
    -------
    LevelLinearity

    References
    ----------
    .. [1] AES17-2015, level-dependent gain (gain linearity) measured through a 1/3-octave
       band-pass at the test frequency (from memory).
    .. [2] IEC 61260-1:2014, fractional-octave band edges ``f * G**(±1/6)`` (base-2 used here).
    """
    rate = _check_rate(rate_hz)
    freq = _check_frequency(frequency_hz, rate)
    levels = [float(v) for v in levels_dbfs]
    caps = list(captures)
    if len(caps) != len(levels) or not caps:
        raise ParameterError(
            "captures", f"{len(caps)} captures for {len(levels)} levels", "one capture per level"
        )
    ref = max(levels) if reference_dbfs is None else float(reference_dbfs)
    if ref not in levels:
        raise ParameterError("reference_dbfs", reference_dbfs, "one of levels_dbfs")
    sos = _third_octave_sos(freq, rate)
    skip = _settle_frames(settle_s, rate)
    measured = []
    for i, cap in enumerate(caps):
        arr = _as_signal(cap, f"captures[{i}]")
        if len(arr) <= skip:
            raise ParameterError(
                f"captures[{i}]", f"{len(arr)} frames", f"more than {skip} frames (settling)"
            )
        y = _sig.sosfilt(sos, arr)[skip:]
        measured.append(power_to_dbfs(float(np.mean(y * y))))
    gain_ref = measured[levels.index(ref)] - ref
    dev = tuple(m - lv - gain_ref for m, lv in zip(measured, levels, strict=True))
    return LevelLinearity(
        levels_dbfs=tuple(levels),
        measured_dbfs=tuple(measured),
        deviation_db=dev,
        reference_dbfs=ref,
        frequency_hz=freq,
        max_deviation_db=max(abs(d) for d in dev),
    )


@dataclass(frozen=True)
class FrequencyResponse:
    """Gain against frequency relative to the gain at the reference frequency.

    Attributes
    ----------
    frequency_hz : tuple of float
    gain_db : tuple of float
        Response at each frequency relative to the response at ``reference_hz``.
    reference_hz : float
    ripple_db : float
        Peak-to-peak spread of ``gain_db`` over the frequencies within
        ``[lower_hz, upper_hz]``.
    lower_hz, upper_hz : float
    """

    frequency_hz: tuple
    gain_db: tuple
    reference_hz: float
    ripple_db: float
    lower_hz: float
    upper_hz: float


def _response_result(freqs, amps_out, amps_in, reference_hz, lower_hz, upper_hz):
    freqs = [float(f) for f in freqs]
    if reference_hz not in freqs:
        raise ParameterError("reference_hz", reference_hz, "one of frequencies_hz")
    gains = [20.0 * math.log10(o / i) for o, i in zip(amps_out, amps_in, strict=True)]
    g_ref = gains[freqs.index(reference_hz)]
    rel = tuple(g - g_ref for g in gains)
    inband = [g for f, g in zip(freqs, rel, strict=True) if lower_hz <= f <= upper_hz]
    ripple = (max(inband) - min(inband)) if inband else 0.0
    return FrequencyResponse(tuple(freqs), rel, float(reference_hz), ripple, lower_hz, upper_hz)


def _check_amplitudes(input_amplitudes, count):
    if input_amplitudes is None:
        return [1.0] * count
    amps = [float(a) for a in np.atleast_1d(input_amplitudes)]
    if len(amps) == 1:
        amps = amps * count
    if len(amps) != count or not all(a > 0 for a in amps):
        raise ParameterError(
            "input_amplitudes", input_amplitudes, f"one positive amplitude or {count} of them"
        )
    return amps


def frequency_response(
    x,
    *,
    rate_hz,
    frequencies_hz,
    input_amplitudes=None,
    reference_hz=AES17_TEST_HZ,
    lower_hz=20.0,
    upper_hz=20000.0,
    settle_s=0.1,
):
    """Frequency response from a multitone capture, relative to the reference frequency.

    All tone amplitudes are fitted jointly by least squares at their exact frequencies (with
    DC), after ``settle_s`` seconds; dividing by the stimulus amplitudes gives each tone's
    gain, reported relative to the gain at ``reference_hz``.

    Parameters
    ----------
    x : array_like
        One channel holding the response to a multitone.
    rate_hz : float
    frequencies_hz : sequence of float
        The tone frequencies (``reference_hz`` among them), all distinct.
    input_amplitudes : float or sequence of float, optional
        Stimulus amplitude of each tone (all equal by default).
    reference_hz : float
        The reference frequency (AES17: 997 Hz).
    lower_hz, upper_hz : float
        The band over which the ripple is read.
    settle_s : float
        Seconds skipped at the start.

    Returns
    -------
    FrequencyResponse

    References
    ----------
    .. [1] AES17-2015, frequency response relative to the 997 Hz response (from memory).
    """
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    freqs = [_check_frequency(float(f), rate, "frequencies_hz") for f in frequencies_hz]
    if len(set(freqs)) != len(freqs) or not freqs:
        raise ParameterError("frequencies_hz", frequencies_hz, "distinct tone frequencies")
    amps_in = _check_amplitudes(input_amplitudes, len(freqs))
    skip = _settle_frames(settle_s, rate)
    if len(arr) - skip < 4 * len(freqs) + 16:
        raise ParameterError("x", f"{len(arr)} frames", "a longer capture for this many tones")
    amps, _ = _fit_lines(arr[skip:], freqs, rate)
    return _response_result(freqs, np.abs(amps), amps_in, float(reference_hz), lower_hz, upper_hz)


def stepped_frequency_response(
    captures,
    *,
    rate_hz,
    frequencies_hz,
    input_amplitudes=None,
    reference_hz=AES17_TEST_HZ,
    lower_hz=20.0,
    upper_hz=20000.0,
    settle_s=0.1,
):
    """Frequency response from one capture per frequency (a stepped sine).

    Each capture's amplitude is a 3-parameter sine fit at its stated frequency after
    ``settle_s`` seconds. Parameters and result as :func:`frequency_response`, with
    ``captures[i]`` the response to a sine at ``frequencies_hz[i]``.

    References
    ----------
    .. [1] AES17-2015, frequency response relative to the 997 Hz response (from memory).
    """
    rate = _check_rate(rate_hz)
    freqs = [_check_frequency(float(f), rate, "frequencies_hz") for f in frequencies_hz]
    caps = list(captures)
    if len(caps) != len(freqs) or not caps:
        raise ParameterError(
            "captures", f"{len(caps)} captures for {len(freqs)} frequencies", "one per frequency"
        )
    amps_in = _check_amplitudes(input_amplitudes, len(freqs))
    skip = _settle_frames(settle_s, rate)
    amps = []
    for i, (cap, f) in enumerate(zip(caps, freqs, strict=True)):
        arr = _as_signal(cap, f"captures[{i}]")
        if len(arr) - skip < 16:
            raise ParameterError(f"captures[{i}]", f"{len(arr)} frames", f"more than {skip + 16}")
        fit = fit_sine(arr[skip:], rate_hz=rate, frequency_hz=f, four_parameter=False)
        amps.append(fit.amplitude)
    return _response_result(freqs, amps, amps_in, float(reference_hz), lower_hz, upper_hz)


# ---------------------------------------------------------------------------------------------
# Intermodulation
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class IntermodProduct:
    """One intermodulation product: its name, frequency and level relative to the reference."""

    name: str
    frequency_hz: float
    level_db: float


@dataclass(frozen=True)
class Intermodulation:
    """A twin-tone intermodulation measurement.

    Attributes
    ----------
    method : str
        ``"smpte"`` or ``"difference-frequency"``.
    ratio_db, percent : float
        The total: rss of the second- and third-order parts.
    second_order_db, third_order_db : float
        The second- and third-order parts alone (see the measuring function).
    products : tuple of IntermodProduct
        Each product's level relative to the reference amplitude.
    f1_hz, f2_hz : float
    f1_dbfs, f2_dbfs : float
        Fitted amplitude of each tone as the level of a sine of that amplitude.
    peak_dbfs : float
        ``20 log10(U1 + U2)``: the combined peak of the two tones relative to full scale.
    convention : str
        How the ratio and the levels are defined.
    """

    method: str
    ratio_db: float
    percent: float
    second_order_db: float
    third_order_db: float
    products: tuple
    f1_hz: float
    f2_hz: float
    f1_dbfs: float
    f2_dbfs: float
    peak_dbfs: float
    convention: str


def _db(ratio):
    return 20.0 * math.log10(ratio) if ratio > 0 else -math.inf


def _intermod_lines(f1, f2, rate, extra):
    """Folded frequencies of every product |m f1 + n f2| with 1 <= |m|+|n| <= 3, plus extra."""
    lines = []
    for m in range(-3, 4):
        for k in range(-3, 4):
            if 1 <= abs(m) + abs(k) <= 3:
                lines.append(_fold(m * f1 + k * f2, rate))
    lines.extend(_fold(f, rate) for f in extra)
    out = []
    for f in sorted(lines):
        if f > 1e-9 * rate and not any(abs(f - g) < 1e-6 for g in out):
            out.append(f)
    return out


def _line_amplitudes(arr, rate, f1, f2, wanted):
    lines = _intermod_lines(f1, f2, rate, wanted)
    amps, _ = _fit_lines(arr, lines, rate)

    def amp(f):
        g = _fold(f, rate)
        i = int(np.argmin([abs(g - h) for h in lines]))
        return float(abs(amps[i]))

    return amp


def _twin_capture(x, rate_hz, f1_hz, f2_hz, settle_s):
    """A twin-tone capture checked and trimmed: ``(samples after settle_s, rate, f1, f2)``."""
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    arr = arr[_settle_frames(settle_s, rate) :]
    f1 = _check_frequency(f1_hz, rate, "f1_hz")
    f2 = _check_frequency(f2_hz, rate, "f2_hz")
    if not f1 < f2:
        raise ParameterError("f1_hz, f2_hz", (f1_hz, f2_hz), "f1_hz < f2_hz")
    # the fit separates lines 1/T apart; ask for a few times that
    if len(arr) * min(f1, f2 - f1) / rate < 4:
        raise ParameterError("x", f"{len(arr)} frames", "a record of at least 4 cycles of f1")
    return arr, rate, f1, f2


def imd_smpte(x, *, rate_hz, f1_hz=60.0, f2_hz=7000.0, orders=(1, 2, 3), settle_s=0.0):
    """SMPTE intermodulation distortion (60 Hz + 7 kHz at 4:1).

    The sidebands ``f2 ± n f1`` are fitted at their exact frequencies (jointly with both tones
    and every product up to third order); the two sidebands of each order ``n`` are added
    linearly, the orders are combined as the root of the sum of squares, and the result is
    relative to the amplitude of the f2 tone. ``second_order_db`` is the ``n = 1`` pair,
    ``third_order_db`` the ``n = 2`` pair.

    Parameters
    ----------
    x : array_like
        One channel holding the twin tone.
    rate_hz : float
    f1_hz, f2_hz : float
        The low and the high tone.
    orders : sequence of int
        Sideband orders ``n`` to include.
    settle_s : float
        Seconds skipped at the start.

    Returns
    -------
    Intermodulation

    References
    ----------
    .. [1] SMPTE RP 120, measurement of intermodulation distortion (60 Hz and 7 kHz, 4:1),
       and IEC 60268-3, modulation distortion (from memory).
    """
    arr, rate, f1, f2 = _twin_capture(x, rate_hz, f1_hz, f2_hz, settle_s)
    ords = [int(n) for n in orders]
    if not ords or any(n < 1 for n in ords):
        raise ParameterError("orders", orders, "sideband orders of 1 or more")
    wanted = [f2 + s * n * f1 for n in ords for s in (-1, 1)]
    amp = _line_amplitudes(arr, rate, f1, f2, wanted)
    u1, u2 = amp(f1), amp(f2)
    products, per_order = [], {}
    for n in ords:
        lo, hi = amp(f2 - n * f1), amp(f2 + n * f1)
        per_order[n] = (lo + hi) / u2
        products.append(IntermodProduct(f"f2-{n}f1", f2 - n * f1, _db(lo / u2)))
        products.append(IntermodProduct(f"f2+{n}f1", f2 + n * f1, _db(hi / u2)))
    total = math.sqrt(sum(v * v for v in per_order.values()))
    return Intermodulation(
        method="smpte",
        ratio_db=_db(total),
        percent=100.0 * total,
        second_order_db=_db(per_order.get(1, 0.0)),
        third_order_db=_db(per_order.get(2, 0.0)),
        products=tuple(products),
        f1_hz=f1,
        f2_hz=f2,
        f1_dbfs=_db(u1),
        f2_dbfs=_db(u2),
        peak_dbfs=_db(u1 + u2),
        convention=(
            "sidebands f2±n*f1 of each order added linearly, orders combined rms, relative to "
            "the f2 amplitude; peak_dbfs is the combined peak U1+U2 relative to full scale"
        ),
    )


def imd_difference_frequency(x, *, rate_hz, f1_hz=19000.0, f2_hz=20000.0, settle_s=0.0):
    """Difference-frequency distortion (19 kHz + 20 kHz at 1:1).

    The second-order product at ``f2 - f1`` and the third-order products at ``2 f1 - f2``
    and ``2 f2 - f1`` are fitted at their exact frequencies; ``second_order_db`` is
    ``U(f2-f1) / (2 U(f2))``, ``third_order_db`` is ``(U(2f1-f2) + U(2f2-f1)) / (2 U(f2))``,
    and the total is their rss. A product above Nyquist is left out (and not listed).

    Parameters
    ----------
    x : array_like
        One channel holding the twin tone.
    rate_hz : float
    f1_hz, f2_hz : float
    settle_s : float
        Seconds skipped at the start.

    Returns
    -------
    Intermodulation

    References
    ----------
    .. [1] IEC 60268-3, difference-frequency distortion, products expressed relative to
       twice the amplitude of f2 (from memory).
    """
    arr, rate, f1, f2 = _twin_capture(x, rate_hz, f1_hz, f2_hz, settle_s)
    nyq = rate / 2
    cands = [("f2-f1", f2 - f1, 2), ("2f1-f2", 2 * f1 - f2, 3), ("2f2-f1", 2 * f2 - f1, 3)]
    cands = [c for c in cands if 0 < c[1] < nyq]
    amp = _line_amplitudes(arr, rate, f1, f2, [c[1] for c in cands])
    u1, u2 = amp(f1), amp(f2)
    ref = 2.0 * u2
    d2 = sum(amp(f) for _, f, order in cands if order == 2) / ref
    d3 = sum(amp(f) for _, f, order in cands if order == 3) / ref
    total = math.hypot(d2, d3)
    return Intermodulation(
        method="difference-frequency",
        ratio_db=_db(total),
        percent=100.0 * total,
        second_order_db=_db(d2),
        third_order_db=_db(d3),
        products=tuple(IntermodProduct(name, f, _db(amp(f) / ref)) for name, f, _ in cands),
        f1_hz=f1,
        f2_hz=f2,
        f1_dbfs=_db(u1),
        f2_dbfs=_db(u2),
        peak_dbfs=_db(u1 + u2),
        convention=(
            "products relative to 2*U(f2) (the sum of the two equal tone amplitudes); third-"
            "order products added linearly; peak_dbfs is the combined peak U1+U2"
        ),
    )


# ---------------------------------------------------------------------------------------------
# Out-of-band power, noise modulation
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BandPower:
    """Power in a frequency band, in dBFS."""

    power_dbfs: float
    lower_hz: float
    upper_hz: float


def out_of_band_power_dbfs(x, *, rate_hz, lower_hz=20000.0, upper_hz=None, resolution_hz=None):
    """Power between ``lower_hz`` and ``upper_hz`` (default Nyquist), in dBFS.

    Read from :func:`averaged_spectrum` (4-term Blackman-Harris window) by summing the bins
    of the band, so noise and tones both count at their power. Meant for oversampled signals,
    where the noise shaper pushes its noise above the audio band.

    Parameters
    ----------
    x : array_like
        One channel.
    rate_hz : float
    lower_hz, upper_hz : float
        Band edges; ``upper_hz=None`` means Nyquist.
    resolution_hz : float, optional
        Bin spacing, passed to :func:`averaged_spectrum`.

    Returns
    -------
    BandPower
    """
    rate = _check_rate(rate_hz)
    hi = rate / 2 if upper_hz is None else float(upper_hz)
    spec = averaged_spectrum(x, rate_hz=rate, resolution_hz=resolution_hz)
    return BandPower(spec.band_noise_dbfs(float(lower_hz), hi), float(lower_hz), hi)


@dataclass(frozen=True)
class NoiseModulation:
    """Noise floor against tone level.

    Attributes
    ----------
    tone_dbfs : tuple of float
        Fitted tone level of each capture.
    noise_dbfs : tuple of float
        Band-limited, weighted noise with the fundamental removed, per capture.
    spread_db : float
        ``max(noise_dbfs) - min(noise_dbfs)``.
    weighting : str
    """

    tone_dbfs: tuple
    noise_dbfs: tuple
    spread_db: float
    weighting: str


def noise_modulation(
    captures,
    *,
    rate_hz,
    weighting="a",
    frequency_hz=None,
    upper_hz=20000.0,
    lower_hz=20.0,
    lead_s=1.0,
    segment_s=1.0,
    settle_s=0.1,
):
    """Noise modulation: the weighted noise floor, fundamental removed, across tone levels.

    Each capture holds the same tone at a different level (for example 0 to -90 dBFS in
    10 dB steps). Its noise is read as by :func:`thd_plus_noise` (residual after a sine fit,
    band-limited and weighted); the spread of those noise levels is the result.

    Parameters
    ----------
    captures : sequence of array_like
    rate_hz : float
    weighting : {"unweighted", "a", "ccir"}
    frequency_hz : float, optional
        The tone, when known exactly; otherwise fitted on each capture.
    upper_hz, lower_hz, lead_s, segment_s, settle_s
        As in :func:`thd_plus_noise`.

    Returns
    -------
    NoiseModulation

    References
    ----------
    .. [1] S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy, "Quantization and dither: a
       theoretical survey", J. Audio Eng. Soc. 40(5), 1992 (noise modulation and its
       removal by TPDF dither).
    """
    caps = list(captures)
    if not caps:
        raise ParameterError("captures", "no captures", "one capture per tone level")
    tones, noise = [], []
    for i, cap in enumerate(caps):
        try:
            r = thd_plus_noise(
                cap,
                rate_hz=rate_hz,
                weighting=weighting,
                upper_hz=upper_hz,
                lower_hz=lower_hz,
                frequency_hz=frequency_hz,
                lead_s=lead_s,
                segment_s=segment_s,
                settle_s=settle_s,
            )
        except ParameterError as exc:
            raise ParameterError(f"captures[{i}]", exc.value, exc.expected) from None
        tones.append(r.fundamental_dbfs)
        noise.append(r.noise_dbfs)
    return NoiseModulation(tuple(tones), tuple(noise), max(noise) - min(noise), r.weighting)
