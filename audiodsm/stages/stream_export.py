"""Writing the modulator's stream to disk, block by block.

Packed bits with a JSON sidecar for a single-bit stream, or text with one word per line for
HDL test benches (:class:`PackedBitsWriter`, :class:`CodeTextWriter`); both writers append block
by block and only show a file under its final name once it is complete.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from audiodsm.errors import AudioFileError, OutputError, ParameterError, StorageError
from audiodsm.io_files import create_temp_file
from audiodsm.stages.output_stage import _check_int, _check_levels, level_codes

__all__ = [
    "PackedBitsWriter",
    "write_packed_bits",
    "read_packed_bits",
    "CodeTextWriter",
    "write_code_text",
    "read_code_text",
    "PACKED_BITS_LAYOUT",
]


# ---------------------------------------------------------------------------------------------
# Exports: packed bits + JSON sidecar, and one word per line for HDL test benches
# ---------------------------------------------------------------------------------------------

#: Name written into every sidecar, so a reader can tell the layout (see docs/outputs.md).
PACKED_BITS_LAYOUT = "audiodsm packed single-bit stream"
_LAYOUT_VERSION = 1


class _AtomicFile:
    """A file written under a temporary name in the target folder, renamed on commit.

    With an ``output_set`` (:class:`audiodsm.io_files.OutputSet`) the commit hands the finished
    temporary file to the set, which renames it together with the set's other files.
    """

    def __init__(self, path, *, overwrite: bool, mode: str, output_set=None):
        self.path = Path(path)
        self.overwrite = overwrite
        self.output_set = output_set
        folder = self.path.parent if str(self.path.parent) else Path(".")
        if os.path.lexists(self.path) and not overwrite:
            raise OutputError(f"{self.path}: already exists; pass overwrite=True to replace it")
        if not folder.is_dir():
            raise OutputError(f"{self.path}: folder {str(folder)!r} does not exist")
        # owner pid in the name, umask permissions; StorageError when the folder is read-only
        fd, self.tmp = create_temp_file(self.path, suffix=".part")
        self.handle = os.fdopen(fd, mode)

    def commit(self):
        try:
            self.handle.flush()
            os.fsync(self.handle.fileno())
            self.handle.close()
            if self.output_set is None:
                os.replace(self.tmp, self.path)
        except OSError as exc:
            self.discard()
            raise StorageError(self.path, exc) from None
        if self.output_set is not None:
            self.output_set.stage(self.tmp, self.path, overwrite=self.overwrite)

    def discard(self):
        if not self.handle.closed:
            self.handle.close()
        self.tmp.unlink(missing_ok=True)


def _as_block(y, channels: int) -> np.ndarray:
    arr = np.asarray(y, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[1] != channels:
        raise ParameterError(
            "y.shape", arr.shape, f"(n,) or (n, {channels}) for {channels} channels"
        )
    return arr


@dataclass
class PackedBitsWriter:
    """Write a single-bit stream as packed bytes plus a JSON sidecar, block by block.

    Layout (our own, see docs/outputs.md): samples are interleaved by channel (sample 0 of
    channel 1, sample 0 of channel 2, ..., sample 1 of channel 1, ...; channels numbered from 1,
    as everywhere people read them); each value is one bit,
    1 for +1.0 and 0 for -1.0; bits fill each byte from the most significant bit down
    (``np.packbits(..., bitorder="big")``); the last byte is padded with 0 bits. The sidecar
    ``<path>.json`` holds the rate, channel count, bit order, level mapping and sample count.

    Use as a context manager, or call :meth:`close`; nothing appears under the final names
    until ``close`` succeeds, and an exception inside the ``with`` block leaves nothing.

    Parameters
    ----------
    path : str or Path
        The bit file; the sidecar is ``path`` plus ``".json"``.
    rate_hz : float
        The bit rate per channel (the modulator rate).
    channels : int
        Channel count.
    overwrite : bool
        Replace existing files instead of refusing.
    output_set : audiodsm.io_files.OutputSet, optional
        Leave both finished files for the set to rename together with its other outputs.
    """

    path: str | Path
    rate_hz: float
    channels: int = 1
    overwrite: bool = False
    output_set: object = None
    _file: _AtomicFile | None = field(default=None, init=False, repr=False)
    _carry: np.ndarray = field(default=None, init=False, repr=False)
    _samples: int = field(default=0, init=False, repr=False)

    def __post_init__(self):
        self.rate_hz = _check_rate_named(self.rate_hz, "rate_hz")
        self.channels = _check_int(self.channels, "channels", 1, 64)
        sidecar = Path(str(self.path) + ".json")
        if os.path.lexists(sidecar) and not self.overwrite:  # a dangling symlink counts too
            raise OutputError(f"{sidecar}: already exists; pass overwrite=True to replace it")
        self._file = _AtomicFile(
            self.path, overwrite=self.overwrite, mode="wb", output_set=self.output_set
        )
        self._carry = np.zeros(0, dtype=np.uint8)

    def append(self, y) -> None:
        """Add a block of samples, shape ``(n,)`` or ``(n, channels)``, values -1.0 / +1.0."""
        block = _as_block(y, self.channels)
        try:
            bits = level_codes(block, levels=2).astype(np.uint8).ravel()
        except ParameterError:
            self._file.discard()
            raise
        bits = np.concatenate([self._carry, bits])
        whole = bits.size - bits.size % 8
        self._file.handle.write(np.packbits(bits[:whole], bitorder="big").tobytes())
        self._carry = bits[whole:]
        self._samples += block.shape[0]

    def close(self) -> None:
        """Flush the last byte, write the sidecar and move both to their final names."""
        pad = (-self._carry.size) % 8
        if self._carry.size:
            self._file.handle.write(np.packbits(self._carry, bitorder="big").tobytes())
        info = {
            "layout": PACKED_BITS_LAYOUT,
            "layout_version": _LAYOUT_VERSION,
            "bit_file": Path(self.path).name,
            "rate_hz": self.rate_hz,
            "channels": self.channels,
            "samples_per_channel": self._samples,
            "channel_order": "interleaved, channel 1 first within each sample",
            "bit_order": "most significant bit first within each byte",
            "level_of_bit_1": 1.0,
            "level_of_bit_0": -1.0,
            "padding_bits_at_end": pad,
        }
        try:
            side = _AtomicFile(
                str(self.path) + ".json",
                overwrite=self.overwrite,
                mode="w",
                output_set=self.output_set,
            )
        except BaseException:
            self._file.discard()
            raise
        try:
            json.dump(info, side.handle, indent=2)
            side.handle.write("\n")
        except BaseException:
            side.discard()
            self._file.discard()
            raise
        self._file.commit()
        side.commit()

    def abort(self) -> None:
        """Give up: remove the temporary file; nothing is left under the final names."""
        self._file.discard()

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
        else:
            self.abort()
        return False


def _check_rate_named(value, name) -> float:
    try:
        rate = float(value)
    except (TypeError, ValueError):
        rate = float("nan")
    if not (math.isfinite(rate) and rate > 0):
        raise ParameterError(name, value, "a finite number > 0")
    return rate


def write_packed_bits(path, y, *, rate_hz: float, overwrite: bool = False) -> None:
    """Write a whole single-bit stream (``(n,)`` or ``(n, channels)``) with its sidecar.

    See :class:`PackedBitsWriter` for the layout.
    """
    arr = np.asarray(y, dtype=np.float64)
    channels = 1 if arr.ndim == 1 else arr.shape[-1]
    with PackedBitsWriter(path, rate_hz, channels, overwrite) as writer:
        writer.append(arr)


def read_packed_bits(path) -> tuple[np.ndarray, dict]:
    """Read a packed bit file written by :class:`PackedBitsWriter`.

    Returns
    -------
    y : ndarray, shape (n, channels)
        The stream as -1.0 / +1.0.
    info : dict
        The sidecar's contents.
    """
    path = Path(path)
    side = Path(str(path) + ".json")
    try:
        info = json.loads(side.read_text())
        raw = np.fromfile(path, dtype=np.uint8)
    except OSError as exc:
        raise AudioFileError(str(exc.filename or path), f"cannot read ({exc.strerror})") from None
    except json.JSONDecodeError as exc:
        raise AudioFileError(str(side), f"not valid JSON ({exc.msg})") from None
    if info.get("layout") != PACKED_BITS_LAYOUT:
        raise AudioFileError(
            str(side), f"layout {info.get('layout')!r}; expected {PACKED_BITS_LAYOUT!r}"
        )
    try:
        channels = int(info["channels"])
        samples = int(info["samples_per_channel"])
    except (KeyError, TypeError, ValueError):
        raise AudioFileError(
            str(side), "needs integer 'channels' and 'samples_per_channel' entries"
        ) from None
    need = samples * channels
    bits = np.unpackbits(raw, bitorder="big")
    if bits.size < need or bits.size - need >= 8:
        raise AudioFileError(
            str(path), f"{raw.size} bytes; expected {-(-need // 8)} for {samples} x {channels} bits"
        )
    y = np.where(bits[:need] == 1, 1.0, -1.0).reshape(samples, channels)
    return y, info


@dataclass
class CodeTextWriter:
    """Write level codes as text, one word per line, for HDL test benches.

    Each line is one sample clock: for every channel (channel 1 leftmost) the level code
    ``k`` (0 for -1.0 ... ``levels - 1`` for +1.0) in binary with ``ceil(log2(levels))``
    digits, most significant digit first, channels concatenated without separators. For a
    single-bit stereo stream a line is two characters, e.g. ``10``. No header: a line holds
    nothing but the word. Appends block by block; the file appears under its final name when
    :meth:`close` succeeds.

    Parameters
    ----------
    path : str or Path
        The text file.
    levels : int
        Quantizer levels (2 for PDM).
    channels : int
        Channel count.
    overwrite : bool
        Replace an existing file instead of refusing.
    output_set : audiodsm.io_files.OutputSet, optional
        Leave the finished file for the set to rename together with its other outputs.
    """

    path: str | Path
    levels: int = 2
    channels: int = 1
    overwrite: bool = False
    output_set: object = None
    _file: _AtomicFile | None = field(default=None, init=False, repr=False)

    def __post_init__(self):
        self.levels = _check_levels(self.levels)
        self.channels = _check_int(self.channels, "channels", 1, 64)
        self._file = _AtomicFile(
            self.path, overwrite=self.overwrite, mode="w", output_set=self.output_set
        )

    @property
    def digits(self) -> int:
        """Binary digits per channel code."""
        return max(1, math.ceil(math.log2(self.levels)))

    def append(self, y) -> None:
        """Add a block, shape ``(n,)`` or ``(n, channels)``, values on the level grid."""
        block = _as_block(y, self.channels)
        try:
            codes = level_codes(block, levels=self.levels)
        except ParameterError:
            self._file.discard()
            raise
        d = self.digits
        shifts = np.arange(d - 1, -1, -1)
        digits = (codes[:, :, None] >> shifts) & 1  # (n, channels, d)
        chars = (digits.reshape(codes.shape[0], -1) + ord("0")).astype(np.uint8)
        lines = np.concatenate([chars, np.full((chars.shape[0], 1), ord("\n"), np.uint8)], 1)
        self._file.handle.write(lines.tobytes().decode("ascii"))

    def close(self) -> None:
        """Move the file to its final name."""
        self._file.commit()

    def abort(self) -> None:
        """Remove the temporary file."""
        self._file.discard()

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
        else:
            self.abort()
        return False


def write_code_text(path, y, *, levels: int = 2, overwrite: bool = False) -> None:
    """Write a whole stream as text, one word per line (see :class:`CodeTextWriter`)."""
    arr = np.asarray(y, dtype=np.float64)
    channels = 1 if arr.ndim == 1 else arr.shape[-1]
    with CodeTextWriter(path, levels, channels, overwrite) as writer:
        writer.append(arr)


def read_code_text(path, *, levels: int = 2, channels: int = 1) -> np.ndarray:
    """Read a file written by :class:`CodeTextWriter` back to values in [-1, 1].

    Returns
    -------
    ndarray, shape (n, channels)
        The levels ``-1 + 2 k / (levels - 1)``.
    """
    n_levels = _check_levels(levels)
    channels = _check_int(channels, "channels", 1, 64)
    d = max(1, math.ceil(math.log2(n_levels)))
    try:
        text = Path(path).read_bytes()
    except OSError as exc:
        raise AudioFileError(str(path), f"cannot read ({exc.strerror})") from None
    width = d * channels
    raw = np.frombuffer(text, dtype=np.uint8)
    if raw.size % (width + 1) or (raw.size and np.any(raw[width :: width + 1] != ord("\n"))):
        raise AudioFileError(str(path), f"lines are not {width} binary digits each")
    rows = raw.reshape(-1, width + 1)[:, :width].astype(np.int64) - ord("0")
    if rows.size and (rows.min() < 0 or rows.max() > 1):
        raise AudioFileError(str(path), "found a character other than 0 or 1")
    weights = 1 << np.arange(d - 1, -1, -1)
    codes = (rows.reshape(-1, channels, d) * weights).sum(axis=2)
    if codes.size and codes.max() > n_levels - 1:
        raise AudioFileError(str(path), f"code {codes.max()} above levels - 1 = {n_levels - 1}")
    return -1.0 + 2.0 * codes / (n_levels - 1)
