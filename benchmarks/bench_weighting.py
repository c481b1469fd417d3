"""Band-limit and weighting filters in the time domain, and the one-off filter designs.

`audiodsm analyze` must measure a 10-minute stereo 96 kHz file in under 15 s (issue 3), which is
115 M frames. This reports the throughput of the time-domain band filter and of each weighting
filter (frames per second, all channels counted once), so the analyzer can budget how many
time-domain passes it can afford, and the cost of designing each filter (done once per rate
and process, then cached).
"""

from __future__ import annotations

import time

import numpy as np

from audiodsm.measure import bands, weighting
from audiodsm.measure.bands import band_limit, band_limit_filter
from audiodsm.measure.weighting import apply_weighting, weighting_filter
from benchmarks._timing import best_seconds

RATE = 96000.0


def run():
    for kind in ("a", "ccir"):
        for rate in (48000.0, 96000.0):
            weighting._design.cache_clear()
            t0 = time.perf_counter()
            sos = weighting_filter(kind, rate)
            yield {
                "bench": f"design_weighting_{kind}",
                "rate_hz": rate,
                "sections": int(sos.shape[0]),
                "seconds": round(time.perf_counter() - t0, 4),
            }
    bands._design.cache_clear()
    t0 = time.perf_counter()
    sos = band_limit_filter(RATE)
    yield {
        "bench": "design_band_limit",
        "rate_hz": RATE,
        "sections": int(sos.shape[0]),
        "seconds": round(time.perf_counter() - t0, 4),
    }

    rng = np.random.default_rng(1)
    frames = 960_000  # 10 s of stereo 96 kHz
    x = rng.standard_normal((frames, 2)) * 0.1
    t = best_seconds(lambda: band_limit(x, rate_hz=RATE))
    yield {
        "bench": "band_limit_stereo",
        "rate_hz": RATE,
        "sections": int(band_limit_filter(RATE).shape[0]),
        "frames": frames,
        "seconds": round(t, 4),
        "frames_per_s": round(frames / t),
        "ten_minute_file_s": round(t * 60.0, 2),
    }
    for kind in ("a", "ccir"):
        t = best_seconds(lambda kind=kind: apply_weighting(x, rate_hz=RATE, kind=kind))
        yield {
            "bench": f"apply_weighting_{kind}_stereo",
            "rate_hz": RATE,
            "sections": int(weighting_filter(kind, RATE).shape[0]),
            "frames": frames,
            "seconds": round(t, 4),
            "frames_per_s": round(frames / t),
            "ten_minute_file_s": round(t * 60.0, 2),
        }
