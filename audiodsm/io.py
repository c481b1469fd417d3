"""Reading and writing audio files: the only module that imports soundfile.

Everything read comes back as float64 frames of shape ``(n_frames, n_channels)`` in
full-scale units (±1.0), together with the sample rate in Hz. Long files are read in blocks
(:func:`iter_audio_blocks`) so memory stays bounded. Everything written goes to a temporary
name in the target folder first and is renamed only when complete
(:func:`write_audio_atomic`, :func:`open_audio_writer`), so an interrupted run never leaves a
half-written file under the final name.

Problems with a file raise :class:`~audiodsm.errors.AudioFileError` with a one-line message
that names the file: missing, unreadable, truncated (the WAV, RF64, Wave64 and AIFF headers are
checked against the bytes present), empty, NaN/Inf samples, more than :data:`MAX_CHANNELS`
channels, or a rate below :data:`MIN_RATE_HZ`.

Outputs: the temporary files, their clean-up after a killed run, the
:class:`~audiodsm.errors.StorageError` of a write that fails, output names and sets of outputs
written together live in :mod:`audiodsm.io_files`; the audio writers here are built on them.
"""

from __future__ import annotations

import errno
import os
import struct
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf

from audiodsm.errors import AudioFileError, OutputError, ParameterError, StorageError
from audiodsm.io_files import (
    OutputSet,
    _check_name_fits,
    create_temp_file,
    refuse_dangling_symlink,
)

__all__ = [
    "MAX_CHANNELS",
    "MIN_RATE_HZ",
    "WRITE_SUBTYPES",
    "AudioInfo",
    "audio_info",
    "read_audio",
    "read_audio_span",
    "iter_audio_blocks",
    "write_audio_atomic",
    "open_audio_writer",
    "AudioFileWriter",
]

#: The most channels a file may hold.
MAX_CHANNELS = 8
#: The lowest sample rate accepted: below it the 20 kHz audio band does not fit.
MIN_RATE_HZ = 44100
#: Sample formats the writers accept (libsndfile subtype names).
WRITE_SUBTYPES = ("PCM_16", "PCM_24", "PCM_32", "FLOAT", "DOUBLE")

# file extension -> libsndfile container name
_CONTAINERS = {".wav": "WAV", ".flac": "FLAC", ".aif": "AIFF", ".aiff": "AIFF", ".aifc": "AIFF"}
_INT_SUBTYPES = ("PCM_16", "PCM_24", "PCM_32")


@dataclass(frozen=True)
class AudioInfo:
    """What a file's header says, after validation.

    Attributes
    ----------
    path : str
        The file.
    frames : int
        Number of sample frames (per channel).
    channels : int
        Number of channels.
    rate_hz : int
        Sample rate in Hz.
    container : str
        Container name as libsndfile reports it, e.g. ``"WAV"``, ``"WAVEX"``, ``"FLAC"``.
    sample_format : str
        Sample encoding as libsndfile reports it, e.g. ``"PCM_24"``, ``"FLOAT"``.
    """

    path: str
    frames: int
    channels: int
    rate_hz: int
    container: str
    sample_format: str

    @property
    def duration_s(self) -> float:
        """Length in seconds."""
        return self.frames / self.rate_hz


_W64_RIFF = b"riff\x2e\x91\xcf\x11\xa5\xd6\x28\xdb\x04\xc1\x00\x00"
_W64_WAVE = b"wave\xf3\xac\xd3\x11\x8c\xd1\x00\xc0\x4f\x8e\xdb\x8a"
_W64_DATA = b"data\xf3\xac\xd3\x11\x8c\xd1\x00\xc0\x4f\x8e\xdb\x8a"


def _declared_shortfall(path: Path) -> tuple[int, int] | None:
    """Compare the data size a file's header declares with the bytes present.

    libsndfile silently shortens a truncated WAV, RF64/BW64, Sony Wave64 or AIFF file to the
    data it finds, so the header is checked here. Returns ``(declared_bytes, present_bytes)``
    when the file holds fewer sample bytes than its header declares, else None (also for
    other containers and for streaming headers that leave the size at 0 or 0xFFFFFFFF).

    References
    ----------
    .. [1] EBU Tech 3306, "MBWF / RF64: An extended File Format for Audio" (2009): the
       ``ds64`` chunk holds the 64-bit RIFF size, data size and sample count, in that order,
       and a ``data`` chunk size of 0xFFFFFFFF defers to it.
    .. [2] Sony Wave64 (W64): chunks are a 16-byte GUID and a 64-bit little-endian size that
       counts the 24-byte chunk header, each chunk padded to a multiple of 8 bytes.
    """
    size = path.stat().st_size
    with open(path, "rb") as fh:
        head = fh.read(40)
        if len(head) < 12:
            return None
        if head[:16] == _W64_RIFF and head[24:40] == _W64_WAVE:
            return _w64_shortfall(fh, size)
        ds64_data = None
        if head[:4] in (b"RF64", b"BW64") and head[8:12] == b"WAVE":
            endian = "<"
            data_id, extra = b"data", 0
            if head[12:16] == b"ds64" and len(head) >= 36:
                (ds64_data,) = struct.unpack("<Q", head[28:36])
        elif head[:4] in (b"RIFF", b"RIFX") and head[8:12] == b"WAVE":
            endian = "<" if head[:4] == b"RIFF" else ">"
            data_id, extra = b"data", 0
        elif head[:4] == b"FORM" and head[8:12] in (b"AIFF", b"AIFC"):
            endian = ">"
            data_id, extra = b"SSND", 8  # SSND starts with offset and block size
        else:
            return None
        pos = 12
        while pos + 8 <= size:
            fh.seek(pos)
            chunk = fh.read(8)
            if len(chunk) < 8:
                return None
            (length,) = struct.unpack(endian + "I", chunk[4:8])
            if chunk[:4] == data_id:
                if length == 0xFFFFFFFF and ds64_data is not None:
                    length = ds64_data
                if length in (0, 0xFFFFFFFF):
                    return None
                declared = length - extra
                present = size - (pos + 8 + extra)
                return (declared, present) if present < declared else None
            pos += 8 + length + (length & 1)
    return None


def _w64_shortfall(fh, size: int) -> tuple[int, int] | None:
    """The W64 half of :func:`_declared_shortfall`."""
    pos = 40
    while pos + 24 <= size:
        fh.seek(pos)
        chunk = fh.read(24)
        if len(chunk) < 24:
            return None
        (length,) = struct.unpack("<Q", chunk[16:24])
        if length < 24:
            return None
        if chunk[:16] == _W64_DATA:
            declared = length - 24
            present = size - (pos + 24)
            return (declared, present) if present < declared else None
        pos += length + (-length % 8)
    return None


def _open_checked(path) -> tuple[sf.SoundFile, Path]:
    """Open a file for reading and check everything the header can tell."""
    p = Path(path)
    if not p.exists():
        raise AudioFileError(str(path), "no such file")
    if p.is_dir():
        raise AudioFileError(str(path), "is a folder, expected an audio file")
    if p.stat().st_size == 0:
        raise AudioFileError(str(path), "empty file (0 bytes)")
    try:
        handle = sf.SoundFile(str(p), "r")
    except (sf.SoundFileError, RuntimeError, OSError) as exc:
        reason = str(exc).split(":")[-1].strip() or type(exc).__name__
        raise AudioFileError(str(path), f"unreadable as audio ({reason})") from None
    try:
        if handle.frames <= 0:
            raise AudioFileError(str(path), "empty: holds no sample frames")
        if handle.channels > MAX_CHANNELS:
            raise AudioFileError(
                str(path), f"has {handle.channels} channels, at most {MAX_CHANNELS} are allowed"
            )
        if handle.samplerate < MIN_RATE_HZ:
            raise AudioFileError(
                str(path),
                f"sample rate {handle.samplerate} Hz is below {MIN_RATE_HZ} Hz "
                "(the 20 kHz audio band does not fit)",
            )
        short = _declared_shortfall(p)
        if short is not None:
            raise AudioFileError(
                str(path),
                f"truncated: header declares {short[0]} bytes of samples, {short[1]} present",
            )
    except BaseException:
        handle.close()
        raise
    return handle, p


def audio_info(path) -> AudioInfo:
    """Read and validate a file's header without reading its samples.

    Parameters
    ----------
    path : str or os.PathLike
        A WAV (including WAVE_FORMAT_EXTENSIBLE), FLAC or AIFF file.

    Returns
    -------
    AudioInfo

    Raises
    ------
    AudioFileError
        Missing, unreadable, truncated (WAV/RF64/W64/AIFF header check) or empty file, more than
        :data:`MAX_CHANNELS` channels, or a rate below :data:`MIN_RATE_HZ`.
    """
    handle, _ = _open_checked(path)
    with handle:
        return AudioInfo(
            path=str(path),
            frames=int(handle.frames),
            channels=int(handle.channels),
            rate_hz=int(handle.samplerate),
            container=str(handle.format),
            sample_format=str(handle.subtype),
        )


def _check_finite(block: np.ndarray, path, first_frame: int) -> None:
    if not np.isfinite(block).all():
        bad = int(np.argwhere(~np.isfinite(block))[0][0]) + first_frame
        raise AudioFileError(str(path), f"holds NaN or Inf samples (first at frame {bad})")


def iter_audio_blocks(path, block_frames: int = 65536) -> Iterator[np.ndarray]:
    """Read a file block by block, with bounded memory.

    Parameters
    ----------
    path : str or os.PathLike
        The audio file.
    block_frames : int, optional
        Frames per block (the last block may be shorter).

    Yields
    ------
    numpy.ndarray
        float64 blocks of shape ``(frames, channels)``, full scale ±1.0.

    Raises
    ------
    AudioFileError
        As :func:`audio_info`, and also when a block holds NaN or Inf samples or the data
        end before the header says (a truncated FLAC file surfaces here).
    """
    if isinstance(block_frames, bool) or not isinstance(block_frames, int | np.integer):
        raise ParameterError("block_frames", block_frames, "a positive integer")
    if block_frames < 1:
        raise ParameterError("block_frames", block_frames, "a positive integer")
    handle, _ = _open_checked(path)
    with handle:
        total = handle.frames
        done = 0
        while done < total:
            want = min(int(block_frames), total - done)
            try:
                block = handle.read(want, dtype="float64", always_2d=True)
            except (sf.SoundFileError, RuntimeError) as exc:
                reason = str(exc).split(":")[-1].strip()
                raise AudioFileError(
                    str(path), f"truncated or corrupt after frame {done} ({reason})"
                ) from None
            if block.shape[0] == 0:
                raise AudioFileError(
                    str(path), f"truncated: data end at frame {done} of {total} declared"
                )
            _check_finite(block, path, done)
            done += block.shape[0]
            yield block


def read_audio_span(path, start_frame: int, frames: int) -> np.ndarray:
    """Read ``frames`` frames from ``start_frame`` on (seeking, not reading what is before).

    Parameters
    ----------
    path : str or os.PathLike
        The audio file.
    start_frame : int
        First frame, from 0.
    frames : int
        Number of frames; the span must lie inside the file.

    Returns
    -------
    numpy.ndarray
        float64, shape ``(frames, channels)``.

    Raises
    ------
    AudioFileError
        As :func:`iter_audio_blocks`.
    ParameterError
        When the span does not lie inside the file.
    """
    handle, _ = _open_checked(path)
    with handle:
        total = handle.frames
        for name, value in (("start_frame", start_frame), ("frames", frames)):
            if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 0:
                raise ParameterError(name, value, "a whole number >= 0")
        if start_frame + frames > total:
            raise ParameterError(
                "start_frame + frames", start_frame + frames, f"at most {total} (the file's frames)"
            )
        try:
            handle.seek(int(start_frame))
            block = handle.read(int(frames), dtype="float64", always_2d=True)
        except (sf.SoundFileError, RuntimeError) as exc:
            reason = str(exc).split(":")[-1].strip()
            raise AudioFileError(
                str(path), f"truncated or corrupt near frame {start_frame} ({reason})"
            ) from None
        if block.shape[0] != frames:
            raise AudioFileError(
                str(path), f"truncated: data end before frame {start_frame + frames} of {total}"
            )
        _check_finite(block, path, int(start_frame))
        return block


def read_audio(path) -> tuple[np.ndarray, int]:
    """Read a whole audio file.

    Parameters
    ----------
    path : str or os.PathLike
        A WAV (including WAVE_FORMAT_EXTENSIBLE), FLAC or AIFF file holding 8/16/24/32-bit
        integer or 32/64-bit float samples, 1 to :data:`MAX_CHANNELS` channels.

    Returns
    -------
    frames : numpy.ndarray
        float64, shape ``(n_frames, n_channels)``, full scale ±1.0 (integer formats are
        scaled by 2**(bits-1), libsndfile's convention).
    rate_hz : int
        Sample rate in Hz.

    Raises
    ------
    AudioFileError
        See :func:`iter_audio_blocks`.
    """
    info = audio_info(path)
    out = np.empty((info.frames, info.channels), dtype=np.float64)
    pos = 0
    for block in iter_audio_blocks(path, block_frames=1 << 20):
        out[pos : pos + block.shape[0]] = block
        pos += block.shape[0]
    return out[:pos], info.rate_hz


# ---------------------------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------------------------


def _target(path, subtype: str, overwrite: bool, protect) -> tuple[Path, str]:
    p = Path(path)
    container = _CONTAINERS.get(p.suffix.lower())
    if container is None:
        raise OutputError(
            f"{path}: unknown audio file extension {p.suffix!r}; "
            f"expected one of {', '.join(sorted(_CONTAINERS))}"
        )
    if subtype not in WRITE_SUBTYPES:
        raise ParameterError("subtype", subtype, f"one of {', '.join(WRITE_SUBTYPES)}")
    if not sf.check_format(container, subtype):
        raise OutputError(f"{path}: {container} files cannot hold {subtype} samples")
    folder = p.parent if str(p.parent) else Path(".")
    if not folder.is_dir():
        raise OutputError(f"{path}: folder {str(folder)!r} does not exist")
    if not os.access(folder, os.W_OK):
        raise StorageError(path, f"folder {str(folder)!r} is not writable")
    _check_name_fits(p)
    refuse_dangling_symlink(p, replace=overwrite)
    if p.exists():
        for other in protect:
            try:
                if os.path.samefile(p, other):
                    raise OutputError(f"{path}: refusing to overwrite an input file")
            except FileNotFoundError:
                continue
        if not overwrite:
            raise OutputError(f"{path}: already exists (pass overwrite=True to replace it)")
    return p, container


def _check_block(frames, channels: int | None, subtype: str) -> np.ndarray:
    x = np.asarray(frames, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise ParameterError("frames", f"array of shape {x.shape}", "shape (n,) or (n, channels)")
    if channels is not None and x.shape[1] != channels:
        raise ParameterError("frames", f"{x.shape[1]} channels", f"{channels} channels")
    if not 1 <= x.shape[1] <= MAX_CHANNELS:
        raise ParameterError("frames", f"{x.shape[1]} channels", f"1 to {MAX_CHANNELS} channels")
    if not np.isfinite(x).all():
        raise ParameterError("frames", "samples with NaN or Inf", "finite samples")
    if subtype in _INT_SUBTYPES and x.size and np.abs(x).max() > 1.0:
        raise ParameterError(
            "frames",
            f"peak {np.abs(x).max():.6g}",
            f"samples within ±1.0 for {subtype} (integer formats clip at full scale)",
        )
    return np.ascontiguousarray(x)


class AudioFileWriter:
    """A streaming writer that only puts a file under its final name once it is complete.

    Use it through :func:`open_audio_writer` as a context manager. Blocks are written to a
    temporary file in the target folder; leaving the ``with`` block normally renames it to the
    final name (``os.replace``), leaving it through an exception (including
    ``KeyboardInterrupt``) deletes it.
    """

    def __init__(
        self,
        path,
        *,
        rate_hz: int,
        channels: int,
        subtype: str,
        overwrite,
        protect,
        output_set=None,
    ):
        if isinstance(rate_hz, bool) or not isinstance(rate_hz, int | np.integer) or rate_hz < 1:
            raise ParameterError("rate_hz", rate_hz, "a positive integer rate in Hz")
        if isinstance(channels, bool) or not isinstance(channels, int | np.integer):
            raise ParameterError("channels", channels, f"an integer from 1 to {MAX_CHANNELS}")
        if not 1 <= channels <= MAX_CHANNELS:
            raise ParameterError("channels", channels, f"an integer from 1 to {MAX_CHANNELS}")
        self.path, self._container = _target(path, subtype, overwrite, tuple(protect))
        self.rate_hz = int(rate_hz)
        self.channels = int(channels)
        self.subtype = subtype
        self.frames_written = 0
        self._overwrite = overwrite
        self._output_set = output_set
        self._tmp: str | None = None
        self._handle: sf.SoundFile | None = None

    def __enter__(self) -> AudioFileWriter:
        fd, tmp = create_temp_file(self.path)
        os.close(fd)
        self._tmp = str(tmp)
        try:
            self._handle = sf.SoundFile(
                self._tmp,
                "w",
                samplerate=self.rate_hz,
                channels=self.channels,
                subtype=self.subtype,
                format=self._container,
            )
        except (sf.SoundFileError, RuntimeError, OSError) as exc:
            os.unlink(tmp)
            self._tmp = None
            raise StorageError(self.path, _sound_cause(exc, self.path)) from None
        except BaseException:
            os.unlink(tmp)
            self._tmp = None
            raise
        return self

    def write(self, frames) -> None:
        """Append frames, shape ``(n,)`` for mono or ``(n, channels)``, full scale ±1.0."""
        if self._handle is None:
            raise OutputError(f"{self.path}: writer is not open (use it in a with block)")
        x = _check_block(frames, self.channels, self.subtype)
        try:
            self._handle.write(x)
        except (sf.SoundFileError, RuntimeError, OSError, AssertionError) as exc:
            # libsndfile reports a full disk as a short write (soundfile asserts on it)
            raise StorageError(self.path, _sound_cause(exc, self.path)) from None
        self.frames_written += x.shape[0]

    def __exit__(self, exc_type, exc, tb) -> None:
        handle, tmp = self._handle, self._tmp
        self._handle = self._tmp = None
        try:
            if handle is not None:
                try:
                    handle.close()
                except (sf.SoundFileError, RuntimeError, OSError) as err:
                    if exc_type is None:
                        raise StorageError(self.path, _sound_cause(err, self.path)) from None
        except BaseException:
            if tmp is not None:
                Path(tmp).unlink(missing_ok=True)
            raise
        if exc_type is None and tmp is not None:
            if self._output_set is not None:  # renamed with the rest of its set
                self._output_set.stage(tmp, self.path, overwrite=self._overwrite)
                return
            if os.path.lexists(self.path) and not self._overwrite:
                os.unlink(tmp)
                raise OutputError(f"{self.path}: appeared while writing; not replaced")
            try:
                os.replace(tmp, self.path)
            except OSError as err:
                Path(tmp).unlink(missing_ok=True)
                raise StorageError(self.path, err) from None
        elif tmp is not None:
            Path(tmp).unlink(missing_ok=True)


def _sound_cause(exc, path=None) -> str:
    """Plain words for why libsndfile or the OS refused a write to ``path``.

    libsndfile reports a failed system call (a full disk, say) only as "System error."; when
    the file's folder has no free space left, the cause is said in the OS's words instead.
    """
    if isinstance(exc, OSError) and exc.strerror:
        return exc.strerror
    if path is not None and _no_space_left(path):
        return os.strerror(errno.ENOSPC)
    if isinstance(exc, AssertionError):
        return "short write: the disk may be full"
    text = str(exc).split(":")[-1].strip()
    return text or type(exc).__name__


def _no_space_left(path) -> bool:
    """True when the file system holding ``path``'s folder has no block left for a user."""
    folder = Path(path).parent if str(Path(path).parent) else Path(".")
    try:
        return os.statvfs(folder).f_bavail == 0
    except (OSError, AttributeError):  # no statvfs (Windows): nothing more to say
        return False


def open_audio_writer(
    path,
    *,
    rate_hz: int,
    channels: int,
    subtype: str = "PCM_24",
    overwrite: bool = False,
    protect=(),
    output_set: OutputSet | None = None,
) -> AudioFileWriter:
    """Open a streaming, all-or-nothing audio writer.

    Parameters
    ----------
    path : str or os.PathLike
        Final file name; the extension (.wav, .flac, .aif, .aiff) picks the container.
    rate_hz : int
        Sample rate in Hz.
    channels : int
        Number of channels, 1 to :data:`MAX_CHANNELS`.
    subtype : str, optional
        Sample format, one of :data:`WRITE_SUBTYPES`. Integer formats refuse samples beyond
        ±1.0 rather than wrap or clip silently.
    overwrite : bool, optional
        Replace an existing file. Without it an existing file raises OutputError.
    protect : iterable of path, optional
        Files that must never be replaced (the inputs of a run), even with ``overwrite``.
    output_set : OutputSet, optional
        Leave the finished file under its temporary name for the set to rename together with
        the set's other outputs (:meth:`OutputSet.commit`).

    Returns
    -------
    AudioFileWriter
        Use as ``with open_audio_writer(...) as w: w.write(block)``.

    Raises
    ------
    OutputError
        Unknown extension, a format the container cannot hold, a missing or read-only
        folder, or an existing/protected target.
    ParameterError
        Bad rate, channel count, subtype or samples.
    """
    return AudioFileWriter(
        path,
        rate_hz=rate_hz,
        channels=channels,
        subtype=subtype,
        overwrite=overwrite,
        protect=protect,
        output_set=output_set,
    )


def write_audio_atomic(
    path,
    frames,
    rate_hz: int,
    *,
    subtype: str = "PCM_24",
    overwrite: bool = False,
    protect=(),
    output_set: OutputSet | None = None,
) -> Path:
    """Write a whole signal to a file, atomically.

    Parameters
    ----------
    path : str or os.PathLike
        Final file name; the extension (.wav, .flac, .aif, .aiff) picks the container.
    frames : array_like
        Shape ``(n,)`` or ``(n, channels)``, full scale ±1.0.
    rate_hz : int
        Sample rate in Hz.
    subtype, overwrite, protect, output_set
        As :func:`open_audio_writer`.

    Returns
    -------
    pathlib.Path
        The file written.
    """
    x = _check_block(frames, None, subtype)
    with open_audio_writer(
        path,
        rate_hz=rate_hz,
        channels=x.shape[1],
        subtype=subtype,
        overwrite=overwrite,
        protect=protect,
        output_set=output_set,
    ) as writer:
        writer.write(x)
    return writer.path
