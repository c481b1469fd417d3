"""Streamed analysis of a whole multichannel signal, according to what each channel holds.

:func:`analyze_blocks` reads a signal block by block: it surveys each channel, finds the span
where a tone has settled (transients at its edges left out), decides what each
channel holds with :func:`audiodsm.measure.classify.classify_channel` and makes the
measurements that fit its content (THD+N of a tone, the idle noise and tones of silence, the
level of program material). The result is one :class:`ChannelAnalysis` per channel. The
`analyze` command (:mod:`audiodsm.evaluate.analyze`) is built on it.
"""

from __future__ import annotations

import warnings
from contextlib import contextmanager
from dataclasses import dataclass, replace

import numpy as np
from scipy import signal

from audiodsm.errors import ParameterError
from audiodsm.measure.classify import (
    _FULL_SCALE_SINE_POWER,
    ChannelContent,
    _dbfs,
    _ratio_db,
    classify_channel,
)
from audiodsm.measure.idle_tones import (
    accumulate_line_spectrum,
    find_idle_tones,
    segment_frames_for,
)
from audiodsm.measure.sine_fit import fit_sine
from audiodsm.measure.tone import thd

__all__ = [
    "ZERO_LEVEL_DBFS",
    "LINE_FLOOR_DBFS",
    "SURVEY_SPANS",
    "ChannelAnalysis",
    "analyze_blocks",
    "OVERFLOW_PEAK",
    "SETTLE_BLOCK_S",
    "SETTLE_MARGIN_DB",
    "SETTLE_SEARCH_S",
    "SPAN_SOURCES",
    "WITHHELD_OVER_FULL_SCALE",
]


# ---------------------------------------------------------------------------------------------
# Measuring a whole multichannel signal, streamed, according to what each channel holds
# ---------------------------------------------------------------------------------------------

#: Level reported for digital zero, where the true level is minus infinity (JSON has no -inf).
ZERO_LEVEL_DBFS = -400.0
#: Lines weaker than this are not reported: the rounding of 64-bit arithmetic on a full-scale
#: signal leaves structured residue near -250 dBFS, and no file format holds a real line
#: there next to a signal (24-bit LSB -141 dBFS, 32-bit -187 dBFS, float32 relative -144 dB).
LINE_FLOOR_DBFS = -200.0
#: A tone counts as the AES17 dynamic-range stimulus within this many dB of -60 dBFS.
DR_TONE_WINDOW_DB = 1.0
#: Number of evenly spread spans a long file's survey reads.
SURVEY_SPANS = 32
#: Samples larger than this in magnitude (+2000 dBFS) are refused: squared and summed over
#: a segment they would come near the float64 limit (about 1.8e308), and no real or simulated
#: signal has them; they are a broken file or an overflowed computation.
OVERFLOW_PEAK = 1e100
#: Length of the residual blocks the settling search reads, in seconds.
SETTLE_BLOCK_S = 0.01
#: A residual block more than this above the loudest block of the settled reference stretch
#: counts as not yet settled, in dB. Measured against the loudest rather than the typical
#: block, so that a residual whose short-term level swings (hum, low-frequency noise) does
#: not look unsettled.
SETTLE_MARGIN_DB = 3.0
#: How far into a tone, from where it first plays at full level, the settling search looks (s).
SETTLE_SEARCH_S = 1.0
#: The figures withheld for a channel whose samples go beyond full scale.
WITHHELD_OVER_FULL_SCALE = (
    "thd_n_db",
    "thd_n_db_a",
    "thd_db",
    "dynamic_range_db",
    "dynamic_range_db_a",
)
#: Where a channel's measured span came from, in the words the JSON output uses.
SPAN_SOURCES = ("settled", "whole", "given")
_SETTLE_REF_S = 0.25
_SETTLE_FLOOR_REL = 1e-20  # the floor never counts lower than -200 dB under the tone
_SURVEY_SPAN_S = 1.0
_LEVEL_BLOCK_S = 0.25
_LEAD_S = 1.0
_THD_LEAD_S = 1.0
_FIT_PIECE_S = 1.0
_SCAN_FRAMES = 1 << 18
_BAND_HZ = (20.0, 20000.0)


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
        Tone: fitted amplitude in dBFS. Twin tone and program: band-limited level of the
        measured span. Silence: None.
    thd_n_db, thd_n_db_a : float or None
        THD+N ratio, unweighted and A-weighted residual (tone only; withheld when the
        channel goes beyond full scale).
    thd_db : float or None
        THD from harmonics 2..10 inside the band (tone only; None when no harmonic has any
        power at all, or when withheld).
    noise_dbfs, noise_dbfs_a, noise_dbfs_ccir : float
        Band-limited residual after removing the tone (or both tones of a twin tone), or the
        signal itself for silence and program, unweighted / A / CCIR-RMS, in dBFS.
    dynamic_range_db, dynamic_range_db_a : float or None
        Minus the matching noise level, given only for a tone within ±1 dB of -60 dBFS.
    tones : tuple of SpectralLine
        Lines found by the idle-tone detector in the residual (tone, twin tone: harmonics and
        intermodulation products show here; the trace of a removed tone within a main lobe
        of its frequency is left out) or in the signal (silence); empty for program.
    peak_dbfs : float
        Largest sample magnitude anywhere in the signal, in dB relative to full scale 1.0
        (so a full-scale sine peaks at 0.00); ``-inf`` for digital zero.
    over_full_scale : bool
        Whether any sample goes beyond ±1.0: a converter would clip it. The distortion
        figures (:data:`WITHHELD_OVER_FULL_SCALE`) are then withheld (None).
    span_s : (float, float)
        Start and end, in seconds from the start of the signal, of the stretch measured.
    span_source : str
        One of :data:`SPAN_SOURCES`: ``"settled"`` (a tone's settled part, found from its
        residual), ``"whole"`` (the whole signal) or ``"given"`` (set by the caller).
    notes : tuple of str
        Warnings raised while measuring (a fit that did not converge, and the like) and
        remarks on the figures, one line each.
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
    peak_dbfs: float = -np.inf
    over_full_scale: bool = False
    span_s: tuple = (0.0, 0.0)
    span_source: str = "whole"
    notes: tuple = ()

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
            "peak_dbfs": num(self.peak_dbfs),
            "over_full_scale": bool(self.over_full_scale),
            "span_s": [num(self.span_s[0], 6), num(self.span_s[1], 6)],
            "span_source": self.span_source,
            "notes": list(self.notes),
        }


@contextmanager
def _noted(notes: list):
    """Turn the Python warnings raised inside the block into lines of ``notes``.

    Warnings (a fit that did not converge, a numerical overflow) belong in the result, where
    a reader sees them next to the figures they concern, not on stderr with source paths.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        yield
    for w in caught:
        text = " ".join(str(w.message).split())
        if text not in notes:
            notes.append(text)


def _peaks(x: np.ndarray) -> np.ndarray:
    """Largest magnitude per channel (NaN propagates)."""
    if x.shape[0] == 0:
        return np.zeros(x.shape[1])
    return np.max(np.abs(x), axis=0)


def _check_overflow(peaks: np.ndarray) -> None:
    bad = np.flatnonzero(~(peaks <= OVERFLOW_PEAK))
    if bad.size:
        c = int(bad[0])
        raise ParameterError(
            "samples",
            f"magnitude {float(peaks[c]):.3g} in channel {c + 1}",
            f"magnitudes up to {OVERFLOW_PEAK:.0e} (+2000 dBFS); larger ones overflow the "
            "measurement",
        )


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


class _ToneRemover:
    """Remove tones of known frequency from a stream by least-squares fits, piece by piece.

    Each piece of ``piece`` frames (about 1 s; the last piece takes the remainder, one to
    two pieces long) gets a joint fit of DC and a cosine and sine at each frequency (IEEE
    Std 1057 3-parameter fit, extended to several known frequencies), solved through its
    normal equations (the tones are well apart and a piece holds many cycles, so the Gram
    matrix is well conditioned). Refitting amplitude and phase every piece lets the removal
    follow a frequency known to a few parts per billion.
    Pieces are cut from the concatenated stream, so block sizes do not change the result.
    """

    def __init__(self, freqs_hz, rate_hz: float, piece: int):
        self.freqs = tuple(float(f) for f in freqs_hz)
        self.rate = float(rate_hz)
        self.piece = int(piece)
        self.pending = np.zeros(0)
        self._full = None
        self._amps: list = []

    def _basis(self, n: int):
        """DC, cosine and sine columns over n frames, phase counted from the piece start.

        They span the same space as columns with the phase counted from the stream start, so
        the fit (and its residual) is the same; full pieces all share one basis and one
        factorised Gram matrix, which makes the removal cheap.
        """
        if n == self.piece and self._full is not None:
            return self._full
        k = np.arange(n, dtype=np.float64)
        cols = [np.ones(n)]
        for f in self.freqs:
            phase = 2.0 * np.pi * np.mod(k * (f / self.rate), 1.0)
            cols += [np.cos(phase), np.sin(phase)]
        d = np.column_stack(cols)
        basis = (d, np.linalg.inv(d.T @ d))
        if n == self.piece:
            self._full = basis
        return basis

    def _fit(self, x: np.ndarray) -> np.ndarray:
        d, gram_inv = self._basis(x.size)
        coef = gram_inv @ (x @ d)
        self._amps.append(np.hypot(coef[1::2], coef[2::2]))
        return x - d @ coef

    def add(self, x: np.ndarray) -> np.ndarray:
        """Feed samples; return the residual of every piece completed so far."""
        data = np.concatenate([self.pending, x]) if self.pending.size else x
        out = []
        pos = 0
        while data.size - pos >= 2 * self.piece:  # keep one piece back for the remainder
            out.append(self._fit(data[pos : pos + self.piece]))
            pos += self.piece
        self.pending = data[pos:].copy()
        return np.concatenate(out) if out else np.zeros(0)

    def finish(self) -> np.ndarray:
        """Fit what is left (one to two pieces, or less for a short signal)."""
        rest, self.pending = self.pending, np.zeros(0)
        if rest.size < 2 * len(self.freqs) + 1:
            return np.zeros(0)  # too few frames to fit: left out
        return self._fit(rest)

    def amplitudes(self) -> np.ndarray:
        """Each tone's fitted peak amplitude where it plays.

        The median over the pieces whose amplitude is within 3 dB of the largest: a stretch
        of silence before or after the tone (common in captured files), and the pieces only
        partly covered by it, do not pull the level down.
        """
        if not self._amps:
            return np.zeros(len(self.freqs))
        amps = np.array(self._amps)
        out = np.empty(amps.shape[1])
        for k in range(amps.shape[1]):
            a = amps[:, k]
            out[k] = np.median(a[a >= a.max() * 10 ** (-3.0 / 20.0)])
        return out


def _survey_spans(n_frames: int, span: int, count: int) -> list[int]:
    """Start frames of ``count`` spans of ``span`` frames spread evenly over the signal."""
    last = n_frames - span
    return sorted({int(round(v)) for v in np.linspace(0, last, count)})


def _loud_extent(levels, starts, level_frames: int, n_frames: int, scan) -> tuple[int, int]:
    """First and last frame of the stretch where a channel plays at full level.

    From the survey's quarter-second block levels of one channel (``levels``, their start
    frames ``starts``, sorted): from the first to the end of the last block within 3 dB of
    the loudest. Where the survey sampled spans, the unread stretch next to the first or last
    loud block is scanned (``scan(lo, hi) -> (levels, starts)``) so that the edge is found
    to a block wherever it lies.
    """
    levels = np.asarray(levels, dtype=np.float64)
    finite = np.isfinite(levels)
    if not finite.any():
        return 0, n_frames
    top = levels[finite].max()
    idx = np.flatnonzero(finite & (levels >= top - 3.0))
    i0, i1 = int(idx[0]), int(idx[-1])
    e0, e1 = int(starts[i0]), int(starts[i1]) + level_frames
    lo = int(starts[i0 - 1]) + level_frames if i0 > 0 else 0
    if e0 - lo >= level_frames:  # a stretch the survey did not read
        lv, st = scan(lo, e0)
        hit = np.flatnonzero(np.isfinite(lv) & (lv >= top - 3.0))
        if hit.size:
            e0 = int(st[hit[0]])
    hi = int(starts[i1 + 1]) if i1 + 1 < len(starts) else n_frames
    if hi - e1 >= level_frames:
        lv, st = scan(e1, hi)
        hit = np.flatnonzero(np.isfinite(lv) & (lv >= top - 3.0))
        if hit.size:
            e1 = int(st[hit[-1]]) + level_frames
    return e0, min(e1, n_frames)


def _band_limited(x: np.ndarray, rate: float) -> np.ndarray:
    """``x`` through a linear-phase low-pass that keeps the audio band (20 kHz).

    Kaiser-window FIR with 100 dB stop-band attenuation from the top of the band to 24 kHz
    (or the Nyquist frequency), sized by Kaiser's formula (``scipy.signal.kaiserord``), so
    that shaped noise above the band does not hide a transient inside it.
    """
    top = min(rate / 2.0, 24000.0)
    if top <= _BAND_HZ[1] or x.size == 0:
        return x
    width = top - _BAND_HZ[1]
    taps, beta = signal.kaiserord(100.0, width / (rate / 2.0))
    h = signal.firwin(taps | 1, _BAND_HZ[1] + width / 2.0, window=("kaiser", beta), fs=rate)
    return signal.fftconvolve(x, h, mode="same")


def _unsettled_frames(x: np.ndarray, freqs, rate: float, block: int, ref: int) -> int:
    """How many frames at the start of ``x`` precede the settled tone.

    ``x`` runs from outside the tone (its outer edge) inwards; its last ``ref`` frames are
    taken as settled. The tone(s) at ``freqs`` (and DC) are fitted by least squares on that
    reference stretch and removed from all of ``x``; the residual is band-limited and cut
    into blocks of ``block`` frames from the outer edge, each with its mean removed (slow
    drift below the band, as in a capture's DC, is not a transient). The limit is the power of the
    loudest block of the reference stretch; scanning outwards from it, the first block more
    than :data:`SETTLE_MARGIN_DB` above that ends the settled part.
    """
    n = x.size
    nb = n // block
    ref = min(ref, n // 2)
    ref_blocks = ref // block
    if ref_blocks < 1 or nb <= ref_blocks:
        return 0
    k = np.arange(n, dtype=np.float64)
    cols = [np.ones(n)]
    for f in freqs:
        phase = 2.0 * np.pi * np.mod(k * (f / rate), 1.0)
        cols += [np.cos(phase), np.sin(phase)]
    d = np.column_stack(cols)
    coef = np.linalg.lstsq(d[n - ref :], x[n - ref :], rcond=None)[0]
    r = _band_limited(x - d @ coef, rate)
    p = np.var(r[: nb * block].reshape(nb, block), axis=1)  # mean removed: drift is no transient
    limit = float(np.max(p[nb - ref_blocks :]))
    tone_power = float(np.sum(coef[1:] ** 2)) / 2.0
    limit = max(limit, tone_power * _SETTLE_FLOOR_REL, np.finfo(float).tiny)
    over = np.flatnonzero(p[: nb - ref_blocks] > limit * 10.0 ** (SETTLE_MARGIN_DB / 10.0))
    return int(over[-1] + 1) * block if over.size else 0


def _settled_span(read, c: int, freqs, rate: float, extent, n_frames: int, level_frames: int):
    """Start and end frame of the settled part of the tone(s) of channel ``c``.

    The head is searched from one level block before the loud stretch ``extent`` to
    :data:`SETTLE_SEARCH_S` into it, the tail likewise backwards (a sine reversed in time is
    a sine of the same frequency, so the same search serves).
    """
    e0, e1 = extent
    block = max(1, int(round(SETTLE_BLOCK_S * rate)))
    search = int(round(SETTLE_SEARCH_S * rate))
    ref = int(round(_SETTLE_REF_S * rate))
    a, b = max(0, e0 - level_frames), min(e1, e0 + search)
    start = a + _unsettled_frames(read(a, b - a)[:, c], freqs, rate, block, ref) if b > a else e0
    a, b = max(e0, e1 - search), min(n_frames, e1 + level_frames)
    tail = read(a, b - a)[:, c][::-1] if b > a else np.zeros(0)
    stop = b - _unsettled_frames(np.ascontiguousarray(tail), freqs, rate, block, ref)
    return start, stop


def _cut_blocks(blocks, start: int, stop: int):
    """The frames ``start .. stop`` of a block stream, as blocks."""
    pos = 0
    for block in blocks:
        end = pos + block.shape[0]
        if end > start:
            piece = block[max(start - pos, 0) : max(stop - pos, 0)]
            if piece.shape[0]:
                yield piece
        pos = end
        if pos >= stop:
            break


def _stretch_from_blocks(open_blocks, start: int, frames: int) -> np.ndarray:
    """Frames ``start .. start+frames`` of a block stream (stops reading once it has them)."""
    out, pos, need = [], 0, frames
    for block in open_blocks():
        end = pos + block.shape[0]
        if end > start:
            piece = block[max(start - pos, 0) :][:need]
            out.append(piece.copy())
            need -= piece.shape[0]
            if need <= 0:
                break
        pos = end
    return np.concatenate(out)


def _lines_apart(spectrum, freqs, floor_dbfs=LINE_FLOOR_DBFS):
    """Lines in a residual spectrum, leaving out what remains of the removed tones.

    A removed tone leaves a trace far below itself (its frequency is known to a few parts
    per billion, not exactly); that trace is not a spurious line, so lines within one main
    lobe plus a bin of a removed tone are dropped.
    """
    found = _real_lines(find_idle_tones(spectrum).tones, floor_dbfs)
    bin_hz = float(spectrum.freq_hz[1] - spectrum.freq_hz[0])
    reach = (int(getattr(spectrum, "main_lobe_bins", 4)) + 1) * bin_hz
    return tuple(t for t in found if all(abs(t.frequency_hz - f) > reach for f in freqs))


def _real_lines(lines, floor_dbfs=LINE_FLOOR_DBFS) -> tuple:
    """Lines at or above ``floor_dbfs`` (below it they are float64 rounding).

    The floor is :data:`LINE_FLOOR_DBFS`, raised by the signal's peak where that is above
    full scale (the rounding residue scales with the signal).
    """
    return tuple(t for t in lines if t.level_dbfs >= floor_dbfs)


def analyze_blocks(
    open_blocks,
    *,
    rate_hz: float,
    channels: int,
    n_frames: int,
    read_span=None,
    progress=None,
    span_frames=None,
) -> list[ChannelAnalysis]:
    """Classify and measure every channel of a long signal, streamed in blocks.

    First a survey decides what each channel holds (:func:`classify_channel`) from an
    averaged spectrum and short-term levels: of the whole signal when it is short or when
    ``read_span`` is not given, otherwise of :data:`SURVEY_SPANS` one-second spans spread
    evenly over it. Then, for a tone or twin tone, the span to measure is settled
    (see Notes), and one streamed pass measures, with memory bounded by the block size:

    * tone: the frequency from a 4-parameter sine fit (IEEE Std 1057) on one second where
      the tone plays; the tone then removed piece by piece (about 1 s) by least-squares fits
      at that frequency; the level is the median fitted amplitude over the pieces within
      3 dB of the largest; noise is the residual's averaged spectrum summed over
      20 Hz-20 kHz, unweighted and weighted (A, CCIR-RMS); THD+N is that noise over the
      band-limited total (fundamental plus residual; the weighting applies to the residual
      only); THD from harmonics 2..10 fitted on the first second of the span; lines
      searched in the residual spectrum;
    * twin tone: both tones removed the same way (jointly); noise and lines from the
      residual (intermodulation products show as lines); level = combined band level;
    * silence: noise and idle tones from the signal's own spectrum;
    * program: band level of the signal; no line search.

    Parameters
    ----------
    open_blocks : callable
        ``open_blocks()`` returns a fresh iterator of float64 blocks ``(frames, channels)``
        over the whole signal.
    rate_hz : float
        Sample rate (44.1 kHz or more).
    channels : int
        Number of channels.
    n_frames : int
        Total frames (to size the spectra; must match what the blocks deliver).
    read_span : callable, optional
        ``read_span(start, frames)`` returns ``(frames, channels)`` float64 from ``start``;
        lets the survey sample a long file instead of reading it all twice.
    progress : callable, optional
        Called with the number of frames just processed.
    span_frames : (int, int), optional
        Measure only frames ``start .. stop`` of the signal, every channel, as if the rest
        were not there (no settling search). Default: each tone's settled part, the whole
        signal for other content.

    Returns
    -------
    list of ChannelAnalysis
        Spans in seconds from the start of the whole signal; the Python warnings raised
        while measuring are in each channel's ``notes``, not on stderr.

    Raises
    ------
    ParameterError
        When the signal (or the span) is too short for the spectral resolution needed
        (:func:`~audiodsm.measure.idle_tones.segment_frames_for`), when ``span_frames`` is
        outside the signal, or when a sample is larger in magnitude than
        :data:`OVERFLOW_PEAK`.

    Notes
    -----
    *Settled span* (AES17 measures after the device has settled). The survey's block
    levels give the stretch where the tone plays at full level (from the first to the last
    quarter-second block within 3 dB of the loudest). Near each end of it, the tone is
    fitted on a quarter second well inside and removed, and the residual, band-limited to
    20 kHz, is read in 10 ms blocks outwards; the first block more than
    :data:`SETTLE_MARGIN_DB` above the loudest block of that quarter second ends the settled
    part. This skips the
    start and end transients of a rendered or captured tone (and any silence before or
    after it) up to :data:`SETTLE_SEARCH_S` into the tone; longer transients need
    ``span_frames``. When the settled part is too short to measure, the loud stretch is
    measured instead, and failing that the whole signal, with a note.

    Noise levels come from the averaged spectrum (frequency-domain band limits and
    weightings, :meth:`audiodsm.measure.spectrum.Spectrum.band_noise_dbfs`) rather than
    from time-domain filters: this is what keeps a ten-minute 96 kHz file within seconds.
    On white noise the two agree within 0.1 dB (tested against
    :func:`audiodsm.measure.tone.thd_plus_noise`).

    References
    ----------
    .. [1] AES17-2020, AES standard method for digital audio engineering - Measurement of
       digital audio equipment.
    .. [2] IEEE Std 1057-2017, Standard for Digitizing Waveform Recorders (sine fits).
    """
    rate = float(rate_hz)
    n_frames = n_total = int(n_frames)
    common: list = []
    offset = 0
    if span_frames is not None:
        start, stop = (int(v) for v in span_frames)
        if not 0 <= start < stop <= n_frames:
            raise ParameterError(
                "span", f"frames {start} to {stop}", f"a stretch inside the {n_frames} frames"
            )
        offset = start
        inner_blocks = open_blocks

        def open_blocks():
            return _cut_blocks(inner_blocks(), start, stop)

        if read_span is not None:
            inner_read = read_span

            def read_span(at, frames):
                return inner_read(start + at, frames)

        n_frames = stop - start
    with _noted(common):
        results = _analyze(
            open_blocks, rate, int(channels), n_frames, read_span, progress, span_frames is None
        )
    if progress is not None and span_frames is not None:
        progress(int(n_total) - n_frames)  # the frames outside the span count as done
    out = []
    for r in results:
        notes = list(r.notes) + [n for n in common if n not in r.notes]
        out.append(
            replace(
                r,
                span_s=(r.span_s[0] + offset / rate, r.span_s[1] + offset / rate),
                span_source="given" if span_frames is not None else r.span_source,
                notes=tuple(notes),
            )
        )
    return out


def _analyze(open_blocks, rate, channels, n_frames, read_span, progress, settle):
    """The body of :func:`analyze_blocks`, on the (possibly cut) signal."""
    seg = segment_frames_for(n_frames, rate)
    level_frames = max(1, int(round(_LEVEL_BLOCK_S * rate)))
    piece = max(seg, int(round(_FIT_PIECE_S * rate)))
    span = max(2 * seg, int(round(_SURVEY_SPAN_S * rate)))
    notes: list = [[] for _ in range(channels)]

    def read(start, frames):
        if read_span is not None:
            x = np.asarray(read_span(start, frames), dtype=np.float64)
        else:
            x = _stretch_from_blocks(open_blocks, start, frames)
        _check_overflow(_peaks(x))
        return x

    def scan(c):
        def levels_between(lo, hi):
            lv, st = [], []
            step = max(level_frames, _SCAN_FRAMES // level_frames * level_frames)
            for at in range(lo, hi - level_frames + 1, step):
                frames = min(step, (hi - at) // level_frames * level_frames)
                lv.append(_block_levels(read(at, frames), level_frames)[:, c])
                st.append(at + level_frames * np.arange(lv[-1].size))
            return (np.concatenate(lv), np.concatenate(st)) if lv else (np.zeros(0),) * 2

        return levels_between

    def more(x, st, seg_frames=seg):
        return accumulate_line_spectrum(x, rate_hz=rate, segment_frames=seg_frames, state=st)

    # survey: spectra and short-term levels for the classification
    survey: list = [None] * channels
    levels, level_starts = [], []
    if read_span is not None and n_frames > 2 * SURVEY_SPANS * span:
        for start in _survey_spans(n_frames, span, SURVEY_SPANS):
            x = read(start, span)
            for c in range(channels):
                part = more(x[:, c], None)  # spans stay separate: none straddles two
                survey[c] = part if survey[c] is None else survey[c].merged(part)
            lv = _block_levels(x, level_frames)
            levels.append(lv)
            level_starts.append(start + level_frames * np.arange(lv.shape[0]))
    else:
        carry, done = np.zeros((0, channels)), 0
        for block in open_blocks():
            _check_overflow(_peaks(block))
            for c in range(channels):
                survey[c] = more(block[:, c], survey[c])
            data = np.concatenate([carry, block]) if carry.size else block
            lv = _block_levels(data, level_frames)
            levels.append(lv)
            level_starts.append(done + level_frames * np.arange(lv.shape[0]))
            done += lv.shape[0] * level_frames
            carry = data[lv.shape[0] * level_frames :]
    level_arr = np.concatenate(levels) if levels else np.zeros((0, channels))
    starts_arr = np.concatenate(level_starts).astype(np.int64) if levels else np.zeros(0, int)
    contents = []
    for c in range(channels):
        with _noted(notes[c]):
            contents.append(
                classify_channel(survey[c].spectrum(), block_levels_dbfs=level_arr[:, c])
            )

    # each tone: where it plays, its frequency, its settled span, a second for THD
    one = int(round(_LEAD_S * rate))
    freqs: list[tuple] = [()] * channels
    spans = [(0, n_frames)] * channels
    sources = ["whole"] * channels
    segs = [seg] * channels
    leads: list = [None] * channels
    for c, content in enumerate(contents):
        if content.kind not in ("tone", "twin-tone"):
            continue
        with _noted(notes[c]):
            extent = _loud_extent(level_arr[:, c], starts_arr, level_frames, n_frames, scan(c))
            freqs[c] = _fit_frequencies(read, c, content, rate, extent, one, level_frames)
            if settle:
                spans[c] = _settled_span(read, c, freqs[c], rate, extent, n_frames, level_frames)
                sources[c] = "settled"
            lead_from = spans[c][0] if settle else extent[0]
            for candidate in (spans[c], extent, (0, n_frames)):
                try:
                    segs[c] = segment_frames_for(candidate[1] - candidate[0], rate)
                except ParameterError:
                    continue
                if candidate != spans[c]:
                    what = "the loud stretch" if candidate == extent else "the whole signal"
                    notes[c].append(
                        f"the settled part ({spans[c][0] / rate:.3f}-{spans[c][1] / rate:.3f}"
                        f" s) is too short to measure; {what} is measured instead"
                    )
                    spans[c], lead_from = candidate, candidate[0]
                    sources[c] = "whole" if candidate == (0, n_frames) else "settled"
                break
            lead_frames = min(int(round(_THD_LEAD_S * rate)), spans[c][1] - spans[c][0])
            lead_from = max(spans[c][0], min(lead_from, spans[c][1] - lead_frames))
            leads[c] = np.ascontiguousarray(read(lead_from, lead_frames)[:, c])

    # the measuring pass
    removers = [_ToneRemover(f, rate, piece) if f else None for f in freqs]
    spectra: list = [None] * channels
    peaks = np.zeros(channels)
    pos = 0
    for block in open_blocks():
        peaks = np.maximum(peaks, _peaks(block))
        _check_overflow(peaks)
        for c in range(channels):
            lo, hi = max(spans[c][0] - pos, 0), min(spans[c][1] - pos, block.shape[0])
            if hi <= lo:
                continue
            x = np.ascontiguousarray(block[lo:hi, c])
            spectra[c] = more(removers[c].add(x) if removers[c] else x, spectra[c], segs[c])
        pos += block.shape[0]
        if progress is not None:
            progress(block.shape[0])
    for c in range(channels):
        if removers[c]:
            spectra[c] = more(removers[c].finish(), spectra[c], segs[c])

    results = []
    for c, content in enumerate(contents):
        peak_dbfs = 20.0 * np.log10(peaks[c]) if peaks[c] > 0 else -np.inf
        with _noted(notes[c]):
            figures = _figures(
                content, spectra[c].spectrum(), freqs[c], removers[c], leads[c], rate, peak_dbfs
            )
        over = bool(peaks[c] > 1.0)
        if over:
            figures.update(dict.fromkeys(WITHHELD_OVER_FULL_SCALE))
            notes[c].append(
                f"samples reach {peak_dbfs:+.2f} dBFS, beyond full scale (±1.0): a converter "
                "would clip them, so THD+N, THD and dynamic range are withheld"
            )
        results.append(
            ChannelAnalysis(
                channel=c + 1,
                content=content,
                **figures,
                peak_dbfs=peak_dbfs,
                over_full_scale=over,
                span_s=(spans[c][0] / rate, spans[c][1] / rate),
                span_source=sources[c],
                notes=tuple(notes[c]),
            )
        )
    return results


def _fit_frequencies(read, c, content, rate, extent, one, level_frames) -> tuple:
    """The tone's (or both tones') frequency from fits on up to a second where it plays.

    The second starts one level block into the loud stretch when the stretch is long enough
    (away from a start transient), else at its start.
    """
    length = min(one, extent[1] - extent[0])
    start = extent[0] + min(level_frames, max(0, extent[1] - extent[0] - length))
    lead = np.ascontiguousarray(read(start, length)[:, c])
    # the fits work on the stretch scaled to a peak of 1: the frequency does not depend on
    # the scale, and fit_sine's least-squares cut-off misjudges far larger numbers (a
    # +194 dBFS float tone came out 150 uHz off)
    peak = float(np.max(np.abs(lead))) if lead.size else 0.0
    if peak > 0.0:
        lead = lead / peak
    if content.kind == "tone":
        fit = fit_sine(lead, rate_hz=rate, frequency_hz=content.frequencies_hz[0])
        return (fit.frequency_hz,)
    # twin tone: alternate 4-parameter fits, each with the other tone's model removed
    fa, fb = content.frequencies_hz
    other = np.zeros_like(lead)
    for _ in range(3):
        fit_a = fit_sine(lead - other, rate_hz=rate, frequency_hz=fa)
        fa = fit_a.frequency_hz
        fit_b = fit_sine(lead - fit_a.model(lead.size), rate_hz=rate, frequency_hz=fb)
        fb = fit_b.frequency_hz
        other = fit_b.model(lead.size)
    return (fa, fb)


def _figures(content, spec, freqs, remover, lead, rate, peak_dbfs) -> dict:
    """The measurements of one channel from its residual spectrum, by kind of content."""
    floor = LINE_FLOOR_DBFS + max(0.0, peak_dbfs)
    noise = {k: spec.band_power(*_BAND_HZ, weighting=k) for k in ("unweighted", "a", "ccir")}
    noise_dbfs = {k: _dbfs(v) for k, v in noise.items()}
    fundamental = level = thd_n = thd_n_a = thd_db = dr = dr_a = None
    tones: tuple = ()
    if content.kind == "tone":
        fundamental = freqs[0]
        amp = float(remover.amplitudes()[0])
        level = 20.0 * np.log10(amp) if amp > 0 else -np.inf
        total = amp * amp / 2.0 + noise["unweighted"]
        thd_n = _ratio_db(noise["unweighted"], total)
        thd_n_a = _ratio_db(noise["a"], total)
        ratio = thd(lead, rate_hz=rate, frequency_hz=fundamental).ratio_db
        thd_db = ratio if np.isfinite(ratio) else None
        if abs(level + 60.0) <= DR_TONE_WINDOW_DB:
            dr, dr_a = -noise_dbfs["unweighted"], -noise_dbfs["a"]
        tones = _lines_apart(spec, freqs, floor)
    elif content.kind == "twin-tone":
        amps = remover.amplitudes()
        level = _dbfs(float(np.sum(amps * amps)) / 2.0 + noise["unweighted"])
        tones = _lines_apart(spec, freqs, floor)
    elif content.kind == "silence":
        tones = _real_lines(find_idle_tones(spec).tones, floor)
    else:
        level = noise_dbfs["unweighted"]
    return {
        "fundamental_hz": fundamental,
        "level_dbfs": level,
        "thd_n_db": thd_n,
        "thd_n_db_a": thd_n_a,
        "thd_db": thd_db,
        "noise_dbfs": noise_dbfs["unweighted"],
        "noise_dbfs_a": noise_dbfs["a"],
        "noise_dbfs_ccir": noise_dbfs["ccir"],
        "dynamic_range_db": dr,
        "dynamic_range_db_a": dr_a,
        "tones": tones,
    }
