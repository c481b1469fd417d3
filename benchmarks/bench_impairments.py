"""Impairment benchmarks: what element mismatch shaping, jitter and noise cost in the chain.

Cases
-----
``impairments_cost``
    The demo 17-level NRZ DAC chip profile (``profiles/dac_chip/nrz17_64x.toml``, 3rd-order
    loop, OSR 64) on one channel of a synthesized 48 kHz tone, ``SECONDS`` long, run through
    :class:`~audiodsm.stages.chain.Chain` as is (ideal) and with each impairment set: 0.1 %
    element mismatch with each element-selection method, white plus sinusoidal edge jitter,
    analog noise (white and 1/f), mismatch shaping with jitter together (the second-order
    vector shaper, ``shaping_and_jitter``; the first-order bi-directional DWA the demo part
    ``nrz17_shaped_64x`` ships, ``bidirectional_and_jitter``; plain DWA,
    ``dwa_and_jitter``), unequal edges, and unequal edges with return-to-zero coding.
    Every case is timed three times, the runs of all cases interleaved, and the best wall
    and the best CPU time of each are kept; reports both and their ratios to the ideal
    chain, and the machine's load average (the wall times follow it; on a shared machine
    compare the ``_cpu_ratio`` figures of one run). Target (issue 13): mismatch shaping
    and jitter together at most 1.5 x the ideal chain (``shaping_and_jitter_cpu_ratio``).

``class_d_cost``
    The demo class-D bridge (``profiles/pocket_amp/pwm9_bridge_16x.toml``, three-level PWM,
    OSR 16) with its [impairments] section removed (ideal), then with each class-D
    impairment alone: the supply ripple, the switches' unequal on-resistance (one filter per
    switch state), the loudspeaker load (a five-state filter), and all three together; and
    the half bridge with dead time, ideal and with on-resistance and its loudspeaker; and the
    bridge with white plus sinusoidal edge jitter. Best wall and best CPU time of each over
    :data:`REPEATS` interleaved rounds, their ratios to its ideal chain, and the load average
    (no target: the cost is reported).

``AUDIODSM_BENCH_IMPAIRMENT_SECONDS`` shortens (or lengthens) the input.
"""

from __future__ import annotations

import dataclasses
import os
import time
from pathlib import Path

import numpy as np

SECONDS = float(os.environ.get("AUDIODSM_BENCH_IMPAIRMENT_SECONDS", "10"))
TARGET_RATIO = 1.5
_PROFILE = Path(__file__).resolve().parents[1] / "profiles" / "dac_chip" / "nrz17_64x.toml"
_POCKET = Path(__file__).resolve().parents[1] / "profiles" / "pocket_amp"
_SPEAKER = {
    "speaker_coil_ohm": 7.2,
    "speaker_coil_inductance_h": 1.2e-4,
    "speaker_resonance_hz": 180.0,
    "speaker_mechanical_q": 2.8,
    "speaker_electrical_q": 0.9,
}
_JITTER = {"jitter_rms_s": 5e-12, "jitter_sine_peak_s": 2e-12, "jitter_sine_hz": 1000.0}


#: Runs of each case; the best wall and the best CPU time are kept.
REPEATS = 3


def _time_chain(profile, x, rate) -> tuple[float, float]:
    """Wall and CPU seconds of one run (CPU time is steadier on a shared machine)."""
    from audiodsm.stages.chain import Chain

    chain = Chain.from_profile(profile, rate, 1, threads=1)
    chain.process(x[: rate // 10])  # compile and warm the caches
    start, cpu = time.perf_counter(), time.process_time()
    chain.process(x)
    return time.perf_counter() - start, time.process_time() - cpu


def _best_times(cases, x, rate) -> dict:
    """Best wall and best CPU seconds of each case over :data:`REPEATS` interleaved rounds."""
    best = {}
    for _ in range(REPEATS):  # interleaved: a burst of load hits every case alike
        for name, profile in cases.items():
            wall, cpu = _time_chain(profile, x, rate)
            old = best.get(name, (wall, cpu))
            best[name] = (min(wall, old[0]), min(cpu, old[1]))
    return best


def run():
    from audiodsm.profile import load_profile

    rate = 48000
    base = load_profile(_PROFILE)
    x = 0.5 * np.sin(2 * np.pi * 997.0 * np.arange(int(SECONDS * rate)) / rate)

    def with_keys(**keys):
        return dataclasses.replace(base, impairments=dataclasses.replace(base.impairments, **keys))

    cases = {"ideal": base}
    for method in (
        "thermometer",
        "random",
        "data-weighted",
        "bidirectional-weighted",
        "vector-second-order",
    ):
        cases[f"elements_{method}"] = with_keys(element_mismatch=0.001, element_selection=method)
    cases["jitter"] = with_keys(**_JITTER)
    cases["analog_noise"] = with_keys(noise_density_nv=50.0, noise_corner_hz=100.0)
    cases["shaping_and_jitter"] = with_keys(
        element_mismatch=0.001, element_selection="vector-second-order", **_JITTER
    )
    cases["bidirectional_and_jitter"] = with_keys(
        element_mismatch=0.001, element_selection="bidirectional-weighted", **_JITTER
    )
    cases["dwa_and_jitter"] = with_keys(
        element_mismatch=0.001, element_selection="data-weighted", **_JITTER
    )
    cases["unequal_edges"] = with_keys(rise_time_s=4e-9, fall_time_s=3e-9)
    cases["return_to_zero_edges"] = with_keys(
        rise_time_s=4e-9, fall_time_s=3e-9, return_to_zero=True
    )
    times = _best_times(cases, x, rate)
    record = {
        "case": "impairments_cost",
        "audio_seconds": SECONDS,
        "profile": base.name,
        "target_ratio": TARGET_RATIO,
        "repeats": REPEATS,
        "load_average_1min": round(os.getloadavg()[0], 2),
    }
    for name, (wall, cpu) in times.items():
        record[f"{name}_s"] = round(wall, 3)
        record[f"{name}_ratio"] = round(wall / times["ideal"][0], 3)
        record[f"{name}_cpu_s"] = round(cpu, 3)
        record[f"{name}_cpu_ratio"] = round(cpu / times["ideal"][1], 3)
    yield record
    yield _class_d_record(rate, x)


def _class_d_record(rate, x):
    from audiodsm.profile import ImpairmentSettings, load_profile

    def with_keys(base, **keys):
        return dataclasses.replace(base, impairments=ImpairmentSettings(**keys))

    bridge = load_profile(_POCKET / "pwm9_bridge_16x.toml")
    half = load_profile(_POCKET / "pwm9_halfbridge_deadtime_16x.toml")
    switches = {"high_side_on_ohm": 0.12, "low_side_on_ohm": 0.08}
    ripple = {"supply_ripple": 0.02, "supply_ripple_hz": 217.0}
    cases = {
        "bridge_ideal": with_keys(bridge),
        "bridge_supply_ripple": with_keys(bridge, **ripple),
        "bridge_on_resistance": with_keys(bridge, **switches),
        "bridge_loudspeaker": with_keys(bridge, **_SPEAKER),
        "bridge_all": with_keys(bridge, **ripple, **switches, **_SPEAKER),
        "dead_time_ideal": with_keys(half),
        "dead_time_on_resistance_loudspeaker": with_keys(half, **switches, **_SPEAKER),
        "bridge_jitter": with_keys(bridge, **_JITTER),
    }
    times = _best_times(cases, x, rate)
    record = {
        "case": "class_d_cost",
        "audio_seconds": SECONDS,
        "repeats": REPEATS,
        "load_average_1min": round(os.getloadavg()[0], 2),
    }
    for name, (wall, cpu) in times.items():
        ideal = times["dead_time_ideal" if name.startswith("dead") else "bridge_ideal"]
        record[f"{name}_s"] = round(wall, 3)
        record[f"{name}_ratio"] = round(wall / ideal[0], 3)
        record[f"{name}_cpu_s"] = round(cpu, 3)
        record[f"{name}_cpu_ratio"] = round(cpu / ideal[1], 3)
    return record
