"""Output stage + reconstruction filter at the modulator rate.

The render benchmark's budget (issue 4) is 60 s of stereo 48 kHz at OSR 64 in under 6 s, i.e.
at least 3.07 MHz x 2 channels x 10 = 61 M frames/s for the whole chain; this reports what
the output stage and the filter alone sustain, in frames per second per channel.
"""

from __future__ import annotations

import numpy as np

from audiodsm.stages.filter_design import analog_prototype, lc_filter
from audiodsm.stages.output_stage import pdm_waveform, pwm_waveform
from audiodsm.stages.reconstruct import filter_pwm_with_dead_time, filter_waveform
from benchmarks._timing import best_seconds

RATE = 3.072e6


def run():
    rng = np.random.default_rng(1)
    n = 2_000_000
    bits = np.where(rng.random(n) < 0.5, -1.0, 1.0)
    butter = analog_prototype("butterworth", order=3, cutoff_hz=60e3)
    filter_waveform(butter, pdm_waveform(bits[:10], frame_rate_hz=RATE))  # compile
    t_wave = best_seconds(lambda: pdm_waveform(bits, frame_rate_hz=RATE))
    wave = pdm_waveform(bits, frame_rate_hz=RATE)
    t_filt = best_seconds(lambda: filter_waveform(butter, wave))
    yield {
        "bench": "pdm_butterworth3",
        "frames": n,
        "waveform_frames_per_s": n / t_wave,
        "filter_frames_per_s": n / t_filt,
        "realtime_factor_per_channel_at_3.072MHz": n / (t_wave + t_filt) / RATE,
    }

    m = 200_000
    y = -1.0 + 2.0 * rng.integers(0, 17, m) / 16
    lc = lc_filter(22e-6, 680e-9, 8.0)
    opts = dict(frame_rate_hz=384e3, levels=17, carrier="double-edge", mode="three-level")
    pwm_waveform(y[:10], **opts)
    t_pwm = best_seconds(lambda: pwm_waveform(y, **opts))
    pwave, _, _ = pwm_waveform(y, **opts)
    filter_waveform(lc, pwave)
    t_lc = best_seconds(lambda: filter_waveform(lc, pwave))
    yield {
        "bench": "pwm_three_level_double_edge_lc",
        "frames": m,
        "segments_per_frame": pwave.n_segments,
        "waveform_frames_per_s": m / t_pwm,
        "filter_frames_per_s": m / t_lc,
    }

    # the half bridge whose dead time follows the inductor current: stage and filter in one loop
    y9 = -1.0 + 2.0 * rng.integers(0, 9, m) / 8
    dead_opts = dict(
        frame_rate_hz=768e3, levels=9, bridge="half", tick_subdivision=4, dead_time_ticks=1
    )
    filter_pwm_with_dead_time(lc, y9[:10], **dead_opts)  # compile
    t_dead = best_seconds(lambda: filter_pwm_with_dead_time(lc, y9, **dead_opts))
    yield {
        "bench": "pwm_half_bridge_dead_time_lc",
        "frames": m,
        "frames_per_s": m / t_dead,
        "realtime_factor_per_channel_at_768kHz": m / t_dead / 768e3,
    }
