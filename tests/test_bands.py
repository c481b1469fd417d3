"""AES17 band limits, checked against the AES17 filter specification and textbook formulas."""

import numpy as np
import pytest
from scipy import signal

from audiodsm.errors import ParameterError
from audiodsm.measure.bands import (
    band_limit,
    band_limit_filter,
    band_mask,
    stop_edge_hz,
)


def _db(sos, f, rate):
    _, h = signal.sosfreqz(sos, worN=np.asarray(f, dtype=float), fs=rate)
    return 20.0 * np.log10(np.abs(h))


@pytest.mark.parametrize("rate", [44100.0, 48000.0, 88200.0, 96000.0, 192000.0, 768000.0])
def test_aes17_low_pass_meets_the_standard(rate):
    sos = band_limit_filter(rate, lower_hz=None)
    # AES17-2015 standard low-pass (from memory): passband within +/-0.1 dB up to 20 kHz
    passband = _db(sos, np.linspace(0.0, 20000.0, 4001), rate)
    assert passband.max() <= 0.1 and passband.min() >= -0.1
    # ... and at least 60 dB attenuation from 24 kHz. Below 48 kHz, 24 kHz lies beyond Nyquist;
    # there the stop band starts halfway between 20 kHz and Nyquist (our choice, documented).
    edge = stop_edge_hz(20000.0, rate)
    assert edge == min(24000.0, 20000.0 + 0.5 * (rate / 2 - 20000.0))
    stop = _db(sos, np.linspace(edge, rate / 2, 4001), rate)
    assert stop.max() <= -60.0 + 1e-6  # 1e-6 dB: float rounding of the equiripple design
    # our default is deeper than the standard's minimum: 120 dB
    assert stop.max() <= -120.0 + 1e-6


@pytest.mark.parametrize("rate", [96000.0, 192000.0])
def test_aes17_wide_band_variant(rate):
    sos = band_limit_filter(rate, upper_hz=40000.0, lower_hz=None, stop_db=60.0)
    # AES17 40 kHz variant (from memory): +/-0.1 dB to 40 kHz, >= 60 dB from 48 kHz (or, at
    # 96 kHz, from halfway to Nyquist: 44 kHz)
    assert np.all(np.abs(_db(sos, np.linspace(0.0, 40000.0, 2001), rate)) <= 0.1)
    edge = stop_edge_hz(40000.0, rate)
    # 1e-6 dB: the equiripple stop band touches -60 dB exactly, up to float rounding
    assert np.max(_db(sos, np.linspace(edge, rate / 2, 2001), rate)) <= -60.0 + 1e-6


@pytest.mark.parametrize("rate", [44100.0, 192000.0])
def test_high_pass_is_a_bilinear_butterworth(rate):
    sos = band_limit_filter(rate, upper_hz=None, lower_hz=20.0)
    f = np.array([5.0, 10.0, 20.0, 40.0, 100.0, 1000.0])
    # Textbook: a 4th-order Butterworth high-pass designed through the bilinear transform has
    # |H|^2 = 1 / (1 + (tan(pi fc / fs) / tan(pi f / fs))^8); -3.01 dB at fc.
    ratio = np.tan(np.pi * 20.0 / rate) / np.tan(np.pi * f / rate)
    expected = -10.0 * np.log10(1.0 + ratio**8)
    np.testing.assert_allclose(_db(sos, f, rate), expected, atol=1e-6)


def test_band_filter_is_the_cascade():
    rate = 96000.0
    f = np.geomspace(5.0, 47000.0, 300)
    both = _db(band_limit_filter(rate), f, rate)
    low = _db(band_limit_filter(rate, lower_hz=None), f, rate)
    high = _db(band_limit_filter(rate, upper_hz=None), f, rate)
    np.testing.assert_allclose(both, low + high, atol=1e-6)


def test_bad_rates_and_edges_are_refused():
    # the 20 kHz band does not fit below 44.1 kHz
    for rate in (32000.0, 22050.0, 0.0, -48000.0, float("nan"), "x"):
        with pytest.raises(ParameterError, match="rate_hz"):
            band_limit_filter(rate)
    with pytest.raises(ParameterError, match="upper_hz"):
        band_limit_filter(48000.0, upper_hz=40000.0)
    with pytest.raises(ParameterError, match="lower_hz"):
        band_limit_filter(48000.0, lower_hz=25000.0)
    with pytest.raises(ParameterError, match="stop_db"):
        band_limit_filter(48000.0, stop_db=40.0)
    with pytest.raises(ParameterError, match="rate_hz"):
        band_limit(np.zeros(10), rate_hz=32000.0)


def test_band_limit_blockwise_equals_one_shot(rng):
    x = rng.standard_normal((6000, 3))
    whole, _ = band_limit(x, rate_hz=48000.0)
    state = None
    parts = []
    for block in np.split(x, [17, 18, 2500, 5999]):
        y, state = band_limit(block, rate_hz=48000.0, state=state)
        parts.append(y)
    np.testing.assert_array_equal(np.concatenate(parts), whole)
    with pytest.raises(ParameterError, match="state"):
        band_limit(x, rate_hz=96000.0, state=state)


def test_band_limit_matches_scipy_sosfilt(rng):
    # the streaming wrapper is scipy.signal.sosfilt over axis 0 starting from rest
    x = rng.standard_normal(3000)
    y, _ = band_limit(x, rate_hz=88200.0, upper_hz=40000.0)
    ref = signal.sosfilt(band_limit_filter(88200.0, upper_hz=40000.0), x)
    np.testing.assert_array_equal(y, ref)


@pytest.mark.parametrize("rate", [48000.0, 96000.0, 192000.0])
def test_time_domain_and_spectral_band_power_agree_on_white_noise(rate, rng):
    # Parseval: for the same noise record, the power of the band-limited signal should equal
    # the periodogram summed through the mask. Using one record for both removes the random
    # error of the estimate, so the difference measures only the filter's departure from the
    # ideal band (ripple, transition band, high-pass skirt, start-up transient).
    n = 2**17
    x = rng.standard_normal(n)
    y, _ = band_limit(x, rate_hz=rate)
    skip = int(0.1 * rate)  # the 20 Hz high-pass settles in 0.1 s
    x, y = x[skip:], y[skip:]
    m = x.size
    spectrum = np.abs(np.fft.rfft(x)) ** 2 / m**2
    spectrum[1 : (m + 1) // 2] *= 2.0  # one-sided
    freqs = np.fft.rfftfreq(m, 1.0 / rate)
    p_time = np.mean(y**2)
    p_ideal = np.sum(spectrum * band_mask(freqs))
    p_exact = np.sum(spectrum * band_mask(freqs, rate_hz=rate))
    # stated tolerance (see band_mask Notes): ideal band within 0.1 dB; the filter's own power
    # response within 0.02 dB (only circular-vs-linear filtering edge effects remain)
    assert abs(10 * np.log10(p_time / p_ideal)) < 0.1
    assert abs(10 * np.log10(p_time / p_exact)) < 0.02
    # and both match white-noise theory, power x bandwidth / Nyquist, within the random error
    # of 2^17 samples (about 0.03 dB rms at 48 kHz; 0.15 dB is 5 sigma)
    expected = np.mean(x**2) * (20000.0 - 20.0) / (rate / 2)
    assert abs(10 * np.log10(p_ideal / expected)) < 0.15


def test_band_mask_ideal_edges_and_none():
    f = np.array([0.0, 19.9, 20.0, 1000.0, 20000.0, 20000.1, 30000.0])
    np.testing.assert_array_equal(band_mask(f), [0, 0, 1, 1, 1, 0, 0])
    np.testing.assert_array_equal(band_mask(f, lower_hz=None), [1, 1, 1, 1, 1, 0, 0])
    np.testing.assert_array_equal(band_mask(f, upper_hz=None, lower_hz=None), np.ones(7))
    np.testing.assert_array_equal(band_mask(f, upper_hz=40000.0), [0, 0, 1, 1, 1, 1, 1])
    with pytest.raises(ParameterError, match="freq_hz"):
        band_mask([-1.0])
    with pytest.raises(ParameterError, match="freq_hz"):
        band_mask([30000.0], rate_hz=48000.0)


def test_run_sos_gives_scipy_sosfilt_bit_for_bit(rng):
    # the reference is scipy.signal.sosfilt itself: run_sos runs the same recursion in a
    # compiled loop (audiodsm/measure/_sos_kernel.py) so that a render need not import
    # scipy.signal; every sample and every section delay must be the same number
    from audiodsm.measure.bands import SosState, run_sos
    from audiodsm.measure.weighting import weighting_filter

    sos = np.vstack([band_limit_filter(96000.0), weighting_filter("a", 96000.0)])
    for shape in [(5000,), (5000, 2), (5000, 3)]:
        x = rng.standard_normal(shape)
        zi = 0.1 * rng.standard_normal((sos.shape[0], 2) + shape[1:])
        want, want_zf = signal.sosfilt(sos, x, axis=0, zi=zi)
        state = SosState(tag=("t",), zi=zi)
        got, got_state = run_sos(x, sos, state=state, tag=("t",))
        np.testing.assert_array_equal(got, want)
        np.testing.assert_array_equal(got_state.zi, want_zf)
        # block by block equals one shot
        first, mid = run_sos(x[:1234], sos, state=state, tag=("t",))
        second, _ = run_sos(x[1234:], sos, state=mid, tag=("t",))
        np.testing.assert_array_equal(np.concatenate([first, second]), want)
