"""What a channel holds: a tone, a twin tone, silence, or program material.

The `analyze` command measures a file without being told what is in it. This module decides,
from a channel's averaged spectrum and the spread of its short-term levels, which of four
kinds of content it holds, so that the right measurements are made:

``"tone"``
    One spectral line carries the band: it stands at least ``dominance_db`` above everything
    else in the audio band (harmonics and noise together), i.e. THD+N better than
    ``-dominance_db``.
``"twin-tone"``
    Two lines that are not harmonically related (the higher not within two bins of harmonic
    1 to 10 of the lower) carry the band together, standing at least
    ``dominance_db`` above the rest, and the weaker is within ``twin_range_db`` of the
    stronger (SMPTE 4:1 is 12 dB apart, difference-frequency 1:1 is 0 dB).
``"silence"``
    No dominating line, the band level is at most ``silence_dbfs``, and the short-term level
    is steady (the 10th-to-90th percentile spread of the block levels is at most
    ``steady_db``): noise, perhaps with idle tones, and digital zero.
``"program"``
    Anything else (music, speech, loud or unsteady noise).

The thresholds are choices of this project, stated here and in the result; they are not
taken from a standard.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError

__all__ = [
    "KINDS",
    "DOMINANCE_DB",
    "TWIN_RANGE_DB",
    "SILENCE_DBFS",
    "STEADY_DB",
    "ChannelContent",
    "classify_channel",
    "ZERO_LEVEL_DBFS",
    "ChannelAnalysis",
    "analyze_blocks",
]

#: The kinds of content, in the words the JSON output uses.
KINDS = ("tone", "twin-tone", "silence", "program")
#: How far the tone(s) must stand above the rest of the band, in dB.
DOMINANCE_DB = 10.0
#: How far below the stronger tone the weaker of a twin tone may be, in dB.
TWIN_RANGE_DB = 20.0
#: Highest band level (dBFS) that still counts as silence.
SILENCE_DBFS = -40.0
#: Largest 10th-to-90th percentile spread of block levels (dB) that counts as steady.
STEADY_DB = 6.0
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
    """

    kind: str
    frequencies_hz: tuple
    band_dbfs: float
    dominance_db: float
    reason: str


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
    dominance_db, twin_range_db, silence_dbfs, steady_db : float, optional
        Thresholds; see the module docstring.

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
        return ChannelContent("silence", (), band_dbfs, 0.0, "digital zero in the band")

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
        )
    if dom1 >= dominance_db:
        return ChannelContent(
            "tone", (f1,), band_dbfs, dom1, f"a line at {f1:.1f} Hz stands {dom1:.1f} dB above"
        )

    spread = 0.0
    if block_levels_dbfs is not None:
        levels = np.asarray(block_levels_dbfs, dtype=np.float64)
        levels = levels[np.isfinite(levels)]
        if levels.size >= 2:
            p10, p90 = np.percentile(levels, [10.0, 90.0])
            spread = float(p90 - p10)
    if band_dbfs <= silence_dbfs and spread <= steady_db:
        return ChannelContent(
            "silence",
            (),
            band_dbfs,
            dom1,
            f"no dominating line; steady band level {band_dbfs:.1f} dBFS",
        )
    why = (
        f"band level {band_dbfs:.1f} dBFS above {silence_dbfs:g} dBFS"
        if band_dbfs > silence_dbfs
        else f"level spread {spread:.1f} dB over {steady_db:g} dB"
    )
    return ChannelContent("program", (), band_dbfs, dom1, f"no dominating line; {why}")


# ---------------------------------------------------------------------------------------------
# Measuring a whole multichannel signal, streamed, according to what each channel holds
# ---------------------------------------------------------------------------------------------

#: Level reported for digital zero, where the true level is minus infinity (JSON has no -inf).
ZERO_LEVEL_DBFS = -400.0
#: A tone counts as the AES17 dynamic-range stimulus within this many dB of -60 dBFS.
DR_TONE_WINDOW_DB = 1.0
_LEVEL_BLOCK_S = 0.25
_LEAD_S = 1.0
_THD_LEAD_S = 2.0
_FIT_PIECE_S = 1.0


@dataclass(frozen=True)
class ChannelAnalysis:
    """The measurements of one channel, by the kind of content found.

    Attributes
    ----------
    channel : int
        Channel number, from 1.
    content : ChannelContent
        What the channel holds.
    fundamental_hz : float or None
        Fitted tone frequency (tone only).
    level_dbfs : float or None
        Tone: fitted amplitude in dBFS. Twin tone and program: band-limited level of the whole
        signal. Silence: None.
    thd_n_db, thd_n_db_a : float or None
        THD+N ratio, unweighted and A-weighted residual (tone only).
    thd_db : float or None
        THD from harmonics 2..10 inside the band (tone only; None when no harmonic has any
        power at all).
    noise_dbfs, noise_dbfs_a, noise_dbfs_ccir : float
        Band-limited residual after removing the tone (or both tones of a twin tone), or the
        whole signal for silence and program, unweighted / A / CCIR-RMS, in dBFS.
    dynamic_range_db, dynamic_range_db_a : float or None
        Minus the matching noise level, given only for a tone within ±1 dB of -60 dBFS.
    tones : tuple of SpectralLine
        Lines found by the idle-tone detector in the residual (tone, twin tone) or in the
        signal (silence); empty for program material.
    """

    channel: int
    content: ChannelContent
    fundamental_hz: float | None
    level_dbfs: float | None
    thd_n_db: float | None
    thd_n_db_a: float | None
    thd_db: float | None
    noise_dbfs: float
    noise_dbfs_a: float
    noise_dbfs_ccir: float
    dynamic_range_db: float | None
    dynamic_range_db_a: float | None
    tones: tuple

    def to_dict(self) -> dict:
        """The channel's entry in the `analyze` JSON output (keys are stable)."""

        def num(v, digits=4):
            if v is None:
                return None
            v = float(v)
            if not np.isfinite(v):
                return ZERO_LEVEL_DBFS if v < 0 else None
            return round(v, digits)

        return {
            "channel": self.channel,
            "signal": self.content.kind,
            "fundamental_hz": num(self.fundamental_hz, 6),
            "level_dbfs": num(self.level_dbfs),
            "thd_n_db": num(self.thd_n_db),
            "thd_n_db_a": num(self.thd_n_db_a),
            "thd_db": num(self.thd_db),
            "noise_dbfs": num(self.noise_dbfs),
            "noise_dbfs_a": num(self.noise_dbfs_a),
            "noise_dbfs_ccir": num(self.noise_dbfs_ccir),
            "dynamic_range_db": num(self.dynamic_range_db),
            "dynamic_range_db_a": num(self.dynamic_range_db_a),
            "tones": [
                {"frequency_hz": num(t.frequency_hz, 3), "level_dbfs": num(t.level_dbfs)}
                for t in self.tones
            ],
        }


def _block_levels(x: np.ndarray, frames: int) -> np.ndarray:
    """Levels in dBFS of consecutive pieces of ``frames`` (a short tail piece is dropped)."""
    n = (x.shape[0] // frames) * frames
    if n == 0:
        return np.zeros((0, x.shape[1]))
    pieces = x[:n].reshape(n // frames, frames, x.shape[1])
    pieces = pieces - pieces.mean(axis=1, keepdims=True)
    ms = np.mean(pieces * pieces, axis=1)
    with np.errstate(divide="ignore"):
        return 10.0 * np.log10(ms / _FULL_SCALE_SINE_POWER)


def _remove_tones(x, freqs, rate, fit_sine):
    """Subtract 3-parameter sine fits at fixed frequencies, piece by piece (about 1 s each).

    Fitting short pieces lets the removal follow a frequency known to a few parts per
    billion, as the residual meter does; the tones are removed one after the other, which
    equals a joint fit up to their small cross-correlation over a piece.
    """
    piece = max(16, int(round(_FIT_PIECE_S * rate)))
    out = np.empty_like(x)
    for start in range(0, x.size, piece):
        r = x[start : start + piece]
        if r.size < 16:  # a short tail joins the piece before it
            r = x[start - piece : start + piece]
            for f in freqs:
                r = fit_sine(r, rate_hz=rate, frequency_hz=f, four_parameter=False).residual
            out[start - piece :] = r
            break
        for f in freqs:
            r = fit_sine(r, rate_hz=rate, frequency_hz=f, four_parameter=False).residual
        out[start : start + r.size] = r
    return out


def analyze_blocks(
    open_blocks,
    *,
    rate_hz: float,
    channels: int,
    n_frames: int,
    progress=None,
) -> list[ChannelAnalysis]:
    """Classify and measure every channel of a long signal, streamed in blocks.

    Two passes over the signal: the first accumulates each channel's averaged spectrum and
    short-term levels and decides what the channel holds (:func:`classify_channel`); the
    second measures accordingly, with memory bounded by the block size:

    * tone: frequency by a 4-parameter sine fit on the first second; the AES17 residual meter
      (fundamental removed by 3-parameter fits, band-limited 20 Hz-20 kHz, weighted) gives
      the level, THD+N and noise; THD from harmonics 2..10 on the first two seconds; the
      detector runs on the spectrum of the residual;
    * twin tone: both tones removed block by block (3-parameter fits in turn), the residual
      metered as noise and searched for lines (the intermodulation products show there);
    * silence: the whole signal metered as idle-channel noise and searched for idle tones;
    * program: the whole signal metered; no line search.

    Parameters
    ----------
    open_blocks : callable
        ``open_blocks()`` returns a fresh iterator of float64 blocks ``(frames, channels)``
        over the whole signal (it is called twice).
    rate_hz : float
        Sample rate (44.1 kHz or more).
    channels : int
        Number of channels.
    n_frames : int
        Total frames (to size the spectra; must match what the blocks deliver).
    progress : callable, optional
        Called with the number of frames just processed (each pass counts the signal once).

    Returns
    -------
    list of ChannelAnalysis

    Raises
    ------
    ParameterError
        When the signal is too short for the spectral resolution needed
        (:func:`~audiodsm.measure.idle_tones.segment_frames_for`).
    """
    from audiodsm.measure.aes17 import (
        fit_sine,
        read_residual_meter,
        start_residual_meter,
        thd,
        update_residual_meter,
    )
    from audiodsm.measure.idle_tones import find_idle_tones, segment_frames_for
    from audiodsm.measure.spectrum import accumulate_spectrum

    rate = float(rate_hz)
    seg = segment_frames_for(int(n_frames), rate)
    level_frames = max(1, int(round(_LEVEL_BLOCK_S * rate)))
    lead_frames = int(round(max(_LEAD_S, _THD_LEAD_S) * rate))

    # pass 1: spectra, short-term levels and the leading stretch
    spectra = [None] * channels
    levels = []
    lead = []
    lead_have = 0
    carry = np.zeros((0, channels))
    for block in open_blocks():
        for c in range(channels):
            spectra[c] = accumulate_spectrum(
                block[:, c], rate_hz=rate, state=spectra[c], segment_frames=seg
            )
        data = np.concatenate([carry, block]) if carry.size else block
        lv = _block_levels(data, level_frames)
        levels.append(lv)
        carry = data[lv.shape[0] * level_frames :]
        if lead_have < lead_frames:
            take = block[: lead_frames - lead_have]
            lead.append(take.copy())
            lead_have += take.shape[0]
        if progress is not None:
            progress(block.shape[0])
    lead_x = np.concatenate(lead) if lead else np.zeros((0, channels))
    level_arr = np.concatenate(levels) if levels else np.zeros((0, channels))
    first_spectra = [s.spectrum() for s in spectra]
    contents = [
        classify_channel(first_spectra[c], block_levels_dbfs=level_arr[:, c])
        for c in range(channels)
    ]

    # the fits that fix each tone's frequency
    freqs: list[tuple] = []
    for c, content in enumerate(contents):
        one = lead_x[: int(round(_LEAD_S * rate)), c]
        if content.kind == "tone":
            f = fit_sine(one, rate_hz=rate, frequency_hz=content.frequencies_hz[0]).frequency_hz
            freqs.append((f,))
        elif content.kind == "twin-tone":
            # alternate 4-parameter fits, each with the other tone's model removed
            two = lead_x[:, c]
            fa, fb = content.frequencies_hz
            other = np.zeros_like(two)
            for _ in range(3):
                fit_a = fit_sine(two - other, rate_hz=rate, frequency_hz=fa)
                fa = fit_a.frequency_hz
                fit_b = fit_sine(two - fit_a.model(two.size), rate_hz=rate, frequency_hz=fb)
                fb = fit_b.frequency_hz
                other = fit_b.model(two.size)
            freqs.append((fa, fb))
        else:
            freqs.append(())

    # pass 2: meters (and residual spectra for tone / twin tone)
    meters = []
    for c, content in enumerate(contents):
        f = freqs[c][0] if content.kind == "tone" else None
        meters.append(start_residual_meter(rate_hz=rate, frequency_hz=f))
    residual_spectra = [None] * channels
    for block in open_blocks():
        for c, content in enumerate(contents):
            x = np.ascontiguousarray(block[:, c])
            if content.kind == "tone":
                meters[c] = update_residual_meter(x, meters[c])
            if content.kind in ("tone", "twin-tone") and x.size >= 16:
                r = _remove_tones(x, freqs[c], rate, fit_sine)
                residual_spectra[c] = accumulate_spectrum(
                    r, rate_hz=rate, state=residual_spectra[c], segment_frames=seg
                )
                if content.kind == "twin-tone":
                    meters[c] = update_residual_meter(r, meters[c])
            elif content.kind == "twin-tone":
                pass  # a final block of under 16 frames is too short to fit: left out
            else:
                meters[c] = update_residual_meter(x, meters[c])
        if progress is not None:
            progress(block.shape[0])

    results = []
    for c, content in enumerate(contents):
        readings = read_residual_meter(meters[c])
        noise = readings.noise_dbfs
        fundamental = level = thd_n = thd_n_a = thd_db = dr = dr_a = None
        tones: tuple = ()
        if content.kind == "tone":
            fundamental = freqs[c][0]
            level = readings.fundamental_dbfs
            thd_n = readings.thd_n_db["unweighted"]
            thd_n_a = readings.thd_n_db["a"]
            ratio = thd(lead_x[:, c], rate_hz=rate, frequency_hz=fundamental).ratio_db
            thd_db = ratio if np.isfinite(ratio) else None
            if abs(level + 60.0) <= DR_TONE_WINDOW_DB:
                dr, dr_a = -noise["unweighted"], -noise["a"]
            tones = find_idle_tones(residual_spectra[c].spectrum()).tones
        elif content.kind == "twin-tone":
            level = first_spectra[c].band_noise_dbfs(20.0, 20000.0)
            tones = find_idle_tones(residual_spectra[c].spectrum()).tones
        elif content.kind == "silence":
            tones = find_idle_tones(first_spectra[c]).tones
        else:
            level = readings.total_dbfs
        results.append(
            ChannelAnalysis(
                channel=c + 1,
                content=content,
                fundamental_hz=fundamental,
                level_dbfs=level,
                thd_n_db=thd_n,
                thd_n_db_a=thd_n_a,
                thd_db=thd_db,
                noise_dbfs=noise["unweighted"],
                noise_dbfs_a=noise["a"],
                noise_dbfs_ccir=noise["ccir"],
                dynamic_range_db=dr,
                dynamic_range_db_a=dr_a,
                tones=tones,
            )
        )
    return results
