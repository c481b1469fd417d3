"""Tests for audiodsm.measure.tone against outside sources named beside each check."""

import math

import numpy as np
import pytest
from measure_helpers import RATE, _cos

from audiodsm.errors import ParameterError
from audiodsm.measure.tone import enob_bits, sinad_db, thd, thd_plus_noise

# --- THD+N ------------------------------------------------------------------------------------


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


# --- THD, SINAD, ENOB -------------------------------------------------------------------------


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


# --- errors -----------------------------------------------------------------------------------


def test_bad_inputs_raise_parameter_errors():
    x = _cos(997.0, 48000, 0.5)
    with pytest.raises(ParameterError, match="weighting="):
        thd_plus_noise(x, rate_hz=RATE, weighting="b")
    with pytest.raises(ParameterError, match="x="):
        thd_plus_noise(x[:1000], rate_hz=RATE, frequency_hz=997.0)  # all within settling
    with pytest.raises(ParameterError, match="silent"):
        thd_plus_noise(np.zeros(48000), rate_hz=RATE)
    with pytest.raises(ParameterError, match="harmonics="):
        thd(x, rate_hz=RATE, harmonics=[1, 2])
