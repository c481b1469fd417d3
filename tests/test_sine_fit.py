"""Tests for audiodsm.measure.sine_fit against outside sources named beside each check."""

import math

import numpy as np
import pytest
from measure_helpers import RATE, _cos

from audiodsm.errors import ParameterError
from audiodsm.measure import sine_fit
from audiodsm.measure.sine_fit import fit_sine

# --- sine fit (IEEE Std 1057) -----------------------------------------------------------------


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
        est = sine_fit.interpolated_peak_hz(_cos(f, n, 0.5, 0.3), rate_hz=RATE)
        assert abs(est - f) < 0.01 * RATE / n


# --- errors -----------------------------------------------------------------------------------


def test_bad_inputs_raise_parameter_errors():
    x = _cos(997.0, 48000, 0.5)
    with pytest.raises(ParameterError, match="frequency_hz="):
        fit_sine(x, rate_hz=RATE, frequency_hz=30000.0)
    with pytest.raises(ParameterError, match="x="):
        fit_sine(x[:5], rate_hz=RATE)


def test_remembered_fit_columns_are_the_fresh_ones():
    # Short column pairs are remembered per process (the battery fits the same tone on many
    # captures of one length): the same bits as computed afresh, read-only, and the textbook
    # cos/sin of 2 pi f n / rate (to 1e-12: the phase is reduced to whole cycles first)
    from audiodsm.measure.noise import _harmonic_columns, _harmonic_pair
    from audiodsm.measure.sine_fit import _columns, _phase_columns

    c, s = _phase_columns(0, 19200, 997.0, 48000.0)
    again = _phase_columns(0, 19200, 997.0, 48000.0)
    assert again[0] is c and again[1] is s
    assert not c.flags.writeable and not s.flags.writeable
    fresh = _columns(0, 19200, 997.0, 48000.0)
    np.testing.assert_array_equal(c, fresh[0])
    np.testing.assert_array_equal(s, fresh[1])
    n = np.arange(19200)
    np.testing.assert_allclose(c, np.cos(2 * np.pi * 997.0 * n / 48000.0), atol=1e-12)
    h = _harmonic_columns(2991.0, 48000.0, 19200)
    assert _harmonic_columns(2991.0, 48000.0, 19200)[0] is h[0] and not h[0].flags.writeable
    for a, b in zip(h, _harmonic_pair(2991.0, 48000.0, 19200), strict=True):
        np.testing.assert_array_equal(a, b)
