"""Modulator loop speed as a ratio to the C reference loop measured in the same run.

The C reference (``shared/perf/limit.c``, see :mod:`benchmarks._c_reference`) runs three
loops on 10 s of a -6 dBFS 1 kHz sine at 48 kHz x 64. The project's cases build the same
loops with the project's own API and run them on the same input:

``order5-1bit-feedback``
    the NTF of ``feedback5_1bit``: 5th order, zeros at the Legendre-root positions for OSR 64,
    Butterworth-type poles with out-of-band gain 1.5 (``NoiseTransfer.designed(5, osr=64)``),
    realized as a feedback loop (two resonator pairs and one integrator, input into the
    first) and its states scaled to peak at 0.5 for this input, as in limit.c. The per-sample
    work is the C loop's: five lossless integrators with chain gains, two resonator taps, five
    feedback terms, one input term, a sign quantizer.
``order2-1bit-feedback``
    NTF ``(1 - z^-1)^2``: the project's loop has the C loop's coefficients (a = 1, 2; unit
    gains; the realization's solve gives them to within 2 ulp and they are set exact), so the
    output must be the C loop's sequence, bit for bit (``same_output_as_c``).
``order5-17level-feedback``
    the 5th-order loop with a 17-level quantizer (levels k/8), as ``feedback5_17level``.
``order5-1bit-feedforward``, ``order5-1bit-error-feedback``
    the same NTF in the other two structures (no C loop of their own: compared with
    ``feedback5_1bit`` for scale, no target).

Each case prints one line per measurement, with ``ratio_to_c`` (our samples/s over C's, both
the best of three wall-clock runs), ``cpu_ratio_to_c`` (the same by the process CPU clock, the
steadier figure on a busy machine) and the ``target`` beside them:

``Modulator.run(out=)``
    the public call on a caller-provided output buffer (validation, state in and out).
``Modulator.run``
    the same with a fresh output array per call (its first touch of the memory included).
``bare loop``
    the compiled kernel alone, on preallocated arrays.

Each case first runs on a short block so that compiling (or loading the numba cache) is not
timed. ``AUDIODSM_BENCH_MODULATOR_SECONDS`` shortens the input for a quick check.
"""

from __future__ import annotations

import os
import time
from dataclasses import replace

import numpy as np

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.design.realize import LoopRealization
from audiodsm.stages import _kernels
from audiodsm.stages.modulator import Modulator, _kernel_key
from benchmarks._c_reference import C_RATE_HZ, c_input, c_loop_speeds, sequence_hash, speed_ratio

SECONDS = float(os.environ.get("AUDIODSM_BENCH_MODULATOR_SECONDS", "10"))
OSR = 64

# issue 12: ratios to the C loop (ours / C, higher is faster)
TARGETS = {
    ("order5-1bit-feedback", "Modulator.run(out=)"): 0.85,
    ("order5-1bit-feedback", "bare loop"): 0.9,
    ("order5-17level-feedback", "Modulator.run(out=)"): 0.75,
}

CASES = [
    # name, C loop, levels, structure
    ("order5-1bit-feedback", "feedback5_1bit", 2, "feedback"),
    ("order2-1bit-feedback", "feedback2_1bit", 2, "feedback"),
    ("order5-17level-feedback", "feedback5_17level", 17, "feedback"),
    ("order5-1bit-feedforward", "feedback5_1bit", 2, "feedforward"),
    ("order5-1bit-error-feedback", "feedback5_1bit", 2, "error-feedback"),
]


def _modulator(name: str, levels: int, structure: str, x: np.ndarray) -> Modulator:
    """The case's loop, built as the module docstring says."""
    if name.startswith("order2"):
        ntf = NoiseTransfer.from_roots(zeros=[1.0, 1.0], poles=[0.0, 0.0])
        loop = LoopRealization.for_ntf(ntf, structure=structure)
        # the solve gives a = (1, 2), b = 1 to within 2 ulp; limit.c has them exactly, and
        # with the exact values both loops must give the same sequence
        exact = {"feedback": np.array([1.0, 2.0]), "input_gain": np.array([1.0, 0.0])}
        for field, value in exact.items():
            assert np.allclose(getattr(loop, field), value, rtol=1e-15, atol=0)
        return Modulator(replace(loop, **exact), levels=levels)
    ntf = NoiseTransfer.designed(5, osr=OSR, out_of_band_gain=1.5)
    loop = LoopRealization.for_ntf(ntf, structure=structure)
    if structure == "feedback":
        # limit.c: states s1..s4 rescaled to peak near 0.5 for the -6 dBFS sine; the
        # quantizer-facing state keeps its size
        _, st = Modulator(loop, levels=levels).run(x[: 1 << 20])
        loop = loop.rescaled(st.state_peak[0], peak_target=0.5)
    return Modulator(loop, levels=levels)


def _best_wall(fn, repeats=3):
    best = best_cpu = np.inf
    for _ in range(repeats):
        start, start_cpu = time.perf_counter(), time.process_time()
        fn()
        best = min(best, time.perf_counter() - start)
        best_cpu = min(best_cpu, time.process_time() - start_cpu)
    return best, best_cpu


def run():
    n = int(C_RATE_HZ * SECONDS)
    x = c_input(n)
    c_loop_speeds(n)  # build and run the C reference first, once for every case
    for name, c_loop, levels, structure in CASES:
        mod = _modulator(name, levels, structure, x)
        mod.run(x[:4096])  # warm-up: compile or load the cached kernel
        buffer = np.empty(n)
        result = {}

        def with_buffer(mod=mod, buffer=buffer, result=result):
            result["y"], result["state"] = mod.run(x, out=buffer)

        def fresh(mod=mod):
            mod.run(x)

        kernel = _kernels.loop_kernel(*_kernel_key(mod.loop)).variant(levels == 2, False)
        loop_out = np.empty(n)

        def bare(mod=mod, kernel=kernel, loop_out=loop_out):
            st = np.zeros(mod.order)
            rng = np.zeros(1, dtype=np.uint64)
            peaks = np.zeros(mod.order)
            counts = np.zeros(1, dtype=np.int64)
            kernel(x, loop_out, mod._coef, st, rng, peaks, counts, *mod._kernel_scalars())

        timings = {
            "Modulator.run(out=)": _best_wall(with_buffer),
            "Modulator.run": _best_wall(fresh),
            "bare loop": _best_wall(bare),
        }
        y, state = result["y"], result["state"]
        extra = {"overloads": int(state.overload_count[0])}
        if name.startswith("order2"):
            ref = c_loop_speeds(n)
            if ref["available"]:
                extra["same_output_as_c"] = sequence_hash(y) == ref["loops"][c_loop]["seq_hash"]
        for what, (wall, cpu) in timings.items():
            speed = n / wall / 1e6
            yield {
                "case": name,
                "measure": what,
                "levels": levels,
                "structure": structure,
                "samples": n,
                "msamples_per_s": round(speed, 1),
                "cpu_msamples_per_s": round(n / cpu / 1e6, 1),
                **speed_ratio(c_loop, n, speed, n / cpu / 1e6),
                "target": TARGETS.get((name, what)),
                **extra,
                "load_average_1min": round(os.getloadavg()[0], 2),
            }
