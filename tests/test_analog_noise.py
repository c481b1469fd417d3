"""Output-referred analog noise (stages/analog_noise.py)."""

from __future__ import annotations

import numpy as np
from scipy.signal import welch

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
