"""Noise: dynamic range (AES17), idle-channel noise, out-of-band power, noise modulation.

Every function takes one channel (or a list of captures) as float arrays (full scale ±1.0)
with the sample rate passed as ``rate_hz=``, and returns a small frozen result.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.measure.residual import (
    _check_weighting,
    read_residual_meter,
    start_residual_meter,
    update_residual_meter,
)
from audiodsm.measure.sine_fit import _REMEMBERED_COLUMNS_MAX
from audiodsm.measure.spectrum import _as_signal, _check_rate, averaged_spectrum, power_to_dbfs
from audiodsm.measure.tone import thd_plus_noise

__all__ = [
    "DynamicRange",
    "dynamic_range",
    "NoiseLevel",
    "idle_channel_noise",
    "BandPower",
    "out_of_band_power_dbfs",
    "ClearBandNoise",
    "noise_clear_of_harmonics",
    "NoiseModulation",
    "noise_modulation",
]


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
class ClearBandNoise:
    """Noise read in the bands clear of a tone and its harmonics.

    Attributes
    ----------
    noise_dbfs : float
        Weighted noise power of the bins kept, scaled up by the weighted width of the whole
        band over that of the bins kept: the band's noise if its density between the
        harmonics holds under them too. The scale depends only on the tone frequency, the
        band and the resolution, so it cancels from a spread over levels of the same tone.
    kept_fraction : float
        Weighted width of the bins kept over that of the whole band (0 .. 1).
    tone_dbfs : float
        Level of the tone that was fitted and removed.
    frequency_hz : float
    weighting : str
    resolution_hz : float
        Bin spacing of the averaged spectrum.
    guard_hz : float
        Bins within this distance of the tone or a harmonic were left out.
    """

    noise_dbfs: float
    kept_fraction: float
    tone_dbfs: float
    frequency_hz: float
    weighting: str
    resolution_hz: float
    guard_hz: float


def _harmonic_columns(freq_hz, rate_hz, count):
    """The cosine and sine of ``2 pi f / rate * t``, t = 0 .. count-1 (short pairs remembered)."""
    if count > _REMEMBERED_COLUMNS_MAX:
        return _harmonic_pair(freq_hz, rate_hz, count)
    return _remembered_harmonic_pair(freq_hz, rate_hz, count)


def _harmonic_pair(freq_hz, rate_hz, count):
    w = 2.0 * np.pi * freq_hz / rate_hz * np.arange(count)
    return np.cos(w), np.sin(w)


@functools.lru_cache(maxsize=48)
def _remembered_harmonic_pair(freq_hz, rate_hz, count):
    # every level of the battery's sweep removes the same harmonics from captures of the
    # same length: the same bits each time (read-only)
    pair = _harmonic_pair(freq_hz, rate_hz, count)
    for a in pair:
        a.setflags(write=False)
    return pair


def noise_clear_of_harmonics(
    x,
    *,
    rate_hz,
    frequency_hz,
    weighting="a",
    lower_hz=20.0,
    upper_hz=20000.0,
    settle_s=0.0,
    guard_hz=None,
):
    """The noise of a tone capture, read only where the tone and its harmonics are not.

    The tone and every harmonic below half the rate are removed by one joint least-squares
    fit at their exact frequencies (DC too); the residual's averaged spectrum (Welch, 4-term
    Blackman-Harris, 8 averages) is then summed, weighted, over the bins of the band that lie
    farther than ``guard_hz`` from the tone and from every harmonic. So distortion, however
    strong, does not count as noise, and the reading follows the noise alone.

    Parameters
    ----------
    x : array_like
        One channel holding one tone.
    rate_hz : float
    frequency_hz : float
        The tone's frequency (known exactly, as for a stimulus).
    weighting : {"unweighted", "a", "ccir"}
    lower_hz, upper_hz : float
        The band.
    settle_s : float
        Leading time left out.
    guard_hz : float, optional
        Half-width of the gap left around the tone and each harmonic. Default: the window's
        main lobe plus two bins.

    Returns
    -------
    ClearBandNoise

    Raises
    ------
    ParameterError
        A bad argument, too short a capture, or a guard that leaves no bin in the band.

    References
    ----------
    .. [1] P. D. Welch, IEEE Trans. Audio Electroacoust. AU-15(2), 1967 (averaged spectrum).
    .. [2] F. J. Harris, Proc. IEEE 66(1), 1978 (Blackman-Harris window, main-lobe width).
    """
    from audiodsm.measure.sine_fit import _fit_lines
    from audiodsm.measure.weighting import weighting_power_gain

    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    kind = _check_weighting(weighting)
    f0 = float(frequency_hz)
    if not (0.0 < f0 < rate / 2):
        raise ParameterError("frequency_hz", frequency_hz, f"a frequency in (0, {rate / 2})")
    lo, hi = float(lower_hz), float(upper_hz)
    if not (0.0 <= lo < hi <= rate / 2):
        raise ParameterError(
            "lower_hz, upper_hz", (lower_hz, upper_hz), f"0 <= lower < upper <= {rate / 2}"
        )
    skip = int(round(float(settle_s) * rate))
    if not (0 <= skip < len(arr)):
        raise ParameterError("settle_s", settle_s, "a settling time shorter than the capture")
    seg = np.ascontiguousarray(arr[skip:], dtype=float)
    harmonics = f0 * np.arange(1, int((rate / 2) // f0) + 1)
    harmonics = harmonics[harmonics < rate / 2 * (1 - 1e-9)]
    amps, dc = _fit_lines(seg, harmonics, rate)
    model = np.full(len(seg), dc)
    for f, c in zip(harmonics, amps, strict=True):
        cos_w, sin_w = _harmonic_columns(float(f), float(rate), len(seg))
        model += c.real * cos_w - c.imag * sin_w
    residual = seg - model
    spec = averaged_spectrum(residual, rate_hz=rate)
    guard = (spec.main_lobe_bins + 2) * spec.resolution_hz if guard_hz is None else float(guard_hz)
    freq = spec.freq_hz
    in_band = (freq >= lo) & (freq <= hi)
    near = np.min(np.abs(freq[:, None] - harmonics[None, :]), axis=1) <= guard
    kept = in_band & ~near
    gain = weighting_power_gain(freq, kind)
    width_band = float(np.sum(gain[in_band]))
    width_kept = float(np.sum(gain[kept]))
    if width_kept <= 0.0:
        raise ParameterError("guard_hz", guard, "a guard that leaves bins between the harmonics")
    power = float(np.sum(spec.power[kept] * gain[kept])) * width_band / width_kept
    return ClearBandNoise(
        noise_dbfs=float(power_to_dbfs(power)),
        kept_fraction=width_kept / width_band,
        tone_dbfs=float(power_to_dbfs(abs(amps[0]) ** 2 / 2.0)),
        frequency_hz=f0,
        weighting=kind,
        resolution_hz=float(spec.resolution_hz),
        guard_hz=float(guard),
    )


@dataclass(frozen=True)
class NoiseModulation:
    """Noise clear of the tone and its harmonics, against tone level.

    Attributes
    ----------
    tone_dbfs : tuple of float
        Fitted tone level of each capture.
    noise_dbfs : tuple of float
        Weighted noise in the bands clear of the tone and its harmonics, per capture
        (:func:`noise_clear_of_harmonics`).
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
    settle_s=0.1,
    guard_hz=None,
):
    """Noise modulation: how far the noise between a tone's harmonics moves with its level.

    Each capture holds the same tone at a different level (for example 0 to -90 dBFS in
    10 dB steps). In each, the noise is read only in the bands clear of the tone and its
    harmonics (:func:`noise_clear_of_harmonics`), so a distortion that grows with level does
    not pass for noise; the spread (largest minus smallest) of those readings is the noise
    modulation. No standard defines the figure; this follows the common practice of reading
    the noise floor beside the tone over a range of levels and quoting how much it moves
    (Lipshitz, Wannamaker & Vanderkooy 1992 show what it measures: signal-dependent error
    power, which TPDF dither removes).

    Parameters
    ----------
    captures : sequence of array_like
    rate_hz : float
    weighting : {"unweighted", "a", "ccir"}
    frequency_hz : float, optional
        The tone, when known exactly; otherwise estimated by a 4-parameter sine fit on the
        first capture and used for all.
    upper_hz, lower_hz : float
        The band.
    settle_s : float
        Leading time left out of each capture.
    guard_hz : float, optional
        See :func:`noise_clear_of_harmonics`.

    Returns
    -------
    NoiseModulation

    References
    ----------
    .. [1] S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy, "Quantization and dither: a
       theoretical survey", J. Audio Eng. Soc. 40(5), 1992 (noise modulation and its
       removal by TPDF dither).
    """
    from audiodsm.measure.sine_fit import fit_sine

    caps = list(captures)
    if not caps:
        raise ParameterError("captures", "no captures", "one capture per tone level")
    rate = _check_rate(rate_hz)
    if frequency_hz is None:
        first = _as_signal(caps[0], "captures[0]")
        skip = int(round(float(settle_s) * rate))
        frequency_hz = fit_sine(first[skip:], rate_hz=rate).frequency_hz
    tones, noise = [], []
    kind = _check_weighting(weighting)
    for i, cap in enumerate(caps):
        try:
            r = noise_clear_of_harmonics(
                cap,
                rate_hz=rate,
                frequency_hz=frequency_hz,
                weighting=kind,
                lower_hz=lower_hz,
                upper_hz=upper_hz,
                settle_s=settle_s,
                guard_hz=guard_hz,
            )
        except ParameterError as exc:
            raise ParameterError(f"captures[{i}]", exc.value, exc.expected) from None
        tones.append(r.tone_dbfs)
        noise.append(r.noise_dbfs)
    return NoiseModulation(tuple(tones), tuple(noise), max(noise) - min(noise), kind)
