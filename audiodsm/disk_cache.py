"""Results worked out once per setting, remembered on disk for every later process.

A render designs its rate converters, its reconstruction filter's tables, its loop, and the
filters of its silence meter before it plays a sample. Those designs depend only on their
settings and on the code that computes them, and most of them need :mod:`scipy.signal`, whose
import alone costs about a second of CPU. So they are kept on disk: a later run reads them
back and never imports the design code's libraries.

The folder is ``$XDG_CACHE_HOME/audiodsm/loops`` (``~/.cache/audiodsm/loops`` when the variable
is unset; the name is older than the designs it now also holds); ``AUDIODSM_LOOP_CACHE`` names
another folder, or turns the cache off with ``off``. An entry is named by the SHA-256 of its
kind, its key and a stamp of the code that computes it (the bytes of the modules the caller
names, and the numpy and scipy versions): editing that code, or upgrading either library, makes
every older entry unreachable. Entries are pickles of plain values (numbers, arrays, tuples) or
the library's own frozen dataclasses, written to a temporary name and renamed, so a reader never
sees half an entry; an entry that cannot be read is ignored and computed again.

:mod:`audiodsm.stages.loop_cache` is this cache for the modulator's designs.
"""

from __future__ import annotations

import functools
import hashlib
import os
import pickle
import tempfile
from pathlib import Path

__all__ = ["cache_folder", "load", "store", "remembered"]


def cache_folder() -> Path | None:
    """The folder of the cache, or None when ``AUDIODSM_LOOP_CACHE=off``.

    ``AUDIODSM_LOOP_CACHE`` set to anything else names the folder itself.
    """
    given = os.environ.get("AUDIODSM_LOOP_CACHE", "")
    if given.lower() == "off":
        return None
    if given:
        return Path(given)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "audiodsm" / "loops"


@functools.cache
def _code_stamp(sources: tuple[str, ...]) -> str:
    import numpy
    import scipy  # the package alone (a few ms; numba imports it anyway), not its submodules

    package = Path(__file__).resolve().parent
    libraries = f"numpy {numpy.__version__} scipy {scipy.__version__}"
    digest = hashlib.sha256(libraries.encode())
    for name in sources:
        digest.update((package / name).read_bytes())
    return digest.hexdigest()


def _path(kind: str, key, sources) -> Path | None:
    folder = cache_folder()
    if folder is None:
        return None
    text = f"{kind}\n{key!r}\n{_code_stamp(tuple(sources))}"
    return folder / f"{kind}-{hashlib.sha256(text.encode()).hexdigest()[:32]}.pickle"


def load(kind: str, key, sources):
    """The value stored under ``(kind, key)``, or None (none stored, unreadable, or off).

    ``key`` must have a ``repr`` that is the same in every process (tuples of numbers,
    strings and bytes). ``sources`` are the modules (paths relative to the package folder)
    whose code computes the value.
    """
    path = _path(kind, key, sources)
    if path is None:
        return None
    try:
        with open(path, "rb") as f:
            return pickle.load(f)
    except (OSError, pickle.UnpicklingError, EOFError, AttributeError, ImportError, TypeError):
        return None


def store(kind: str, key, value, sources) -> None:
    """Store ``value`` under ``(kind, key)``; a folder that cannot be written is skipped."""
    path = _path(kind, key, sources)
    if path is None:
        return
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-", suffix=".pickle")
        try:
            with os.fdopen(fd, "wb") as f:
                pickle.dump(value, f, protocol=pickle.HIGHEST_PROTOCOL)
            os.replace(tmp, path)
        except BaseException:
            os.unlink(tmp)
            raise
    except OSError:
        pass


def remembered(kind: str, key, compute, *, sources, valid=None):
    """``compute()``, or the value a previous call with the same kind and key stored.

    Parameters
    ----------
    kind : str
        What the value is (part of the file name).
    key : tuple
        The settings the value depends on (see :func:`load`).
    compute : callable
        Computes the value when none is stored (its result is stored).
    sources : sequence of str
        Modules whose code computes the value (paths relative to the package folder).
    valid : callable, optional
        ``valid(value) -> bool`` for a value read back; a value it refuses is computed again.
    """
    value = load(kind, key, sources)
    if value is None or (valid is not None and not valid(value)):
        value = compute()
        store(kind, key, value, sources)
    return value
