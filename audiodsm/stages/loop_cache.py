"""An on-disk cache for what the chain works out once per modulator setting.

Building a chain from a profile designs its NTF and, unless state scaling is off, runs a
stability search and a check run of the scaled loop (about a second, and the compile of one
more loop on a fresh checkout). The results depend only on the modulator section of the
profile, the oversampling ratio and the code that computes them, so they are kept on disk
and every later run, in any process, reads them back instead.

The entries live in the project's disk cache (:mod:`audiodsm.disk_cache`: folder, names,
atomic writes), stamped with the code of the design and modulator modules: editing that code,
or upgrading numpy or scipy, makes every older entry unreachable.

:func:`compiled_loops_missing` tells a command whether numba's own cache of the compiled loops
is still empty (a fresh checkout), so that it can say why its first run takes long.
"""

from __future__ import annotations

import os

from audiodsm import disk_cache
from audiodsm.disk_cache import cache_folder

__all__ = ["cache_folder", "compiled_loops_missing", "load", "store"]

# the modules whose code decides what is cached (relative to the package folder)
_SOURCES = ("design/ntf.py", "design/realize.py", "stages/modulator.py", "stages/_kernels.py")


def load(kind: str, key):
    """The value stored under ``(kind, key)``, or None (none stored, unreadable, or off).

    ``key`` must have a ``repr`` that is the same in every process (tuples of numbers,
    strings and bytes).
    """
    return disk_cache.load(kind, key, _SOURCES)


def store(kind: str, key, value) -> None:
    """Store ``value`` under ``(kind, key)``; a folder that cannot be written is skipped."""
    disk_cache.store(kind, key, value, _SOURCES)


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
