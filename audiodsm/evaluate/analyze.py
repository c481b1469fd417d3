"""The analyze job: measure any audio file the way AES17 measures a converter.

For each channel of a file, :func:`analyze_file` finds what the channel holds (tone, twin
tone, silence, program; see :mod:`audiodsm.measure.classify`) and measures accordingly,
streaming the file in blocks so that memory stays bounded. :func:`format_table` gives the
aligned text table ``audiodsm analyze`` prints. Channels are numbered from 1.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import AudioFileError, ParameterError
from audiodsm.io import audio_info, iter_audio_blocks, read_audio_span
from audiodsm.measure.classify import analyze_blocks

__all__ = ["FileAnalysis", "analyze_file", "format_table", "BLOCK_FRAMES"]

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


def analyze_file(path, *, progress=None) -> FileAnalysis:
    """Read, classify and measure every channel of one audio file.

    Parameters
    ----------
    path : str or os.PathLike
        A WAV, FLAC or AIFF file (see :func:`audiodsm.io.read_audio`).
    progress : callable, optional
        Called with the number of frames processed in the measuring pass.

    Returns
    -------
    FileAnalysis

    Raises
    ------
    AudioFileError
        A bad file (see :mod:`audiodsm.io`) or one too short for the resolution needed.
    """
    start = time.perf_counter()
    info = audio_info(path)
    try:
        channels = analyze_blocks(
            lambda: iter_audio_blocks(path, BLOCK_FRAMES),
            rate_hz=info.rate_hz,
            channels=info.channels,
            n_frames=info.frames,
            read_span=lambda start, frames: read_audio_span(path, start, frames),
            progress=progress,
        )
    except ParameterError as exc:
        if exc.name == "signal length":
            raise AudioFileError(
                str(path),
                f"too short: {info.frames} frames ({info.duration_s:.3f} s); {exc.expected}",
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
    ("fundamental", "Hz", "fundamental_hz", "{:.3f}"),
    ("level", "dBFS", "level_dbfs", "{:.2f}"),
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
        quantity with its unit, right-aligned columns, then the detected lines (12 per
        channel at most).
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
        elif label == "spectral lines":
            cells = [str(len(c.tones)) for c in result.channels]
        else:
            cells = [_cell(getattr(c, attr), fmt) for c in result.channels]
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
        for t in c.tones[:12]:
            lines.append(
                f"  ch {c.channel} line: {t.frequency_hz:10.2f} Hz  {t.level_dbfs:8.2f} dBFS"
            )
        if len(c.tones) > 12:
            lines.append(f"  ch {c.channel}: {len(c.tones) - 12} more lines (see --json)")
    return "\n".join(lines)
