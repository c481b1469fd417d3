"""Noise: dynamic range (AES17), idle-channel noise, out-of-band power, noise modulation.

Every function takes one channel (or a list of captures) as float arrays (full scale ±1.0)
with the sample rate passed as ``rate_hz=``, and returns a small frozen result.
"""

from __future__ import annotations

from dataclasses import dataclass

from audiodsm.errors import ParameterError
from audiodsm.measure.residual import (
    _check_weighting,
    read_residual_meter,
    start_residual_meter,
    update_residual_meter,
)
from audiodsm.measure.spectrum import _as_signal, _check_rate, averaged_spectrum
from audiodsm.measure.tone import thd_plus_noise

__all__ = [
    "DynamicRange",
    "dynamic_range",
    "NoiseLevel",
    "idle_channel_noise",
    "BandPower",
    "out_of_band_power_dbfs",
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
