"""The residual meter: band-limited, weighted noise with the fundamental removed, block by block.

The fundamental is removed by a least-squares sine fit (IEEE Std 1057 / 1241) rather than by
an analog-style notch; the residual is noise plus distortion. The meter has a block form
(:func:`start_residual_meter`, :func:`update_residual_meter`, :func:`read_residual_meter`) for
signals too long to hold in memory; the one-shot functions in :mod:`audiodsm.measure.tone`
and :mod:`audiodsm.measure.noise` run the same code on a single block, so both give the same
numbers.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.measure.sine_fit import _check_frequency, _check_positive, _phase_columns
from audiodsm.measure.spectrum import _as_signal, _check_rate, power_to_dbfs

__all__ = [
    "WEIGHTINGS",
    "ResidualMeterState",
    "ResidualReadings",
    "start_residual_meter",
    "update_residual_meter",
    "read_residual_meter",
]

#: The noise weightings every noise measurement accepts.
WEIGHTINGS = ("unweighted", "a", "ccir")
#: The AES17 test frequency (a prime number of hertz).


def _check_weighting(weighting, name="weighting"):
    if not isinstance(weighting, str) or weighting.lower() not in WEIGHTINGS:
        raise ParameterError(name, weighting, f"one of {', '.join(WEIGHTINGS)}")
    return weighting.lower()


def _dot(a, b):
    """Inner product of two 1-D arrays without BLAS.

    BLAS may split a long dot product across threads, which is slow on a busy machine and
    makes the rounding depend on the thread count; einsum's loop does neither.
    """
    return float(np.einsum("i,i->", a, b))


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
    if c.flags.writeable:  # a long pair is fresh; a short one comes read-only from a cache
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
