"""The C speed yardstick: build and run ``shared/perf/run_limit.sh`` in the same benchmark run.

The C reference (``limit.c`` beside the script) holds three hand-written modulator loops,
one sample at a time in double precision: ``feedback5_1bit``, ``feedback2_1bit`` and
``feedback5_17level``. Speeds on these shared machines vary from run to run, so every speed
target is a ratio to the C loop measured in the same run: project samples/s over C samples/s
for a loop, project time over the C loop time for the same number of modulator samples for a
whole render. Each side is the best of three runs (``limit.c`` times each loop three times and
keeps the shortest; other load only ever slows a run down).

The script is looked for as ``shared/perf/run_limit.sh`` in the folders above the project
root (``../shared/perf`` for a checkout beside ``shared/``), or at ``$AUDIODSM_C_REFERENCE``.
When it, or the C compiler, is missing, :func:`c_loop_speeds` says why instead of failing.

These machines are shared, and a wall-clock time includes waiting for a core. So beside the
wall-clock ratio that the targets are set in (``ratio_to_c``), a case also reports
``cpu_ratio_to_c``: both sides timed by the process CPU clock, the C side by a copy of
``limit.c`` built in a temporary folder with its clock switched to ``CLOCK_PROCESS_CPUTIME_ID``
(same flags, nothing else changed). On a busy machine that ratio is the steadier one.
"""

from __future__ import annotations

import functools
import json
import os
import shutil
import subprocess
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

#: the input every C loop runs: a -6 dBFS 1 kHz sine at 48 kHz x 64 (limit.c, ``main``)
C_RATE_HZ = 48_000 * 64


def c_input(n: int) -> np.ndarray:
    """The C reference's input, ``0.5 sin(2 pi 1000 / 3072000 i)``, written the same way."""
    w = 2.0 * 3.141592653589793 * 1000.0 / 3072000.0
    return 0.5 * np.sin(w * np.arange(n, dtype=np.float64))


def find_script() -> Path | None:
    """``run_limit.sh``: ``$AUDIODSM_C_REFERENCE``, else the nearest ``shared/perf`` above."""
    given = os.environ.get("AUDIODSM_C_REFERENCE")
    if given:
        path = Path(given)
        return path if path.is_file() else None
    for folder in ROOT.parents:
        path = folder / "shared" / "perf" / "run_limit.sh"
        if path.is_file():
            return path
    return None


@functools.lru_cache(maxsize=8)
def c_loop_speeds(samples: int) -> dict:
    """Run the C reference on ``samples`` samples per loop.

    Returns
    -------
    dict
        ``{"available": True, "loops": {name: record}}`` with each record as the script
        prints it (``ns_per_sample``, ``msamples_per_s``, ``seq_hash``, ...), or
        ``{"available": False, "reason": "..."}``. Remembered per process: one build and run
        serves every case of a ``make bench`` run.
    """
    script = find_script()
    if script is None:
        return {"available": False, "reason": "shared/perf/run_limit.sh not found"}
    compiler = os.environ.get("CC", "gcc")
    if shutil.which(compiler) is None:
        return {"available": False, "reason": f"C compiler {compiler!r} not found"}
    try:
        done = subprocess.run(
            ["bash", str(script), str(int(samples))],
            capture_output=True,
            text=True,
            check=True,
            timeout=600,
        )
    except (OSError, subprocess.SubprocessError) as exc:
        return {"available": False, "reason": f"run_limit.sh failed: {exc}"[:300]}
    loops = _parse(done.stdout)
    if not loops:
        return {"available": False, "reason": "run_limit.sh printed no result"}
    return {
        "available": True,
        "loops": loops,
        "cpu_loops": _cpu_clock_run(script, compiler, samples),
    }


def _parse(stdout: str) -> dict:
    loops = {}
    for line in stdout.splitlines():
        line = line.strip()
        if line.startswith("{"):
            record = json.loads(line)
            loops[record["loop"]] = record
    return loops


def _cpu_clock_run(script: Path, compiler: str, samples: int) -> dict:
    """limit.c timed by the process CPU clock (a copy built in a temporary folder), or {}."""
    source = (script.parent / "limit.c").read_text()
    if "CLOCK_MONOTONIC" not in source:
        return {}
    with tempfile.TemporaryDirectory() as tmp:
        copy = Path(tmp) / "limit_cpu_clock.c"
        copy.write_text(source.replace("CLOCK_MONOTONIC", "CLOCK_PROCESS_CPUTIME_ID"))
        binary = Path(tmp) / "limit_cpu_clock"
        flags = ["-O3", "-march=native", "-ffp-contract=off"]  # as run_limit.sh
        try:
            subprocess.run(
                [compiler, *flags, "-o", str(binary), str(copy), "-lm"],
                capture_output=True,
                check=True,
                timeout=120,
            )
            done = subprocess.run(
                [str(binary), str(int(samples))],
                capture_output=True,
                text=True,
                check=True,
                timeout=600,
            )
        except (OSError, subprocess.SubprocessError):
            return {}
    return _parse(done.stdout)


def speed_ratio(loop: str, samples: int, msamples_per_s: float, cpu_msamples_per_s=None) -> dict:
    """Fields for a loop case: the C loop's speed and ``ratio_to_c`` (ours / C, higher = faster).

    ``msamples_per_s`` is our wall-clock speed; ``cpu_msamples_per_s``, when given, our speed
    by the process CPU clock, compared with the CPU-clock copy of the C loop.
    """
    ref = c_loop_speeds(samples)
    if not ref["available"]:
        return {"c_loop": loop, "c_reference": ref["reason"], "ratio_to_c": None}
    c = ref["loops"].get(loop)
    if c is None:
        return {"c_loop": loop, "c_reference": f"no loop {loop!r}", "ratio_to_c": None}
    fields = {
        "c_loop": loop,
        "c_msamples_per_s": c["msamples_per_s"],
        "ratio_to_c": round(msamples_per_s / c["msamples_per_s"], 3),
    }
    c_cpu = ref["cpu_loops"].get(loop)
    if cpu_msamples_per_s is not None and c_cpu is not None:
        fields["c_cpu_msamples_per_s"] = c_cpu["msamples_per_s"]
        fields["cpu_ratio_to_c"] = round(cpu_msamples_per_s / c_cpu["msamples_per_s"], 3)
    return fields


def time_ratio(loop: str, modulator_samples: int, seconds: float, *, samples: int) -> dict:
    """Fields for a chain case: ``seconds`` over the C loop time for ``modulator_samples``.

    The C loop runs on ``samples`` samples and its time per sample is scaled up (it is the
    same loop on every sample). Lower is faster; 1.0 would be the bare C loop.
    """
    ref = c_loop_speeds(samples)
    if not ref["available"]:
        return {"c_loop": loop, "c_reference": ref["reason"], "ratio_to_c": None}
    c = ref["loops"][loop]
    c_seconds = c["ns_per_sample"] * 1e-9 * modulator_samples
    return {
        "c_loop": loop,
        "c_loop_seconds": round(c_seconds, 3),
        "ratio_to_c": round(seconds / c_seconds, 3),
    }


def cpu_loop_seconds(loop: str, modulator_samples: int, *, samples: int) -> float | None:
    """The CPU-clock C loop time for ``modulator_samples`` (None when it could not be run)."""
    ref = c_loop_speeds(samples)
    c = ref.get("cpu_loops", {}).get(loop) if ref["available"] else None
    return None if c is None else c["ns_per_sample"] * 1e-9 * modulator_samples


def sequence_hash(v: np.ndarray) -> str:
    """limit.c's output hash: ``h = h M + (8 v[n] + 9) mod 2**64``, ``M = 0x9E3779B97F4A7C15``.

    Lets a case show it produced the same output sequence as the C loop (for loops whose
    coefficients are the same). Computed in blocks with the powers of ``M`` (exact mod 2**64).
    """
    k = (np.rint(np.asarray(v, dtype=np.float64) * 8.0).astype(np.int64) + 9).astype(np.uint64)
    mult = np.uint64(0x9E3779B97F4A7C15)
    block = 1 << 16
    powers = np.empty(block, dtype=np.uint64)  # powers[j] = M**(block-1-j)
    p = np.uint64(1)
    with np.errstate(over="ignore"):
        for j in range(block - 1, -1, -1):
            powers[j] = p
            p = p * mult
        h = np.uint64(0)
        m_block = p  # M**block
        for start in range(0, len(k), block):
            part = k[start : start + block]
            lead = powers[block - len(part) :]
            scale = m_block if len(part) == block else _power(mult, len(part))
            h = h * scale + np.sum(part * lead, dtype=np.uint64)
    return f"{int(h):016x}"


def _power(base: np.uint64, exponent: int) -> np.uint64:
    result = np.uint64(1)
    with np.errstate(over="ignore"):
        for _ in range(exponent):
            result = result * base
    return result
