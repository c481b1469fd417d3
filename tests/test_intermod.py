"""Tests for audiodsm.measure.intermod against outside sources named beside each check."""

import math

import pytest
from measure_helpers import RATE, _cos

from audiodsm.errors import ParameterError
from audiodsm.measure.intermod import imd_difference_frequency, imd_smpte

# --- intermodulation --------------------------------------------------------------------------


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


# --- errors -----------------------------------------------------------------------------------


def test_bad_inputs_raise_parameter_errors():
    x = _cos(997.0, 48000, 0.5)
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
