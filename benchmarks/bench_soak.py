"""Soak benchmark: a long parallel grade batch stopped by signals and resumed (issue 11).

Case
----
``grade_soak``
    40 profiles (the five shipped ones, each with eight modulator seeds) graded on the short
    battery plan with every core, in a child process that handles signals the way the command
    line does (``stop_signals_as_interrupt``). First a clean run into its own cache gives the
    reference grades. Then, with a second cache: start, Ctrl-C (SIGINT to the whole process
    group, as a terminal sends it) once 8 results are cached; resume, SIGTERM to the main
    process only once 24 are cached; resume to the end. Reports each phase's wall time, the
    results cached when it stopped, how many worker processes were still running 10 s after
    the main process ended (target 0), hidden temporary files left in the cache (target 0),
    the peak resident memory of every worker process (``VmHWM``), and whether the final grades
    equal the clean run's (target: equal).

Not part of ``make test``: it takes minutes. ``AUDIODSM_BENCH_SOAK_PROFILES=N`` grades N
profiles instead of 40 (the stop points scale with it).
"""

from __future__ import annotations

import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

_DRIVER = """
import json, os, sys
from pathlib import Path
from audiodsm.cli import stop_signals_as_interrupt
from audiodsm.evaluate.battery import BatteryPlan
from audiodsm.evaluate.grade import collect_profiles, grade_batch
from audiodsm.spec import load_spec

if __name__ == "__main__":
    pdir, spec, cache, out = sys.argv[1:5]
    with stop_signals_as_interrupt():
        batch = grade_batch(collect_profiles([pdir]), load_spec(spec), jobs=os.cpu_count(),
                            cache_dir=cache, battery_options={"plan": BatteryPlan.quick()})
    Path(out).write_text(json.dumps({
        "interrupted": batch.interrupted,
        "signal": batch.stop_signal,
        "cached": sum(g.cached for g in batch.grades),
        "warnings": list(batch.warnings),
        "grades": {g.name: [[t.target.metric, t.value, t.margin, t.passed] for t in g.lines]
                   for g in batch.grades},
    }))
"""


def _children(pid: int) -> list:
    out = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
        except OSError:
            continue
        # the command name may hold spaces: the fields after its closing parenthesis
        fields = stat[stat.rindex(")") + 2 :].split()
        if int(fields[1]) == pid:
            out.append(int(entry.name))
    return out


def _peak_kib(pid: int) -> int | None:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except OSError:
        return None
    return None


def _alive(pid: int) -> bool:
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return False
    state = next((ln for ln in status.splitlines() if ln.startswith("State:")), "State: ?")
    return state.split()[1] != "Z"


class _Phase:
    """One run of the driver, watched: worker memory, cached results, a stop signal."""

    def __init__(self, work: Path, cache: Path, label: str, peaks: dict):
        self.out = work / f"{label}.json"
        self.cache = cache
        self.peaks = peaks
        self.workers: set = set()
        self.t0 = time.perf_counter()
        self.proc = subprocess.Popen(
            [
                sys.executable,
                str(work / "driver.py"),
                str(work / "profiles"),
                str(work / "sheet.toml"),
                str(cache),
                str(self.out),
            ],  # fmt: skip
            cwd=ROOT,
            env={**os.environ, "PYTHONPATH": str(ROOT)},
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            start_new_session=True,
        )

    def _sample(self):
        for pid in _children(self.proc.pid):
            try:
                cmdline = Path(f"/proc/{pid}/cmdline").read_bytes()
            except OSError:
                continue
            if b"spawn_main" not in cmdline:  # the resource tracker is a child too
                continue
            self.workers.add(pid)
            kib = _peak_kib(pid)
            if kib is not None:
                self.peaks[pid] = max(self.peaks.get(pid, 0), kib)

    def entries(self) -> int:
        return len(list(self.cache.glob("*.npz")))

    def run(self, *, stop_at=None, sig=None, group=False, timeout=3600.0) -> dict:
        deadline = time.monotonic() + timeout
        stopped_at = None
        while self.proc.poll() is None:
            if time.monotonic() > deadline:
                os.killpg(self.proc.pid, signal.SIGKILL)
                raise RuntimeError("soak phase timed out")
            self._sample()
            if stop_at is not None and stopped_at is None and self.entries() >= stop_at:
                stopped_at = self.entries()
                if group:
                    os.killpg(self.proc.pid, sig)
                else:
                    os.kill(self.proc.pid, sig)
            time.sleep(0.2)
        seconds = time.perf_counter() - self.t0
        err = self.proc.stderr.read().decode(errors="replace")
        time.sleep(10.0)
        left = [pid for pid in self.workers if _alive(pid)]
        for pid in left:  # do not leave them running after the benchmark
            os.kill(pid, signal.SIGKILL)
        result = json.loads(self.out.read_text()) if self.out.exists() else {}
        return {
            "seconds": round(seconds, 1),
            "exit_code": self.proc.returncode,
            "cached_when_stopped": stopped_at,
            "workers_seen": len(self.workers),
            "workers_left_after_10s": len(left),
            "traceback": "Traceback" in err,
            "result": result,
        }


def run():
    n = int(os.environ.get("AUDIODSM_BENCH_SOAK_PROFILES", "40"))
    sources = sorted(p for p in (ROOT / "profiles").rglob("*.toml") if "specs" not in p.parts)
    with tempfile.TemporaryDirectory(prefix="audiodsm-soak-") as tmp:
        work = Path(tmp)
        (work / "driver.py").write_text(_DRIVER)
        (work / "profiles").mkdir()
        (work / "sheet.toml").write_text(
            (ROOT / "profiles" / "specs" / "dac_chip.toml").read_text()
        )
        for k in range(n):
            src = sources[k % len(sources)]
            text = src.read_text().replace("[modulator]\n", f"[modulator]\nseed = {k}\n", 1)
            text = text.replace('name = "', f'name = "soak {k:02d} ', 1)
            (work / "profiles" / f"p{k:02d}.toml").write_text(text)
        peaks: dict = {}
        clean = _Phase(work, work / "clean_cache", "clean", peaks).run()
        cache = work / "soak_cache"
        first = _Phase(work, cache, "first", peaks).run(
            stop_at=max(1, n // 5), sig=signal.SIGINT, group=True
        )
        second = _Phase(work, cache, "second", peaks).run(
            stop_at=max(2, 3 * n // 5), sig=signal.SIGTERM
        )
        last = _Phase(work, cache, "last", peaks).run()
        leftovers = sorted(p.name for p in cache.iterdir() if p.name.startswith("."))
        reference = clean["result"].get("grades", {})
        final = last["result"].get("grades", {})
    mib = [kib / 1024.0 for kib in peaks.values()]

    def phase(d):
        return {k: v for k, v in d.items() if k != "result"} | {
            "interrupted": d["result"].get("interrupted"),
            "stop_signal": d["result"].get("signal"),
            "graded": len(d["result"].get("grades", {})),
        }

    yield {
        "case": "grade_soak",
        "profiles": n,
        "cores": os.cpu_count(),
        "plan": "quick",
        "clean": phase(clean),
        "stopped_by_sigint": phase(first),
        "stopped_by_sigterm": phase(second),
        "resumed_to_the_end": phase(last),
        "resumed_from_cache": last["result"].get("cached"),
        "final_grades_equal_clean_run": bool(final) and final == reference,
        "hidden_temp_files_left": len(leftovers),
        "worker_peak_mib_max": round(max(mib), 1) if mib else None,
        "worker_peak_mib_median": round(statistics.median(mib), 1) if mib else None,
        "target_workers_left": 0,
        "target_hidden_temp_files_left": 0,
        "load_average_1min": round(os.getloadavg()[0], 2),
    }
