"""Modulator loop speed: single-thread samples per second on 10 s of a -6 dBFS sine.

Cases: the 5th-order single-bit feedback loop at OSR 64 (target >= 180 Msamples/s on one
core), a 2nd-order single-bit loop, and a 5th-order 17-level loop (target >= 120 Msamples/s).
The audio rate is 48 kHz and the modulator runs at 64 x 48 kHz. Each case runs once on a short
block first so that compilation (or loading the numba cache) is not timed; the best of three
timed runs is reported (other processes on the machine only ever slow a run down).

``ns_per_sample`` and ``msamples_per_s`` come from the process CPU time of ``Modulator.run``
(validation and allocation included), so that other programs sharing the machine do not count;
``wall_ns_per_sample`` is the elapsed time, for comparison, and ``loop_msamples_per_s`` the CPU
speed of the compiled loop alone on the same samples (what the speed targets are about).
"""

from __future__ import annotations

import time

import numpy as np

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.stages import _kernels
from audiodsm.stages.modulator import Modulator, _kernel_key

RATE_HZ = 48_000 * 64
SECONDS = 10.0

CASES = [
    # name, order, levels, structure, out_of_band_gain
    ("order5-1bit-feedback-osr64", 5, 2, "feedback", 1.5),
    ("order2-1bit-feedback-osr64", 2, 2, "feedback", 1.5),
    ("order5-17level-feedback-osr64", 5, 17, "feedback", 2.5),
    ("order5-1bit-feedforward-osr64", 5, 2, "feedforward", 1.5),
    ("order5-1bit-error-feedback-osr64", 5, 2, "error-feedback", 1.5),
]


def run():
    n = int(RATE_HZ * SECONDS)
    x = 10 ** (-6 / 20) * np.sin(2 * np.pi * 997.0 / RATE_HZ * np.arange(n))
    for name, order, levels, structure, out_of_band_gain in CASES:
        mod = Modulator(
            NoiseTransfer.designed(order, osr=64, out_of_band_gain=out_of_band_gain),
            structure,
            levels=levels,
        )
        mod.run(x[:4096])  # warm-up: compile or load the cached kernel
        best = best_wall = np.inf
        for _ in range(3):
            start, start_wall = time.process_time(), time.perf_counter()
            _, state = mod.run(x)
            best = min(best, time.process_time() - start)
            best_wall = min(best_wall, time.perf_counter() - start_wall)
        kernel = _kernels.loop_kernel(*_kernel_key(mod.loop))
        out = np.empty(n)
        best_loop = np.inf
        for _ in range(3):
            st = np.zeros(order)
            rng = np.zeros(1, dtype=np.uint64)
            peaks = np.zeros(order)
            counts = np.zeros(1, dtype=np.int64)
            start = time.process_time()
            kernel(x, out, mod._coef, st, rng, peaks, counts, levels, 0.0, 8.0, 1e6, True)
            best_loop = min(best_loop, time.process_time() - start)
        yield {
            "case": name,
            "order": order,
            "levels": levels,
            "structure": structure,
            "samples": n,
            "ns_per_sample": round(best / n * 1e9, 3),
            "msamples_per_s": round(n / best / 1e6, 1),
            "wall_ns_per_sample": round(best_wall / n * 1e9, 3),
            "loop_msamples_per_s": round(n / best_loop / 1e6, 1),
            "overloads": int(state.overload_count[0]),
        }
