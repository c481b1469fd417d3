"""Tests for audiodsm.measure.residual against outside sources named beside each check."""

import pytest
from measure_helpers import LSB16, RATE, _band_power_gain, _cos, _tpdf_quantize

from audiodsm.errors import ParameterError
from audiodsm.measure.residual import (
    read_residual_meter,
    start_residual_meter,
    update_residual_meter,
)
from audiodsm.measure.sine_fit import fit_sine
from audiodsm.measure.spectrum import power_to_dbfs
from audiodsm.measure.tone import thd_plus_noise

# --- residual meter ---------------------------------------------------------------------------


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


# --- errors -----------------------------------------------------------------------------------


def test_bad_inputs_raise_parameter_errors():
    x = _cos(997.0, 48000, 0.5)
    with pytest.raises(ParameterError, match="state="):
        update_residual_meter(x, None)
