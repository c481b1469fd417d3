"""Tests of audiodsm.design.fixed_point: CSD form, word formats, coefficient quantization."""

from __future__ import annotations

import math

import numpy as np
import pytest

from audiodsm.design.fixed_point import (
    FixedPointFormat,
    NodeFormat,
    csd_digits,
    csd_nonzero_count,
    csd_value,
    round_to_csd,
)
from audiodsm.errors import ParameterError


def _min_signed_digit_weight(n: int) -> np.ndarray:
    """Fewest non-zero digits of ANY {-1, 0, 1} representation of 0 .. 2**n - 1 (brute force).

    Enumerates every signed-digit vector of n + 2 digits (3**(n+2) of them), so it knows
    nothing of the CSD rule it checks.
    """
    values = np.zeros(1, dtype=np.int64)
    weights = np.zeros(1, dtype=np.int64)
    for i in range(n + 2):  # append digit i in {-1, 0, +1} to every vector so far
        values = np.concatenate([values - (1 << i), values, values + (1 << i)])
        weights = np.concatenate([weights + 1, weights, weights + 1])
    best = np.full(2**n, 10**6, dtype=np.int64)
    keep = (values >= 0) & (values < 2**n)
    np.minimum.at(best, values[keep], weights[keep])
    return best


def test_csd_round_trips_and_has_no_adjacent_nonzero_digits():
    # Reitwiesner 1960: the canonic form has no two adjacent non-zero digits
    for v in range(-5000, 5001):
        d = csd_digits(v)
        assert csd_value(d) == v
        assert all(x in (-1, 0, 1) for x in d)
        assert all(not (d[i] and d[i + 1]) for i in range(len(d) - 1)), (v, d)
        assert not d or d[-1] != 0


@pytest.mark.parametrize("n", [4, 8, 12])
def test_csd_digit_count_is_minimal_brute_force(n):
    # Reitwiesner 1960: the canonic form has the fewest non-zero digits of all signed-digit
    # forms; checked here against exhaustive enumeration of all of them for n <= 12 bits
    best = _min_signed_digit_weight(n)
    ours = np.array([csd_nonzero_count(v) for v in range(2**n)])
    np.testing.assert_array_equal(ours, best)


def test_mean_digit_count_approaches_a_third_of_the_bits():
    # Known result (Reitwiesner 1960; the non-adjacent form's density is 1/3): the mean number
    # of non-zero CSD digits over all n-bit values grows as n/3. Brute-force means for n <= 12
    # (the minimum over all signed-digit forms, independent of our recoding) must agree with
    # ours, their growth per bit must approach 1/3 and their offset from n/3 stay bounded.
    means = {}
    for n in range(2, 13):
        brute = _min_signed_digit_weight(n).mean()
        ours = np.mean([csd_nonzero_count(v) for v in range(2**n)])
        assert ours == pytest.approx(brute, abs=1e-12)
        means[n] = ours
        assert abs(ours - n / 3) < 0.5
    growth = [means[n + 1] - means[n] for n in range(2, 12)]
    assert abs(growth[-1] - 1 / 3) < 1e-3
    assert abs(growth[-1] - 1 / 3) < abs(growth[0] - 1 / 3)
    # and the plain binary form, for contrast, averages n/2 non-zero digits
    assert np.mean([bin(v).count("1") for v in range(2**12)]) == pytest.approx(6.0)


def test_round_to_csd_without_limit_is_round_to_nearest():
    rng = np.random.default_rng(1)
    for x in rng.uniform(-3, 3, 200):
        c = round_to_csd(float(x), fraction_bits=12)
        assert abs(c / 4096 - x) <= 0.5 / 4096 + 1e-15


def test_round_to_csd_respects_the_digit_limit_and_improves_with_digits():
    rng = np.random.default_rng(2)
    xs = rng.uniform(-2, 2, 300)
    prev = None
    for digits in (1, 2, 3, 4, 6):
        errs = []
        for x in xs:
            c = round_to_csd(float(x), fraction_bits=16, max_digits=digits)
            assert csd_nonzero_count(c) <= digits
            errs.append(abs(c / 2**16 - x))
        err = float(np.mean(errs))
        if prev is not None:
            assert err < prev
        prev = err
    # one digit: the nearest power of two (in value) to x
    assert round_to_csd(0.7, fraction_bits=8, max_digits=1) in (128, 256)
    assert round_to_csd(0.74, fraction_bits=8, max_digits=1) == 128
    assert round_to_csd(0.76, fraction_bits=8, max_digits=1) == 256


def test_node_format_words_and_refusals():
    f = NodeFormat("state 2", 3, 20)
    assert f.word_bits == 24
    assert f.step == 2.0**-20
    assert f.largest == 8 - 2.0**-20
    with pytest.raises(ParameterError, match="state 2 rounding"):
        NodeFormat("state 2", 3, 20, rounding="nearest")
    with pytest.raises(ParameterError, match="state 2 overflow"):
        NodeFormat("state 2", 3, 20, overflow="clip")
    with pytest.raises(ParameterError, match="word_bits"):
        NodeFormat("state 2", 30, 30)
    fmt = FixedPointFormat.uniform(3)
    assert [s.name for s in fmt.states] == ["state 1", "state 2", "state 3"]
    assert fmt.with_state(1, fraction_bits=5).states[1].fraction_bits == 5
    assert math.isclose(fmt.input.step, 2.0**-23)
