"""Tests for audiodsm.measure.noise against outside sources named beside each check."""

import numpy as np
import pytest
from measure_helpers import LSB16, RATE, _band_power_gain, _cos, _tpdf_quantize

from audiodsm.errors import ParameterError
from audiodsm.measure.noise import (
    dynamic_range,
    idle_channel_noise,
    noise_modulation,
    out_of_band_power_dbfs,
)
from audiodsm.measure.spectrum import power_to_dbfs

# --- dynamic range, idle noise ----------------------------------------------------------------


@pytest.mark.parametrize("kind", ["unweighted", "a"])
def test_dithered_16_bit_channel_matches_dither_theory(kind):
    # Lipshitz, Wannamaker & Vanderkooy, JAES 40(5) 1992: TPDF dither of 2 LSB peak-to-peak
    # makes the total error white with power Delta^2/4, whatever the signal. Band-limited and
    # weighted, its power is Delta^2/4 * (2/rate) * integral |H_band|^2 |W|^2 df, and the
    # AES17 dynamic range is minus that level in dBFS. 0.3 dB allows for the fundamental
    # removal and the estimate's scatter (3 s of noise: well under 0.05 dB).
    rng = np.random.default_rng(1992)
    n = int(3 * RATE)
    x = _tpdf_quantize(_cos(997.0, n, 10 ** (-60 / 20), 0.7), rng)
    expected_noise = power_to_dbfs(LSB16**2 / 4 * _band_power_gain(RATE, kind))
    r = dynamic_range(x, rate_hz=RATE, weighting=kind)
    assert r.tone_dbfs == pytest.approx(-60.0, abs=0.05)
    assert r.dynamic_range_db == pytest.approx(-expected_noise, abs=0.3)
    # AES17: DR = -(THD+N) + 60 dB when the tone is at -60 dBFS; here it is off by a few
    # thousandths of a dB, which shifts the two readings apart by as much
    assert r.dynamic_range_db == pytest.approx(-r.thd_n_db + 60.0, abs=0.06)


def test_dynamic_range_refuses_tone_away_from_minus_60(rng):
    x = _tpdf_quantize(_cos(997.0, 48000, 10 ** (-50 / 20)), rng)
    with pytest.raises(ParameterError, match="-60 dBFS"):
        dynamic_range(x, rate_hz=RATE)


@pytest.mark.parametrize("rate", [44100.0, RATE, 96000.0, 192000.0])
def test_idle_channel_noise_of_white_noise(rng, rate):
    # White noise of variance s^2 through the band filter: s^2 (2/rate) integral |H|^2 df,
    # with |H|^2 from scipy.signal.sosfreqz; A-weighted, times librosa's A curve. The
    # in-band share of 1.5 s of noise scatters by ~0.02 dB at 192 kHz; 0.1 dB.
    s = 1e-4
    x = rng.standard_normal(int(1.5 * rate)) * s
    r = idle_channel_noise(x, rate_hz=rate)
    expected = power_to_dbfs(s * s * _band_power_gain(rate, "unweighted"))
    assert r.noise_dbfs == pytest.approx(expected, abs=0.1)
    ra = idle_channel_noise(x, rate_hz=rate, weighting="a")
    expected_a = power_to_dbfs(s * s * _band_power_gain(rate, "a"))
    assert ra.noise_dbfs == pytest.approx(expected_a, abs=0.1)


def test_time_and_frequency_domain_noise_agree(rng):
    # The same band and weighting read two ways: filters in time (idle_channel_noise) and
    # curves on the averaged spectrum (Spectrum.band_noise_dbfs, ideal 20 Hz-20 kHz band).
    # They differ only by the band filter's edges and the digital weighting filter's fit to
    # the curve (within IEC 61672-1 class-1 limits, but far closer in-band), so 0.15 dB.
    from audiodsm.measure.spectrum import averaged_spectrum

    x = rng.standard_normal(int(4 * RATE)) * 1e-3
    spec = averaged_spectrum(x, rate_hz=RATE, resolution_hz=RATE / 4096)
    for kind in ("unweighted", "a", "ccir"):
        t = idle_channel_noise(x, rate_hz=RATE, weighting=kind).noise_dbfs
        f = spec.band_noise_dbfs(20.0, 20000.0, weighting=kind)
        assert t == pytest.approx(f, abs=0.15), kind


def test_ccir_weighting_reads_louder_than_a_on_white_noise(rng):
    # Common practice (and ITU-R BS.468-4's +12 dB peak near 6.3 kHz, normalised to 0 dB at
    # 2 kHz for CCIR-RMS): white noise reads several dB higher CCIR-RMS than A-weighted.
    x = rng.standard_normal(int(1.5 * RATE)) * 1e-4
    a = idle_channel_noise(x, rate_hz=RATE, weighting="a").noise_dbfs
    c = idle_channel_noise(x, rate_hz=RATE, weighting="ccir").noise_dbfs
    assert c - a > 2.0


# --- out-of-band power, noise modulation ------------------------------------------------------


def test_out_of_band_power_of_white_noise_and_a_tone(rng):
    # White noise of variance s^2 holds s^2 (hi - lo) / (rate / 2) between lo and hi (flat
    # density); a tone adds A^2/2. 0.1 dB covers the estimate's scatter (see test_spectrum).
    rate = 192000.0
    s = 0.01
    x = rng.standard_normal(int(rate)) * s
    r = out_of_band_power_dbfs(x, rate_hz=rate)
    assert r.upper_hz == rate / 2
    assert r.power_dbfs == pytest.approx(
        power_to_dbfs(s * s * (rate / 2 - 20000) / (rate / 2)), abs=0.1
    )
    tone = _cos(50000.0, int(rate), 0.1, rate=rate)
    r = out_of_band_power_dbfs(x + tone, rate_hz=rate, lower_hz=40000.0, upper_hz=60000.0)
    expected = s * s * 20000 / (rate / 2) + 0.1**2 / 2
    assert r.power_dbfs == pytest.approx(power_to_dbfs(expected), abs=0.1)


def test_noise_modulation_tpdf_versus_undithered():
    # Lipshitz, Wannamaker & Vanderkooy 1992: TPDF dither makes the error power independent of
    # the signal (Delta^2/4 at every level), so the spread is only the estimates' scatter
    # (< 0.2 dB here); without dither the error depends on the signal and the noise floor
    # moves with level (by more than 1 dB for these levels).
    rng = np.random.default_rng(7)
    levels = (-1.0, -30.0, -60.0, -90.0)
    n = int(2 * RATE)
    clean = [_cos(997.0, n, 10 ** (lv / 20), 0.3) for lv in levels]
    dith = noise_modulation(
        [_tpdf_quantize(c, rng) for c in clean], rate_hz=RATE, weighting="unweighted"
    )
    assert dith.spread_db < 0.2
    expected = power_to_dbfs(LSB16**2 / 4 * _band_power_gain(RATE, "unweighted"))
    for v in dith.noise_dbfs:
        assert v == pytest.approx(expected, abs=0.3)
    plain = noise_modulation(
        [LSB16 * np.round(c / LSB16) for c in clean],
        rate_hz=RATE,
        weighting="unweighted",
        frequency_hz=997.0,
    )
    assert plain.spread_db > 1.0
