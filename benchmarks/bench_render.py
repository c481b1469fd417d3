"""Render benchmarks: speed of the whole chain, and peak memory on a long input.

Cases
-----
``render_speed``
    60 s of synthesized stereo 48 kHz program through the default profile (5th-order single-bit
    PDM loop at OSR 64, 3rd-order Butterworth reconstruction) with a 24-bit listening file
    written, as ``audiodsm render`` does it. Reports the time per stage (summed over the two
    channels, which run in parallel threads), the real-time factor, and ``ratio_to_c``: the
    wall time over the C reference loop's time for the same number of modulator samples
    (``feedback5_1bit`` of ``shared/perf/limit.c``, run in the same benchmark run, see
    :mod:`benchmarks._c_reference`). Target (issue 12): <= 2.0 with both cores busy.
    ``cpu_ratio_to_c`` is the CPU time spread over the two cores, over the C loop's CPU time:
    the steadier figure on a busy machine.
``render_speed_shipped_pdm5``
    The same, through the shipped profile ``profiles/dac_chip/pdm5_64x.toml`` (its loop is
    feedforward, spread zeros), the profile issue 12's target names.
``render_speed_96k_5level_error``
    Issue 12's second render target: 10 s of stereo 96 kHz through a 4th-order 5-level loop
    at OSR 128 (NRZ output, the default reconstruction filter), with the error-only file
    written (``error_gain_db = 0``). Its ratio is to the C 17-level loop
    (``feedback5_17level``, the C reference's multi-level loop) for the same modulator
    samples. Target: wall <= 2.5.
``render_memory``
    A 10-minute stereo 96 kHz 24-bit input at OSR 64, rendered in a child process that reports
    its peak resident memory (``ru_maxrss``). Target: < 400 MB.

``AUDIODSM_BENCH_RENDER_SECONDS`` (speed case) and ``AUDIODSM_BENCH_MEMORY_SECONDS`` (memory
case) shorten the inputs for a quick check.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from benchmarks._c_reference import C_RATE_HZ, c_loop_speeds, cpu_loop_seconds, time_ratio

C_SAMPLES = C_RATE_HZ * 10  # the C reference's run, shared with the modulator benchmark
TARGET_RATIO_TO_C = 2.0
SPEED_SECONDS = float(os.environ.get("AUDIODSM_BENCH_RENDER_SECONDS", "60"))
MEMORY_SECONDS = float(os.environ.get("AUDIODSM_BENCH_MEMORY_SECONDS", "600"))
#: issue 12: 10 s of stereo 96 kHz, 4th order 5 levels at OSR 128, with the error file
MULTI_LEVEL_SECONDS = float(os.environ.get("AUDIODSM_BENCH_RENDER_96K_SECONDS", "10"))
TARGET_MULTI_LEVEL_RATIO_TO_C = 2.5


def _program(n_frames: int, rate: int, start: int = 0) -> np.ndarray:
    """Synthesized stereo program: plucked tones with decays, a bass line and a little noise."""
    t = (start + np.arange(n_frames)) / rate
    beat = 0.5  # a note every half second
    phase = np.mod(t, beat)
    env = np.exp(-phase * 6.0)
    note = np.floor(t / beat).astype(np.int64)
    freqs = 220.0 * 2.0 ** ((note * 7 % 12) / 12.0)
    left = 0.35 * env * np.sin(2 * np.pi * freqs * t) + 0.2 * np.sin(2 * np.pi * 55.0 * t)
    right = 0.3 * env * np.sin(2 * np.pi * 1.5 * freqs * t + 0.3) + 0.2 * np.sin(
        2 * np.pi * 82.5 * t
    )
    rng = np.random.default_rng(start)
    noise = 1e-3 * rng.standard_normal((n_frames, 2))
    return np.column_stack([left, right]) + noise


def _write_input(path: Path, seconds: float, rate: int) -> None:
    from audiodsm.io import open_audio_writer

    total = int(seconds * rate)
    step = 1 << 18
    with open_audio_writer(path, rate_hz=rate, channels=2, subtype="PCM_24") as writer:
        for start in range(0, total, step):
            writer.write(_program(min(step, total - start), rate, start))


def _cpu_seconds() -> float:
    """User + system CPU time of this process and its threads so far."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


#: The shipped 5th-order PDM profile (a feedforward loop with spread zeros), relative to the
#: project root.
SHIPPED_PDM5 = "profiles/dac_chip/pdm5_64x.toml"


def _speed_case(profile_path=None, *, multi_level=False):
    from audiodsm.evaluate.render import render_file
    from audiodsm.profile import (
        ChainProfile,
        ModulatorSettings,
        OutputStageSettings,
        UpsamplerSettings,
        load_profile,
    )

    rate, seconds, loop, error_gain_db = 48000, SPEED_SECONDS, "feedback5_1bit", None
    target = TARGET_RATIO_TO_C
    if multi_level:
        profile = ChainProfile(
            name="nrz5-osr128",
            upsampler=UpsamplerSettings(osr=128),
            modulator=ModulatorSettings(order=4, levels=5),
            output=OutputStageSettings(kind="nrz"),
        )
        case = "render_speed_96k_5level_error"
        text = "4th-order 5-level NRZ, OSR 128, 96 kHz, with the error-only file"
        rate, seconds, loop, error_gain_db = 96000, MULTI_LEVEL_SECONDS, "feedback5_17level", 0.0
        target = TARGET_MULTI_LEVEL_RATIO_TO_C
    elif profile_path is None:
        profile = ChainProfile(name="pdm5-osr64")
        case, text = (
            "render_speed",
            "5th-order single-bit PDM, OSR 64, 3rd-order Butterworth 60 kHz",
        )
    else:
        profile = load_profile(Path(__file__).resolve().parents[1] / profile_path)
        mod = profile.modulator
        case = "render_speed_shipped_pdm5"
        text = f"{profile_path}: 5th-order single-bit PDM, {mod.structure}, {mod.zero_layout} zeros"
    c_loop_speeds(C_SAMPLES)  # the C reference runs before the render, not during it
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        warm = tmp / "warm.wav"
        _write_input(warm, 0.2, rate)
        (tmp / "out").mkdir()
        render_file(warm, profile, tmp / "out", error_gain_db=error_gain_db)  # compile first
        src = tmp / "program.wav"
        _write_input(src, seconds, rate)
        started = time.perf_counter()
        cpu_before = _cpu_seconds()
        summary = render_file(src, profile, tmp / "out", error_gain_db=error_gain_db)
        elapsed = time.perf_counter() - started
        cpu = _cpu_seconds() - cpu_before
    cores = min(2, os.cpu_count() or 1)
    modulator_samples = int(seconds * rate) * profile.upsampler.osr * 2
    versus_c = time_ratio(loop, modulator_samples, elapsed, samples=C_SAMPLES)
    c_cpu = cpu_loop_seconds(loop, modulator_samples, samples=C_SAMPLES)
    if c_cpu is not None:
        versus_c["cpu_ratio_to_c"] = round(cpu / cores / c_cpu, 3)
    return {
        "case": case,
        "profile": text,
        "audio_seconds": seconds,
        "rate_hz": rate,
        "channels": 2,
        "elapsed_s": round(elapsed, 3),
        "realtime_factor": round(seconds / elapsed, 2),
        "target_realtime_factor": 10.0,
        "modulator_samples": modulator_samples,
        **versus_c,
        "target": target,
        "stage_seconds_summed_over_channels": summary["stage_seconds"],
        "cpu_s": round(cpu, 3),
        # on a shared machine the wall time includes waiting for a core; audio seconds per
        # CPU second, spread over the cores the two channels can use, estimates what a quiet
        # machine would give (assuming the two channel threads overlap perfectly)
        "realtime_factor_from_cpu_time": round(seconds / (cpu / cores), 2),
        "load_average_1min": round(os.getloadavg()[0], 2),
        "cpu_count": os.cpu_count(),
    }


def _memory_child(src: str, out: str) -> None:
    """Run in a child process: render, then print the peak resident memory."""
    from audiodsm.evaluate.render import render_file
    from audiodsm.profile import ChainProfile

    started = time.perf_counter()
    summary = render_file(src, ChainProfile(name="pdm5-osr64"), out)
    elapsed = time.perf_counter() - started
    peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # kilobytes on Linux
    print(
        json.dumps({"peak_mb": peak_kb / 1024.0, "elapsed_s": elapsed, "frames": summary["frames"]})
    )


def _memory_case():
    rate = 96000
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        src = tmp / "long.wav"
        _write_input(src, MEMORY_SECONDS, rate)
        out = tmp / "out"
        out.mkdir()
        code = (
            "import sys; from benchmarks.bench_render import _memory_child; "
            "_memory_child(sys.argv[1], sys.argv[2])"
        )
        root = Path(__file__).resolve().parents[1]
        done = subprocess.run(
            [sys.executable, "-c", code, str(src), str(out)],
            capture_output=True,
            text=True,
            cwd=root,
            check=True,
        )
        child = json.loads(done.stdout.strip().splitlines()[-1])
    return {
        "case": "render_memory",
        "profile": "5th-order single-bit PDM, OSR 64, 3rd-order Butterworth 60 kHz",
        "audio_seconds": MEMORY_SECONDS,
        "rate_hz": rate,
        "channels": 2,
        "peak_memory_mb": round(child["peak_mb"], 1),
        "target_peak_memory_mb": 400.0,
        "elapsed_s": round(child["elapsed_s"], 2),
        "realtime_factor": round(MEMORY_SECONDS / child["elapsed_s"], 2),
    }


def run():
    yield _speed_case()
    yield _speed_case(SHIPPED_PDM5)
    yield _speed_case(multi_level=True)
    yield _memory_case()
