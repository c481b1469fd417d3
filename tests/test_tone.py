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


def test_sine_fit_thd_n_against_a_notch_reference_with_close_in_sidebands(rng):
    # A 997 Hz tone with sidebands 50 Hz either side (-50 dB each re the tone: a close-in
    # modulation), a 2nd harmonic at -70 dB and white noise. Reference: the classic analyzer
    # method (AES17's notch filter) built here from scipy.signal.iirnotch run forwards and
    # backwards (scipy.signal.filtfilt, |H|^2 overall, no phase), after the same AES17 band
    # limit, edges trimmed. With Q = 200 (5 Hz wide) the notch takes 0.02 dB off the sidebands
    # and 0.002 dB of the noise (scipy.signal.freqz), so the two readings agree to 0.05 dB. A
    # common wide notch (Q = 2) cuts the sidebands by what |H(997 +- 50 Hz)|^4 says, and the
    # notch reading falls by that; the sine fit, which removes only the fundamental, does not.
    from scipy import signal

    from audiodsm.measure.bands import band_limit_filter

    n = int(4 * RATE)
    t = np.arange(n) / RATE
    tone = 0.5 * np.cos(2 * np.pi * 997.0 * t + 0.3)
    side = 0.5 * 10 ** (-50 / 20)
    x = (
        tone
        + side * np.cos(2 * np.pi * 947.0 * t + 1.1)
        + side * np.cos(2 * np.pi * 1047.0 * t - 0.4)
        + 0.5 * 10 ** (-70 / 20) * np.cos(2 * np.pi * 1994.0 * t)
        + 1e-5 * rng.standard_normal(n)
    )
    fit = thd_plus_noise(x, rate_hz=RATE)
    banded = signal.sosfilt(band_limit_filter(RATE), x)
    keep = slice(int(0.5 * RATE), n - int(0.5 * RATE))

    def notch_thd_n_db(q):
        b, a = signal.iirnotch(997.0, q, fs=RATE)
        residual = signal.filtfilt(b, a, banded)
        return 10 * np.log10(np.mean(residual[keep] ** 2) / np.mean(banded[keep] ** 2))

    assert fit.ratio_db == pytest.approx(notch_thd_n_db(200.0), abs=0.05)
    # the sidebands dominate the residual: about -47 dB (two at -50 dB), a little noise on top
    assert -47.0 < fit.ratio_db < -46.5
    # the wide notch: expected reading from the known power of each component (through the
    # band filter, scipy.signal.sosfreqz) and the notch's loss on it
    b, a = signal.iirnotch(997.0, 2.0, fs=RATE)
    band = band_limit_filter(RATE)
    lines = [947.0, 1047.0, 1994.0]
    _, h = signal.freqz(b, a, worN=lines, fs=RATE)
    _, hb_lines = signal.sosfreqz(band, worN=lines, fs=RATE)
    parts = np.array([side**2 / 2, side**2 / 2, (0.5 * 10 ** (-70 / 20)) ** 2 / 2])
    parts = parts * np.abs(hb_lines) ** 2
    f = np.linspace(0, RATE / 2, 100_001)
    _, hn = signal.freqz(b, a, worN=f, fs=RATE)
    _, hb = signal.sosfreqz(band, worN=f, fs=RATE)
    # white noise of variance 1e-10: its band-limited, notched power (2/rate) integral
    noise_notched = 1e-10 * np.trapezoid(np.abs(hn) ** 4 * np.abs(hb) ** 2, f) / (RATE / 2)
    expected_wide = 10 * np.log10(
        (np.sum(parts * np.abs(h) ** 4) + noise_notched) / np.mean(banded[keep] ** 2)
    )
    assert notch_thd_n_db(2.0) == pytest.approx(expected_wide, abs=0.05)
    assert notch_thd_n_db(2.0) < fit.ratio_db - 3.0
