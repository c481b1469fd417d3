"""Levels and averaged spectra in dBFS, as AES17 practice reads them.

Two things live here:

* :func:`level_dbfs`, the rms level of a signal relative to a full-scale sine (AES17);
* :func:`averaged_spectrum`, a Welch-averaged, windowed periodogram whose bins are scaled so
  that tones and noise both read directly in dBFS, and its streaming form
  :func:`accumulate_spectrum` for signals too long to hold in memory.

Full scale is ±1.0; a full-scale sine has mean-square 1/2, and that is 0 dBFS.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field, replace

import numpy as np

from audiodsm.errors import ParameterError

__all__ = [
    "FULL_SCALE_SINE_POWER",
    "NUMERIC_FLOOR_DBFS",
    "level_dbfs",
    "power_to_dbfs",
    "Spectrum",
    "SpectrumState",
    "averaged_spectrum",
    "accumulate_spectrum",
]

#: Mean-square value of a full-scale sine (peak 1.0): the power that reads 0 dBFS.
FULL_SCALE_SINE_POWER = 0.5

#: The lowest level a simulated signal can honestly carry. The simulation computes in float64,
#: whose rounding noise on a full-scale signal lies near 20 log10(2**-53) = -319 dB (IEEE 754
#: double precision). A noise reading below this floor says only that the output was digitally
#: silent (e.g. an undithered loop idling in a pattern with no in-band power), so readings are
#: reported at the floor, with a note, never as a number of no physical meaning.
NUMERIC_FLOOR_DBFS = -300.0

_MIN_SEGMENT = 64


def power_to_dbfs(power):
    """Convert a mean-square value (full scale = ±1.0) to dBFS.

    Parameters
    ----------
    power : float or array_like
        Mean-square value(s), non-negative.

    Returns
    -------
    float or numpy.ndarray
        ``10 log10(power / 0.5)``; ``-inf`` where the power is zero.
    """
    p = np.asarray(power, dtype=float)
    with np.errstate(divide="ignore"):
        out = 10.0 * np.log10(p / FULL_SCALE_SINE_POWER)
    return float(out) if out.ndim == 0 else out


def _as_signal(x, name="x", *, allow_2d=False):
    arr = np.asarray(x, dtype=float)
    if arr.ndim == 0 or arr.ndim > (2 if allow_2d else 1):
        shape = "(frames,) or (frames, channels)" if allow_2d else "(frames,)"
        raise ParameterError(name, f"array of shape {arr.shape}", f"a {shape} array")
    if arr.shape[0] == 0:
        raise ParameterError(name, "empty array", "at least one frame")
    if not np.all(np.isfinite(arr)):
        raise ParameterError(name, "array with NaN or Inf", "finite samples")
    return arr


def _check_rate(rate_hz):
    ok = isinstance(rate_hz, int | float | np.integer | np.floating)
    if not (ok and math.isfinite(rate_hz) and rate_hz > 0):
        raise ParameterError("rate_hz", rate_hz, "a positive sample rate in Hz")
    return float(rate_hz)


def level_dbfs(x):
    """Rms level of a signal relative to a full-scale sine, in dBFS.

    Parameters
    ----------
    x : array_like
        Samples, shape ``(frames,)`` or ``(frames, channels)``; full scale is ±1.0.

    Returns
    -------
    float or numpy.ndarray
        ``20 log10(rms(x) * sqrt(2))``: a full-scale sine reads 0.00 dBFS and a full-scale
        square wave +3.01 dBFS. One value per channel for 2-D input; ``-inf`` for silence.

    References
    ----------
    .. [1] AES17-2015, "AES standard method for digital audio engineering - Measurement of
       digital audio equipment", Audio Engineering Society, definition of dBFS (clause 3,
       from memory).
    """
    arr = _as_signal(x, allow_2d=True)
    return power_to_dbfs(np.mean(arr * arr, axis=0))


# ---------------------------------------------------------------------------------------------
# Windows
# ---------------------------------------------------------------------------------------------


def _window(window, frames):
    """The periodic window as a read-only array (cached per name and length)."""
    try:
        return _cached_window(window, int(frames))
    except TypeError:  # an unhashable window spec: build it without the cache
        return _make_window(window, int(frames))


@functools.lru_cache(maxsize=16)
def _cached_window(window, frames):
    return _make_window(window, frames)


def _make_window(window, frames):
    try:
        from scipy import signal as _sig  # imported where a window is made

        w = _sig.get_window(window, frames, fftbins=True)
    except (ValueError, TypeError) as exc:
        raise ParameterError(
            "window", window, f"a window name scipy.signal accepts ({exc})"
        ) from None
    w = np.array(w, dtype=float)
    w.setflags(write=False)
    return w


def _main_lobe_half_width(w):
    """Half-width of the window's main lobe in whole bins.

    The first local minimum of the window's transform lying 40 dB or more below the peak
    (ripple on a flat top is not a null), found on a 64x zero-padded DFT, rounded up.
    """
    pad = 64
    mag = np.abs(np.fft.rfft(w, len(w) * pad))
    deep = mag < mag[0] * 1e-2
    is_min = np.zeros_like(deep)
    is_min[1:-1] = (mag[1:-1] <= mag[:-2]) & (mag[1:-1] <= mag[2:])
    hits = np.nonzero(deep & is_min)[0]
    first_min = int(hits[0]) if hits.size else len(mag) - 1
    return max(1, math.ceil(first_min / pad - 1e-9))


# ---------------------------------------------------------------------------------------------
# Spectrum
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Spectrum:
    """An averaged one-sided power spectrum in full-scale units.

    Attributes
    ----------
    freq_hz : numpy.ndarray
        Bin centre frequencies, 0 .. rate/2.
    power : numpy.ndarray
        Mean-square power in each bin (full scale ±1.0): the power spectral density times
        the bin spacing. A band's noise power is the plain sum of its bins; a tone's power is
        the sum over its window main lobe. ``power_to_dbfs`` turns either into dBFS.
    rate_hz : float
        Sample rate.
    resolution_hz : float
        Bin spacing, ``rate_hz / segment_frames``.
    enbw_hz : float
        Equivalent noise bandwidth of the window, ``rate * sum(w**2) / sum(w)**2``.
    window : str
        The window's name.
    segment_frames : int
        Frames per averaged segment (50 % overlap).
    n_averages : int
        Number of segments averaged.
    main_lobe_bins : int
        Half-width of the window main lobe in bins (the span summed for a tone).
    """

    freq_hz: np.ndarray
    power: np.ndarray
    rate_hz: float
    resolution_hz: float
    enbw_hz: float
    window: str
    segment_frames: int
    n_averages: int
    main_lobe_bins: int

    def bins_dbfs(self):
        """Each bin's power in dBFS (a band's noise is the sum of bins, not their mean)."""
        return power_to_dbfs(self.power)

    def tone_scaled_dbfs(self):
        """Each bin in dBFS scaled so that a tone centred on a bin reads its level there.

        This multiplies the bin power by the ENBW in bins; use it to label plots where tones
        are read off the peaks. Noise levels are not read this way.
        """
        return power_to_dbfs(self.power * (self.enbw_hz / self.resolution_hz))

    def tone_dbfs(self, freq_hz):
        """Level of a tone near ``freq_hz`` in dBFS: the sum of the bins of its main lobe.

        Parameters
        ----------
        freq_hz : float
            The tone's frequency; bins within ``main_lobe_bins`` of it are summed.

        Returns
        -------
        float
            The tone's level in dBFS (tone plus the noise in the same bins).
        """
        f = float(freq_hz)
        if not (0.0 <= f <= self.rate_hz / 2):
            raise ParameterError("freq_hz", freq_hz, f"a frequency from 0 to {self.rate_hz / 2}")
        centre = f / self.resolution_hz
        lo = max(0, math.ceil(centre - self.main_lobe_bins))
        hi = min(len(self.power) - 1, math.floor(centre + self.main_lobe_bins))
        return power_to_dbfs(float(np.sum(self.power[lo : hi + 1])))

    def band_power(self, lower_hz, upper_hz, *, weighting="unweighted"):
        """Mean-square power between two frequencies, optionally weighted.

        Bins straddling an edge count in proportion to the part of their width inside the
        band. With a weighting, each bin is multiplied by the weighting's power gain
        ``10**(weighting_db(f)/10)`` at the bin centre.

        Parameters
        ----------
        lower_hz, upper_hz : float
            Band edges, ``0 <= lower_hz < upper_hz <= rate/2``.
        weighting : {"unweighted", "a", "ccir"}
            Noise weighting (see ``audiodsm.measure.weighting``).

        Returns
        -------
        float
            Mean-square power in full-scale units.
        """
        lo, hi = float(lower_hz), float(upper_hz)
        nyq = self.rate_hz / 2
        if not (0.0 <= lo < hi <= nyq * (1 + 1e-12)):
            raise ParameterError(
                "lower_hz, upper_hz", (lower_hz, upper_hz), f"0 <= lower < upper <= {nyq}"
            )
        df = self.resolution_hz
        left = np.maximum(self.freq_hz - df / 2, 0.0)
        right = np.minimum(self.freq_hz + df / 2, nyq)
        width = right - left
        overlap = np.clip(np.minimum(right, hi) - np.maximum(left, lo), 0.0, None)
        frac = np.divide(overlap, width, out=np.zeros_like(overlap), where=width > 0)
        from audiodsm.measure.weighting import weighting_power_gain

        gain = weighting_power_gain(self.freq_hz, weighting)
        return float(np.sum(self.power * frac * gain))

    def band_noise_dbfs(self, lower_hz, upper_hz, *, weighting="unweighted"):
        """Noise power between two frequencies in dBFS (see :meth:`band_power`)."""
        return power_to_dbfs(self.band_power(lower_hz, upper_hz, weighting=weighting))


@dataclass(frozen=True, eq=False)
class SpectrumState:
    """Running sum of windowed periodograms of one channel, carried between blocks (a value).

    Segments are transformed in fixed groups counted from the start of the signal (see
    :func:`accumulate_spectrum`); frames of a group not yet complete wait in ``pending``.

    Attributes
    ----------
    rate_hz : float
    window : str
    segment_frames : int
    detrend : bool
    power_sum : numpy.ndarray
        Sum of the squared FFT magnitudes of the segments in completed groups (read-only,
        not yet scaled).
    n_averages : int
        Segments in ``power_sum``.
    pending : numpy.ndarray
        Frames not yet part of a completed group (read-only).
    """

    rate_hz: float
    window: str
    segment_frames: int
    detrend: bool
    power_sum: np.ndarray = field(repr=False)
    n_averages: int
    pending: np.ndarray = field(repr=False)

    def _totals(self):
        """``(power_sum, n_averages)`` including the complete segments still pending."""
        n = self.segment_frames
        count = _segment_count(self.pending.shape[0], n)
        if count == 0:
            return self.power_sum, self.n_averages
        part = _segments_power(self.pending, count, n, self.window, self.detrend)
        return self.power_sum + part, self.n_averages + count

    def merged(self, other):
        """Pool with the state of a separate stretch of the same channel.

        No segment spans the gap between the two stretches; frames that did not fill a
        segment in either are dropped.

        Parameters
        ----------
        other : SpectrumState
            Set up with the same rate, window, segment length and detrending.

        Returns
        -------
        SpectrumState
        """
        settings = (self.segment_frames, self.rate_hz, self.window, self.detrend)
        if not isinstance(other, SpectrumState) or settings != (
            other.segment_frames,
            other.rate_hz,
            other.window,
            other.detrend,
        ):
            raise ParameterError("other", "a differently set-up spectrum", "the same settings")
        a_sum, a_count = self._totals()
        b_sum, b_count = other._totals()
        total = a_sum + b_sum
        total.setflags(write=False)
        return replace(self, power_sum=total, n_averages=a_count + b_count, pending=_EMPTY)

    def spectrum(self):
        """The averaged spectrum of everything accumulated so far.

        Raises
        ------
        ParameterError
            When no complete segment has been seen yet.
        """
        power_sum, count = self._totals()
        n = self.segment_frames
        if count == 0:
            raise ParameterError(
                "x",
                f"{len(self.pending)} frames",
                f"at least {n} frames for one segment",
            )
        w = _window(self.window, n)
        energy = float(np.sum(w * w))
        # density scaling times the bin spacing: |X|^2 / (sum(w^2) * n) per bin, doubled
        # for the one-sided spectrum except at DC and (even n) Nyquist.
        scale = np.full(n // 2 + 1, 2.0 / (energy * n))
        scale[0] /= 2.0
        scale[-1] /= 2.0
        return Spectrum(
            freq_hz=np.arange(n // 2 + 1) * (self.rate_hz / n),
            power=power_sum * scale / count,
            rate_hz=self.rate_hz,
            resolution_hz=self.rate_hz / n,
            enbw_hz=self.rate_hz * energy / float(np.sum(w)) ** 2,
            window=str(self.window),
            segment_frames=n,
            n_averages=count,
            main_lobe_bins=_main_lobe_half_width(w),
        )


_EMPTY = np.zeros(0)
_EMPTY.setflags(write=False)


def _segment_count(n_frames, segment_frames):
    """Complete half-overlapping segments in ``n_frames`` frames."""
    hop = segment_frames // 2
    return 0 if n_frames < segment_frames else 1 + (n_frames - segment_frames) // hop


def _group_segments(segment_frames):
    """Segments per FFT batch: bounds the temporary arrays to about 2**19 samples."""
    return max(1, (1 << 19) // segment_frames)


def _segments_power(data, count, n, window, detrend):
    """Sum of ``|FFT|**2`` of the first ``count`` windowed, half-overlapping segments."""
    segs = np.lib.stride_tricks.sliding_window_view(data, n)[:: n // 2][:count]
    if detrend:
        segs = segs - segs.mean(axis=1, keepdims=True)
    spec = np.fft.rfft(segs * _window(window, n), axis=1)
    return np.sum(spec.real**2 + spec.imag**2, axis=0)


def _segment_frames_for(n_frames, rate_hz, resolution_hz, segments):
    if resolution_hz is not None:
        if not (isinstance(resolution_hz, int | float) and 0 < resolution_hz < rate_hz / 2):
            raise ParameterError("resolution_hz", resolution_hz, f"a value in (0, {rate_hz / 2})")
        return max(_MIN_SEGMENT, 1 << math.ceil(math.log2(rate_hz / resolution_hz - 1e-9)))
    if not (isinstance(segments, int) and segments >= 1):
        raise ParameterError("segments", segments, "a whole number of averages >= 1")
    # the longest power-of-two segment giving at least `segments` averages at 50 % overlap
    best = _MIN_SEGMENT
    n = _MIN_SEGMENT
    while n <= n_frames:
        if 1 + (n_frames - n) // (n // 2) >= segments:
            best = n
        n *= 2
    return best


def accumulate_spectrum(
    x,
    *,
    rate_hz,
    state=None,
    resolution_hz=None,
    segment_frames=None,
    window="blackmanharris",
    detrend=True,
):
    """Add a block of samples to a running Welch average.

    Segments of ``segment_frames`` frames with 50 % overlap are taken from the concatenation
    of all blocks and their FFTs taken in fixed groups of segments (about 2**19 samples,
    counted from the start of the signal), so the sums do not depend on how the signal was
    cut into blocks: block-wise equals one call, bit for bit. Separate stretches of one
    channel can be pooled with :meth:`SpectrumState.merged`.

    Parameters
    ----------
    x : array_like
        One channel, shape ``(frames,)``. May be shorter than a segment.
    rate_hz : float
        Sample rate.
    state : SpectrumState, optional
        The value returned by the previous call; ``None`` to start.
    resolution_hz : float, optional
        Wanted bin spacing: the segment is the next power of two of ``rate_hz/resolution_hz``
        frames. Used only when starting.
    segment_frames : int, optional
        Explicit segment length (overrides ``resolution_hz``). Used only when starting.
    window : str
        A window name for ``scipy.signal.get_window`` (periodic form).
    detrend : bool
        Remove each segment's mean before windowing (as ``scipy.signal.welch`` does).

    Returns
    -------
    SpectrumState
        Call ``.spectrum()`` on it for the averaged :class:`Spectrum`.

    References
    ----------
    .. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power
       spectra", IEEE Trans. Audio Electroacoust. AU-15(2), 1967, pp. 70-73.
    """
    arr = _as_signal(x) if np.size(x) else np.zeros(0)
    if state is None:
        rate = _check_rate(rate_hz)
        if segment_frames is None:
            if resolution_hz is None:
                raise ParameterError(
                    "resolution_hz", None, "a bin spacing in Hz (or segment_frames) when streaming"
                )
            segment_frames = _segment_frames_for(0, rate, resolution_hz, 1)
        if isinstance(segment_frames, bool) or not (
            isinstance(segment_frames, int | np.integer) and segment_frames >= _MIN_SEGMENT
        ):
            raise ParameterError("segment_frames", segment_frames, f"an integer >= {_MIN_SEGMENT}")
        if segment_frames % 2:
            raise ParameterError("segment_frames", segment_frames, "an even number of frames")
        _window(window, 8)  # validate the name early
        zero = np.zeros(int(segment_frames) // 2 + 1)
        zero.setflags(write=False)
        state = SpectrumState(
            rate_hz=rate,
            window=window,
            segment_frames=int(segment_frames),
            detrend=bool(detrend),
            power_sum=zero,
            n_averages=0,
            pending=_EMPTY,
        )
    elif not isinstance(state, SpectrumState):
        raise ParameterError("state", type(state).__name__, "a SpectrumState or None")
    elif float(rate_hz) != state.rate_hz:
        raise ParameterError(
            "rate_hz", rate_hz, f"the rate the spectrum began with, {state.rate_hz}"
        )

    n = state.segment_frames
    hop = n // 2
    group = _group_segments(n)
    need = (group + 1) * hop  # frames holding one full group of segments
    data = np.concatenate([state.pending, arr]) if state.pending.size else arr
    if data.shape[0] < need:
        pending = np.array(data, copy=True)
        pending.setflags(write=False)
        return replace(state, pending=pending)
    total = np.array(state.power_sum, copy=True)
    count = state.n_averages
    pos = 0
    while data.shape[0] - pos >= need:
        total += _segments_power(data[pos : pos + need], group, n, state.window, state.detrend)
        count += group
        pos += group * hop
    total.setflags(write=False)
    pending = np.array(data[pos:], copy=True)
    pending.setflags(write=False)
    return replace(state, power_sum=total, n_averages=count, pending=pending)


def averaged_spectrum(
    x,
    *,
    rate_hz,
    resolution_hz=None,
    window="blackmanharris",
    segments=8,
    detrend=True,
):
    """Averaged, windowed one-sided power spectrum (Welch's method) in full-scale units.

    Scaling: each bin holds the power spectral density times the bin spacing, so

    * a band's noise power is the plain sum of its bins (the window's ENBW is divided out:
      the periodogram is normalised by ``sum(w**2)``, not ``sum(w)**2``);
    * a tone's power is the sum of the bins of its main lobe, and a full-scale sine sums to
      0 dBFS there (:meth:`Spectrum.tone_dbfs`);
    * a tone's single peak bin reads lower than its level by ``10 log10(ENBW/bin)`` dB
      (2.0 bins, 3.0 dB, for the 4-term Blackman-Harris window);
      :meth:`Spectrum.tone_scaled_dbfs` undoes that for plots.

    Parameters
    ----------
    x : array_like
        One channel, shape ``(frames,)``.
    rate_hz : float
        Sample rate.
    resolution_hz : float, optional
        Wanted bin spacing; the segment length is the next power of two of
        ``rate_hz / resolution_hz``. By default the longest power-of-two segment that still
        gives ``segments`` averages is used.
    window : str
        Window name for ``scipy.signal.get_window``; the 4-term Blackman-Harris window
        (-92 dB side lobes) by default.
    segments : int
        Minimum number of averages when ``resolution_hz`` is not given.
    detrend : bool
        Remove each segment's mean before windowing.

    Returns
    -------
    Spectrum

    References
    ----------
    .. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power
       spectra", IEEE Trans. Audio Electroacoust. AU-15(2), 1967, pp. 70-73.
    .. [2] F. J. Harris, "On the use of windows for harmonic analysis with the discrete
       Fourier transform", Proc. IEEE 66(1), 1978 (ENBW, Blackman-Harris window).
    """
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    n = _segment_frames_for(len(arr), rate, resolution_hz, segments)
    if len(arr) < n:
        raise ParameterError(
            "x", f"{len(arr)} frames", f"at least {n} frames for the requested resolution"
        )
    state = accumulate_spectrum(arr, rate_hz=rate, segment_frames=n, window=window, detrend=detrend)
    return state.spectrum()
