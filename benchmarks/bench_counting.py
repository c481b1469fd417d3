"""The counting decimator as a listening decimator, per second of stereo audio.

Fed like the chain feeds its decimator: one channel at a time, in pieces of 2**16 modulator
samples at 3.072 MHz (48 kHz x OSR 64). The target is the half-band cascade's: 0.05 s of CPU
per second of stereo audio (see bench_rates.py). Each output sums its whole window, K (N - 1)
+ 1 taps, so the work is about K multiplies per modulator sample.
"""

from __future__ import annotations

import time

import numpy as np

from audiodsm.stages.counting import CountingDownsampler, design_counting_downsampler

RATE = 48000
OSR = 64
SECONDS = 4.0
PIECE = 1 << 16
TARGET_CPU_PER_AUDIO_SECOND = 0.05


def _stream(obj, channels):
    t, c = time.perf_counter(), time.process_time()
    for mono in channels:
        state = None
        for start in range(0, mono.shape[0], PIECE):
            _, state = obj.process(mono[start : start + PIECE], state, check_finite=False)
    return time.perf_counter() - t, time.process_time() - c


def run():
    rng = np.random.default_rng(11)
    n = int(SECONDS * RATE) * OSR
    bits = [np.where(rng.uniform(size=n) < 0.5, -1.0, 1.0) for _ in range(2)]
    for stages, length, rate_out in ((1, 64, 48000), (3, 64, 48000), (4, 16, 48000)):
        design = design_counting_downsampler(RATE * OSR, rate_out, length=length, stages=stages)
        down = CountingDownsampler(design)
        down.process(bits[0][:5000])  # compile / load the kernels
        runs = [_stream(down, bits) for _ in range(3)]
        wall, cpu = min(r[0] for r in runs), min(r[1] for r in runs)
        yield {
            "bench": f"counting_stereo_3.072M_K{stages}_N{length}_to_{rate_out}",
            "audio_seconds": SECONDS,
            "taps_per_output": int(design.counter.taps.size),
            "wall_per_audio_second": wall / SECONDS,
            "cpu_per_audio_second": cpu / SECONDS,
            "realtime_factor_cpu": SECONDS / cpu,
            "target_cpu_per_audio_second": TARGET_CPU_PER_AUDIO_SECOND,
            "meets_target": cpu / SECONDS <= TARGET_CPU_PER_AUDIO_SECOND,
        }
