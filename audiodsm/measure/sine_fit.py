"""Least-squares sine fits (IEEE Std 1057 / 1241) and the checks the converter measurements share.

Every measurement in :mod:`audiodsm.measure` that removes or reads a tone builds on the fits
here: :func:`fit_sine` (3- or 4-parameter) for one tone, and a joint fit of DC and sinusoids
at fixed frequencies for harmonics, intermodulation products and multitones.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import signal as _sig

from audiodsm.errors import ParameterError
from audiodsm.measure.spectrum import _as_signal, _check_rate

__all__ = [
    "SineFit",
    "interpolated_peak_hz",
    "fit_sine",
]

_TWO_PI = 2.0 * math.pi


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


#: Longest column pair :func:`_phase_columns` remembers (2 MB a pair), and how many pairs.
_REMEMBERED_COLUMNS_MAX = 1 << 17
_REMEMBERED_PAIRS = 48


def _phase_columns(start_index, count, freq_hz, rate_hz):
    """Cosine and sine of 2*pi*f*n/rate for n = start_index .. start_index+count-1.

    The phase is reduced to whole cycles in float64 before the trigonometry, so indices in
    the tens of millions keep the phase accurate to about 1e-9 rad.

    Pairs up to ``_REMEMBERED_COLUMNS_MAX`` long are remembered (read-only arrays): the
    battery fits the same tone and harmonics on captures of the same length again and again
    (every level of a sweep), and the columns are the same bits each time.
    """
    if count <= _REMEMBERED_COLUMNS_MAX:
        return _remembered_columns(int(start_index), int(count), float(freq_hz), float(rate_hz))
    return _columns(start_index, count, freq_hz, rate_hz)


@functools.lru_cache(maxsize=_REMEMBERED_PAIRS)
def _remembered_columns(start_index, count, freq_hz, rate_hz):
    c, s = _columns(start_index, count, freq_hz, rate_hz)
    c.setflags(write=False)
    s.setflags(write=False)
    return c, s


def _columns(start_index, count, freq_hz, rate_hz):
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
