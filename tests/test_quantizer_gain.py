"""The quantizer's effective gain (design/quantizer_gain.py) against closed-form results."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.design.quantizer_gain import (
    effective_ntf,
    least_squares_gain,
    single_bit_describing_gain,
)
from audiodsm.errors import ParameterError
from audiodsm.stages.modulator import Modulator


@pytest.mark.parametrize("gain", [0.7, 1.0, 1.6, 2.2])
def test_effective_ntf_is_the_closed_loop_formula(gain):
    # Schreier & Temes 2005, ch. 2: with the loop filter L1 = 1 - 1/NTF and the quantizer as
    # y = k v + e, the noise transfer is 1 / (1 - k L1); evaluated here directly from the
    # NTF's response, pointwise, against the zero/pole form the library builds.
    ntf = NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.5)
    f = np.linspace(0.0, 0.5, 301)
    h = ntf.response(f)
    loop_filter = 1.0 - 1.0 / np.where(h == 0, 1e-300, h)
    expected = 1.0 / (1.0 - gain * loop_filter)
    got = effective_ntf(ntf, gain).response(f)
    assert np.allclose(got, expected, rtol=1e-8, atol=1e-12)
    # in the band, where |NTF| is small, NTF_k ~ NTF / k
    band = f[f < 0.5 / 64]
    ratio = np.abs(effective_ntf(ntf, gain).response(band)) * gain
    assert np.allclose(ratio, np.abs(ntf.response(band)), rtol=2e-3, atol=1e-12)


def test_effective_ntf_refuses_a_gain_that_makes_the_loop_unstable():
    ntf = NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.5)
    with pytest.raises(ParameterError, match="stable"):
        effective_ntf(ntf, 10.0)
    with pytest.raises(ParameterError):
        effective_ntf(ntf, -1.0)


@pytest.mark.parametrize(("order", "layout"), [(2, "dc"), (4, "spread"), (5, "spread")])
def test_describing_gain_closes_the_loop_power(order, layout):
    # Ardalan & Paulos 1987: a sign quantizer with a Gaussian input of rms s has the gain
    # k = sqrt(2/pi) / s (Bussgang 1952: E[sign(v) v] = E|v| = s sqrt(2/pi)), and the loop sets
    # s^2 = ||NTF_k - 1||^2 (1 - 2/pi) / k^2. Here ||.||^2 is taken independently of the
    # library's impulse response, by Parseval: 2 * integral_0^0.5 |NTF_k(f) - 1|^2 df
    # (scipy.integrate.quad).
    ntf = NoiseTransfer.designed(order, osr=64, out_of_band_gain=1.5, zero_layout=layout)
    found = single_bit_describing_gain(ntf)
    assert found.error_power == pytest.approx(1.0 - 2.0 / np.pi)
    shaped = effective_ntf(ntf, found.gain)
    energy = (
        2.0
        * integrate.quad(
            lambda f: abs(shaped.response(np.array([f]))[0] - 1.0) ** 2, 0.0, 0.5, limit=400
        )[0]
    )
    s = np.sqrt(energy * found.error_power) / found.gain
    assert found.gain * s == pytest.approx(np.sqrt(2.0 / np.pi), rel=1e-6)
    # the stable root: a gain a little higher would need a larger input than it gets
    assert 1.3 < found.gain < 2.0


def test_least_squares_gain_of_a_sign_quantizer_on_gaussian_noise():
    # Bussgang 1952: for Gaussian v of rms s, E[sign(v) v] = s sqrt(2/pi), so the
    # least-squares gain is sqrt(2/pi) / s and the error left is 1 - 2/pi (unit output power).
    rng = np.random.default_rng(5)
    s = 0.37
    v = s * rng.standard_normal(1 << 20)
    found = least_squares_gain(v, np.sign(v))
    # 2^20 samples: the standard error of both estimates is about 1e-3 relative
    assert found.gain == pytest.approx(np.sqrt(2.0 / np.pi) / s, rel=5e-3)
    assert found.error_power == pytest.approx(1.0 - 2.0 / np.pi, rel=5e-3)
    # a linear stage plus independent noise: the gain and the noise power come back
    e = 0.1 * rng.standard_normal(v.size)
    linear = least_squares_gain(v, 2.5 * v + e)
    assert linear.gain == pytest.approx(2.5, rel=2e-3)
    assert linear.error_power == pytest.approx(0.01, rel=1e-2)
    with pytest.raises(ParameterError):
        least_squares_gain(v, v[:-1])
    with pytest.raises(ParameterError):
        least_squares_gain(np.zeros(4), np.ones(4))


@pytest.mark.parametrize("structure", ["feedback", "feedforward", "error-feedback"])
def test_traced_quantizer_input_gives_the_output(structure):
    # The quantizer's input the modulator reports is what its quantizer decided on: a sign
    # quantizer's output has its sign, a 17-level quantizer's output is it rounded to the
    # nearest of the levels -1 + k/8 (clipped to +-1), on every sample.
    ntf = NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.5)
    u = 0.01 * np.sin(2 * np.pi * 0.001 * np.arange(1 << 14))
    y, v = Modulator(ntf, structure=structure, levels=2).trace_quantizer_input(u)
    nonzero = v != 0
    assert nonzero.sum() >= len(v) - 1
    assert np.array_equal(np.sign(v[nonzero]), y[nonzero])
    y17, v17 = Modulator(ntf, structure=structure, levels=17).trace_quantizer_input(u)
    step = 2.0 / 16
    assert np.array_equal(y17, np.clip(np.round((v17 + 1.0) / step) * step - 1.0, -1.0, 1.0))


def test_traced_quantizer_input_of_a_scaled_loop_is_the_unscaled_one():
    # Scaling the quantizer-facing state changes what the kernel holds, not the loop: the
    # reported input (the linearized loop's) is the same as the unscaled loop's, so the
    # fitted gain is too.
    ntf = NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.5)
    plain = Modulator(ntf, levels=2)
    scaled, _ = plain.with_scaled_states(osr=64, run_samples=1 << 15)
    u = 0.01 * np.sin(2 * np.pi * 0.001 * np.arange(1 << 14))
    y1, v1 = plain.trace_quantizer_input(u)
    y2, v2 = scaled.trace_quantizer_input(u)
    assert np.array_equal(y1, y2)
    assert np.allclose(v1, v2, rtol=0.0, atol=1e-9)  # rounding of the scaled arithmetic
