"""Battery benchmark: the full test battery of a 5th-order single-bit PDM profile at 64x.

Cases
-----
``battery_full``
    ``run_battery`` with the default plan on the default profile (5th-order single-bit loop,
    OSR 64, PDM, 3rd-order Butterworth reconstruction, 48 kHz) using every core. Reports the
    wall time, the time each test's runs took (summed; they overlap), the number of cores and
    the target. Target: <= 20 s on the two-core build machine.
``battery_short``
    The same with ``BatteryPlan.quick()`` (what ``audiodsm measure --short`` runs).

A first untimed call of the dynamic-range test loads the compiled kernels from numba's cache,
so the timed runs measure the battery, not the loading.
"""

from __future__ import annotations

import os
import time

TARGET_S = 20.0


def run():
    from audiodsm.evaluate.battery import BatteryPlan, run_battery
    from audiodsm.profile import ChainProfile

    profile = ChainProfile(name="pdm5-osr64")
    run_battery(profile, tests=("dynamic_range",), plan=BatteryPlan.quick())  # warm-up
    for case, plan in (("battery_full", BatteryPlan()), ("battery_short", BatteryPlan.quick())):
        t0 = time.perf_counter()
        res = run_battery(profile, plan=plan)
        wall = time.perf_counter() - t0
        yield {
            "case": case,
            "profile": profile.name,
            "seconds": round(wall, 2),
            "target_seconds": TARGET_S if case == "battery_full" else None,
            "meets_target": wall <= TARGET_S if case == "battery_full" else None,
            "cores": os.cpu_count(),
            "run_seconds": {k: round(v, 2) for k, v in sorted(res.run_seconds.items())},
            "dynamic_range_db_a": round(res.metrics["dynamic_range_db_a"], 2),
        }
