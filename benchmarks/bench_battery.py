"""Battery benchmark: the test battery of a shipped profile, against the C loop's time.

Cases
-----
``battery_full``
    ``run_battery`` with the default plan on the shipped ``profiles/dac_chip/pdm5_64x.toml``
    (5th-order single-bit PDM at 64x, 48 kHz) using every core. Reports the wall and the CPU
    time, the modulator samples the battery simulated (``BatteryResult.modulator_samples``),
    and both times over the C reference loop's time for that many samples
    (``feedback5_1bit`` of ``shared/perf``, measured in the same run; lower is faster):
    ``ratio_to_c`` by the wall clock, ``cpu_ratio_to_c`` with the CPU time spread over the
    cores against the C loop's CPU-clock time. Target (issue 12): wall <= 2x the C loop time.
    Also the seconds each test's runs took (summed over runs; they overlap).
``battery_short``
    The same with ``BatteryPlan.quick()`` (what ``audiodsm measure --short`` runs).
``battery_short_over_full``
    The short plan's cost over the full plan's: simulated samples, wall time and CPU time.
    Target (issue 12): about a quarter.

A first untimed call of the dynamic-range test loads the compiled kernels from numba's cache,
so the timed runs measure the battery, not the loading. ``AUDIODSM_BENCH_BATTERY_PLANS=short``
runs the short plan alone.
"""

from __future__ import annotations

import os
import resource
import time
from pathlib import Path

from benchmarks._c_reference import C_RATE_HZ, c_loop_speeds, cpu_loop_seconds, time_ratio

ROOT = Path(__file__).resolve().parents[1]
PROFILE = ROOT / "profiles" / "dac_chip" / "pdm5_64x.toml"
TARGET_RATIO_TO_C = 2.0
TARGET_SHORT_OVER_FULL = 0.25
#: C reference run length (samples per loop); the same as the render case's
C_SAMPLES = C_RATE_HZ * 10
C_LOOP = "feedback5_1bit"


def _cpu_seconds() -> float:
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def run():
    from audiodsm.evaluate.battery import BatteryPlan, run_battery
    from audiodsm.evaluate.grade import collect_profiles

    (_, profile), *_ = collect_profiles([PROFILE])
    c_loop_speeds(C_SAMPLES)  # the C reference runs before the battery, not during it
    run_battery(profile, tests=("dynamic_range",), plan=BatteryPlan.quick())  # warm-up
    cores = os.cpu_count() or 1
    plans = [("battery_short", BatteryPlan.quick())]
    if os.environ.get("AUDIODSM_BENCH_BATTERY_PLANS", "all") != "short":
        plans.insert(0, ("battery_full", BatteryPlan()))
    costs = {}
    for case, plan in plans:
        load = os.getloadavg()[0]
        cpu0 = _cpu_seconds()
        t0 = time.perf_counter()
        res = run_battery(profile, plan=plan)
        wall = time.perf_counter() - t0
        cpu = _cpu_seconds() - cpu0
        samples = int(res.modulator_samples)
        costs[case] = (samples, wall, cpu)
        versus_c = time_ratio(C_LOOP, samples, wall, samples=C_SAMPLES)
        c_cpu = cpu_loop_seconds(C_LOOP, samples, samples=C_SAMPLES)
        if c_cpu is not None:
            versus_c["cpu_ratio_to_c"] = round(cpu / cores / c_cpu, 3)
        yield {
            "case": case,
            "profile": str(PROFILE.relative_to(ROOT)),
            "modulator_samples": samples,
            "seconds": round(wall, 2),
            "cpu_s": round(cpu, 2),
            **versus_c,
            "target_ratio_to_c": TARGET_RATIO_TO_C,
            "cores": cores,
            "run_seconds": {k: round(v, 2) for k, v in sorted(res.run_seconds.items())},
            "dynamic_range_db_a": round(res.metrics["dynamic_range_db_a"], 2),
            "load_average_1min": round(load, 2),
        }
    if len(costs) == 2:
        full, short = costs["battery_full"], costs["battery_short"]
        yield {
            "case": "battery_short_over_full",
            "samples_ratio": round(short[0] / full[0], 3),
            "wall_ratio": round(short[1] / full[1], 3),
            "cpu_ratio": round(short[2] / full[2], 3),
            "target_about": TARGET_SHORT_OVER_FULL,
            "load_average_1min": round(os.getloadavg()[0], 2),
        }
