"""``audiodsm measure`` on many batteries: profiles and their parts as cluster tasks.

:func:`measure_on_cluster` runs the battery on every (profile, part) it is given as one Dask
task each (:mod:`audiodsm.evaluate.cluster`); a task carries the profile, the plan and the
part index, and the worker derives the part's profile
(:func:`~audiodsm.evaluate.parts.part_profile`) itself, as a serial run does.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence

__all__ = ["measure_on_cluster", "measure_part"]


def measure_part(profile, threads, seed, plan, part=0, progress=None):
    """The battery of part ``part`` of a profile.

    The task of :func:`measure_on_cluster`, and what ``measure`` runs in its own process.

    Returns
    -------
    BatteryResult
    """
    from audiodsm.evaluate.battery import run_battery
    from audiodsm.evaluate.parts import part_profile

    prof = part_profile(profile, part)
    return run_battery(prof, jobs=threads, progress=progress, seed=seed, plan=plan)


def measure_on_cluster(
    profiles: Sequence,
    *,
    plan=None,
    jobs: int | None = None,
    seed: int = 0,
    scheduler: str | None = None,
    progress: Callable[[float, str], None] | None = None,
    say: Callable[[str], None] | None = None,
    parts: Sequence[int] | None = None,
) -> list:
    """Run the battery on several profiles (or parts of them) as cluster tasks.

    Parameters
    ----------
    profiles : sequence of (path, ChainProfile)
    plan : BatteryPlan, optional, keyword-only
    jobs : int, optional, keyword-only
        Cores of the local cluster (default: all); ``min(jobs, batteries)`` worker processes,
        each battery with ``jobs // workers`` threads. Ignored with ``scheduler``.
    seed : int, keyword-only
    scheduler : str or None, keyword-only
        An existing Dask scheduler (``tcp://host:port``); None starts a local cluster.
    progress, say : callable, optional, keyword-only
        As for :func:`~audiodsm.evaluate.grade.grade_batch`.
    parts : sequence of int, optional, keyword-only
        The part index of each entry (default: 0 for all, the profiles as written).

    Returns
    -------
    list
        Per entry, in the order given: its ``BatteryResult``, or a one-line text saying why
        the battery failed (the other entries are still measured).

    Raises
    ------
    ClusterError
        The scheduler cannot take the batch (before any battery runs).
    """
    from audiodsm.evaluate.cluster import run_tasks

    entries = list(profiles)
    indices = list(parts) if parts is not None else [0] * len(entries)
    jobs = jobs or os.cpu_count() or 1
    workers = max(1, min(jobs, len(entries)))
    threads = 1 if scheduler else max(1, jobs // workers)
    out: list = [None] * len(entries)

    def on_result(i, status, value):
        out[i] = value if status == "ok" else f"battery failed: {value}"

    def report(done, total, per_minute, alive):
        if progress is not None:
            progress(done / total, f"{done}/{total} batteries, {per_minute:.1f}/min, "
                     f"{alive} workers")  # fmt: skip

    calls = [(prof, threads, seed, plan, k) for (_, prof), k in zip(entries, indices, strict=True)]
    run_tasks(
        measure_part,
        calls,
        workers=workers,
        scheduler=scheduler,
        on_result=on_result,
        progress=report,
        say=say,
    )
    return out
