"""Idle-tone detection: spectral lines standing above the local noise floor.

A delta-sigma loop fed with silence or a small DC value can settle into a periodic pattern
whose lines land in the audio band ("idle tones"). This module finds such lines in an averaged
spectrum, with a detection threshold derived from the statistics of the averaging, so that
plain noise triggers it with a stated, small probability.

The statistics
--------------
Each bin of a Welch-averaged periodogram of Gaussian noise with local spectral density S is
distributed as ``S * chi2(nu) / nu``. For K non-overlapping segments ``nu = 2K``; with
overlapping segments the equivalent number of degrees of freedom is smaller and follows from
Welch's variance formula (Welch 1967, eq. 8-9)::

    var / mean**2 = (1/K) * (1 + 2 * sum_{j=1}^{K-1} (1 - j/K) * rho(j))
    rho(j) = (sum_n w[n] w[n + j*D])**2 / (sum_n w[n]**2)**2
    nu = 2 / (var / mean**2)

with window ``w`` and segment step ``D``. The local floor is a running median over
``floor_bins`` bins, divided by the median of ``chi2(nu)/nu`` so that it estimates ``S``.
The sample median is itself noisy (asymptotic relative variance ``1 / (4 M g(m)**2 m**2)``
for M independent values of a variable with density g and median m); M is taken as the
median window divided by the window's noise bandwidth in bins, since neighbouring bins are
correlated. The per-bin false-alarm probability is then

    p_bin(T) = E_z[ P(chi2(nu)/nu > T * (1 + sigma * z)) ],  z ~ N(0, 1),

evaluated by Gauss-Hermite quadrature, and T is chosen so that
``1 - (1 - p_bin)**n_bins`` equals the requested false-alarm probability per spectrum over
the ``n_bins`` bins of the band (a Sidak bound: neighbouring bins are positively correlated,
so the true rate is lower, i.e. the bound is conservative).

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra:
   a method based on time averaging over short, modified periodograms", IEEE Trans. Audio
   Electroacoust. AU-15(2), 70-73, 1967.
.. [2] F. J. Harris, "On the use of windows for harmonic analysis with the discrete Fourier
   transform", Proc. IEEE 66(1), 51-83, 1978 (window ENBW and main-lobe width).
.. [3] H. Cramer, "Mathematical Methods of Statistics", Princeton, 1946, sec. 28.5 (variance
   of the sample median).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, optimize, stats

from audiodsm.errors import ParameterError
from audiodsm.measure.spectrum import SpectrumState, _check_rate, _window, accumulate_spectrum

__all__ = [
    "SpectralLine",
    "IdleToneResult",
    "LineSpectrumState",
    "accumulate_line_spectrum",
    "line_spectrum",
    "segment_frames_for",
    "welch_degrees_of_freedom",
    "line_threshold",
    "find_idle_tones",
]

#: Window used by the detector's own spectra (4-term Blackman-Harris, sidelobes below -92 dB).
DETECTOR_WINDOW = "blackmanharris"
#: Half-width of the 4-term Blackman-Harris main lobe, in bins (Harris 1978, table 1).
_LOBE_HALF_BINS = {"blackmanharris": 4, "hann": 2, "hamming": 2, "flattop": 5}
_FULL_SCALE_SINE_POWER = 0.5  # mean square of a full-scale sine: 0 dBFS (AES17)
#: Default false-alarm probability per spectrum.
DEFAULT_FALSE_ALARM = 0.01
#: Default running-median length in bins.
DEFAULT_FLOOR_BINS = 65


# ---------------------------------------------------------------------------------------------
# A streamed, averaged spectrum with known statistics
# ---------------------------------------------------------------------------------------------


def segment_frames_for(n_frames: int, rate_hz: float, *, min_averages: int = 8) -> int:
    """Choose the segment length for an averaged spectrum.

    The aim is bins no wider than about 3 Hz (fine enough to separate idle tones and read
    20 Hz band edges) with at least ``2*min_averages`` half-overlapping segments; shorter
    signals get coarser bins, down to about 12 Hz with ``min_averages`` segments.

    Parameters
    ----------
    n_frames : int
        Signal length in samples.
    rate_hz : float
        Sample rate.
    min_averages : int, optional
        Least number of averaged segments accepted.

    Returns
    -------
    int
        A power of two.

    Raises
    ------
    ParameterError
        When the signal is too short for 12 Hz bins with ``min_averages`` segments.
    """
    fine = 1 << int(np.ceil(np.log2(rate_hz / 3.0)))
    coarse = 1 << int(np.ceil(np.log2(rate_hz / 12.0)))
    length = fine
    while length > coarse and _n_segments(n_frames, length) < 2 * min_averages:
        length //= 2
    if _n_segments(n_frames, length) < min_averages:
        need = (min_averages + 1) * length // 2
        raise ParameterError(
            "signal length",
            f"{n_frames} frames",
            f"at least {need} frames ({need / rate_hz:.3f} s) at {rate_hz:g} Hz for a "
            f"{rate_hz / length:.1f} Hz resolution",
        )
    return length


def _n_segments(n_frames: int, length: int) -> int:
    step = length // 2
    return 0 if n_frames < length else (n_frames - length) // step + 1


def welch_degrees_of_freedom(window, step_frames: int, n_averages: int) -> float:
    """Equivalent chi-square degrees of freedom of a Welch average of Gaussian noise.

    Parameters
    ----------
    window : array_like
        The segment window.
    step_frames : int
        Hop between segments.
    n_averages : int
        Number of segments.

    Returns
    -------
    float
        ``nu`` such that each bin is distributed about as ``S * chi2(nu) / nu``; equals
        ``2 * n_averages`` without overlap.

    References
    ----------
    .. [1] P. D. Welch, IEEE Trans. Audio Electroacoust. AU-15(2), 1967, eq. 8-9.
    """
    w = np.asarray(window, dtype=np.float64)
    k = int(n_averages)
    if k < 1:
        raise ParameterError("n_averages", n_averages, "an integer >= 1")
    energy = float(np.sum(w * w))
    total = 1.0
    for j in range(1, k):
        shift = j * int(step_frames)
        if shift >= w.size:
            break
        rho = (float(np.dot(w[:-shift], w[shift:])) / energy) ** 2
        total += 2.0 * (1.0 - j / k) * rho
    return 2.0 * k / total


#: The running state of :func:`accumulate_line_spectrum` (the spectrum module's state).
LineSpectrumState = SpectrumState


def accumulate_line_spectrum(
    x,
    *,
    rate_hz: float,
    segment_frames: int,
    window: str = DETECTOR_WINDOW,
    state: SpectrumState | None = None,
) -> SpectrumState:
    """Add a block of one channel to the running average the detector reads.

    This is ``audiodsm.measure.spectrum.accumulate_spectrum`` with the detector's settings:
    an explicit segment length, half-overlapping mean-removed segments and the 4-term
    Blackman-Harris window by default. Block-wise equals one call, bit for bit, and
    separate stretches pool with ``state.merged(other)``.

    Parameters
    ----------
    x : array_like
        The next block of the channel, shape ``(n,)``; any length.
    rate_hz : float
        Sample rate.
    segment_frames : int
        Segment length, even (see :func:`segment_frames_for`). Used only when starting.
    window : str, optional
        Window name for ``scipy.signal.get_window`` (periodic). Used only when starting.
    state : SpectrumState, optional
        The value returned for the previous block; None to start.

    Returns
    -------
    SpectrumState
        Call ``.spectrum()`` for the averaged spectrum.

    References
    ----------
    .. [1] P. D. Welch, IEEE Trans. Audio Electroacoust. AU-15(2), 1967.
    """
    return accumulate_spectrum(
        x, rate_hz=rate_hz, state=state, segment_frames=segment_frames, window=window
    )


def line_spectrum(x, *, rate_hz: float, segment_frames: int | None = None):
    """Averaged spectrum of one channel with the resolution the detector wants.

    Parameters
    ----------
    x : array_like
        One channel, shape ``(n,)``, full scale ±1.0.
    rate_hz : float
        Sample rate.
    segment_frames : int, optional
        Segment length; by default :func:`segment_frames_for` chooses it (bins of about
        3 Hz when the signal is long enough).

    Returns
    -------
    audiodsm.measure.spectrum.Spectrum
        Blackman-Harris window, 50 % overlap, mean removed per segment.
    """
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 1:
        raise ParameterError("x", f"array of shape {a.shape}", "one channel, shape (n,)")
    _check_rate(rate_hz)
    seg = segment_frames or segment_frames_for(a.shape[0], rate_hz)
    return accumulate_line_spectrum(a, rate_hz=rate_hz, segment_frames=seg).spectrum()


# ---------------------------------------------------------------------------------------------
# Threshold
# ---------------------------------------------------------------------------------------------


def _median_relative_sigma(nu: float, floor_bins: int, enbw_bins: float) -> float:
    """Relative standard deviation of the running-median floor estimate."""
    dist = stats.chi2(nu, scale=1.0 / nu)
    m = float(dist.median())
    g = float(dist.pdf(m))
    independent = max(floor_bins / max(enbw_bins, 1.0), 1.0)
    return 1.0 / (2.0 * g * m * np.sqrt(independent))


def line_threshold(
    dof: float,
    n_bins: int,
    *,
    false_alarm: float = DEFAULT_FALSE_ALARM,
    floor_sigma: float = 0.0,
) -> float:
    """Detection threshold (power ratio to the local floor) for a false-alarm probability.

    Parameters
    ----------
    dof : float
        Equivalent chi-square degrees of freedom per bin (:func:`welch_degrees_of_freedom`).
    n_bins : int
        Number of bins tested.
    false_alarm : float, optional
        Probability that plain Gaussian noise gives one or more detections in the spectrum.
    floor_sigma : float, optional
        Relative standard deviation of the floor estimate (0 for a known floor).

    Returns
    -------
    float
        Ratio ``T`` (not in dB): a bin is a candidate line when ``power > T * floor``.

    Notes
    -----
    See the module docstring for the derivation (Sidak bound over bins; chi-square bin
    statistics after Welch 1967; the floor's own noise integrated over a Gaussian).
    """
    if not 0.0 < false_alarm < 1.0:
        raise ParameterError("false_alarm", false_alarm, "a probability between 0 and 1")
    if not dof > 0:
        raise ParameterError("dof", dof, "a positive number of degrees of freedom")
    n = max(int(n_bins), 1)
    p_bin = -np.expm1(np.log1p(-false_alarm) / n)
    nodes, weights = np.polynomial.hermite_e.hermegauss(40)
    weights = weights / weights.sum()
    spread = np.clip(1.0 + floor_sigma * nodes, 1e-3, None)

    def excess(log_t):
        t = np.exp(log_t)
        tail = stats.chi2.sf(dof * t * spread, dof)
        return np.log(np.dot(weights, tail) + 1e-300) - np.log(p_bin)

    hi = np.log(50.0)
    while excess(hi) > 0:
        hi += np.log(10.0)
    return float(np.exp(optimize.brentq(excess, 0.0, hi, xtol=1e-12)))


# ---------------------------------------------------------------------------------------------
# Detector
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class SpectralLine:
    """One detected line.

    Attributes
    ----------
    frequency_hz : float
        Power-weighted centre of the main lobe.
    level_dbfs : float
        Line power above the floor, summed over the main lobe, in dBFS.
    above_floor_db : float
        Peak bin over the local floor, in dB.
    """

    frequency_hz: float
    level_dbfs: float
    above_floor_db: float


@dataclass(frozen=True)
class IdleToneResult:
    """What :func:`find_idle_tones` found.

    Attributes
    ----------
    tones : tuple of SpectralLine
        The lines, strongest first.
    threshold_db : float
        Peak-bin-over-floor threshold used, in dB.
    false_alarm : float or None
        False-alarm probability per spectrum that the threshold gives on Gaussian noise
        (None when the spectrum's averaging is unknown).
    degrees_of_freedom : float
        Equivalent chi-square degrees of freedom per bin.
    band_hz : tuple of float
        Band searched.
    floor_dbfs : numpy.ndarray
        Local floor per bin (dBFS per bin), for plots.
    freq_hz : numpy.ndarray
        Bin frequencies of ``floor_dbfs``.
    """

    tones: tuple
    threshold_db: float
    false_alarm: float | None
    degrees_of_freedom: float
    band_hz: tuple
    floor_dbfs: np.ndarray = field(repr=False)
    freq_hz: np.ndarray = field(repr=False)


def _as_spectrum(data, rate_hz):
    if hasattr(data, "freq_hz") and hasattr(data, "power"):
        return data
    if rate_hz is None:
        raise ParameterError("rate_hz", None, "a sample rate in Hz when a signal is given")
    a = np.asarray(data, dtype=np.float64)
    if a.ndim != 1:
        raise ParameterError("x", f"array of shape {a.shape}", "one channel, shape (n,)")
    return line_spectrum(a, rate_hz=rate_hz)


def _spectrum_dof(spec) -> float:
    dof = getattr(spec, "degrees_of_freedom", None)
    if dof is not None:
        return float(dof)
    window = getattr(spec, "window", None)
    n_avg = getattr(spec, "n_averages", None)
    seg = getattr(spec, "segment_frames", None) or 2 * (len(spec.freq_hz) - 1)
    step = getattr(spec, "step_frames", None) or seg // 2
    if window is None or n_avg is None:
        raise ParameterError(
            "spectrum", type(spec).__name__, "a spectrum with window and n_averages"
        )
    return welch_degrees_of_freedom(_window(window, seg), step, n_avg)


def find_idle_tones(
    data,
    *,
    rate_hz: float | None = None,
    false_alarm: float = DEFAULT_FALSE_ALARM,
    margin_db: float | None = None,
    band_hz: tuple[float, float] = (20.0, 20000.0),
    floor_bins: int = DEFAULT_FLOOR_BINS,
) -> IdleToneResult:
    """Find spectral lines standing above the local noise floor inside a band.

    Parameters
    ----------
    data : Spectrum or array_like
        An averaged spectrum of one channel (``audiodsm.measure.spectrum.Spectrum``: Welch,
        50 % overlap, with ``window`` and ``n_averages``), or a one-channel signal, in which case
        ``rate_hz`` is required and :func:`line_spectrum` is computed.
    rate_hz : float, optional
        Sample rate, when ``data`` is a signal.
    false_alarm : float, optional
        Probability that Gaussian noise alone gives one or more detections in the band; the
        threshold is derived from it (module docstring). Default 0.01.
    margin_db : float, optional
        Use this fixed peak-over-floor margin instead of the derived threshold.
    band_hz : (float, float), optional
        Band searched, default the audio band 20 Hz .. 20 kHz.
    floor_bins : int, optional
        Length of the running median that estimates the local floor (odd; default 65).

    Returns
    -------
    IdleToneResult
        Lines strongest first, each with frequency, level in dBFS and height over the floor.

    Notes
    -----
    Neighbouring bins above the threshold are merged into one line; the line's level is the
    power above the floor summed over the window's main lobe around its peak bin, and its
    frequency the power-weighted centre of those bins. Lines closer than one main lobe
    merge. The floor is the running median corrected by the median of ``chi2(nu)/nu``.

    References
    ----------
    .. [1] P. D. Welch, IEEE Trans. Audio Electroacoust. AU-15(2), 1967.
    .. [2] F. J. Harris, Proc. IEEE 66(1), 1978.
    """
    spec = _as_spectrum(data, rate_hz)
    power = np.asarray(spec.power, dtype=np.float64)
    freq = np.asarray(spec.freq_hz, dtype=np.float64)
    if power.ndim != 1 or power.shape != freq.shape:
        raise ParameterError("spectrum", f"power of shape {power.shape}", "one channel")
    lo, hi = (float(b) for b in band_hz)
    if not 0.0 <= lo < hi:
        raise ParameterError("band_hz", band_hz, "(low, high) with 0 <= low < high")
    if isinstance(floor_bins, bool) or int(floor_bins) != floor_bins or floor_bins < 5:
        raise ParameterError("floor_bins", floor_bins, "an odd integer >= 5")
    floor_bins = int(floor_bins) | 1
    bin_hz = float(freq[1] - freq[0])
    enbw_bins = float(getattr(spec, "enbw_hz", bin_hz)) / bin_hz
    half = getattr(spec, "main_lobe_bins", None) or _LOBE_HALF_BINS.get(
        str(getattr(spec, "window", "")), int(np.ceil(enbw_bins)) + 1
    )

    nu = _spectrum_dof(spec)
    dist_median = float(stats.chi2.median(nu)) / nu
    floor = ndimage.median_filter(power, size=floor_bins, mode="nearest") / dist_median
    floor = np.maximum(floor, np.finfo(float).tiny)
    in_band = (freq >= lo) & (freq <= hi)
    n_bins = int(in_band.sum())
    if margin_db is None:
        sigma = _median_relative_sigma(nu, floor_bins, enbw_bins)
        t = line_threshold(nu, n_bins, false_alarm=false_alarm, floor_sigma=sigma)
        fa = false_alarm
    else:
        if not np.isfinite(margin_db) or margin_db <= 0:
            raise ParameterError("margin_db", margin_db, "a positive margin in dB")
        t = 10.0 ** (margin_db / 10.0)
        fa = None

    ratio = power / floor
    hits = np.flatnonzero(in_band & (ratio > t))
    lines = []
    if hits.size:
        # group hits closer than a main lobe; each group is one line
        breaks = np.flatnonzero(np.diff(hits) > half) + 1
        for group in np.split(hits, breaks):
            peak = int(group[np.argmax(power[group])])
            k0, k1 = max(peak - half, 0), min(peak + half + 1, power.size)
            excess = np.clip(power[k0:k1] - floor[k0:k1], 0.0, None)
            total = float(excess.sum())
            if total <= 0.0:
                continue
            centre = float(np.dot(excess, freq[k0:k1]) / total)
            lines.append(
                SpectralLine(
                    frequency_hz=centre,
                    level_dbfs=10.0 * np.log10(total / _FULL_SCALE_SINE_POWER),
                    above_floor_db=10.0 * np.log10(ratio[peak]),
                )
            )
    lines.sort(key=lambda line: -line.level_dbfs)
    return IdleToneResult(
        tones=tuple(lines),
        threshold_db=10.0 * np.log10(t),
        false_alarm=fa,
        degrees_of_freedom=nu,
        band_hz=(lo, hi),
        floor_dbfs=10.0 * np.log10(floor / _FULL_SCALE_SINE_POWER),
        freq_hz=freq,
    )
