"""Tests for audiodsm.measure.aes17 against outside sources named beside each check."""

import math

import numpy as np
import pytest
from scipy import signal

from audiodsm.errors import ParameterError
from audiodsm.measure import aes17
from audiodsm.measure.aes17 import (
    dynamic_range,
    enob_bits,
    fit_sine,
    frequency_response,
    idle_channel_noise,
    imd_difference_frequency,
    imd_smpte,
    level_linearity,
    noise_modulation,
    out_of_band_power_dbfs,
    read_residual_meter,
    sinad_db,
    start_residual_meter,
    stepped_frequency_response,
    thd,
    thd_plus_noise,
    update_residual_meter,
)
from audiodsm.measure.spectrum import power_to_dbfs

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
        librosa = pytest.importorskip("librosa")
        with np.errstate(divide="ignore"):
            g = g * 10 ** (librosa.A_weighting(np.maximum(f, 1e-3), min_db=None) / 10)
    return np.trapezoid(g, f) / (rate / 2)


# --- sine fit (IEEE Std 1057) ----------------------------------------------------------------


def _ieee1057_four_parameter(y, t, f0, iterations=30):
    """IEEE Std 1057 four-parameter fit, written plainly as the standard lays it out
    (clause 4.1.3.3 from memory): start from a 3-parameter fit at f0, then repeat
    x = (D^T D)^-1 D^T y with D = [cos(w t), sin(w t), 1, -A t sin(w t) + B t cos(w t)],
    w += dw, on the raw time axis t in seconds. Returns (A, B, C, f)."""
    w = 2 * np.pi * f0
    d0 = np.column_stack([np.cos(w * t), np.sin(w * t), np.ones_like(t)])
    a, b, c = np.linalg.solve(d0.T @ d0, d0.T @ y)
    for _ in range(iterations):
        d = np.column_stack(
            [
                np.cos(w * t),
                np.sin(w * t),
                np.ones_like(t),
                -a * t * np.sin(w * t) + b * t * np.cos(w * t),
            ]
        )
        a, b, c, dw = np.linalg.solve(d.T @ d, d.T @ y)
        w += dw
    return a, b, c, w / (2 * np.pi)


@pytest.mark.parametrize("seed", range(6))
def test_sine_fit_recovers_clean_tone(seed):
    # A clean sine is exactly the model: amplitude and frequency must come back to 1e-9
    # relative (the bound; float64 rounding allows ~1e-12), from a start found by
    # the interpolated DFT peak alone.
    r = np.random.default_rng(seed)
    freq = r.uniform(50.0, 20000.0)
    amp = r.uniform(1e-4, 1.0)
    phase = r.uniform(-np.pi, np.pi)
    offset = r.uniform(-0.1, 0.1)
    x = _cos(freq, 6000 + seed * 777, amp, phase) + offset
    fit = fit_sine(x, rate_hz=RATE)
    assert fit.converged
    assert fit.amplitude == pytest.approx(amp, rel=1e-9)
    assert fit.frequency_hz == pytest.approx(freq, rel=1e-9)
    assert fit.offset == pytest.approx(offset, abs=1e-9 * amp + 1e-12)
    assert math.remainder(fit.phase_rad - phase, 2 * np.pi) == pytest.approx(0.0, abs=1e-7)
    assert fit.residual_rms < 1e-9 * amp
    np.testing.assert_allclose(fit.model(len(x)), x, atol=1e-9 * amp)


def test_sine_fit_matches_ieee1057_reference_on_noisy_tone(rng):
    # Both solve the same least-squares problem; the standard's plain normal equations lose
    # some digits to conditioning, so agreement to 1e-8 relative (amplitude) and 1e-10
    # (frequency) is what the reference itself can deliver.
    n = 4800
    t = np.arange(n) / RATE
    x = 0.3 * np.cos(2 * np.pi * 997.3 * t + 1.1) + 0.01 + rng.standard_normal(n) * 0.02
    a, b, c, f = _ieee1057_four_parameter(x, t, 997.0)
    fit = fit_sine(x, rate_hz=RATE)
    assert fit.frequency_hz == pytest.approx(f, rel=1e-10)
    assert fit.amplitude == pytest.approx(math.hypot(a, b), rel=1e-8)
    assert fit.offset == pytest.approx(c, abs=1e-9)
    # phase of A cos + B sin is atan2(-B, A)
    assert math.remainder(fit.phase_rad - math.atan2(-b, a), 2 * np.pi) == pytest.approx(
        0, abs=1e-7
    )


def test_three_parameter_fit_is_plain_least_squares(rng):
    # IEEE Std 1057 three-parameter fit: x = (D0^T D0)^-1 D0^T y, D0 = [cos, sin, 1].
    n = 3000
    t = np.arange(n) / RATE
    x = 0.5 * np.cos(2 * np.pi * 1500.2 * t) + rng.standard_normal(n) * 0.05
    d0 = np.column_stack([np.cos(2 * np.pi * 1500 * t), np.sin(2 * np.pi * 1500 * t), np.ones(n)])
    a, b, c = np.linalg.solve(d0.T @ d0, d0.T @ x)
    fit = fit_sine(x, rate_hz=RATE, frequency_hz=1500.0, four_parameter=False)
    assert fit.frequency_hz == 1500.0
    assert fit.amplitude == pytest.approx(math.hypot(a, b), rel=1e-10)
    assert fit.offset == pytest.approx(c, abs=1e-12)
    assert fit.iterations == 0


def test_fit_warns_when_the_iteration_cannot_converge(rng):
    # white noise holds no tone: one iteration is not enough to settle, and the fit says so
    x = rng.standard_normal(4000)
    with pytest.warns(RuntimeWarning, match="did not converge"):
        fit = fit_sine(x, rate_hz=RATE, max_iterations=1)
    assert not fit.converged


def test_interpolated_peak_is_close_enough_to_start():
    # The Hann three-bin estimator (Jacobsen & Kootsookos 2007) is exact to ~1e-3 bin for a
    # lone tone; 0.01 bin is a loose bound that still fails on an uninterpolated peak.
    n = 4096
    for frac in (0.0, 0.25, 0.5, 0.77):
        f = (100 + frac) * RATE / n
        est = aes17.interpolated_peak_hz(_cos(f, n, 0.5, 0.3), rate_hz=RATE)
        assert abs(est - f) < 0.01 * RATE / n


# --- THD+N, dynamic range, idle noise --------------------------------------------------------


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


def test_thd_n_of_clean_polynomial_distortion():
    # AES17 THD+N = rms(band-limited residual) / rms(band-limited total). For
    # y = x + a2 x^2 + a3 x^3 with x = A cos(w t) the trigonometric identities give
    # H1 = A + 3/4 a3 A^3, H2 = a2 A^2 / 2, H3 = a3 A^3 / 4 (and DC, removed by the band);
    # all lie in the band, whose passband ripple is 0.02 dB, so 0.05 dB.
    a2, a3, amp = 0.01, 0.003, 0.5
    x = _cos(997.0, int(2 * RATE), amp, 0.2)
    y = x + a2 * x**2 + a3 * x**3
    h1, h2, h3 = amp + 0.75 * a3 * amp**3, a2 * amp**2 / 2, a3 * amp**3 / 4
    expected = 10 * math.log10((h2**2 + h3**2) / (h1**2 + h2**2 + h3**2))
    r = thd_plus_noise(y, rate_hz=RATE)
    assert r.ratio_db == pytest.approx(expected, abs=0.05)
    assert r.percent == pytest.approx(100 * 10 ** (expected / 20), rel=0.006)
    assert r.fundamental_dbfs == pytest.approx(20 * math.log10(h1), abs=1e-6)


def test_residual_meter_blockwise_equals_one_shot(rng):
    # Segments are cut from the concatenated blocks, so any block split gives the same bits.
    n = int(3.3 * RATE)
    x = _tpdf_quantize(_cos(997.0, n, 0.5, 0.3), rng) + 0.001
    freq = fit_sine(x[: int(RATE)], rate_hz=RATE).frequency_hz
    kinds = ("unweighted", "a", "ccir")
    one = read_residual_meter(
        update_residual_meter(
            x, start_residual_meter(rate_hz=RATE, frequency_hz=freq, weightings=kinds)
        )
    )
    st = start_residual_meter(rate_hz=RATE, frequency_hz=freq, weightings=kinds)
    pos = 0
    for size in [1, 999, 48000, 0, 17, 60_000, 10**9]:
        st = update_residual_meter(x[pos : pos + size], st)
        pos += size
    blocks = read_residual_meter(st)
    assert blocks == one
    # and the one-shot functions agree with the meter
    r = thd_plus_noise(x, rate_hz=RATE, weighting="a")
    assert r.noise_dbfs == one.noise_dbfs["a"]
    assert r.ratio_db == one.thd_n_db["a"]


def test_residual_meter_follows_a_slightly_wrong_frequency(rng):
    # A frequency 2 parts per billion off (what a 1 s lead fit can leave) must not leak the
    # fundamental into a long measurement: segment-wise refits absorb the phase drift. The
    # reference is the dither-theory floor, as in the dynamic-range test (0.3 dB).
    n = int(12 * RATE)
    x = _tpdf_quantize(_cos(997.0, n, 10 ** (-1 / 20)), rng)
    st = start_residual_meter(
        rate_hz=RATE, frequency_hz=997.0 * (1 + 2e-9), weightings=("unweighted",)
    )
    r = read_residual_meter(update_residual_meter(x, st))
    expected = power_to_dbfs(LSB16**2 / 4 * _band_power_gain(RATE, "unweighted"))
    assert r.noise_dbfs["unweighted"] == pytest.approx(expected, abs=0.3)


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


# --- THD, SINAD, ENOB ------------------------------------------------------------------------


def test_thd_and_each_harmonic_match_trig_identities():
    # y = x + a2 x^2 + a3 x^3, x = A cos: H1 = A + 3/4 a3 A^3, H2 = a2 A^2/2, H3 = a3 A^3/4
    # (cos^2 = (1 + cos 2)/2, cos^3 = (3 cos + cos 3)/4). Issue bound 0.05 dB.
    a2, a3, amp = 0.01, 0.003, 0.5
    x = _cos(997.0, int(RATE), amp, 0.2)
    y = x + a2 * x**2 + a3 * x**3
    h1, h2, h3 = amp + 0.75 * a3 * amp**3, a2 * amp**2 / 2, a3 * amp**3 / 4
    r = thd(y, rate_hz=RATE)
    assert r.ratio_db == pytest.approx(20 * math.log10(math.hypot(h2, h3) / h1), abs=0.05)
    levels = {h.order: h.level_db for h in r.harmonics}
    assert levels[2] == pytest.approx(20 * math.log10(h2 / h1), abs=0.05)
    assert levels[3] == pytest.approx(20 * math.log10(h3 / h1), abs=0.05)
    assert all(levels[k] < -150 for k in range(4, 11))
    assert r.fundamental_dbfs == pytest.approx(20 * math.log10(h1), abs=1e-6)


def test_thd_excludes_harmonics_above_the_band():
    x = _cos(2500.0, int(RATE), 0.5)
    r = thd(x, rate_hz=RATE, upper_hz=20000.0)
    assert [h.order for h in r.harmonics] == [2, 3, 4, 5, 6, 7]  # 7 x 2.5 kHz = 17.5 kHz
    assert r.excluded_orders == (8, 9, 10)


def test_enob_of_ideal_quantizer():
    # Quantization theory (Bennett 1948; IEEE Std 1241 ENOB definition): rounding a busy
    # sine to N bits leaves white error of rms Delta/sqrt(12), so ENOB = N and
    # SINAD = 6.02 N + 1.76 dB for a full-scale sine. 0.05 bit / 0.3 dB cover the small
    # departure from a uniform error at this record length.
    for bits in (8, 12):
        lsb = 2.0 / 2**bits
        x = lsb * np.round(_cos(997.0, 20000, 1.0 - lsb, 0.3) / lsb)
        assert enob_bits(x, rate_hz=RATE) == pytest.approx(bits, abs=0.05)
        expected = 10 * math.log10(1.5) + 20 * math.log10(2**bits)  # 6.02 N + 1.76
        assert sinad_db(x, rate_hz=RATE) == pytest.approx(expected, abs=0.3)


# --- intermodulation -------------------------------------------------------------------------


def test_smpte_imd_matches_trig_identities():
    # x = A1 cos w1 t + A2 cos w2 t through y = x + a2 x^2 + a3 x^3 (trigonometric identities):
    # sidebands f2 ± f1 from a2 with amplitude a2 A1 A2 each; f2 ± 2 f1 from a3 with
    # 3/4 a3 A1^2 A2 each; U(f2) = A2 + a3 (3/2 A1^2 A2 + 3/4 A2^3). SMPTE RP120 / IEC
    # 60268-3 (from memory): the sidebands of one order add linearly, relative to U(f2).
    a2, a3, amp1, amp2 = 0.01, 0.003, 0.4, 0.1
    x = _cos(60.0, int(RATE), amp1) + _cos(7000.0, int(RATE), amp2)
    y = x + a2 * x**2 + a3 * x**3
    u2 = amp2 + a3 * (1.5 * amp1**2 * amp2 + 0.75 * amp2**3)
    d1 = 2 * a2 * amp1 * amp2 / u2
    d2 = 2 * 0.75 * a3 * amp1**2 * amp2 / u2
    r = imd_smpte(y, rate_hz=RATE)
    assert r.second_order_db == pytest.approx(20 * math.log10(d1), abs=0.05)
    assert r.third_order_db == pytest.approx(20 * math.log10(d2), abs=0.05)
    assert r.ratio_db == pytest.approx(20 * math.log10(math.hypot(d1, d2)), abs=0.05)
    levels = {p.name: p.level_db for p in r.products}
    assert levels["f2+1f1"] == pytest.approx(20 * math.log10(a2 * amp1 * amp2 / u2), abs=0.05)
    assert levels["f2-2f1"] == pytest.approx(
        20 * math.log10(0.75 * a3 * amp1**2 * amp2 / u2), abs=0.05
    )
    assert r.peak_dbfs == pytest.approx(20 * math.log10(amp1 + u2), abs=0.01)
    assert "relative to the f2 amplitude" in r.convention


def test_difference_frequency_imd_matches_trig_identities():
    # Equal tones A at 19 and 20 kHz through the polynomial (trigonometric identities):
    # U(f2-f1) = a2 A^2; U(2f1-f2) = U(2f2-f1) = 3/4 a3 A^3; U(f2) = A + 9/4 a3 A^3.
    # IEC 60268-3 difference-frequency distortion (from memory): relative to 2 U(f2).
    # At 96 kHz every product lies below Nyquist.
    rate = 96000.0
    a2, a3, amp = 0.01, 0.003, 0.3
    x = _cos(19000.0, int(rate), amp, rate=rate) + _cos(20000.0, int(rate), amp, 0.5, rate=rate)
    y = x + a2 * x**2 + a3 * x**3
    u2 = amp + 2.25 * a3 * amp**3
    d2 = a2 * amp**2 / (2 * u2)
    d3 = 2 * 0.75 * a3 * amp**3 / (2 * u2)
    r = imd_difference_frequency(y, rate_hz=rate)
    assert r.second_order_db == pytest.approx(20 * math.log10(d2), abs=0.05)
    assert r.third_order_db == pytest.approx(20 * math.log10(d3), abs=0.05)
    assert r.ratio_db == pytest.approx(20 * math.log10(math.hypot(d2, d3)), abs=0.05)
    assert [p.name for p in r.products] == ["f2-f1", "2f1-f2", "2f2-f1"]


def test_difference_frequency_at_48k_handles_aliased_products():
    # At 48 kHz the sum products alias into the band (2 f1 -> 10 kHz, f1 + f2 -> 9 kHz, ...);
    # the fit models them, so the in-band products still match the identities.
    a2, a3, amp = 0.01, 0.003, 0.3
    x = _cos(19000.0, int(RATE), amp) + _cos(20000.0, int(RATE), amp, 0.5)
    y = x + a2 * x**2 + a3 * x**3
    u2 = amp + 2.25 * a3 * amp**3
    r = imd_difference_frequency(y, rate_hz=RATE)
    assert r.second_order_db == pytest.approx(20 * math.log10(a2 * amp**2 / (2 * u2)), abs=0.05)


# --- level linearity, frequency response -----------------------------------------------------


def test_level_linearity_of_a_power_law():
    # y = sign(x) |x|^(1+e) is homogeneous of degree 1+e, so its fundamental scales as
    # A^(1+e) (Fourier coefficients of a homogeneous function): the gain deviation at level
    # L relative to L_ref is exactly e (L - L_ref) dB. The 1/3-octave band rejects the odd
    # harmonics by > 40 dB, so 0.01 dB.
    eps = 0.01
    levels = [0.0, -20.0, -40.0, -60.0, -80.0, -100.0, -120.0]
    caps = []
    for lv in levels:
        x = _cos(997.0, int(RATE), 10 ** (lv / 20), 0.1)
        caps.append(np.sign(x) * np.abs(x) ** (1 + eps))
    r = level_linearity(caps, rate_hz=RATE, levels_dbfs=levels)
    for lv, dev in zip(levels, r.deviation_db, strict=True):
        assert dev == pytest.approx(eps * lv, abs=0.01)
    # a plain gain is linear: no deviation at any level (to rounding), reference -20 dBFS
    lin = [0.5 * _cos(997.0, int(RATE), 10 ** (lv / 20), 0.1) for lv in levels]
    r = level_linearity(lin, rate_hz=RATE, levels_dbfs=levels, reference_dbfs=-20.0)
    assert r.max_deviation_db < 1e-6
    assert r.measured_dbfs[1] == pytest.approx(-20.0 + 20 * math.log10(0.5), abs=0.01)


def test_frequency_response_of_a_known_filter():
    # A 2nd-order Butterworth low-pass at 8 kHz; the expected response is
    # scipy.signal.sosfreqz of the same filter relative to its value at 997 Hz. The fit is
    # exact in steady state, so 1e-6 dB.
    sos = signal.butter(2, 8000.0, output="sos", fs=RATE)
    freqs = [50.0, 200.0, 997.0, 3000.0, 7000.0, 12000.0, 19000.0]
    n = int(RATE)
    x = sum(_cos(f, n, 0.1, 0.3 * i) for i, f in enumerate(freqs))
    y = signal.sosfilt(sos, x)
    r = frequency_response(y, rate_hz=RATE, frequencies_hz=freqs)
    _, h = signal.sosfreqz(sos, worN=np.array(freqs), fs=RATE)
    expected = 20 * np.log10(np.abs(h) / np.abs(h[2]))
    np.testing.assert_allclose(r.gain_db, expected, atol=1e-6)
    assert r.ripple_db == pytest.approx(expected.max() - expected.min(), abs=1e-6)
    # the same from one capture per frequency
    caps = [signal.sosfilt(sos, _cos(f, n, 0.2)) for f in freqs]
    r2 = stepped_frequency_response(caps, rate_hz=RATE, frequencies_hz=freqs, input_amplitudes=0.2)
    np.testing.assert_allclose(r2.gain_db, expected, atol=1e-6)


# --- out-of-band power, noise modulation -----------------------------------------------------


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


# --- errors -----------------------------------------------------------------------------------


def test_bad_inputs_raise_parameter_errors():
    x = _cos(997.0, 48000, 0.5)
    with pytest.raises(ParameterError, match="weighting="):
        thd_plus_noise(x, rate_hz=RATE, weighting="b")
    with pytest.raises(ParameterError, match="frequency_hz="):
        fit_sine(x, rate_hz=RATE, frequency_hz=30000.0)
    with pytest.raises(ParameterError, match="x="):
        fit_sine(x[:5], rate_hz=RATE)
    with pytest.raises(ParameterError, match="x="):
        thd_plus_noise(x[:1000], rate_hz=RATE, frequency_hz=997.0)  # all within settling
    with pytest.raises(ParameterError, match="silent"):
        thd_plus_noise(np.zeros(48000), rate_hz=RATE)
    with pytest.raises(ParameterError, match="harmonics="):
        thd(x, rate_hz=RATE, harmonics=[1, 2])
    with pytest.raises(ParameterError, match="reference_dbfs="):
        level_linearity([x], rate_hz=RATE, levels_dbfs=[0.0], reference_dbfs=-20.0)
    with pytest.raises(ParameterError, match="reference_hz="):
        frequency_response(x, rate_hz=RATE, frequencies_hz=[1000.0])
    with pytest.raises(ParameterError, match="state="):
        update_residual_meter(x, None)
    with pytest.raises(ParameterError, match="f1_hz"):
        imd_smpte(x, rate_hz=RATE, f1_hz=8000.0)


# --- with the project's stimuli ---------------------------------------------------------------


def test_twin_tone_stimuli_read_back_their_stated_peak_level():
    # audiodsm.signals states a twin tone's level as the combined peak U1 + U2 (4:1 for
    # SMPTE, 1:1 for difference frequency); the IMD results report the same convention, and
    # a clean stimulus has no products (rounding only: below -200 dB).
    from audiodsm.signals import twin_tone_difference, twin_tone_smpte

    x = twin_tone_smpte(-3.0, rate_hz=RATE, duration_s=1.0)
    r = imd_smpte(x, rate_hz=RATE)
    assert r.peak_dbfs == pytest.approx(-3.0, abs=1e-9)
    assert r.f1_dbfs - r.f2_dbfs == pytest.approx(20 * math.log10(4.0), abs=1e-9)
    assert r.ratio_db < -200
    x = twin_tone_difference(-1.0, rate_hz=96000.0, duration_s=1.0)
    r = imd_difference_frequency(x, rate_hz=96000.0)
    assert r.peak_dbfs == pytest.approx(-1.0, abs=1e-9)
    assert r.f1_dbfs == pytest.approx(r.f2_dbfs, abs=1e-9)
    assert r.ratio_db < -200


def test_multitone_stimulus_gives_the_filter_response():
    # audiodsm.signals.multitone has equal tone amplitudes (Schroeder phases); through a
    # 4th-order Chebyshev type I low-pass (0.5 dB ripple, 15 kHz) the measured response is
    # scipy.signal.sosfreqz relative to 997 Hz, and the in-band ripple its peak-to-peak.
    from audiodsm.signals import multitone

    freqs = [31.0, 100.0, 500.0, 997.0, 2000.0, 5000.0, 9000.0, 12000.0, 14500.0]
    sos = signal.cheby1(4, 0.5, 15000.0, output="sos", fs=RATE)
    y = signal.sosfilt(sos, multitone(freqs, -6.0, rate_hz=RATE, duration_s=1.0))
    r = frequency_response(y, rate_hz=RATE, frequencies_hz=freqs)
    _, h = signal.sosfreqz(sos, worN=np.array(freqs), fs=RATE)
    expected = 20 * np.log10(np.abs(h) / np.abs(h[3]))
    np.testing.assert_allclose(r.gain_db, expected, atol=1e-6)
    assert r.ripple_db == pytest.approx(np.ptp(expected), abs=1e-6)
    assert 0.3 < r.ripple_db < 0.6  # Chebyshev ripple 0.5 dB, sampled at these tones
