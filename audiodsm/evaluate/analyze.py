"""The analyze job: measure any audio file the way AES17 measures a converter.

For each channel of a file, :func:`analyze_file` finds what the channel holds (tone, twin
tone, silence, program; see :mod:`audiodsm.measure.classify`) and measures accordingly,
streaming the file in blocks so that memory stays bounded: a tone over its settled part
(start and end transients skipped, as AES17 measures after settling), or over a span the
caller gives (:func:`parse_span` reads the ``--span`` text). :func:`format_table` gives the
aligned text table ``audiodsm analyze`` prints. Channels are numbered from 1.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import AudioFileError, ParameterError
from audiodsm.io import audio_info, iter_audio_blocks, read_audio_span
from audiodsm.measure.channel_analysis import (
    OVERFLOW_PEAK,
    WITHHELD_OVER_FULL_SCALE,
    analyze_blocks,
)

__all__ = ["FileAnalysis", "analyze_file", "format_table", "parse_span", "BLOCK_FRAMES"]

#: Frames per block read; bounds memory at about 8 channels x this x 8 bytes per block.
BLOCK_FRAMES = 1 << 18


@dataclass(frozen=True)
class FileAnalysis:
    """The measurements of one file.

    Attributes
    ----------
    path : str
    rate_hz : int
    frames : int
    container, sample_format : str
        As libsndfile names them (e.g. ``"WAV"``, ``"PCM_24"``).
    channels : list of ChannelAnalysis
    measurement_s : float
        Wall-clock seconds the measurement took.
    """

    path: str
    rate_hz: int
    frames: int
    container: str
    sample_format: str
    channels: list
    measurement_s: float

    def to_dict(self) -> dict:
        """The file's JSON object (keys are stable; see docs/analyze.md)."""
        return {
            "file": self.path,
            "sample_rate_hz": int(self.rate_hz),
            "channels": [c.to_dict() for c in self.channels],
            "measurement_s": round(self.measurement_s, 3),
        }


def parse_span(text: str):
    """Read a span given as ``START:END`` in seconds (the ``--span`` option).

    Either end may be left out (the file's start or end); a negative value counts back from
    the end of the file; ``all`` (or ``:``) is the whole file.

    Parameters
    ----------
    text : str
        E.g. ``"0.5:2.5"``, ``"1:"``, ``":-0.5"``, ``"all"``.

    Returns
    -------
    (float or None, float or None)
        Start and end in seconds, None for "the file's own".

    Raises
    ------
    ParameterError
        When the text is not of that form, or the start is not before the end.
    """
    words = str(text).strip()
    if words.lower() == "all":
        return None, None
    parts = words.split(":")
    if len(parts) != 2:
        raise ParameterError("--span", text, "START:END in seconds (either may be empty), or all")
    try:
        start, end = (float(p) if p.strip() else None for p in parts)
    except ValueError:
        raise ParameterError("--span", text, "START:END in seconds, e.g. 0.5:2.5") from None
    for v in (start, end):
        if v is not None and not np.isfinite(v):
            raise ParameterError("--span", text, "finite numbers of seconds")
    if start is not None and end is not None and (start >= 0) == (end >= 0) and start >= end:
        raise ParameterError("--span", text, "a start before the end")
    return start, end


def _span_frames(span_s, frames: int, rate_hz: float, path) -> tuple[int, int]:
    """The frames of a span in seconds (negative: from the end), checked against the file."""

    def frame(v, default):
        if v is None:
            return default
        return int(round((v if v >= 0 else frames / rate_hz + v) * rate_hz))

    start, stop = frame(span_s[0], 0), frame(span_s[1], frames)
    if not 0 <= start < stop <= frames:
        raise AudioFileError(
            str(path),
            f"span {start / rate_hz:.3f}-{stop / rate_hz:.3f} s is not inside the file "
            f"(0-{frames / rate_hz:.3f} s)",
        )
    return start, stop


def analyze_file(path, *, span_s=None, progress=None) -> FileAnalysis:
    """Read, classify and measure every channel of one audio file.

    Parameters
    ----------
    path : str or os.PathLike
        A WAV, FLAC or AIFF file (see :func:`audiodsm.io.read_audio`).
    span_s : (float or None, float or None), optional
        Measure only this stretch, start and end in seconds (None: the file's start or
        end; negative: counted back from the end), every channel. Default: each tone over
        its settled part (transients at its start and end skipped), other content over the
        whole file. The span used is in each channel's result.
    progress : callable, optional
        Called with the number of frames processed in the measuring pass.

    Returns
    -------
    FileAnalysis

    Raises
    ------
    AudioFileError
        A bad file (see :mod:`audiodsm.io`), one too short for the resolution needed, a
        span outside the file, or samples so large that they overflow the measurement.
    """
    start = time.perf_counter()
    info = audio_info(path)
    span = None if span_s is None else _span_frames(span_s, info.frames, info.rate_hz, path)
    frames = info.frames if span is None else span[1] - span[0]
    try:
        channels = analyze_blocks(
            lambda: iter_audio_blocks(path, BLOCK_FRAMES),
            rate_hz=info.rate_hz,
            channels=info.channels,
            n_frames=info.frames,
            read_span=lambda start, frames: read_audio_span(path, start, frames),
            progress=progress,
            span_frames=span,
        )
    except ParameterError as exc:
        if exc.name == "signal length":
            what = "file" if span is None else "span"
            raise AudioFileError(
                str(path),
                f"{what} too short: {frames} frames ({frames / info.rate_hz:.3f} s); "
                f"{exc.expected}",
            ) from None
        if exc.name == "samples":
            raise AudioFileError(
                str(path),
                f"samples overflow: {exc.value} (at most {OVERFLOW_PEAK:.0e}, +2000 dBFS, "
                "can be measured)",
            ) from None
        raise
    return FileAnalysis(
        path=str(path),
        rate_hz=info.rate_hz,
        frames=info.frames,
        container=info.container,
        sample_format=info.sample_format,
        channels=channels,
        measurement_s=time.perf_counter() - start,
    )


# ---------------------------------------------------------------------------------------------
# Table
# ---------------------------------------------------------------------------------------------

# (label, unit, attribute, format)
_ROWS = (
    ("signal", "", None, None),
    ("span", "s", None, None),
    ("fundamental", "Hz", "fundamental_hz", "{:.3f}"),
    ("level", "dBFS", "level_dbfs", "{:.2f}"),
    ("peak", "dBFS", "peak_dbfs", "{:.2f}"),
    ("THD+N", "dB", "thd_n_db", "{:.2f}"),
    ("THD+N, A-weighted", "dB", "thd_n_db_a", "{:.2f}"),
    ("THD (2nd-10th)", "dB", "thd_db", "{:.2f}"),
    ("noise", "dBFS", "noise_dbfs", "{:.2f}"),
    ("noise, A-weighted", "dBFS", "noise_dbfs_a", "{:.2f}"),
    ("noise, CCIR-RMS", "dBFS", "noise_dbfs_ccir", "{:.2f}"),
    ("dynamic range", "dB", "dynamic_range_db", "{:.2f}"),
    ("dynamic range, A", "dB", "dynamic_range_db_a", "{:.2f}"),
    ("spectral lines", "", None, None),
)


#: What a withheld figure of a channel beyond full scale shows in the table.
OVER_FULL_SCALE_CELL = "over FS"


def _cell(value, fmt):
    if value is None:
        return "-"
    v = float(value)
    if not np.isfinite(v):
        return "zero" if v < 0 else "-"
    return fmt.format(v)


def format_table(result: FileAnalysis) -> str:
    """Aligned plain-text table of one file's measurements, one column per channel.

    Parameters
    ----------
    result : FileAnalysis
        What :func:`analyze_file` returned.

    Returns
    -------
    str
        A header line (file, rate, channels, duration, format, measurement time), a row per
        quantity with its unit, right-aligned columns (the span measured, in seconds, with
        its source; ``over FS`` for the figures withheld from a channel beyond full scale),
        then the notes and the detected lines (12 per channel at most).
    """
    seconds = result.frames / result.rate_hz
    head = (
        f"{result.path}: {result.rate_hz} Hz, {len(result.channels)} channel(s), "
        f"{seconds:.2f} s, {result.sample_format} {result.container}; "
        f"measured in {result.measurement_s:.2f} s"
    )
    columns = [f"ch {c.channel}" for c in result.channels]
    body = []
    for label, unit, attr, fmt in _ROWS:
        if label == "signal":
            cells = [c.content.kind for c in result.channels]
        elif label == "span":
            cells = [
                f"{c.span_s[0]:.3f}-{c.span_s[1]:.3f} {c.span_source}" for c in result.channels
            ]
        elif label == "spectral lines":
            cells = [str(len(c.tones)) for c in result.channels]
        else:
            cells = [
                OVER_FULL_SCALE_CELL
                if c.over_full_scale and attr in WITHHELD_OVER_FULL_SCALE
                else _cell(getattr(c, attr), fmt)
                for c in result.channels
            ]
        body.append((label, unit, cells))
    w_label = max(len(r[0]) for r in body)
    w_unit = max(len(r[1]) for r in body)
    w_cell = max(8, *(len(c) for c in columns), *(len(x) for r in body for x in r[2]))
    lines = [head, " " * (w_label + w_unit + 2) + "  ".join(c.rjust(w_cell) for c in columns)]
    for label, unit, cells in body:
        lines.append(
            f"{label.ljust(w_label)}  {unit.ljust(w_unit)}"
            + "  ".join(x.rjust(w_cell) for x in cells)
        )
    for c in result.channels:
        for note in c.notes:
            lines.append(f"  ch {c.channel} note: {note}")
    for c in result.channels:
        for t in c.tones[:12]:
            lines.append(
                f"  ch {c.channel} line: {t.frequency_hz:10.2f} Hz  {t.level_dbfs:8.2f} dBFS"
            )
        if len(c.tones) > 12:
            lines.append(f"  ch {c.channel}: {len(c.tones) - 12} more lines (see --json)")
    return "\n".join(lines)
