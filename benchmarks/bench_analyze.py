"""Benchmark: ``analyze`` on a 10-minute stereo 96 kHz 24-bit file.

Target (issue 3): under 15 s on the project machine, memory bounded by streaming. The file is
generated block by block into a temporary folder (channel 1: a -1 dBFS 997 Hz tone, channel 2:
silence, both with 24-bit TPDF dither), then analysed in a child process so that its peak
resident memory can be read on its own. Wall-clock and CPU seconds of the measurement are
both reported (on a shared machine the CPU time is the steadier figure), and the child
process's whole run including Python start-up and imports.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np

RATE = 96000
MINUTES = 10.0
TARGET_S = 15.0

_CHILD = """
import json, sys, time, resource
from audiodsm.evaluate.analyze import analyze_file
t, c = time.perf_counter(), time.process_time()
result = analyze_file(sys.argv[1])
seconds, cpu = time.perf_counter() - t, time.process_time() - c
peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"seconds": seconds, "cpu": cpu, "peak_kib": peak_kib,
                  "kinds": [c.content.kind for c in result.channels]}))
"""


def _make_file(path, seconds):
    from audiodsm.io import open_audio_writer

    lsb = 2.0**-23
    gen = np.random.default_rng(20261201)
    total = int(seconds * RATE)
    block = 1 << 18
    with open_audio_writer(path, rate_hz=RATE, channels=2, subtype="PCM_24") as out:
        for start in range(0, total, block):
            n = min(block, total - start)
            t = (start + np.arange(n)) / RATE
            tone = 10 ** (-1 / 20) * np.sin(2 * np.pi * 997.0 * t)
            d = gen.uniform(-0.5, 0.5, (n, 4))
            x = np.stack([tone + (d[:, 0] + d[:, 1]) * lsb, (d[:, 2] + d[:, 3]) * lsb], axis=1)
            out.write(np.clip(np.round(x / lsb) * lsb, -1.0, 1.0 - lsb))


def run():
    with tempfile.TemporaryDirectory() as folder:
        path = os.path.join(folder, "ten_minutes.wav")
        t = time.perf_counter()
        _make_file(path, MINUTES * 60)
        made = time.perf_counter() - t
        t = time.perf_counter()
        proc = subprocess.run(
            [sys.executable, "-c", _CHILD, path], capture_output=True, text=True, check=True
        )
        process_seconds = time.perf_counter() - t
        child = json.loads(proc.stdout.strip().splitlines()[-1])
        size_mb = os.path.getsize(path) / 1e6
    yield {
        "benchmark": "analyze_10min_stereo_96k_24bit",
        "seconds": round(child["seconds"], 2),
        "target_seconds": TARGET_S,
        "meets_target": child["seconds"] < TARGET_S,
        "cpu_seconds": round(child["cpu"], 2),
        "process_seconds_with_imports": round(process_seconds, 2),
        "peak_memory_mb": round(child["peak_kib"] / 1024, 1),
        "file_mb": round(size_mb, 1),
        "signals": child["kinds"],
        "generation_seconds": round(made, 2),
        "load_average_1min": round(os.getloadavg()[0], 2),
        "self_peak_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
    }
