"""Grading benchmarks: does a batch scale linearly and use both cores?

Cases
-----
``grade_scaling``
    Copies of the shipped 5th-order single-bit profile (``profiles/dac_chip/pdm5_64x.toml``)
    graded with the full battery (``AUDIODSM_BENCH_GRADE_PLAN=quick``: its short plan), no
    cache: one copy with ``jobs=1`` (the unit of work), then N = 4 copies with ``jobs=1``
    and with ``jobs=2``. Reports wall times, the
    time per profile, and the speed-up of two worker processes. Targets: the N-profile
    serial time within 1.3 x N times the one-profile time (linear scaling), and a speed-up
    of at least 1.6 with two cores on a quiet machine (each worker process pays the
    first-call cost of the compiled loops and filter designs once).
``demo``
    The whole ``python -m audiodsm.demo`` (short battery plan, renders, reports) into a fresh
    folder, timed. Target: under 180 s on two cores.

``AUDIODSM_BENCH_GRADE_SKIP_DEMO=1`` leaves the demo case out. With the short plan a battery
takes about a second once warm, less than a fresh worker process needs to start (import,
compiled-loop cache, filter designs), so two workers do not pay off there.
"""

from __future__ import annotations

import os
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _grade(paths, jobs):
    from audiodsm.evaluate.battery import BatteryPlan
    from audiodsm.evaluate.grade import collect_profiles, grade_batch
    from audiodsm.spec import load_spec

    spec = load_spec(ROOT / "profiles" / "specs" / "dac_chip.toml")
    profiles = collect_profiles(paths)
    quick = os.environ.get("AUDIODSM_BENCH_GRADE_PLAN", "full") == "quick"
    options = {"plan": BatteryPlan.quick()} if quick else {}
    t0 = time.perf_counter()
    grade_batch(profiles, spec, jobs=jobs, battery_options=options)
    return time.perf_counter() - t0, len(profiles)


def run():
    source = (ROOT / "profiles" / "dac_chip" / "pdm5_64x.toml").read_text()
    with tempfile.TemporaryDirectory() as tmp:
        files = []
        for k in range(4):
            path = Path(tmp) / f"copy{k}.toml"
            path.write_text(source.replace('name = "', f'name = "copy {k} of ', 1))
            files.append(path)
        one, _ = _grade(files[:1], 1)
        serial, n = _grade(files, 1)
        parallel, _ = _grade(files, 2)
    yield {
        "case": "grade_scaling",
        "plan": os.environ.get("AUDIODSM_BENCH_GRADE_PLAN", "full"),
        "profiles": n,
        "one_profile_s": round(one, 2),
        "serial_s": round(serial, 2),
        "two_workers_s": round(parallel, 2),
        "serial_per_profile_s": round(serial / n, 2),
        "linear_ratio": round(serial / (n * one), 3),
        "speedup_two_workers": round(serial / parallel, 3),
        "target_linear_ratio_max": 1.3,
        "target_speedup_min": 1.6,
        "load_average_1min": round(os.getloadavg()[0], 2),
    }
    if os.environ.get("AUDIODSM_BENCH_GRADE_SKIP_DEMO"):
        return
    from audiodsm.demo import run_demo

    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        run_demo(out_dir=Path(tmp) / "demo_out", jobs=2, say=lambda s: None)
        spent = time.perf_counter() - t0
    yield {
        "case": "demo",
        "seconds": round(spent, 1),
        "target_s_max": 180.0,
        "load_average_1min": round(os.getloadavg()[0], 2),
    }
