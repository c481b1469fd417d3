"""Stimuli, checked against AES17 level definitions, trigonometric identities, Schroeder (1970)
and Lipshitz/Wannamaker/Vanderkooy dither theory (JAES 1992)."""

import math

import numpy as np
import pytest
from scipy import stats

from audiodsm.errors import ParameterError
from audiodsm.signals import (
    AES17_TEST_HZ,
    amplitude_to_dbfs,
    dbfs_to_amplitude,
    dbfs_to_rms,
    dc_offset,
    multitone,
    quantize,
    rms_to_dbfs,
    schroeder_phases,
    silence,
    sine,
    stepped_sine,
    tpdf_dither,
    twin_tone_amplitudes,
    twin_tone_difference,
    twin_tone_smpte,
)

RATE = 48000.0


def _rms(x):
    return float(np.sqrt(np.mean(np.square(x))))


def _amplitude_at(x, f, rate):
    # Orthogonality of sines over whole periods: projecting onto sin and cos at f gives the
    # exact amplitude of that component (textbook Fourier series).
    t = np.arange(x.size) / rate
    s = 2.0 / x.size * np.dot(x, np.sin(2 * np.pi * f * t))
    c = 2.0 / x.size * np.dot(x, np.cos(2 * np.pi * f * t))
    return math.hypot(s, c)


def test_dbfs_definition_full_scale_sine_and_square():
    # AES17: a full-scale sine reads 0.00 dBFS, a full-scale square wave +3.01 dBFS
    x = sine(1000.0, 0.0, rate_hz=RATE, duration_s=1.0)  # exactly 1000 periods
    assert abs(rms_to_dbfs(_rms(x))) < 1e-9
    assert np.max(np.abs(x)) <= 1.0
    square = np.sign(sine(1000.0, 0.0, rate_hz=RATE, duration_s=1.0, phase_rad=0.1))
    assert abs(rms_to_dbfs(_rms(square)) - 10 * math.log10(2.0)) < 1e-9
    assert round(rms_to_dbfs(_rms(square)), 2) == 3.01


def test_level_conversions_round_trip():
    levels = np.array([0.0, -1.0, -20.0, -60.0, -120.0])
    np.testing.assert_allclose(amplitude_to_dbfs(dbfs_to_amplitude(levels)), levels, atol=1e-12)
    np.testing.assert_allclose(rms_to_dbfs(dbfs_to_rms(levels)), levels, atol=1e-12)
    # a sine's rms is its amplitude / sqrt(2) (textbook)
    np.testing.assert_allclose(dbfs_to_rms(levels), dbfs_to_amplitude(levels) / math.sqrt(2))
    assert amplitude_to_dbfs(0.0) == -math.inf
    with pytest.raises(ParameterError, match="amplitude"):
        amplitude_to_dbfs(-1.0)


def test_sine_level_length_and_phase():
    x = sine(AES17_TEST_HZ, -60.0, rate_hz=RATE, duration_s=0.5, phase_rad=math.pi / 2)
    assert x.shape == (24000,)
    assert x[0] == pytest.approx(1e-3, rel=1e-12)  # cos start, amplitude 10^(-60/20)
    assert AES17_TEST_HZ == 997.0
    with pytest.raises(ParameterError, match="frequency_hz"):
        sine(30000.0, 0.0, rate_hz=RATE, duration_s=0.1)
    with pytest.raises(ParameterError, match="level_dbfs"):
        sine(1000.0, 1.0, rate_hz=RATE, duration_s=0.1)
    with pytest.raises(ParameterError, match="rate_hz"):
        sine(1000.0, 0.0, rate_hz=0, duration_s=0.1)
    with pytest.raises(ParameterError, match="duration_s"):
        sine(1000.0, 0.0, rate_hz=RATE, duration_s=-1)


def test_smpte_twin_tone_amplitudes_and_peak():
    x = twin_tone_smpte(-6.0, rate_hz=RATE, duration_s=1.0)  # whole periods of 60 Hz and 7 kHz
    peak = 10 ** (-6.0 / 20)
    # SMPTE RP120 4:1 amplitudes (from memory); our level convention: a_low + a_high = peak
    assert _amplitude_at(x, 60.0, RATE) == pytest.approx(0.8 * peak, rel=1e-9)
    assert _amplitude_at(x, 7000.0, RATE) == pytest.approx(0.2 * peak, rel=1e-9)
    assert np.max(np.abs(x)) <= peak + 1e-12
    # the peaks coincide within a 7 kHz half-cycle of the 60 Hz crest: max is near the sum
    assert np.max(np.abs(x)) > 0.99 * peak
    assert twin_tone_amplitudes(-6.0, ratio=4.0) == pytest.approx((0.8 * peak, 0.2 * peak))


def test_difference_twin_tone_equal_amplitudes():
    x = twin_tone_difference(0.0, rate_hz=RATE, duration_s=1.0)
    # IEC 60268-3 difference-frequency test: 19 kHz + 20 kHz at 1:1 (from memory)
    assert _amplitude_at(x, 19000.0, RATE) == pytest.approx(0.5, rel=1e-9)
    assert _amplitude_at(x, 20000.0, RATE) == pytest.approx(0.5, rel=1e-9)
    assert np.max(np.abs(x)) <= 1.0 + 1e-12
    with pytest.raises(ParameterError, match="Nyquist"):
        twin_tone_difference(0.0, rate_hz=32000.0, duration_s=0.1)


def test_dc_and_silence():
    np.testing.assert_array_equal(dc_offset(-0.25, rate_hz=RATE, duration_s=0.01), -0.25)
    assert dc_offset(0.5, rate_hz=RATE, duration_s=0.01).shape == (480,)
    assert not np.any(silence(rate_hz=RATE, duration_s=0.01))
    with pytest.raises(ParameterError, match="value"):
        dc_offset(1.5, rate_hz=RATE, duration_s=0.01)


def test_schroeder_phases_formula():
    # Schroeder (1970): phi_k = -pi k (k - 1) / N for a flat spectrum of N tones
    n = 7
    k = np.arange(1, n + 1)
    np.testing.assert_allclose(schroeder_phases(n), -np.pi * k * (k - 1) / n)
    with pytest.raises(ParameterError, match="n_tones"):
        schroeder_phases(0)


@pytest.mark.parametrize("n_tones", [8, 16, 32, 64])
def test_schroeder_multitone_crest_factor(n_tones):
    # N harmonics of f0 = 100 Hz over exactly 10 periods
    f0 = 100.0
    t = np.arange(int(RATE / f0) * 10) / RATE
    k = np.arange(1, n_tones + 1)
    in_phase = np.cos(2 * np.pi * f0 * np.outer(t, k)).sum(axis=1)
    # analytic: with equal phases all N tones peak together, crest factor = N / sqrt(N/2)
    crest_in_phase = np.max(np.abs(in_phase)) / _rms(in_phase)
    assert crest_in_phase == pytest.approx(math.sqrt(2 * n_tones), rel=1e-9)
    x = multitone(f0 * k, -1.0, rate_hz=RATE, duration_s=t.size / RATE)
    crest = np.max(np.abs(x)) / _rms(x)
    # Schroeder (1970) reports peak factors near that of a single sine for this phase law
    # (from memory, roughly 1.6-1.9 against sqrt(2) = 1.41); we require < 2.0, far below
    # the in-phase sqrt(2N) (4 to 11.3 here).
    assert crest < 2.0
    # level convention: the largest sample is the stated peak level
    assert np.max(np.abs(x)) == pytest.approx(10 ** (-1.0 / 20), rel=1e-12)
    # all tones have the same amplitude (orthogonality over whole periods)
    amps = [_amplitude_at(x, f, RATE) for f in f0 * k]
    np.testing.assert_allclose(amps, amps[0], rtol=1e-9)


def test_multitone_rejects_bad_sets():
    with pytest.raises(ParameterError, match="frequencies_hz"):
        multitone([100.0, 100.0], -1.0, rate_hz=RATE, duration_s=0.1)
    with pytest.raises(ParameterError, match="frequencies_hz"):
        multitone([100.0, 30000.0], -1.0, rate_hz=RATE, duration_s=0.1)


def test_stepped_sine_positions_and_content():
    st = stepped_sine([100.0, 1000.0, 10000.0], -20.0, rate_hz=RATE, step_s=0.1, gap_s=0.05)
    assert st.step_samples == 4800
    np.testing.assert_array_equal(st.starts, [0, 7200, 14400])
    assert st.signal.size == 3 * 7200
    ref = sine(1000.0, -20.0, rate_hz=RATE, duration_s=0.1)
    np.testing.assert_array_equal(st.signal[7200:12000], ref)
    assert not np.any(st.signal[12000:14400])
    lin = stepped_sine(997.0, [0.0, -10.0, -20.0], rate_hz=RATE, step_s=0.05)
    np.testing.assert_array_equal(lin.levels_dbfs, [0.0, -10.0, -20.0])
    np.testing.assert_array_equal(lin.frequencies_hz, [997.0] * 3)
    with pytest.raises(ParameterError, match="levels_dbfs"):
        stepped_sine([100.0, 200.0], [0.0, -1.0, -2.0], rate_hz=RATE, step_s=0.05)


def test_tpdf_dither_distribution_and_seed():
    lsb = 2.0**-15
    d = tpdf_dither(200000, lsb, 7)
    # Lipshitz et al. (1992): TPDF of 2 LSB peak to peak has variance lsb^2 / 6, support
    # (-lsb, lsb). Tolerance: 2e5 samples give ~0.3 % rms error on the variance; 2 % is ~6 sigma.
    assert np.var(d) == pytest.approx(lsb**2 / 6, rel=0.02)
    assert np.all(np.abs(d) < lsb)
    # and its shape is the triangle (scipy.stats.triang), Kolmogorov-Smirnov at 1 % level
    ks = stats.kstest(d, stats.triang(c=0.5, loc=-lsb, scale=2 * lsb).cdf)
    assert ks.pvalue > 0.01
    np.testing.assert_array_equal(d, tpdf_dither(200000, lsb, 7))
    assert not np.array_equal(d, tpdf_dither(200000, lsb, 8))
    assert tpdf_dither(10, lsb, 0, channels=2).shape == (10, 2)


def test_tpdf_quantization_error_power_is_signal_independent():
    # Lipshitz, Wannamaker & Vanderkooy (JAES 1992): with TPDF dither the total error has
    # mean 0 and power Delta^2/4 whatever the input, while without dither a DC input's error
    # depends on where it sits between steps. 1e5 samples: ~0.5 % rms error; 3 % tolerance.
    bits = 12
    step = 2.0 ** (1 - bits)
    base = 205 * step  # a value on the quantizer grid
    for offset in (0.0, 0.25, 0.5, 0.75):
        x = np.full(100000, base + offset * step)
        err = quantize(x, bits=bits, dither="tpdf", seed=3) - x
        assert np.mean(err**2) == pytest.approx(step**2 / 4, rel=0.03)
        assert abs(np.mean(err)) < 0.01 * step
    for offset in (0.0, 0.25):
        x = np.full(10, base + offset * step)
        err = quantize(x, bits=bits, dither="none") - x
        assert np.mean(err**2) == pytest.approx((offset * step) ** 2, abs=1e-30)


def test_ideal_16_bit_channel_snr():
    # Lipshitz et al. (1992): an ideal N-bit TPDF-dithered channel has SNR = 6.02 N - 3.01 dB
    # for a full-scale sine over the Nyquist band (exactly 10 log10(1.5 * 2^(2N)) - 10 log10(3)
    # = 10 log10(2^(2N) / 2)). Measured at -1 dBFS so the dither does not clip; 2^18 samples
    # give ~0.01 dB rms error; tolerance 0.05 dB.
    x = sine(AES17_TEST_HZ, -1.0, rate_hz=RATE, duration_s=2**18 / RATE)
    err = quantize(x, bits=16, dither="tpdf", seed=11) - x
    snr = 10 * math.log10(np.mean(x**2) / np.mean(err**2))
    expected = 10 * math.log10(2.0**32 / 2) - 1.0
    assert snr == pytest.approx(expected, abs=0.05)
    # the undithered busy signal has error power Delta^2/12 (4.77 dB better), within 0.1 dB
    err0 = quantize(x, bits=16, dither="none") - x
    assert 10 * math.log10(np.mean(err**2) / np.mean(err0**2)) == pytest.approx(
        10 * math.log10(3.0), abs=0.1
    )


def test_quantize_bad_options():
    with pytest.raises(ParameterError, match="bits"):
        quantize([0.0], bits=1)
    with pytest.raises(ParameterError, match="dither"):
        quantize([0.0], bits=16, dither="gauss")
