"""Stimuli and reference integrals shared by the tests of the measure modules."""

import librosa
import numpy as np
from scipy import signal

RATE = 48000.0
LSB16 = 2.0**-15  # 16-bit step for full scale ±1.0


def _cos(freq, n, amp=1.0, phase=0.0, rate=RATE):
    return amp * np.cos(2 * np.pi * freq * np.arange(n) / rate + phase)


def _tpdf_quantize(x, rng, lsb=LSB16):
    """Round to a grid of step `lsb` after adding 2-LSB peak-to-peak TPDF dither."""
    d = rng.random(len(x)) - rng.random(len(x))
    return lsb * np.round(x / lsb + d)


def _band_power_gain(rate, kind):
    """(2/rate) * integral over 0..rate/2 of |H_band(f)|^2 |W(f)|^2 df.

    |H_band|^2 from scipy.signal.sosfreqz of the AES17 band filter; |W|^2 from
    librosa.A_weighting (an outside implementation of IEC 61672-1) for "a", 1 otherwise.
    """
    from audiodsm.measure.bands import band_limit_filter

    f = np.linspace(0.0, rate / 2, 200_001)
    _, h = signal.sosfreqz(band_limit_filter(rate), worN=f, fs=rate)
    g = np.abs(h) ** 2
    if kind == "a":
        with np.errstate(divide="ignore"):
            g = g * 10 ** (librosa.A_weighting(np.maximum(f, 1e-3), min_db=None) / 10)
    return np.trapezoid(g, f) / (rate / 2)
