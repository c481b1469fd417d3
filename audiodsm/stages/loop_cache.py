"""An on-disk cache for what the chain works out once per modulator setting.

Building a chain from a profile designs its NTF and, unless state scaling is off, runs a
stability search and a check run of the scaled loop (about a second, and the compile of one
more loop on a fresh checkout). The results depend only on the modulator section of the
profile, the oversampling ratio and the code that computes them, so they are kept on disk
and every later run, in any process, reads them back instead.

The folder is ``$XDG_CACHE_HOME/audiodsm/loops`` (``~/.cache/audiodsm/loops`` when the variable
is unset); ``AUDIODSM_LOOP_CACHE`` names another folder, or turns the cache off with ``off``.
An entry is named by the SHA-256 of its key and of a stamp of the code that computes it (the
bytes of the design and modulator modules, and the numpy and scipy versions): editing that
code, or upgrading either library, makes every older entry unreachable. Entries are pickles
of the library's own frozen dataclasses, written to a temporary name and renamed, so a reader
never sees half an entry; an entry that cannot be read is ignored and computed again.

:func:`compiled_loops_missing` tells a command whether numba's own cache of the compiled loops
is still empty (a fresh checkout), so that it can say why its first run takes long.
"""

from __future__ import annotations

import functools
import hashlib
import os
import pickle
import tempfile
from pathlib import Path

__all__ = ["cache_folder", "compiled_loops_missing", "load", "store"]

# the modules whose code decides what is cached (relative to the package folder)
_SOURCES = ("design/ntf.py", "design/realize.py", "stages/modulator.py", "stages/_kernels.py")


def cache_folder() -> Path | None:
    """The folder of the loop cache, or None when ``AUDIODSM_LOOP_CACHE=off``.

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
def _code_stamp() -> str:
    import numpy
    import scipy

    package = Path(__file__).resolve().parents[1]
    digest = hashlib.sha256(f"numpy {numpy.__version__} scipy {scipy.__version__}".encode())
    for name in _SOURCES:
        digest.update((package / name).read_bytes())
    return digest.hexdigest()


def _path(kind: str, key) -> Path | None:
    folder = cache_folder()
    if folder is None:
        return None
    text = f"{kind}\n{key!r}\n{_code_stamp()}"
    return folder / f"{kind}-{hashlib.sha256(text.encode()).hexdigest()[:32]}.pickle"


def load(kind: str, key):
    """The value stored under ``(kind, key)``, or None (none stored, unreadable, or off).

    ``key`` must have a ``repr`` that is the same in every process (tuples of numbers,
    strings and bytes).
    """
    path = _path(kind, key)
    if path is None:
        return None
    try:
        with open(path, "rb") as f:
            return pickle.load(f)
    except (OSError, pickle.UnpicklingError, EOFError, AttributeError, ImportError, TypeError):
        return None


def store(kind: str, key, value) -> None:
    """Store ``value`` under ``(kind, key)``; a folder that cannot be written is skipped."""
    path = _path(kind, key)
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


def compiled_loops_missing() -> bool:
    """True when no compiled loop of the kernel modules is in numba's on-disk cache yet.

    A fresh checkout (or a cleared cache): the first run compiles the loops it needs, which
    takes several seconds each; later runs load them. Cheap: it looks for the cache index file
    of each loop compiled with ``cache=True`` and stops at the first one found. It says
    nothing about loops a given run needs that a previous run did not (those compile silently,
    one at a time).
    """
    from numba.core.dispatcher import Dispatcher

    from audiodsm.stages import _kernels, _rate_kernels, _waveform_kernels

    checked = 0
    for module in (_kernels, _rate_kernels, _waveform_kernels):
        for value in vars(module).values():
            if not isinstance(value, Dispatcher):
                continue
            try:
                index = value._cache._cache_file._index_path  # numba's FunctionCache
            except AttributeError:  # not cached, or a numba whose cache looks different
                continue
            checked += 1
            if os.path.exists(index):
                return False
    return checked > 0
