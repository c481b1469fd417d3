"""What a channel holds: a tone, a twin tone, silence, or program material.

The `analyze` command measures a file without being told what is in it. This module decides,
from a channel's averaged spectrum and the spread of its short-term levels, which of four
kinds of content it holds, so that the right measurements are made:

``"tone"``
    One spectral line carries the signal, and its level is at least ``min_tone_dbfs`` (a
    lone line lower than that in an otherwise quiet channel is an idle tone, and the channel
    counts as silence). The line qualifies in either of two ways:

    * it stands at least ``dominance_db`` above everything else in the audio band (harmonics
      and noise together), i.e. THD+N better than ``-dominance_db``: a clean tone; or
    * the short-term level is steady and the line is the strongest one the line detector of
      :mod:`audiodsm.measure.idle_tones` finds above the local noise floor at the stated
      false-alarm rate ``false_alarm`` (default :data:`TONE_FALSE_ALARM`, per spectrum): a
      tone in strong noise, such as a -60 dBFS tone in the output of a noisy PWM stage.
      Steady Gaussian noise with no line in it is called a tone with at most that
      probability.
``"twin-tone"``
    Two lines that are not harmonically related (the higher not within two bins of harmonic
    1 to 10 of the lower) carry the band together, standing at least
    ``dominance_db`` above the rest, and the weaker is within ``twin_range_db`` of the
    stronger (SMPTE 4:1 is 12 dB apart, difference-frequency 1:1 is 0 dB).
``"silence"``
    No tone, the band level is at most ``silence_dbfs``, and the short-term level
    is steady (the 10th-to-90th percentile spread of the block levels is at most
    ``steady_db``): noise, perhaps with idle tones, and digital zero.
``"program"``
    Anything else (music, speech, loud or unsteady noise).

The detection threshold for a tone in noise follows from the false-alarm rate (the chi-square
statistics of an averaged spectrum; see :func:`audiodsm.measure.idle_tones.line_threshold`).
The other thresholds are choices of this project, stated here and in the result; they are
not taken from a standard.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.measure.idle_tones import find_idle_tones

__all__ = [
    "KINDS",
    "DOMINANCE_DB",
    "TWIN_RANGE_DB",
    "SILENCE_DBFS",
    "MIN_TONE_DBFS",
    "STEADY_DB",
    "TONE_FALSE_ALARM",
    "ChannelContent",
    "classify_channel",
]

#: The kinds of content, in the words the JSON output uses.
KINDS = ("tone", "twin-tone", "silence", "program")
#: How far the tone(s) must stand above the rest of the band, in dB.
DOMINANCE_DB = 10.0
#: How far below the stronger tone the weaker of a twin tone may be, in dB.
TWIN_RANGE_DB = 20.0
#: Lowest level (dBFS) of a line that makes a channel a "tone" (or each line of a twin tone).
MIN_TONE_DBFS = -100.0
#: Highest band level (dBFS) that still counts as silence.
SILENCE_DBFS = -40.0
#: Largest 10th-to-90th percentile spread of block levels (dB) that counts as steady.
STEADY_DB = 6.0
#: Probability, per spectrum, that steady Gaussian noise with no line in it is called a tone.
TONE_FALSE_ALARM = 1e-3
_MAX_HARMONIC = 10
_FULL_SCALE_SINE_POWER = 0.5


@dataclass(frozen=True)
class ChannelContent:
    """The verdict for one channel.

    Attributes
    ----------
    kind : str
        One of :data:`KINDS`.
    frequencies_hz : tuple of float
        The tone (one value) or twin tone (two values, stronger first); empty otherwise.
    band_dbfs : float
        Level of everything in the band, dBFS (``-inf`` for digital zero).
    dominance_db : float
        How far the strongest line (two lines for a twin tone) stands above the rest of the
        band, in dB.
    reason : str
        One line saying why, for reports.
    false_alarm : float
        The false-alarm rate the tone-in-noise test used (per spectrum).
    """

    kind: str
    frequencies_hz: tuple
    band_dbfs: float
    dominance_db: float
    reason: str
    false_alarm: float = TONE_FALSE_ALARM


def _dbfs(power: float) -> float:
    return 10.0 * np.log10(power / _FULL_SCALE_SINE_POWER) if power > 0 else -np.inf


def _ratio_db(a: float, b: float) -> float:
    if a <= 0:
        return -np.inf
    return np.inf if b <= 0 else 10.0 * np.log10(a / b)


def _lobe(power, band, freq, k, half):
    """In-band power of the main lobe around bin k, and its centre from the whole lobe."""
    k0, k1 = max(k - half, 0), min(k + half + 1, power.size)
    whole = power[k0:k1]
    total = float(whole.sum())
    centre = float(np.dot(whole, freq[k0:k1]) / total) if total > 0 else float(freq[k])
    return float(band[k0:k1].sum()), centre, k0, k1


def _harmonically_related(f1: float, f2: float, bin_hz: float) -> bool:
    """True when the higher line sits on harmonic 1..10 of the lower (within 2 bins)."""
    lo, hi = sorted((f1, f2))
    if lo <= 0:
        return True
    n = round(hi / lo)
    return 1 <= n <= _MAX_HARMONIC and abs(hi - n * lo) <= max(2.0 * bin_hz, 1e-3 * hi)


def classify_channel(
    spectrum,
    *,
    block_levels_dbfs=None,
    band_hz: tuple[float, float] = (20.0, 20000.0),
    dominance_db: float = DOMINANCE_DB,
    twin_range_db: float = TWIN_RANGE_DB,
    silence_dbfs: float = SILENCE_DBFS,
    steady_db: float = STEADY_DB,
    min_tone_dbfs: float = MIN_TONE_DBFS,
    false_alarm: float = TONE_FALSE_ALARM,
) -> ChannelContent:
    """Decide whether a channel holds a tone, a twin tone, silence or program material.

    Parameters
    ----------
    spectrum : Spectrum-like
        An averaged spectrum of the channel with ``freq_hz`` and ``power`` (mean square per
        bin, so that a tone's main lobe sums to its mean square), and ``main_lobe_bins``
        (or a known ``window``): e.g. ``audiodsm.measure.spectrum.averaged_spectrum``.
    block_levels_dbfs : array_like, optional
        Levels of successive short blocks (e.g. 0.25 s); used to tell steady noise from
        program material. Without them the level counts as steady.
    band_hz : (float, float), optional
        The band looked at (AES17 audio band by default).
    dominance_db, twin_range_db, silence_dbfs, steady_db, min_tone_dbfs : float, optional
        Thresholds; see the module docstring.
    false_alarm : float, optional
        Probability, per spectrum, that steady Gaussian noise without a line is called a
        tone (the line detector's threshold is derived from it). The spectrum must carry
        its averaging (``window`` and ``n_averages``) for this test.

    Returns
    -------
    ChannelContent
    """
    power = np.asarray(spectrum.power, dtype=np.float64)
    freq = np.asarray(spectrum.freq_hz, dtype=np.float64)
    if power.ndim != 1 or power.shape != freq.shape or power.size < 16:
        raise ParameterError("spectrum", f"power of shape {power.shape}", "one channel")
    lo, hi = (float(b) for b in band_hz)
    if not 0.0 <= lo < hi:
        raise ParameterError("band_hz", band_hz, "(low, high) with 0 <= low < high")
    half = int(getattr(spectrum, "main_lobe_bins", 0) or 4)
    in_band = (freq >= lo) & (freq <= hi)
    band = np.where(in_band, power, 0.0)
    total = float(band.sum())
    band_dbfs = _dbfs(total)
    if total <= 0.0:
        return ChannelContent(
            "silence", (), band_dbfs, 0.0, "digital zero in the band", false_alarm
        )

    k1 = int(np.argmax(band))
    p1, f1, a0, a1 = _lobe(power, band, freq, k1, half)
    rest1 = max(total - p1, 0.0)
    dom1 = _ratio_db(p1, rest1)

    masked = band.copy()
    masked[a0:a1] = 0.0
    k2 = int(np.argmax(masked))
    p2, f2, _, _ = _lobe(power, masked, freq, k2, half)
    rest2 = max(total - p1 - p2, 0.0)
    dom2 = _ratio_db(p1 + p2, rest2)
    if (
        p2 > 0
        and _dbfs(p2) >= min_tone_dbfs
        and _ratio_db(p1, p2) <= twin_range_db
        and dom2 >= dominance_db
        and not _harmonically_related(f1, f2, float(freq[1] - freq[0]))
    ):
        return ChannelContent(
            "twin-tone",
            (f1, f2),
            band_dbfs,
            dom2,
            f"two lines at {f1:.1f} and {f2:.1f} Hz stand {dom2:.1f} dB above the rest",
            false_alarm,
        )
    if dom1 >= dominance_db and _dbfs(p1) >= min_tone_dbfs:
        return ChannelContent(
            "tone",
            (f1,),
            band_dbfs,
            dom1,
            f"a line at {f1:.1f} Hz stands {dom1:.1f} dB above",
            false_alarm,
        )

    spread = 0.0
    if block_levels_dbfs is not None:
        levels = np.asarray(block_levels_dbfs, dtype=np.float64)
        levels = levels[np.isfinite(levels)]
        if levels.size >= 2:
            p10, p90 = np.percentile(levels, [10.0, 90.0])
            spread = float(p90 - p10)
    if spread <= steady_db:
        # a tone in strong steady noise: the strongest line the detector finds at the
        # stated false-alarm rate
        found = find_idle_tones(spectrum, false_alarm=false_alarm, band_hz=(lo, hi))
        if found.tones and found.tones[0].level_dbfs >= min_tone_dbfs:
            line = found.tones[0]
            line_power = _FULL_SCALE_SINE_POWER * 10.0 ** (line.level_dbfs / 10.0)
            dom = _ratio_db(line_power, max(total - line_power, 0.0))
            return ChannelContent(
                "tone",
                (line.frequency_hz,),
                band_dbfs,
                dom,
                f"a line at {line.frequency_hz:.1f} Hz, {line.level_dbfs:.1f} dBFS, stands "
                f"{line.above_floor_db:.1f} dB above the noise floor (threshold "
                f"{found.threshold_db:.1f} dB for a false-alarm rate of {false_alarm:g})",
                false_alarm,
            )
    if band_dbfs <= silence_dbfs and spread <= steady_db:
        return ChannelContent(
            "silence",
            (),
            band_dbfs,
            dom1,
            f"no dominating line; steady band level {band_dbfs:.1f} dBFS",
            false_alarm,
        )
    why = (
        f"band level {band_dbfs:.1f} dBFS above {silence_dbfs:g} dBFS"
        if band_dbfs > silence_dbfs
        else f"level spread {spread:.1f} dB over {steady_db:g} dB"
    )
    return ChannelContent("program", (), band_dbfs, dom1, f"no dominating line; {why}", false_alarm)
