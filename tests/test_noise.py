"""Tests for audiodsm.measure.noise against outside sources named beside each check."""

import numpy as np
import pytest
from measure_helpers import LSB16, RATE, _band_power_gain, _cos, _tpdf_quantize
from scipy import signal

from audiodsm.errors import ParameterError
from audiodsm.measure.noise import (
    dynamic_range,
    idle_channel_noise,
    noise_clear_of_harmonics,
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


def _bs468_published_magnitude(f):
    """|R_ITU(f)| of ITU-R BS.468-4's weighting network, the standard's closed form.

    R_ITU(f) = 1.246332637532143e-4 f / sqrt(h1^2 + h2^2) with h1, h2 the polynomials below
    (coefficients as published with BS.468-4; transcribed from memory, written out here
    independently of audiodsm.measure.weighting). The BS.468-4 table check in test_weighting
    confirms the shape.
    """
    h1 = (
        -4.737338981378384e-24 * f**6
        + 2.043828333606125e-15 * f**4
        - 1.363894795463638e-07 * f**2
        + 1.0
    )
    h2 = 1.306612257412824e-19 * f**5 - 2.118150887518656e-11 * f**3 + 5.559488023498642e-04 * f
    return 1.246332637532143e-4 * f / np.hypot(h1, h2)


def test_ccir_minus_a_on_white_noise_matches_the_curves(rng):
    # White noise read CCIR-RMS and A-weighted through the same AES17 band filter differs by
    #   10 log10( integral |H_band|^2 |W_ccir|^2 df / integral |H_band|^2 |W_a|^2 df ),
    # with W_ccir the BS.468-4 curve normalised to 0 dB at 2 kHz (AES17-2015 "CCIR-RMS"),
    # W_a from librosa.A_weighting (an outside IEC 61672-1 implementation), |H_band|^2 from
    # scipy.signal.sosfreqz of the band filter. About 3.71 dB at 48 kHz (3.72 dB over an ideal
    # 20 Hz-20 kHz band). The two readings of one 4 s noise record scatter apart by about
    # 0.015 dB (the noise's own spectral fluctuation); with the weighting filters' fit to
    # the curves (far inside class 1 in band), 0.06 dB.
    import librosa

    from audiodsm.measure.bands import band_limit_filter

    f = np.linspace(0.0, RATE / 2, 400_001)
    _, h = signal.sosfreqz(band_limit_filter(RATE), worN=f, fs=RATE)
    band = np.abs(h) ** 2
    fpos = np.maximum(f, 1e-3)
    w_a = 10 ** (librosa.A_weighting(fpos, min_db=None) / 10)
    w_ccir = (_bs468_published_magnitude(fpos) / _bs468_published_magnitude(2000.0)) ** 2
    expected = 10 * np.log10(np.trapezoid(band * w_ccir, f) / np.trapezoid(band * w_a, f))
    # the ideal-band value of the same curves, as a sanity bound on the integral
    ideal = (f >= 20.0) & (f <= 20000.0)
    ideal_db = 10 * np.log10(
        np.trapezoid(w_ccir[ideal], f[ideal]) / np.trapezoid(w_a[ideal], f[ideal])
    )
    assert ideal_db == pytest.approx(3.72, abs=0.005)
    x = rng.standard_normal(int(4 * RATE)) * 1e-4
    a = idle_channel_noise(x, rate_hz=RATE, weighting="a").noise_dbfs
    c = idle_channel_noise(x, rate_hz=RATE, weighting="ccir").noise_dbfs
    assert c - a == pytest.approx(expected, abs=0.06)


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


def _white_in_band(n, rms, rng):
    """White Gaussian noise of the given rms (over 0..rate/2)."""
    return rms * rng.standard_normal(n)


def test_noise_modulation_reads_a_known_noise_change():
    # A synthetic tone whose added white noise is made 6 dB louder at the top level than at
    # the others: the reading must be that known 6 dB (within 0.5 dB, the tolerance).
    # The noise power in the band is sigma^2 * (band / (rate/2)) for white noise (its
    # definition), so the change in sigma is the change in every band's level.
    rng = np.random.default_rng(61)
    n = int(0.5 * RATE)
    levels = (-1.0, -20.0, -40.0, -60.0)
    sigma = {-1.0: 2e-5, -20.0: 1e-5, -40.0: 1e-5, -60.0: 1e-5}
    caps = [
        _cos(997.0, n, 10 ** (lv / 20), 0.4) + _white_in_band(n, sigma[lv], rng) for lv in levels
    ]
    r = noise_modulation(caps, rate_hz=RATE, frequency_hz=997.0, weighting="unweighted")
    assert r.spread_db == pytest.approx(20 * np.log10(2.0), abs=0.5)
    # the reading follows the noise: each capture's level is that of its white noise in the
    # 20 Hz..20 kHz band (sigma^2 * 19980 / 24000), to 0.3 dB
    for lv, got in zip(levels, r.noise_dbfs, strict=True):
        expected = power_to_dbfs(sigma[lv] ** 2 * 19980.0 / (RATE / 2))
        assert got == pytest.approx(expected, abs=0.3)
    for lv, got in zip(levels, r.tone_dbfs, strict=True):
        assert got == pytest.approx(lv, abs=0.01)


@pytest.mark.parametrize("weighting", ["unweighted", "a"])
def test_noise_modulation_ignores_harmonics_that_rise_with_level(weighting):
    # Harmonics 2..7 at -40 dBc at every level rise with the tone (from -41 dBFS at -1 dBFS to
    # -100 dBFS at -60 dBFS) while the noise stays the same: the reading must stay under
    # 0.5 dB. The THD+N residual of the same captures moves by tens of dB, which is what the
    # old definition reported.
    rng = np.random.default_rng(62)
    n = int(0.5 * RATE)
    levels = (-1.0, -20.0, -40.0, -60.0)
    caps = []
    for lv in levels:
        a = 10 ** (lv / 20)
        x = _cos(997.0, n, a, 0.4)
        for k in range(2, 8):
            x = x + _cos(997.0 * k, n, a * 1e-2, 0.3 * k)
        caps.append(x + _white_in_band(n, 1e-5, rng))
    r = noise_modulation(caps, rate_hz=RATE, frequency_hz=997.0, weighting=weighting)
    assert r.spread_db < 0.5
    # the harmonics themselves are big: at -1 dBFS they sum to about -33 dBFS, far above the
    # noise, so the THD+N residual (the old reading) moves by tens of dB over these captures
    from audiodsm.measure.tone import thd_plus_noise

    top, bottom = (
        thd_plus_noise(c, rate_hz=RATE, frequency_hz=997.0, weighting=weighting).noise_dbfs
        for c in (caps[0], caps[-1])
    )
    assert top - bottom > 30.0


def test_noise_clear_of_harmonics_refuses_bad_input():
    x = _cos(997.0, 24000, 0.5)
    with pytest.raises(ParameterError, match="frequency_hz"):
        noise_clear_of_harmonics(x, rate_hz=RATE, frequency_hz=30000.0)
    with pytest.raises(ParameterError, match="guard_hz"):
        noise_clear_of_harmonics(x, rate_hz=RATE, frequency_hz=997.0, guard_hz=1000.0)
