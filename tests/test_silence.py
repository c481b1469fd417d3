import math

import librosa
import numpy as np
import pytest

from audiodsm.measure.silence import SILENCE_GUARD_WINDOWS, SILENCE_WINDOW_S, SilenceNoiseMeter
from audiodsm.measure.spectrum import NUMERIC_FLOOR_DBFS


def test_silence_meter_reads_a_weighted_white_noise_as_the_curve_predicts(rng):
    # Outside check: white noise of variance s^2 at rate fs has a one-sided density of
    # s^2 / (fs/2). Band-limited to 20 Hz-20 kHz and A-weighted (IEC 61672-1 curve, here from
    # librosa.A_weighting), its power is s^2 / (fs/2) * integral |A(f)|^2 df over the band,
    # and its AES17 level is 10 log10(2 * power) dBFS. Allowed: 0.1 dB, for the meter's digital
    # band and weighting filters (they approximate the band edges and the curve) and for the
    # spread of a 2.8 s noise power estimate (a few hundredths of a dB).
    fs = 48000
    sigma = 1e-3
    x = np.zeros((4 * fs, 1))
    x[:fs, 0] = 0.5 * np.sin(2 * np.pi * 997 * np.arange(fs) / fs)  # 1 s of sound, 3 s silence
    y = sigma * rng.standard_normal((4 * fs, 1))
    meter = SilenceNoiseMeter(fs, fs, 1)
    for start in range(0, 4 * fs, 7000):  # blocks of any size
        meter.feed_input(x[start : start + 7000])
        meter.feed_output(y[start : start + 7000])
    seconds, levels = meter.result()
    assert seconds == pytest.approx(3.0 - SILENCE_GUARD_WINDOWS * SILENCE_WINDOW_S)
    f = np.linspace(20.0, 20000.0, 20001)
    gain2 = 10 ** (librosa.A_weighting(f, min_db=None) / 10)
    power = sigma**2 / (fs / 2) * np.trapezoid(gain2, f)
    assert abs(levels[0] - 10 * math.log10(2 * power)) < 0.1
    # too little silence: no level
    short = SilenceNoiseMeter(fs, fs, 1)
    short.feed_input(x[: int(1.4 * fs)])
    short.feed_output(y[: int(1.4 * fs)])
    assert short.result()[1] == [None]


def test_a_digitally_silent_output_reads_the_numeric_floor():
    # An output with no in-band power in the silent stretch (here exact zeros; in a render, an
    # undithered single-bit loop idling in a pattern at half its rate once band-limited) has no
    # physical noise level: float64 rounding noise on a full-scale signal is near
    # 20 log10(2**-53) = -319 dB (IEEE 754), so the meter reports the numeric floor, as the
    # battery does, not a level of -466 dBFS.
    fs = 48000
    x = np.zeros((2 * fs, 1))
    meter = SilenceNoiseMeter(fs, fs, 1)
    meter.feed_input(x)
    meter.feed_output(1e-30 * np.ones((2 * fs, 1)))  # DC, outside the 20 Hz .. 20 kHz band
    _, levels = meter.result()
    assert 20 * math.log10(2.0**-53) < NUMERIC_FLOOR_DBFS
    assert levels == [NUMERIC_FLOOR_DBFS]
