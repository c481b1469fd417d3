"""Stand-in batteries for the fault tests, in a module light enough for worker processes.

Worker processes of ``grade --jobs N`` import the battery by reference, so these live apart
from the test modules (which import pytest and hypothesis).
"""

import os
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np


def quick_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    """Readings that follow the loop order; counts its calls in $AUDIODSM_TEST_CALLS."""
    folder = os.environ.get("AUDIODSM_TEST_CALLS")
    if folder:
        Path(folder, f"ran.{profile.name}.{os.getpid()}.{time.monotonic_ns()}").touch()
    order = profile.modulator.order
    levels = np.array([0.0, -20.0])
    return SimpleNamespace(
        metrics={"dynamic_range_db_a": 95.0 + 5.0 * order, "idle_tone_max_dbfs": -140.0},
        curves={"thd_n_vs_level": {"level_dbfs": levels, "thd_n_db": -100.0 + 0.0 * levels}},
        notes=("stand-in",),
        seconds=0.01,
    )


def waiting_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    """Finishes at once for loop order 2; otherwise says it started (with its pid) and waits."""
    if profile.modulator.order != 2:
        folder = Path(os.environ["AUDIODSM_TEST_CALLS"])
        Path(folder, f"started.{profile.name}.{os.getpid()}").touch()
        while True:
            time.sleep(0.05)
    return quick_battery(profile)


def short_real_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    """The real battery on its short plan, cut to the dynamic-range test (a few seconds)."""
    from audiodsm.evaluate.battery import BatteryPlan, run_battery

    options = dict(options)
    options.setdefault("plan", BatteryPlan.quick())
    options.setdefault("tests", ("dynamic_range",))
    return run_battery(profile, jobs=jobs, progress=progress, seed=seed, **options)


def worker_killing_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    """Ends its worker process the first time it runs profile "k3"; otherwise the real battery.

    The marker file in $AUDIODSM_TEST_CALLS says it has already killed once, so the
    scheduler's retry on another worker runs the battery to the end.
    """
    marker = Path(os.environ["AUDIODSM_TEST_CALLS"], "killed.once")
    if profile.name == "k3" and not marker.exists():
        marker.touch()
        os._exit(9)
    return short_real_battery(profile, jobs=jobs, progress=progress, seed=seed, **options)


def preloaded_warm_up():
    """What a worker inherited from the local cluster's process server.

    ``(seconds of the server's warm-up or None, whether the battery's modules were already
    imported in this worker before the task ran)``.
    """
    import sys

    module = sys.modules.get("audiodsm.evaluate._worker_preload")
    seconds = None if module is None else module.SECONDS
    return seconds, "audiodsm.evaluate.battery_runs" in sys.modules


def part_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    """Readings drawn from the part: the first unit element's error in standard deviations.

    ``dynamic_range_db_a`` = 100 + 5 z and ``idle_tone_max_dbfs`` = -140 + z, with ``z`` the
    first element's error over the mismatch (one standard normal draw per part, through the
    element stage's own draw). Each call leaves a file in $AUDIODSM_TEST_CALLS naming the part
    seed.
    """
    from audiodsm.stages.elements import draw_element_errors

    imp = profile.impairments
    folder = os.environ.get("AUDIODSM_TEST_CALLS")
    if folder:
        Path(folder, f"ran.{imp.part_seed}.{os.getpid()}.{time.monotonic_ns()}").touch()
    errors = draw_element_errors(
        profile.modulator.levels - 1, mismatch=max(imp.element_mismatch, 1e-3), seed=imp.part_seed
    )
    z = float(errors[0]) / max(imp.element_mismatch, 1e-3)
    levels = np.array([0.0, -20.0])
    return SimpleNamespace(
        metrics={"dynamic_range_db_a": 100.0 + 5.0 * z, "idle_tone_max_dbfs": -140.0 + z},
        curves={"thd_n_vs_level": {"level_dbfs": levels, "thd_n_db": -100.0 + z + 0.0 * levels}},
        notes=("stand-in",),
        seconds=0.01,
    )
