"""Timing helper shared by the benchmark modules."""

from __future__ import annotations

import time


def best_seconds(fn, repeats=3):
    """The shortest wall-clock time of ``repeats`` calls of ``fn()``, in seconds.

    The minimum is the usual choice on a shared machine: other load only ever adds time.
    """
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best
