"""Output-referred analog noise (stages/analog_noise.py)."""

from __future__ import annotations

import numpy as np
from scipy.signal import welch

from audiodsm.stages._element_kernels import normal_draws
from audiodsm.stages.analog_noise import AnalogNoise

RATE = 3_072_000.0


def test_white_frame_means_have_the_density_of_the_definition():
    # one-sided density D over fs/2: variance D^2 fs / 2 (Parseval)
    noise, _ = AnalogNoise(RATE, density_v=10e-9, seed=2).process(1 << 20)
    want = (10e-9) ** 2 * RATE / 2
    assert abs(np.var(noise) / want - 1) < 0.01


def test_one_over_f_part_follows_its_corner():
    # density D^2 (1 + f_c / f): at f_c / 10 eleven times the white level (10.4 dB), at 10 f_c
    # 1.1 times; the relaxation sum is accurate to a few tenths of a dB (Keshner 1982)
    n, corner = 1 << 22, 2000.0
    gen = AnalogNoise(RATE, density_v=1e-8, corner_hz=corner, seed=5)
    noise, _ = gen.process(n)
    freqs, psd = welch(noise, fs=RATE, nperseg=1 << 18)
    white = (1e-8) ** 2
    for f in (corner / 10, corner, 10 * corner):
        sel = (freqs > f / 1.25) & (freqs < f * 1.25)
        got = 10 * np.log10(np.mean(psd[sel] * freqs[sel]) / np.mean(freqs[sel]) / white)
        want = 10 * np.log10(1 + corner / f)
        assert abs(got - want) <= 1.0, (f, got, want)


def test_blocks_equal_one_call():
    gen = AnalogNoise(RATE, density_v=3e-9, corner_hz=500.0, seed=1)
    whole, _ = gen.process(10000)
    a, st = gen.process(3333)
    b, _ = gen.process(6667, st)
    np.testing.assert_array_equal(np.concatenate([a, b]), whole)
    parts, st = [], None  # splits on and off the held processes' update frames
    for size in (1, 1023, 1, 1024, 2, 7949):
        part, st = gen.process(size, st)
        parts.append(part)
    np.testing.assert_array_equal(np.concatenate(parts), whole)


def test_held_slow_processes_keep_the_spectrum_of_the_per_frame_sum():
    # A slow relaxation process is updated every M frames (an AR(1) with pole a^M) and held:
    # its density is that of the AR(1) at rate fs / M, 2 b^2 / (r |1 - p e^{-j 2 pi f / r}|^2),
    # times the hold's |sum of M phasors|^2 / M^2 = (sin(pi f M / fs) / (M sin(pi f / fs)))^2
    # (zero-order hold; e.g. Oppenheim & Schafer, Discrete-Time Signal Processing, upsampling
    # and interpolation). Summed over the processes, against the same processes run every
    # frame (M = 1) and against D^2 f_c / f, 20 Hz..20 kHz.
    gen = AnalogNoise(RATE, density_v=1e-8, corner_hz=2000.0)
    assert gen._holds.max() > 1  # the slow processes are held
    f = np.logspace(np.log10(20.0), np.log10(20000.0), 200)

    def density(poles, gains, holds):
        total = np.zeros_like(f)
        for a, b, m in zip(poles, gains, holds, strict=True):
            r = RATE / m
            ar = 2 * b * b / (r * np.abs(1 - a * np.exp(-2j * np.pi * f / r)) ** 2)
            total += ar * (np.sin(np.pi * f * m / RATE) / (m * np.sin(np.pi * f / RATE))) ** 2
        return total

    held = density(gen._poles, gen._gains, gen._holds)
    per_frame_pole = gen._poles ** (1.0 / gen._holds)
    per_frame_gain = gen._gains * np.sqrt((1 - per_frame_pole**2) / (1 - gen._poles**2))
    every_frame = density(per_frame_pole, per_frame_gain, np.ones_like(gen._holds))
    assert np.max(np.abs(10 * np.log10(held / every_frame))) < 0.05
    # the relaxation sum's own approximation of 1/f (Keshner 1982): a few tenths of a dB
    assert np.max(np.abs(10 * np.log10(held / ((1e-8) ** 2 * 2000.0 / f)))) < 0.3


def test_no_corner_draws_only_the_white_part():
    gen = AnalogNoise(RATE, density_v=10e-9, seed=4)
    assert gen._holds.size == 0
    noise, st = gen.process(1000)
    rng = np.random.SeedSequence([4, 0xA0]).generate_state(1, dtype=np.uint64)
    draws = np.empty(1000)
    normal_draws(rng, 1.0, draws)
    np.testing.assert_array_equal(noise, gen.frame_std * draws)
    assert st.frames == 1000 and st.generator == int(rng[0])
