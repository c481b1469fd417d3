"""Fixed-point loop speed against the float loop it models (issue target: at least 0.8x).

One case per shipped profile with a ``[fixed_point]`` section: the profile's chain is built at
48 kHz, and its integer loop (``FixedPointModulator.run_words`` on input words, and ``run``
with the float-to-word conversion included) and its float loop (``Modulator.run``) each run
2**22 samples of a -6 dBFS sine. The best of three runs by process CPU time is reported;
``speed_ratio`` is float time over fixed-point time on input words (1.0: as fast), and
``speed_ratio_with_input_conversion`` the same for ``run`` on floats (into the caller's
buffer), the chain's path; both ratios come from the same run.
"""

from __future__ import annotations

import time
from functools import partial
from pathlib import Path

import numpy as np

from audiodsm.profile import load_profile
from audiodsm.stages.chain import Chain

SAMPLES = 1 << 22


def _best(fn, arg, repeats=3):
    best = np.inf
    for _ in range(repeats):
        start = time.process_time()
        fn(arg)
        best = min(best, time.process_time() - start)
    return best


def run():
    root = Path(__file__).resolve().parents[1] / "profiles"
    x = 10 ** (-6 / 20) * np.sin(2 * np.pi * 997.0 / (48000 * 64) * np.arange(SAMPLES))
    for path in sorted(root.glob("*/*.toml")):
        if path.parent.name in ("specs", "spaces"):  # spec sheets and design spaces
            continue
        profile = load_profile(path)
        if not profile.fixed_point.active:
            continue
        chain = Chain.from_profile(profile, 48000, 1)
        fx, flt = chain.fixed_loop, chain.modulator
        xs = x * chain.input_scale
        words = fx.input_words(xs)
        fx.run_words(words[:4096])  # warm-up: compile or load the cached kernels
        fx.run(xs[:4096])
        flt.run(xs[:4096])
        out = np.empty(len(xs))
        t_words = _best(fx.run_words, words)
        t_run = _best(partial(fx.run, out=out), xs)
        t_float = _best(flt.run, xs)
        yield {
            "case": f"fixed-point {path.stem}",
            "order": fx.order,
            "levels": fx.levels,
            "samples": SAMPLES,
            "fixed_ns_per_sample": round(t_words / SAMPLES * 1e9, 3),
            "fixed_with_input_conversion_ns_per_sample": round(t_run / SAMPLES * 1e9, 3),
            "float_ns_per_sample": round(t_float / SAMPLES * 1e9, 3),
            "speed_ratio": round(t_float / t_words, 3),
            "speed_ratio_with_input_conversion": round(t_float / t_run, 3),
            "target_speed_ratio": 0.8,
        }
