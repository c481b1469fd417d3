"""Rate conversion: the interpolation chain and the listening decimator, per second of audio.

The render budget (issue 4) is 60 s of stereo 48 kHz at OSR 64 through the whole chain at
10x real time or better on two cores, i.e. 0.1 s for every second of stereo audio. The two
rate converters may take a small part of it: the target here is 0.05 s of CPU per second of
stereo audio for each. The work is fed the way the chain feeds it: one channel at a time, in
cache-sized pieces of 2**16 modulator samples. Wall-clock and CPU seconds are both reported;
on a shared machine CPU time is the steadier.
"""

from __future__ import annotations

import time

import numpy as np

from audiodsm.stages.downsample import Downsampler, design_downsampler
from audiodsm.stages.upsample import Upsampler, design_upsampler

RATE = 48000
OSR = 64
SECONDS = 4.0
BLOCK_FRAMES = (1 << 16) // OSR
TARGET_CPU_PER_AUDIO_SECOND = 0.05


def _stream(obj, channels, block):
    """Run each channel through ``obj`` in blocks; return (wall, cpu) seconds."""
    t, c = time.perf_counter(), time.process_time()
    for mono in channels:
        state = None
        for start in range(0, mono.shape[0], block):
            _, state = obj.process(mono[start : start + block], state)
    return time.perf_counter() - t, time.process_time() - c


def _best(obj, x, block, repeats=3):
    runs = [_stream(obj, x, block) for _ in range(repeats)]
    return min(r[0] for r in runs), min(r[1] for r in runs)


def run():
    rng = np.random.default_rng(7)
    n = int(SECONDS * RATE)
    audio = [0.5 * rng.uniform(-1.0, 1.0, size=n) for _ in range(2)]

    t = time.perf_counter()
    up_design = design_upsampler(RATE, OSR)
    design_s = time.perf_counter() - t
    up = Upsampler(up_design)
    up.process(audio[0][:100])  # compile / load the kernels
    wall, cpu = _best(up, audio, BLOCK_FRAMES)
    yield {
        "bench": "upsample_stereo_48k_to_osr64",
        "audio_seconds": SECONDS,
        "design_seconds": design_s,
        "multiplies_per_input_sample": up_design.multiplies_per_input_sample,
        "wall_per_audio_second": wall / SECONDS,
        "cpu_per_audio_second": cpu / SECONDS,
        "realtime_factor_cpu": SECONDS / cpu,
        "target_cpu_per_audio_second": TARGET_CPU_PER_AUDIO_SECOND,
        "meets_target": cpu / SECONDS <= TARGET_CPU_PER_AUDIO_SECOND,
    }

    # modulator-rate input: white noise near full scale stands in for the shaped noise
    high = [rng.uniform(-1.0, 1.0, size=n * OSR) for _ in range(2)]
    for rate_out in (48000, 44100):
        t = time.perf_counter()
        down_design = design_downsampler(RATE * OSR, rate_out)
        design_s = time.perf_counter() - t
        down = Downsampler(down_design)
        down.process(high[0][:5000])
        wall, cpu = _best(down, high, BLOCK_FRAMES * OSR)
        yield {
            "bench": f"downsample_stereo_3.072M_to_{rate_out}",
            "audio_seconds": SECONDS,
            "design_seconds": design_s,
            "multiplies_per_output_sample": down_design.multiplies_per_output_sample,
            "wall_per_audio_second": wall / SECONDS,
            "cpu_per_audio_second": cpu / SECONDS,
            "realtime_factor_cpu": SECONDS / cpu,
            "target_cpu_per_audio_second": TARGET_CPU_PER_AUDIO_SECOND,
            "meets_target": cpu / SECONDS <= TARGET_CPU_PER_AUDIO_SECOND,
        }
