"""Tests for audiodsm.measure.classify.classify_channel (what a channel holds).

The stimuli follow their defining documents: the AES17 997 Hz test tone, the SMPTE RP120
twin tone (60 Hz + 7 kHz, 4:1 amplitude) and the IEC 60268-3 difference-frequency twin tone
(19 kHz + 20 kHz, 1:1) (from memory, as in REFERENCES.md); TPDF dither of 2 LSB peak to peak
(Lipshitz, Wannamaker & Vanderkooy 1992).
"""

from __future__ import annotations

import numpy as np
import pytest

from audiodsm.errors import ParameterError
from audiodsm.measure.classify import classify_channel
from audiodsm.measure.idle_tones import line_spectrum

RATE = 48000
N = 2 * RATE
T = np.arange(N) / RATE
LSB = 2.0**-15


def _tpdf(seed, n=N):
    g = np.random.default_rng(seed)
    return (g.uniform(-0.5, 0.5, n) + g.uniform(-0.5, 0.5, n)) * LSB


def _levels(x, frames=RATE // 4):
    p = x[: x.size // frames * frames].reshape(-1, frames)
    ms = np.mean((p - p.mean(axis=1, keepdims=True)) ** 2, axis=1)
    with np.errstate(divide="ignore"):
        return 10 * np.log10(ms / 0.5)


def _classify(x):
    return classify_channel(line_spectrum(x, rate_hz=RATE), block_levels_dbfs=_levels(x))


@pytest.mark.parametrize("level_dbfs", [-1.0, -60.0])
def test_aes17_tone(level_dbfs):
    x = 10 ** (level_dbfs / 20) * np.sin(2 * np.pi * 997 * T) + _tpdf(1)
    got = _classify(x)
    assert got.kind == "tone"
    # the lobe centroid of a symmetric window: well within one 5.9 Hz bin
    assert got.frequencies_hz[0] == pytest.approx(997.0, abs=0.5)
    # The added TPDF dither (two uniform variates of +-LSB/2, no requantization) has power
    # LSB^2/6 (Lipshitz, Wannamaker & Vanderkooy 1992), white, so the band 20 Hz .. 20 kHz of
    # the 24 kHz Nyquist band holds 19980/24000 of it: -95.9 dBFS. The tone stands that far
    # above it; at -1 dBFS the analysis window's own leakage (about -92 dB) takes over.
    noise_dbfs = 10 * np.log10(LSB**2 / 6 / 0.5 * (20000.0 - 20.0) / (RATE / 2))
    if level_dbfs < -20:
        assert got.dominance_db == pytest.approx(level_dbfs - noise_dbfs, abs=0.5)
    else:
        assert level_dbfs - noise_dbfs - 6 < got.dominance_db <= level_dbfs - noise_dbfs + 0.5


def test_tone_with_strong_harmonics_is_still_a_tone():
    x = np.sin(2 * np.pi * 997 * T)
    x = 0.5 * x + 0.05 * x**2 + 0.02 * x**3  # 2nd harmonic about -26 dB, 3rd about -40 dB
    assert _classify(x).kind == "tone"


@pytest.mark.parametrize(
    "f1,a1,f2,a2",
    [(60.0, 0.4, 7000.0, 0.1), (19000.0, 0.25, 20000.0, 0.25)],  # SMPTE 4:1, IEC 1:1
)
def test_twin_tones(f1, a1, f2, a2):
    x = a1 * np.sin(2 * np.pi * f1 * T) + a2 * np.sin(2 * np.pi * f2 * T) + _tpdf(2)
    got = _classify(x)
    assert got.kind == "twin-tone"
    assert sorted(got.frequencies_hz) == pytest.approx(sorted((f1, f2)), abs=0.5)
    # the stronger tone comes first
    assert got.frequencies_hz[0] == pytest.approx(f1 if a1 >= a2 else f2, abs=0.5)


def test_silence_and_digital_zero():
    assert _classify(_tpdf(3)).kind == "silence"
    zero = _classify(np.zeros(N))
    assert zero.kind == "silence" and zero.band_dbfs == -np.inf
    # a small idle tone in dither does not make a "tone": it carries little of the band
    x = _tpdf(4) + 3e-6 * np.sin(2 * np.pi * 1234.0 * T)
    assert _classify(x).kind == "silence"


def test_program_material():
    g = np.random.default_rng(5)
    loud_noise = 0.1 * g.normal(size=N)
    assert _classify(loud_noise).kind == "program"
    # quiet but unsteady: noise bursts switching 20 dB every quarter second
    env = np.repeat(np.where(np.arange(8) % 2, 1.0, 0.1), RATE // 4)
    bursts = 1e-3 * g.normal(size=N) * env
    got = _classify(bursts)
    assert got.kind == "program" and "spread" in got.reason
    # without block levels the same signal would pass as steady quiet noise
    assert classify_channel(line_spectrum(bursts, rate_hz=RATE)).kind == "silence"


def test_bad_spectrum():
    with pytest.raises(ParameterError, match="band_hz"):
        classify_channel(line_spectrum(_tpdf(6), rate_hz=RATE), band_hz=(30.0, 10.0))
