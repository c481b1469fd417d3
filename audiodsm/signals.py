"""Test stimuli for the measurement battery: tones, twin tones, multitones, DC, silence, dither.

Conventions (shared by every function here)
-------------------------------------------
- Full scale is ±1.0. Levels are in dBFS as AES17 defines them: 0 dBFS is the level of a sine
  whose positive peak just reaches full scale, so a sine of amplitude ``a`` is at
  ``20 log10(a)`` dBFS and a signal of rms ``r`` at ``20 log10(r sqrt(2))`` dBFS (a full-scale
  square wave reads +3.01 dBFS).
- Composite stimuli (twin tones, multitones, stepped sines) state their level as a **peak**
  level: the stimulus has the same peak as a single sine at ``level_dbfs``. For twin tones the
  two amplitudes add up to that peak; for a multitone the largest sample equals it.
- The sample rate is always explicit (``rate_hz=``) and the length is ``round(duration_s *
  rate_hz)`` samples. Signals are float64 arrays of shape ``(n,)``.
- Every random element takes a seed; the same arguments give the same samples.

The standard test frequency of AES17 is 997 Hz (:data:`AES17_TEST_HZ`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError

__all__ = [
    "AES17_TEST_HZ",
    "SMPTE_FREQUENCIES_HZ",
    "SMPTE_RATIO",
    "DIFFERENCE_FREQUENCIES_HZ",
    "dbfs_to_amplitude",
    "amplitude_to_dbfs",
    "rms_to_dbfs",
    "dbfs_to_rms",
    "sine",
    "twin_tone_amplitudes",
    "twin_tone_smpte",
    "twin_tone_difference",
    "dc_offset",
    "silence",
    "schroeder_phases",
    "multitone",
    "SteppedSine",
    "stepped_sine",
    "tpdf_dither",
    "quantize",
]

#: AES17 test frequency, Hz (a prime, so the tone does not repeat on a short sample grid).
AES17_TEST_HZ = 997.0
#: SMPTE RP120 / IEC 60268-3 modulation-distortion tones (low, high) and their amplitude ratio.
SMPTE_FREQUENCIES_HZ = (60.0, 7000.0)
SMPTE_RATIO = 4.0
#: IEC 60268-3 difference-frequency distortion tones (low, high), at equal amplitude.
DIFFERENCE_FREQUENCIES_HZ = (19000.0, 20000.0)


# --- level conversions --------------------------------------------------------------------


def dbfs_to_amplitude(level_dbfs):
    """Peak amplitude of a sine at a level in dBFS (AES17: 0 dBFS is a full-scale sine).

    Parameters
    ----------
    level_dbfs : float or array_like
        Level in dBFS.

    Returns
    -------
    float or numpy.ndarray
        Peak amplitude in full-scale units, ``10 ** (level_dbfs / 20)``.

    References
    ----------
    AES17-2015, definition of dBFS (clause 3, from memory).
    """
    out = 10.0 ** (np.asarray(level_dbfs, dtype=np.float64) / 20.0)
    return out if out.ndim else float(out)


def amplitude_to_dbfs(amplitude):
    """Level in dBFS of a sine with the given peak amplitude (full scale = 1).

    Parameters
    ----------
    amplitude : float or array_like
        Peak amplitude (>= 0); 0 gives ``-inf``.

    Returns
    -------
    float or numpy.ndarray
        ``20 log10(amplitude)`` dBFS.
    """
    a = np.asarray(amplitude, dtype=np.float64)
    if np.any(a < 0) or not np.all(np.isfinite(a)):
        raise ParameterError("amplitude", amplitude, "finite amplitudes >= 0")
    with np.errstate(divide="ignore"):
        out = 20.0 * np.log10(a)
    return out if out.ndim else float(out)


def rms_to_dbfs(rms):
    """Level in dBFS of a signal with the given rms value (AES17).

    Parameters
    ----------
    rms : float or array_like
        Rms value in full-scale units (>= 0).

    Returns
    -------
    float or numpy.ndarray
        ``20 log10(rms * sqrt(2))``: a full-scale sine (rms 1/sqrt 2) reads 0 dBFS and a
        full-scale square wave (rms 1) +3.01 dBFS.

    References
    ----------
    AES17-2015, definition of dBFS (from memory).
    """
    r = np.asarray(rms, dtype=np.float64)
    if np.any(r < 0) or not np.all(np.isfinite(r)):
        raise ParameterError("rms", rms, "finite rms values >= 0")
    with np.errstate(divide="ignore"):
        out = 20.0 * np.log10(r * math.sqrt(2.0))
    return out if out.ndim else float(out)


def dbfs_to_rms(level_dbfs):
    """Rms value of a signal at a level in dBFS (inverse of :func:`rms_to_dbfs`).

    Parameters
    ----------
    level_dbfs : float or array_like
        Level in dBFS.

    Returns
    -------
    float or numpy.ndarray
        ``10 ** (level_dbfs / 20) / sqrt(2)``.
    """
    out = 10.0 ** (np.asarray(level_dbfs, dtype=np.float64) / 20.0) / math.sqrt(2.0)
    return out if out.ndim else float(out)


# --- validation helpers -------------------------------------------------------------------


def _positive(name, value):
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = math.nan
    if not (v > 0 and math.isfinite(v)):
        raise ParameterError(name, value, "a finite number > 0")
    return v


def _length(rate_hz, duration_s):
    rate = _positive("rate_hz", rate_hz)
    try:
        duration = float(duration_s)
    except (TypeError, ValueError):
        duration = math.nan
    if not (duration >= 0 and math.isfinite(duration)):
        raise ParameterError("duration_s", duration_s, "a finite duration >= 0 s")
    return rate, int(round(duration * rate))


def _frequency(name, value, rate):
    f = _positive(name, value)
    if f >= 0.5 * rate:
        raise ParameterError(name, value, f"a frequency from 0 to below Nyquist ({rate / 2:g} Hz)")
    return f


def _level(name, value):
    try:
        level = float(value)
    except (TypeError, ValueError):
        level = math.nan
    if not (level <= 0.0 and not math.isnan(level)):
        raise ParameterError(name, value, "a level <= 0 dBFS (the peak must stay in full scale)")
    return level


# --- tones --------------------------------------------------------------------------------


def sine(frequency_hz, level_dbfs, *, rate_hz, duration_s, phase_rad=0.0):
    """A sine tone.

    Parameters
    ----------
    frequency_hz : float
        Frequency in Hz, above 0 and below Nyquist (AES17 uses 997 Hz, :data:`AES17_TEST_HZ`).
    level_dbfs : float
        Level in dBFS (<= 0): the amplitude is ``10 ** (level_dbfs / 20)``.
    rate_hz : float
        Sample rate in Hz.
    duration_s : float
        Length in seconds.
    phase_rad : float, optional
        Phase at sample 0 in radians (0 starts the sine at zero, rising).

    Returns
    -------
    numpy.ndarray
        ``a sin(2 pi f n / rate + phase)``, shape ``(round(duration_s * rate_hz),)``.
    """
    rate, n = _length(rate_hz, duration_s)
    f = _frequency("frequency_hz", frequency_hz, rate)
    amplitude = dbfs_to_amplitude(_level("level_dbfs", level_dbfs))
    t = np.arange(n, dtype=np.float64)
    return amplitude * np.sin(2.0 * np.pi * f / rate * t + float(phase_rad))


def twin_tone_amplitudes(level_dbfs, *, ratio):
    """Amplitudes of the two tones of a twin-tone stimulus at a peak level.

    Parameters
    ----------
    level_dbfs : float
        Peak level in dBFS: the two amplitudes add up to ``10 ** (level_dbfs / 20)``, so the
        stimulus has the same peak as a sine at `level_dbfs`.
    ratio : float
        Amplitude of the low tone over that of the high tone (4 for SMPTE, 1 for the difference
        test).

    Returns
    -------
    (float, float)
        ``(a_low, a_high)``.
    """
    peak = dbfs_to_amplitude(_level("level_dbfs", level_dbfs))
    r = _positive("ratio", ratio)
    return peak * r / (r + 1.0), peak / (r + 1.0)


def _twin(level_dbfs, low_hz, high_hz, ratio, rate_hz, duration_s):
    rate, n = _length(rate_hz, duration_s)
    f1 = _frequency("low_hz", low_hz, rate)
    f2 = _frequency("high_hz", high_hz, rate)
    if not f1 < f2:
        raise ParameterError("low_hz", low_hz, f"a frequency below high_hz={high_hz!r}")
    a1, a2 = twin_tone_amplitudes(level_dbfs, ratio=ratio)
    t = np.arange(n, dtype=np.float64)
    return a1 * np.sin(2.0 * np.pi * f1 / rate * t) + a2 * np.sin(2.0 * np.pi * f2 / rate * t)


def twin_tone_smpte(
    level_dbfs,
    *,
    rate_hz,
    duration_s,
    low_hz=SMPTE_FREQUENCIES_HZ[0],
    high_hz=SMPTE_FREQUENCIES_HZ[1],
    ratio=SMPTE_RATIO,
):
    """SMPTE / IEC modulation-distortion twin tone: 60 Hz and 7 kHz at 4:1 amplitude.

    Parameters
    ----------
    level_dbfs : float
        Peak level in dBFS (<= 0). Level convention: combined peak = the stated level, i.e.
        ``a_low + a_high = 10 ** (level_dbfs / 20)`` with ``a_low = ratio * a_high``.
    rate_hz : float
        Sample rate in Hz.
    duration_s : float
        Length in seconds.
    low_hz, high_hz : float, optional
        The two frequencies (60 Hz and 7 kHz).
    ratio : float, optional
        Amplitude ratio low/high (4).

    Returns
    -------
    numpy.ndarray
        ``a_low sin(2 pi f_low t) + a_high sin(2 pi f_high t)``, both starting at phase 0.

    References
    ----------
    SMPTE RP120 and IEC 60268-3, modulation distortion (from memory).
    """
    return _twin(level_dbfs, low_hz, high_hz, ratio, rate_hz, duration_s)


def twin_tone_difference(
    level_dbfs,
    *,
    rate_hz,
    duration_s,
    low_hz=DIFFERENCE_FREQUENCIES_HZ[0],
    high_hz=DIFFERENCE_FREQUENCIES_HZ[1],
):
    """Difference-frequency twin tone: 19 kHz and 20 kHz at equal amplitude.

    Parameters
    ----------
    level_dbfs : float
        Peak level in dBFS (<= 0). Level convention: combined peak = the stated level, so each
        tone has amplitude ``10 ** (level_dbfs / 20) / 2`` (6.02 dB below the stated level).
    rate_hz : float
        Sample rate in Hz (the 20 kHz tone must lie below Nyquist).
    duration_s : float
        Length in seconds.
    low_hz, high_hz : float, optional
        The two frequencies (19 kHz and 20 kHz).

    Returns
    -------
    numpy.ndarray
        ``a (sin(2 pi f_low t) + sin(2 pi f_high t))``.

    References
    ----------
    IEC 60268-3, difference-frequency distortion (from memory).
    """
    return _twin(level_dbfs, low_hz, high_hz, 1.0, rate_hz, duration_s)


def dc_offset(value, *, rate_hz, duration_s):
    """A constant signal.

    Parameters
    ----------
    value : float
        The constant, in full-scale units, within [-1, 1].
    rate_hz : float
        Sample rate in Hz.
    duration_s : float
        Length in seconds.

    Returns
    -------
    numpy.ndarray
        ``value`` repeated.
    """
    _, n = _length(rate_hz, duration_s)
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = math.nan
    if not (-1.0 <= v <= 1.0):
        raise ParameterError("value", value, "a constant within full scale, -1 to 1")
    return np.full(n, v)


def silence(*, rate_hz, duration_s):
    """Digital silence (all zeros).

    Parameters
    ----------
    rate_hz : float
        Sample rate in Hz.
    duration_s : float
        Length in seconds.

    Returns
    -------
    numpy.ndarray
        Zeros.
    """
    _, n = _length(rate_hz, duration_s)
    return np.zeros(n)


def schroeder_phases(n_tones):
    """Schroeder's low-crest-factor phases for equal-amplitude tones.

    Parameters
    ----------
    n_tones : int
        Number of tones (>= 1).

    Returns
    -------
    numpy.ndarray
        Phases in radians, ``phi_k = -pi k (k - 1) / N`` for k = 1..N (tones in ascending
        frequency order).

    Notes
    -----
    For harmonically spaced tones of a flat spectrum this spreads the tones' peaks over the
    period, so the crest factor stays near that of a single sine instead of growing as
    ``sqrt(2 N)`` as it does when all phases are equal.

    References
    ----------
    M. R. Schroeder, "Synthesis of low-peak-factor signals and binary sequences with low
    autocorrelation", IEEE Trans. Inf. Theory 16(1), 85-89, 1970 (eq. for a flat spectrum).
    """
    if isinstance(n_tones, bool) or not isinstance(n_tones, (int, np.integer)) or n_tones < 1:
        raise ParameterError("n_tones", n_tones, "an integer >= 1")
    k = np.arange(1, int(n_tones) + 1, dtype=np.float64)
    return -np.pi * k * (k - 1.0) / float(n_tones)


def multitone(frequencies_hz, level_dbfs, *, rate_hz, duration_s):
    """Equal-amplitude multitone with Schroeder phases.

    Parameters
    ----------
    frequencies_hz : sequence of float
        Tone frequencies in Hz, distinct, above 0 and below Nyquist (sorted internally for the
        phase assignment).
    level_dbfs : float
        Peak level in dBFS (<= 0). Level convention: the largest absolute sample equals
        ``10 ** (level_dbfs / 20)``; every tone has the same amplitude, that peak divided by
        the signal's crest ratio (peak over single-tone amplitude).
    rate_hz : float
        Sample rate in Hz.
    duration_s : float
        Length in seconds (> 0).

    Returns
    -------
    numpy.ndarray
        The multitone.

    References
    ----------
    M. R. Schroeder, IEEE Trans. Inf. Theory 16(1), 1970.
    """
    rate, n = _length(rate_hz, duration_s)
    if n == 0:
        raise ParameterError("duration_s", duration_s, "a duration of at least one sample")
    freqs = np.sort(np.atleast_1d(np.asarray(frequencies_hz, dtype=np.float64)))
    if freqs.ndim != 1 or freqs.size == 0 or len(np.unique(freqs)) != freqs.size:
        raise ParameterError("frequencies_hz", frequencies_hz, "one or more distinct frequencies")
    for f in freqs:
        _frequency("frequencies_hz", f, rate)
    peak = dbfs_to_amplitude(_level("level_dbfs", level_dbfs))
    phases = schroeder_phases(freqs.size)
    t = np.arange(n, dtype=np.float64)
    x = np.zeros(n)
    for f, phi in zip(freqs, phases, strict=True):
        x += np.cos(2.0 * np.pi * f / rate * t + phi)
    top = np.max(np.abs(x))
    return x * (peak / top) if top > 0 else x


@dataclass(frozen=True)
class SteppedSine:
    """A sequence of tone bursts and where each one lies.

    Attributes
    ----------
    signal : numpy.ndarray
        The whole stimulus, shape ``(n,)``.
    frequencies_hz : numpy.ndarray
        Frequency of each step.
    levels_dbfs : numpy.ndarray
        Level of each step.
    starts : numpy.ndarray
        First sample of each step.
    step_samples : int
        Length of each step in samples (a silent gap may follow each step).
    rate_hz : float
        Sample rate.
    """

    signal: np.ndarray
    frequencies_hz: np.ndarray
    levels_dbfs: np.ndarray
    starts: np.ndarray
    step_samples: int
    rate_hz: float


def stepped_sine(frequencies_hz, levels_dbfs, *, rate_hz, step_s, gap_s=0.0):
    """Tone bursts stepping through frequencies and/or levels.

    Parameters
    ----------
    frequencies_hz : float or sequence of float
        Frequency of each step (a single value repeats for every step).
    levels_dbfs : float or sequence of float
        Level of each step in dBFS (<= 0); broadcast against `frequencies_hz`, so a fixed
        frequency with a list of levels gives a level-linearity staircase and a list of
        frequencies at one level a frequency-response sweep.
    rate_hz : float
        Sample rate in Hz.
    step_s : float
        Length of each tone burst in seconds.
    gap_s : float, optional
        Silence after each burst in seconds (0).

    Returns
    -------
    SteppedSine
        The signal and the position, frequency and level of each step. Each burst starts at
        phase 0.
    """
    rate, step_n = _length(rate_hz, step_s)
    _, gap_n = _length(rate_hz, gap_s)
    if step_n == 0:
        raise ParameterError("step_s", step_s, "a step of at least one sample")
    try:
        freqs, levels = np.broadcast_arrays(
            np.atleast_1d(np.asarray(frequencies_hz, dtype=np.float64)),
            np.atleast_1d(np.asarray(levels_dbfs, dtype=np.float64)),
        )
    except ValueError:
        raise ParameterError(
            "levels_dbfs", levels_dbfs, "one level or as many levels as frequencies"
        ) from None
    if freqs.ndim != 1:
        raise ParameterError("frequencies_hz", frequencies_hz, "a 1-D sequence of frequencies")
    t = np.arange(step_n, dtype=np.float64)
    period = step_n + gap_n
    x = np.zeros(period * freqs.size)
    for i, (f, level) in enumerate(zip(freqs, levels, strict=True)):
        _frequency("frequencies_hz", f, rate)
        amplitude = dbfs_to_amplitude(_level("levels_dbfs", level))
        x[i * period : i * period + step_n] = amplitude * np.sin(2.0 * np.pi * f / rate * t)
    starts = np.arange(freqs.size) * period
    return SteppedSine(
        signal=x,
        frequencies_hz=np.array(freqs),
        levels_dbfs=np.array(levels),
        starts=starts,
        step_samples=step_n,
        rate_hz=rate,
    )


# --- dither and quantization --------------------------------------------------------------


def tpdf_dither(n, lsb, seed, *, channels=None):
    """Triangular-PDF dither of 2 LSB peak to peak.

    Parameters
    ----------
    n : int
        Number of samples (>= 0).
    lsb : float
        Quantization step in full-scale units (> 0), e.g. ``2.0 ** -15`` for 16 bits.
    seed : int
        Seed of the generator (:func:`numpy.random.default_rng`).
    channels : int or None, optional
        If given, the shape is ``(n, channels)`` with independent dither per channel.

    Returns
    -------
    numpy.ndarray
        Sum of two independent uniform variables on ``[-lsb/2, lsb/2)``: zero mean, variance
        ``lsb^2 / 6``, support ``(-lsb, lsb)``.

    References
    ----------
    S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy, "Quantization and dither: a theoretical
    survey", J. Audio Eng. Soc. 40(5), 355-375, 1992.
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 0:
        raise ParameterError("n", n, "an integer >= 0")
    step = _positive("lsb", lsb)
    shape = (int(n),) if channels is None else (int(n), int(channels))
    if channels is not None and (isinstance(channels, bool) or int(channels) < 1):
        raise ParameterError("channels", channels, "an integer >= 1 or None")
    rng = np.random.default_rng(seed)
    u = rng.random((2, *shape))
    return step * (u[0] - u[1])


def quantize(x, *, bits, dither="tpdf", seed=0):
    """Quantize a signal to a fixed-point word, the way an ideal N-bit channel does.

    Parameters
    ----------
    x : array_like
        Signal in full-scale units.
    bits : int
        Word length, 2 to 32. The step is ``2 ** (1 - bits)`` (two's complement, full scale
        ±1), and the output is clipped to ``[-1, 1 - step]``.
    dither : {"tpdf", "rpdf", "none"}, optional
        Non-subtractive dither added before rounding: triangular (2 LSB peak to peak),
        rectangular (1 LSB) or none.
    seed : int, optional
        Seed of the dither.

    Returns
    -------
    numpy.ndarray
        The quantized signal (float64, on the step grid).

    Notes
    -----
    With TPDF dither the total error has power ``step^2 / 4`` whatever the signal, so an
    ideal N-bit channel has a full-scale SNR of ``6.02 N - 3.01`` dB over the Nyquist band.
    Undithered the error power is ``step^2 / 12`` for busy signals but depends on the signal;
    RPDF dither gives ``step^2 / 6`` with signal-dependent error power.

    References
    ----------
    S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy, J. Audio Eng. Soc. 40(5), 1992.
    """
    arr = np.asarray(x, dtype=np.float64)
    if isinstance(bits, bool) or not isinstance(bits, (int, np.integer)) or not 2 <= bits <= 32:
        raise ParameterError("bits", bits, "an integer from 2 to 32")
    if dither not in ("tpdf", "rpdf", "none"):
        raise ParameterError("dither", dither, "'tpdf', 'rpdf' or 'none'")
    step = 2.0 ** (1 - int(bits))
    if dither == "tpdf":
        flat = tpdf_dither(arr.size, step, seed).reshape(arr.shape)
    elif dither == "rpdf":
        flat = step * (np.random.default_rng(seed).random(arr.shape) - 0.5)
    else:
        flat = 0.0
    q = np.round((arr + flat) / step) * step
    return np.clip(q, -1.0, 1.0 - step)
