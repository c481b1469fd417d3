"""Output files: temporary names, atomic replacement, names that fit, sets written together.

Every output goes to a temporary name in the target folder first and is renamed only when
complete, so an interrupted run never leaves a half-written file under the final name. The
temporary name records the writer's process id (:func:`create_temp_file`,
:func:`create_temp_folder`), so a later run removes what a killed one left
(:func:`remove_stale_temp_files`); files get the permissions of the user's umask; a write that
fails for want of space, permission or a name that fits raises
:class:`~audiodsm.errors.StorageError` naming the path and the cause. Text files are replaced
with :func:`replace_text_atomically`; outputs that belong together go through one
:class:`OutputSet`. Helpers for choosing output names: :func:`fit_file_name` (shorten with a
digest), :func:`same_file` (device and inode), :func:`refuse_dangling_symlink`.

Audio files are written by :mod:`audiodsm.io` (the only soundfile user) on top of these.
"""

from __future__ import annotations

import errno
import hashlib
import os
import re
import shutil
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

from audiodsm.errors import OutputError, ParameterError, StorageError

__all__ = [
    "replace_text_atomically",
    "MAX_NAME_BYTES",
    "MAX_OUTPUT_NAME_BYTES",
    "TEMP_SUFFIXES",
    "current_umask",
    "create_temp_file",
    "create_temp_folder",
    "temp_file_owner",
    "remove_stale_temp_files",
    "fit_file_name",
    "same_file",
    "refuse_dangling_symlink",
    "OutputSet",
]


# ---------------------------------------------------------------------------------------------
# Temporary files, stale clean-up, names that fit, same-file checks
# ---------------------------------------------------------------------------------------------

#: Suffixes of the hidden temporary files outputs are written to before they are renamed.
TEMP_SUFFIXES = (".partial", ".part")
#: The longest file name, in bytes, that common file systems accept (ext4, XFS, APFS, NTFS).
MAX_NAME_BYTES = 255
# a temporary name wraps the final one: "." + name + "." + pid (up to 10 digits) + "-" +
# 8 random characters + ".partial"
_TEMP_WRAP_BYTES = 1 + 1 + 10 + 1 + 8 + len(".partial")
#: The longest final output name :func:`fit_file_name` makes, so its temporary twin fits too.
MAX_OUTPUT_NAME_BYTES = MAX_NAME_BYTES - _TEMP_WRAP_BYTES
#: Temporary files in the old layout (no owner process in the name) older than this are stale.
_LEGACY_STALE_S = 24 * 3600.0

# ".<name>.<pid>-<random>.partial" (or ".part"): the owner's process id is in the name
_TEMP_NAME = re.compile(r"^\.(?P<name>.+)\.(?P<pid>[0-9]{1,10})-[a-z0-9_]{8}(?:\.partial|\.part)$")
# the layout before the owner was recorded: ".<name>.<random>.partial" and ".partial-<random>.npz"
_LEGACY_TEMP_NAME = re.compile(
    r"^(?:\.(?P<name>.+)\.[a-z0-9_]{8}(?:\.partial|\.part)|\.partial-[a-z0-9_]{8}\.npz)$"
)


def current_umask() -> int:
    """The process's file-creation mask, e.g. ``0o022``.

    Read from ``/proc/self/status`` where there is one (Linux), which leaves the mask alone;
    elsewhere it is set and put back at once (``os.umask`` has no read-only form).
    """
    try:
        with open("/proc/self/status", encoding="ascii", errors="replace") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _temp_stem(name: str) -> str:
    """The part of a temporary name that stands for the final name (shortened to fit)."""
    return fit_file_name(name, max_bytes=MAX_OUTPUT_NAME_BYTES)


def create_temp_file(path, *, suffix: str = ".partial") -> tuple[int, Path]:
    """Create the hidden temporary file an output is written to before its rename.

    The file is ``.<name>.<pid>-<random><suffix>`` in the output's folder: the process id of
    the writer is part of the name, so a later run can tell a file left by a killed run
    (:func:`remove_stale_temp_files`) from one still being written. Stale temporary files of
    the same output are removed first. The file gets the permissions a plain new file gets
    under the user's umask (0644 under 0022), not ``mkstemp``'s 0600, so the renamed output
    does too.

    Parameters
    ----------
    path : str or os.PathLike
        The final output name.
    suffix : str, keyword-only
        One of :data:`TEMP_SUFFIXES`.

    Returns
    -------
    fd : int
        An open file descriptor (the caller closes it).
    tmp : Path
        The temporary file.

    Raises
    ------
    StorageError
        The folder is missing, read-only or full.
    """
    if suffix not in TEMP_SUFFIXES:
        raise ParameterError("suffix", suffix, f"one of {', '.join(TEMP_SUFFIXES)}")
    p = Path(path)
    folder = p.parent if str(p.parent) else Path(".")
    stem = _temp_stem(p.name)
    remove_stale_temp_files(folder, name=stem)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{stem}.{os.getpid()}-", suffix=suffix, dir=folder)
    except OSError as exc:
        raise StorageError(p, exc) from None
    try:
        os.fchmod(fd, 0o666 & ~current_umask())
    except OSError:  # a file system without permissions (FAT): keep what it gives
        pass
    return fd, Path(tmp)


def create_temp_folder(path) -> Path:
    """Create the hidden temporary folder a set of outputs is written into before its rename.

    As :func:`create_temp_file`, for a folder: ``.<name>.<pid>-<random>.partial`` beside
    ``path``, with the permissions of a new folder under the user's umask (0755 under 0022).

    Raises
    ------
    StorageError
        The parent folder is missing, read-only or full.
    """
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    stem = _temp_stem(p.name)
    remove_stale_temp_files(parent, name=stem)
    try:
        tmp = Path(
            tempfile.mkdtemp(prefix=f".{stem}.{os.getpid()}-", suffix=".partial", dir=parent)
        )
    except OSError as exc:
        raise StorageError(p, exc) from None
    try:
        os.chmod(tmp, 0o777 & ~current_umask())
    except OSError:
        pass
    return tmp


def temp_file_owner(name: str) -> int | None:
    """The process id recorded in a temporary file's name, or None for any other name."""
    m = _TEMP_NAME.match(name)
    return int(m.group("pid")) if m else None


def _process_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # EPERM: alive, owned by someone else
        return True
    return True


def remove_stale_temp_files(folder, *, name: str | None = None) -> list:
    """Remove the hidden temporary files in a folder that no live process owns.

    A temporary file whose name records a process id (:func:`create_temp_file`) is stale when
    that process no longer runs: a run killed before it could clean up left it. Temporary
    files in the older layout without a process id are stale when untouched for a day. Files
    of a live process, and every other file, are left alone. Removal is best effort: a file
    that vanishes meanwhile or cannot be removed is skipped.

    Process ids are those of this machine: a folder shared with another machine over a
    network may hold temporary files whose owner runs there; they are kept as long as a
    process with the same id runs here.

    Parameters
    ----------
    folder : str or os.PathLike
    name : str, optional, keyword-only
        Only the temporary files of this output name.

    Returns
    -------
    list of Path
        What was removed.
    """
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    now = time.time()
    for entry in entries:
        m = _TEMP_NAME.match(entry.name)
        if m is not None:
            if name is not None and m.group("name") != name:
                continue
            if _process_alive(int(m.group("pid"))):
                continue
        else:
            legacy = _LEGACY_TEMP_NAME.match(entry.name)
            if legacy is None or (name is not None and legacy.group("name") != name):
                continue
            try:
                if now - entry.stat(follow_symlinks=False).st_mtime < _LEGACY_STALE_S:
                    continue
            except OSError:
                continue
        try:
            if entry.is_dir(follow_symlinks=False):
                shutil.rmtree(entry.path)
            else:
                os.unlink(entry.path)
        except OSError:
            continue
        removed.append(Path(entry.path))
    return removed


def fit_file_name(name: str, *, max_bytes: int = MAX_OUTPUT_NAME_BYTES) -> str:
    """Shorten a file name that is too long, keeping it unique with a digest.

    A name of at most ``max_bytes`` bytes (UTF-8) comes back unchanged. A longer one keeps
    its extension and as much of its start as fits, followed by ``-`` and the first 16 hex
    digits of the SHA-256 of the whole name, so two long names that differ anywhere get
    different short names, and the same name always gets the same one.

    Parameters
    ----------
    name : str
        A file name (no folder part).
    max_bytes : int, keyword-only
        At least 40. Default :data:`MAX_OUTPUT_NAME_BYTES`, which leaves room for the
        temporary name wrapped around it while it is written.

    Returns
    -------
    str
    """
    if isinstance(max_bytes, bool) or not isinstance(max_bytes, int) or max_bytes < 40:
        raise ParameterError("max_bytes", max_bytes, "an integer of at least 40")
    raw = name.encode("utf-8", "surrogateescape")
    if len(raw) <= max_bytes:
        return name
    digest = hashlib.sha256(raw).hexdigest()[:16]
    dot = name.rfind(".")
    ext = name[dot:] if 0 < dot and len(name[dot:].encode("utf-8", "surrogateescape")) <= 12 else ""
    stem_raw = raw[: len(raw) - len(ext.encode("utf-8", "surrogateescape"))]
    room = max_bytes - len(ext.encode("utf-8", "surrogateescape")) - 1 - len(digest)
    stem = stem_raw[:room].decode("utf-8", "ignore")  # never split a character
    return f"{stem}-{digest}{ext}"


def same_file(a, b) -> bool:
    """True when two paths name the same file or folder (same device and inode).

    Unlike comparing path text, this sees through symlinks, ``..``, hard links and bind
    mounts. A path that does not exist is the same as nothing.
    """
    try:
        sa, sb = os.stat(a), os.stat(b)
    except (OSError, ValueError):
        return False
    return (sa.st_dev, sa.st_ino) == (sb.st_dev, sb.st_ino)


def refuse_dangling_symlink(path, *, replace: bool) -> None:
    """Refuse to write over a symlink that points nowhere, unless replacing was asked for.

    ``Path.exists`` is False for a dangling symlink, so an "already exists" check lets it
    through, and the rename that finishes an atomic write would then silently replace the
    link. This check makes the link count as an existing output.

    Raises
    ------
    OutputError
        ``path`` is a dangling symlink and ``replace`` is False.
    """
    p = Path(path)
    if not replace and p.is_symlink() and not p.exists():
        raise OutputError(
            f"{path}: is a symlink to a missing file ({os.readlink(p)}); "
            "not replaced without permission to replace outputs"
        )


def _check_name_fits(path) -> None:
    """Refuse a final name longer than the file system takes, before any work is done."""
    p = Path(path)
    if len(p.name.encode("utf-8", "surrogateescape")) > MAX_NAME_BYTES:
        raise StorageError(p, os.strerror(errno.ENAMETOOLONG))


def _write_temp_beside(path: Path, write) -> Path:
    """Write a hidden temporary twin of ``path`` through ``write(binary file)``; return it.

    The file is flushed and synced before it is closed. On any failure it is removed again:
    an ``OSError`` becomes a :class:`StorageError` naming ``path``, anything else (Ctrl-C, an
    error of ``write``) is raised as it is.
    """
    fd, tmp = create_temp_file(path)
    with _removed_on_failure(tmp, path):
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
    return tmp


@contextmanager
def _removed_on_failure(tmp: Path, path):
    """Remove the temporary file ``tmp`` when the block fails; name ``path`` in the error.

    An ``OSError`` becomes a :class:`StorageError` naming ``path``; anything else (Ctrl-C, a
    writer's own error) is raised as it is.
    """
    try:
        yield
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise StorageError(path, exc) from None
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def replace_text_atomically(path, text: str) -> Path:
    """Put a text file in place through a temporary file in the same folder and a rename.

    The text is written as UTF-8 with no newline translation to a hidden temporary file
    beside the target, which is then renamed over it (``os.replace``); on any failure the
    temporary file is removed and the target is left as it was.

    Parameters
    ----------
    path : str or os.PathLike
        The target file. The caller decides whether an existing file may be replaced.
    text : str

    Returns
    -------
    Path

    The file gets the permissions of a new file under the user's umask (0644 under 0022).
    The temporary name records this process's id, so a later run can remove it if this one
    is killed (:func:`remove_stale_temp_files`).

    Raises
    ------
    StorageError
        (an ``OSError``) The folder is missing or not writable, the disk is full, the name
        is too long, or the rename failed; the message names the path and the cause.
    """
    p = Path(path)
    _check_name_fits(p)
    data = text.encode("utf-8")
    tmp = _write_temp_beside(p, lambda fh: fh.write(data))
    with _removed_on_failure(tmp, p):
        os.replace(tmp, p)
    return p


class OutputSet:
    """Outputs that appear together or not at all (a listening file and its summary, say).

    Files written for the set stay under their hidden temporary names until :meth:`commit`
    renames them all. A failure before the commit (a full disk while writing the last file,
    Ctrl-C) leaves none of them under a final name; :meth:`discard` removes the temporary
    files. If a rename inside the commit fails, the files the commit already put in place are
    taken back out again (a file they replaced is restored from a hard link kept for the
    purpose, where the file system allows one), so the set is still all or nothing.

    Files join the set as text (:meth:`add_text`), bytes (:meth:`add_bytes`), through a
    writer given a binary file (:meth:`add_from_writer`, a figure's ``savefig`` say), or as
    a finished temporary file (:meth:`stage`, the audio writers).

    Use it as a context manager: leaving the block normally commits, leaving it through an
    exception discards::

        with OutputSet() as outputs:
            with open_audio_writer(listen, rate_hz=48000, channels=2, output_set=outputs) as w:
                w.write(block)
            outputs.add_text(summary, text)
    """

    def __init__(self):
        self._staged: list = []  # (temporary file, final name, may replace)

    def stage(self, tmp, final, *, overwrite: bool) -> None:
        """Take over a finished temporary file, to be renamed to ``final`` on commit."""
        self._staged.append((Path(tmp), Path(final), bool(overwrite)))

    def add_text(self, path, text: str, *, overwrite: bool = False) -> Path:
        """Write a UTF-8 text file for the set (no newline translation); return its name.

        Raises
        ------
        OutputError
            The file (or a dangling symlink) exists and ``overwrite`` is False.
        StorageError
            The temporary file cannot be written.
        """
        return self.add_bytes(path, text.encode("utf-8"), overwrite=overwrite)

    def add_bytes(self, path, data: bytes, *, overwrite: bool = False) -> Path:
        """Write a file of the given bytes for the set; return its name.

        Raises as :meth:`add_text`.
        """
        return self.add_from_writer(path, lambda fh: fh.write(data), overwrite=overwrite)

    def add_from_writer(self, path, write, *, overwrite: bool = False) -> Path:
        """Write a file for the set through ``write(fh)``; return its name.

        ``write`` is called once with a binary file open for writing (a figure's ``savefig``,
        say); the file is synced and staged when it returns. An error inside ``write``
        removes the temporary file and is raised as it is.

        Raises
        ------
        OutputError
            The file (or a dangling symlink) exists and ``overwrite`` is False.
        StorageError
            The temporary file cannot be written.
        """
        p = Path(path)
        _check_name_fits(p)
        refuse_dangling_symlink(p, replace=overwrite)
        if p.exists() and not overwrite:
            raise OutputError(f"{p}: already exists (pass overwrite=True to replace it)")
        self.stage(_write_temp_beside(p, write), p, overwrite=overwrite)
        return p

    def _backup(self, final: Path) -> Path | None:
        """A hard link to a file about to be replaced, or None (nothing there, or no links)."""
        if not final.is_file():
            return None
        fd, spare = create_temp_file(final)
        os.close(fd)
        spare.unlink()
        try:
            os.link(final, spare)
        except OSError:
            return None
        return spare

    def commit(self) -> list:
        """Rename every staged file to its final name; all of them or none.

        Returns
        -------
        list of Path
            The final names, in the order staged.

        Raises
        ------
        OutputError
            A final name appeared meanwhile and may not be replaced.
        StorageError
            A rename failed; nothing of the set is left under a final name.
        """
        placed, backups = [], []
        try:
            for tmp, final, overwrite in self._staged:
                if os.path.lexists(final) and not overwrite:
                    raise OutputError(f"{final}: appeared while writing; not replaced")
                backups.append(self._backup(final) if overwrite else None)
                try:
                    os.replace(tmp, final)
                except OSError as exc:
                    raise StorageError(final, exc) from None
                placed.append(final)
        except BaseException:
            for final, spare in zip(placed, backups, strict=False):
                try:
                    if spare is not None:
                        os.replace(spare, final)
                    else:
                        final.unlink(missing_ok=True)
                except OSError:
                    pass
            for spare in backups[len(placed) :]:
                if spare is not None:
                    spare.unlink(missing_ok=True)
            self.discard()
            raise
        for spare in backups:
            if spare is not None:
                spare.unlink(missing_ok=True)
        self._staged = []
        return placed

    def discard(self) -> None:
        """Remove every staged temporary file; nothing appears under a final name."""
        for tmp, _final, _overwrite in self._staged:
            tmp.unlink(missing_ok=True)
        self._staged = []

    def __enter__(self) -> OutputSet:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.commit()
        else:
            self.discard()
