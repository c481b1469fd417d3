"""Tests of audiodsm.design.ntf: NTF design, checking and evaluation.

Outside sources used below:
- R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", IEEE Press /
  Wiley, 2005 ("S&T"): ch. 2 (in-band noise and peak SQNR of (1 - z^-1)^L), ch. 4 (table of
  optimal zero positions and SQNR improvements).
- M. Abramowitz and I. A. Stegun, "Handbook of Mathematical Functions", 1964 ("A&S"):
  22.2.10 (norm of P_n on [-1, 1]) and 22.3.8 (leading coefficient of P_n).
- scipy.signal (butter, freqz), scipy.integrate.quad, scipy.optimize.minimize,
  numpy.polynomial.legendre.
"""

import json
import math
from dataclasses import FrozenInstanceError

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.polynomial import Polynomial, legendre
from scipy import integrate, optimize, signal

import audiodsm
from audiodsm.design.ntf import (
    NoiseTransfer,
    _butterworth_highpass_poles,
)
from audiodsm.errors import ParameterError

# S&T 2005, ch. 4, table of optimal NTF zeros (normalized to the band edge, +- pairs shown by
# their positive member) and the SQNR improvement over all zeros at DC, in dB.
# Transcribed FROM MEMORY (the book was not at hand): positions to 3 decimals, improvements
# to whole dB except order 2 (3.5 dB). Every row is cross-checked below by computation.
SNT_OPTIMAL_ZEROS = {
    1: ([0.0], 0.0),
    2: ([0.577], 3.5),
    3: ([0.0, 0.775], 8.0),
    4: ([0.340, 0.861], 13.0),
    5: ([0.0, 0.538, 0.906], 18.0),
    6: ([0.239, 0.661, 0.932], 23.0),
    7: ([0.0, 0.406, 0.742, 0.949], 28.0),
    8: ([0.183, 0.526, 0.797, 0.960], 34.0),
}
# Half a unit in the last transcribed decimal of the positions.
TABLE_POS_TOL = 5e-4
# The improvements are printed to whole dB (order 2: to 0.5 dB). The remembered entries are
# not all rounded the same way (order 7: 28 for 28.57, order 3: 8 for 7.96), so the table is
# checked as a rounded value: the computed improvement lies within one printed step of the
# entry, on either side (|computed - entry| < step). A wrong row (off by a step) fails.
TABLE_DB_STEP = {2: 0.5}


def _band_integral(positions):
    """integral_0^1 prod_i (x^2 - x_i^2)^2 dx for +-x_i pairs (one x for 0 at DC).

    The small-angle form of the in-band noise power of an NTF with zeros at +-x_i (S&T ch. 4),
    computed exactly by polynomial integration.
    """
    p = Polynomial([1.0])
    for x in positions:
        p = p * (Polynomial([0.0, 1.0]) if x == 0 else Polynomial([-(x**2), 0.0, 1.0]))
    return _square_integral(p)


def _square_integral(p):
    """integral_0^1 p(x)^2 dx, exactly by polynomial integration."""
    sq = (p * p).integ()
    return sq(1.0) - sq(0.0)


def _legendre_improvement_db(order):
    """SQNR gain of the Legendre zeros over zeros at DC, from A&S 22.2.10 and 22.3.8.

    Zeros at DC: integral_{-1}^{1} x^(2n) dx = 2/(2n+1). Legendre zeros: the monic Legendre
    polynomial P_n / k_n with k_n = (2n)! / (2^n (n!)^2) (A&S 22.3.8) has squared norm
    2 / ((2n+1) k_n^2) (A&S 22.2.10). The ratio is k_n^2.
    """
    k_n = math.factorial(2 * order) / (2**order * math.factorial(order) ** 2)
    return 10 * math.log10(k_n**2)


# --------------------------------------------------------------------------------------------
# optimal zero positions


@pytest.mark.parametrize("order", range(1, 9))
def test_spread_zeros_match_published_table_and_legendre_roots(order):
    positions, improvement_db = SNT_OPTIMAL_ZEROS[order]
    got = NoiseTransfer.spread_zero_fractions(order)
    # S&T ch. 4 table (from memory), 3 decimals.
    np.testing.assert_allclose(got, positions, atol=TABLE_POS_TOL)
    # numpy.polynomial.legendre roots of P_order: the non-negative ones, to rounding.
    roots = legendre.legroots([0] * order + [1])
    np.testing.assert_allclose(got, np.sort(roots[roots > -1e-12]), atol=1e-12)
    # The table's improvement vs the integral of prod(x^2 - x_i^2)^2 over the band, for both
    # placements: zeros at DC give integral_0^1 x^(2n) dx.
    dc = _square_integral(Polynomial.basis(order))
    opt = _band_integral(got)
    computed_db = 10 * math.log10(dc / opt)
    assert dc == pytest.approx(1.0 / (2 * order + 1), rel=1e-12)
    # The book table (S&T ch. 4, from memory) as a rounded value: order 7 computes to 28.57 dB
    # against the remembered 28 (the book rounds down there, or memory is off by the rounding);
    # the tight check is the closed form below and test_order_7_improvement_closed_form.
    step = TABLE_DB_STEP.get(order, 1.0)
    assert abs(computed_db - improvement_db) < step
    # ... and vs the closed form from A&S 22.2.10 / 22.3.8 (exact up to rounding).
    assert computed_db == pytest.approx(_legendre_improvement_db(order), abs=1e-9)


def test_order_7_improvement_closed_form():
    # A&S 22.3.8: k_7 = 14! / (2^7 (7!)^2) = 3432 / 128 = 26.8125 exactly; the improvement of
    # the Legendre zeros over zeros at DC is 20 log10(k_7) = 28.5667 dB (A&S 22.2.10).
    assert math.factorial(14) / (2**7 * math.factorial(7) ** 2) == 26.8125
    assert _legendre_improvement_db(7) == pytest.approx(20 * math.log10(26.8125), abs=1e-12)
    assert _legendre_improvement_db(7) == pytest.approx(28.5667, abs=1e-4)
    # Numerically on the true (not small-angle) in-band power of two FIR NTFs (all poles at
    # z = 0, zeros on the unit circle at +-pi x_i / OSR), by scipy.integrate.quad of
    # |N(e^jw)|^2 over 0..pi/OSR: Legendre-root zeros vs seven zeros at DC. At OSR 1024 the
    # small-angle error is ~ order (pi/OSR)^2 relative, about 3e-5 dB: 1e-3 dB.
    osr = 1024
    xs = legendre.legroots([0] * 7 + [1])
    edge = np.pi / osr

    def band_power(fractions):
        z = np.exp(1j * edge * np.asarray(fractions))

        def power(w):
            return float(np.prod(np.abs(np.exp(1j * w) - z)) ** 2)

        pts = [edge * x for x in fractions if 0 < x < 1]
        return integrate.quad(power, 0, edge, points=pts or None, epsabs=0, epsrel=1e-12)[0]

    ratio_db = 10 * math.log10(band_power([0.0] * 7) / band_power(xs))
    assert ratio_db == pytest.approx(28.5667, abs=1e-3)
    # ... and the library's own quadrature on the same FIR NTFs, from_roots with poles at 0.
    spread = NoiseTransfer.from_roots(zeros=np.exp(1j * edge * xs), poles=np.zeros(7))
    at_dc = NoiseTransfer.from_roots(zeros=np.ones(7), poles=np.zeros(7))
    lib_db = 10 * math.log10(at_dc.in_band_noise_fraction(osr) / spread.in_band_noise_fraction(osr))
    assert lib_db == pytest.approx(ratio_db, abs=1e-6)


@pytest.mark.parametrize("order", [2, 3, 4, 5])
def test_spread_zeros_minimize_band_integral(order):
    # Independent check of optimality: scipy.optimize.minimize of the band integral over the
    # free positions (one at DC for odd orders, as S&T ch. 4 prescribe) from an even spread.
    n_free = order // 2
    fixed = [0.0] * (order % 2)
    start = np.linspace(0.2, 0.8, n_free)
    res = optimize.minimize(
        lambda x: _band_integral(fixed + list(x)),
        start,
        method="Nelder-Mead",
        options={"xatol": 1e-10, "fatol": 1e-16, "maxiter": 20000},
    )
    got = NoiseTransfer.spread_zero_fractions(order)
    # Nelder-Mead converges to ~1e-6 in position on this smooth, flat-bottomed objective.
    np.testing.assert_allclose(np.sort(res.x), got[order % 2 :], atol=1e-5)


# --------------------------------------------------------------------------------------------
# in-band noise gain and predicted SQNR against S&T ch. 2


def _exact_band_integral_of_difference_power(order, w_band):
    """integral_0^{w_band} |1 - e^{-jw}|^(2L) dw = integral (2 sin(w/2))^(2L) dw by Taylor series.

    2 sin(w/2) = sum_k (-1)^k 2 (w/2)^(2k+1) / (2k+1)!; raise to the power 2L as a polynomial,
    integrate term by term. With w_band <= pi/16 the terms kept (degree < 60) leave a remainder
    far below 1e-16 relative.
    """
    coef = np.zeros(24)
    for k in range(11):
        coef[2 * k + 1] = (-1) ** k * 2 * 0.5 ** (2 * k + 1) / math.factorial(2 * k + 1)
    s = Polynomial(coef)
    p = Polynomial([1.0])
    for _ in range(2 * order):
        p = (p * s).cutdeg(60)
    ip = p.integ()
    return ip(w_band) - ip(0.0)


def _difference_ntf(order):
    """NTF = (1 - z^-1)^L: L zeros at z = 1, L poles at z = 0."""
    return NoiseTransfer.from_roots(zeros=np.ones(order), poles=np.zeros(order))


@pytest.mark.parametrize("order", [1, 2, 3, 4])
@pytest.mark.parametrize("osr", [64, 128])
def test_in_band_noise_of_difference_ntf_matches_textbook(order, osr):
    ntf = _difference_ntf(order)
    got = ntf.in_band_noise_fraction(osr)
    w_b = math.pi / osr
    # S&T 2005 ch. 2: in-band noise / (Delta^2/12) = pi^(2L) / ((2L+1) OSR^(2L+1)), from the
    # small-angle approximation |1 - e^{-jw}| ~ w. Its first neglected term: (2 sin(w/2))^(2L)
    # = w^(2L) (1 - L w^2/12 + O(w^4)), so the exact value is smaller by the relative amount
    # L (2L+1) w_b^2 / (12 (2L+3)) (~1e-3 at L = 4, OSR 64), up to O(w_b^4).
    textbook = math.pi ** (2 * order) / ((2 * order + 1) * osr ** (2 * order + 1))
    first_term = order * (2 * order + 1) * w_b**2 / (12 * (2 * order + 3))
    assert got == pytest.approx(textbook, rel=1.1 * first_term)
    # The shortfall itself matches the first neglected term to within O(w_b^2) of it (2 %).
    assert (textbook - got) / textbook == pytest.approx(first_term, rel=0.02)
    # Exact value by Taylor series (analytic, not quadrature): the quadrature is exact to
    # rounding here, so 1e-11 relative.
    exact = _exact_band_integral_of_difference_power(order, w_b) / math.pi
    assert got == pytest.approx(exact, rel=1e-11)


@pytest.mark.parametrize("order,osr,gain", [(5, 64, 1.5), (8, 32, 3.0), (3, 128, 2.0)])
def test_in_band_noise_fraction_matches_scipy_quad(order, osr, gain):
    ntf = NoiseTransfer.designed(order, osr=osr, out_of_band_gain=gain)
    w_b = math.pi / osr
    zero_w = [abs(np.angle(z)) for z in ntf.zeros if 0 < abs(np.angle(z)) < w_b]

    def power(w):
        return abs(ntf.response(w / (2 * math.pi))) ** 2

    # scipy.integrate.quad (adaptive Gauss-Kronrod) with the zeros as break points; its own
    # error estimate is far below the 1e-9 relative asked here.
    ref, _ = integrate.quad(power, 0.0, w_b, points=zero_w, epsabs=0.0, epsrel=1e-12, limit=200)
    assert ntf.in_band_noise_fraction(osr) == pytest.approx(ref / math.pi, rel=1e-9)


def test_in_band_noise_fraction_with_in_band_resonance_matches_scipy_quad():
    # A user NTF with a pole pair at radius 0.999 inside the band of OSR 8 (a sharp peak at
    # 0.02 cycles/sample): scipy.integrate.quad with the resonance as a break point.
    p = 0.999 * np.exp(2j * np.pi * 0.02)
    ntf = NoiseTransfer.from_roots(zeros=[1, 1, 1], poles=[p, np.conj(p), 0.3])
    w_p = 2 * np.pi * 0.02
    ref, _ = integrate.quad(
        lambda w: abs(ntf.response(w / (2 * math.pi))) ** 2,
        0.0,
        math.pi / 8,
        points=[w_p],
        epsabs=0.0,
        epsrel=1e-12,
        limit=400,
    )
    assert ntf.in_band_noise_fraction(8) == pytest.approx(ref / math.pi, rel=1e-9)


@pytest.mark.parametrize("order", [1, 2, 3, 4])
@pytest.mark.parametrize("levels", [2, 17])
def test_linear_sqnr_matches_peak_sqnr_formula(order, levels):
    osr = 128
    m = levels - 1
    # S&T 2005 ch. 2 / REFERENCES.md: peak SQNR = 10log10(1.5 M^2) - 10log10(pi^(2L)/(2L+1))
    # + (2L+1) 10log10(OSR), M = levels - 1 (1.76 dB for single bit). The formula uses the
    # small-angle noise; the exact integral is lower by the relative amount d of the test
    # above, which raises the SQNR by -10log10(1 - d) dB (< 0.002 dB here); 1.2x that bound.
    formula = (
        10 * math.log10(1.5 * m**2)
        - 10 * math.log10(math.pi ** (2 * order) / (2 * order + 1))
        + (2 * order + 1) * 10 * math.log10(osr)
    )
    w_b = math.pi / osr
    d = order * (2 * order + 1) * w_b**2 / (12 * (2 * order + 3))
    got = _difference_ntf(order).linear_sqnr_db(levels=levels, osr=osr)
    assert got - formula == pytest.approx(-10 * math.log10(1 - d), abs=0.2 * d * 4.343 + 1e-9)


@pytest.mark.parametrize("order", [1, 3, 5, 8])
def test_full_band_noise_gain_is_impulse_energy(order):
    # Parseval's theorem: (1/pi) integral_0^pi |H|^2 dw = sum_n h[n]^2, with h the impulse
    # response from scipy.signal.lfilter. Poles have radius < 0.95, so 20000 samples leave a
    # tail below 1e-300; the direct-form recursion of an order-8 polynomial rounds to ~2e-11
    # relative here, hence 1e-9.
    ntf = NoiseTransfer.designed(order, osr=32, out_of_band_gain=2.0)
    b, a = ntf.polynomials()
    impulse = np.zeros(20000)
    impulse[0] = 1.0
    h = signal.lfilter(b, a, impulse)
    assert ntf.in_band_noise_fraction(1) == pytest.approx(np.sum(h**2), rel=1e-9)


@pytest.mark.parametrize(
    "make,expected",
    [
        (lambda: NoiseTransfer.designed(5, osr=32, out_of_band_gain=2.0), lambda n: 0.0),
        (lambda: NoiseTransfer.designed(8, osr=64), lambda n: 0.0),
        # zeros outside the unit circle count: 2 ln 1.2 for the pair at radius 1.2
        (
            lambda: NoiseTransfer.from_roots(
                zeros=[1.2j, -1.2j, 1.0], poles=[0.5, 0.2 + 0.3j, 0.2 - 0.3j]
            ),
            lambda n: 2 * math.log(1.2),
        ),
    ],
)
def test_log_response_integral_follows_jensens_formula(make, expected):
    # Jensen's formula (W. Rudin, "Real and Complex Analysis", 3rd ed., 1987, thm 15.18, from
    # memory) for H = prod(z - z_i)/prod(z - p_i) with H(inf) = 1 and poles inside the circle:
    # (1/pi) integral_0^pi ln|H(e^jw)| dw = sum over zeros outside the circle of ln|z_i|.
    # (The noise-shaping "no free lunch": shaping only moves noise around in log terms.)
    ntf = make()
    breaks = sorted({abs(np.angle(z)) for z in ntf.zeros if 0 < abs(np.angle(z)) < np.pi})
    value, _ = integrate.quad(
        lambda w: math.log(abs(ntf.response(w / (2 * math.pi)))),
        0.0,
        math.pi,
        points=breaks or None,
        limit=400,
        epsabs=1e-12,
    )
    # quad's own error estimate is ~1e-14 for these integrable log singularities; 1e-9 leaves
    # room for it.
    assert value / math.pi == pytest.approx(expected(ntf), abs=1e-9)


def test_linear_sqnr_scales_with_level_and_levels():
    ntf = NoiseTransfer.designed(4, osr=64)
    base = ntf.linear_sqnr_db(levels=2, osr=64)
    # Signal power A^2/2: -20 dBFS lowers it by exactly 20 dB (definition of dBFS, AES17).
    assert ntf.linear_sqnr_db(levels=2, osr=64, level_dbfs=-20.0) == pytest.approx(
        base - 20, abs=1e-9
    )
    # Step Delta = 2/(levels-1): 3 levels halve the step, noise power / 4 -> +6.02 dB.
    assert ntf.linear_sqnr_db(levels=3, osr=64) == pytest.approx(
        base + 20 * math.log10(2), abs=1e-9
    )


def test_linear_sqnr_counts_the_dither_power():
    # Lipshitz, Wannamaker & Vanderkooy, JAES 40(5) 1992: TPDF dither of 2 LSB peak-to-peak
    # (peak 1 LSB) has power Delta^2/6; added to the quantizer's Delta^2/12 the error power
    # triples, so a 17-level loop with it is predicted 10 log10(3) = 4.771 dB worse. A peak of
    # D LSB has power (D Delta)^2/6: half an LSB adds Delta^2/24, 10 log10(1.5) = 1.761 dB.
    ntf = NoiseTransfer.designed(4, osr=64, out_of_band_gain=2.0)
    plain = ntf.linear_sqnr_db(levels=17, osr=64)
    dithered = ntf.linear_sqnr_db(levels=17, osr=64, dither_lsb=1.0)
    assert plain - dithered == pytest.approx(10 * math.log10(3.0), abs=1e-9)
    assert plain - dithered == pytest.approx(4.8, abs=0.05)  # the rounded figure
    half = ntf.linear_sqnr_db(levels=17, osr=64, dither_lsb=0.5)
    assert plain - half == pytest.approx(10 * math.log10(1.5), abs=1e-9)
    with pytest.raises(ParameterError, match="dither_lsb"):
        ntf.linear_sqnr_db(levels=17, osr=64, dither_lsb=-1.0)


# --------------------------------------------------------------------------------------------
# NoiseTransfer.designed


def test_butterworth_pole_family_matches_scipy_butter():
    # scipy.signal.butter (bilinear, pre-warped) high-pass poles at the same cutoff.
    for order in range(1, 9):
        for wn in (0.01, 0.2, 0.7):
            _, p_ref, _ = signal.butter(order, wn, btype="high", output="zpk")
            got = _butterworth_highpass_poles(order, math.tan(math.pi * wn / 2))
            np.testing.assert_allclose(np.sort_complex(got), np.sort_complex(p_ref), atol=1e-13)


GAIN_GRID = [(o, r, g) for o in range(1, 9) for r in (32, 64, 128) for g in (1.5, 2.0, 3.0)]


@pytest.mark.parametrize("order,osr,gain", GAIN_GRID)
def test_designed_out_of_band_gain_equals_the_target(order, osr, gain):
    ntf = NoiseTransfer.designed(order, osr=osr, out_of_band_gain=gain)
    assert ntf.out_of_band_gain() == pytest.approx(gain, abs=1e-6)
    # Independent check with scipy.signal.freqz of the polynomials on 2^15 + 1 points: the
    # grid maximum cannot exceed the true peak and lies close below it.
    b, a = ntf.polynomials()
    _, h = signal.freqz(b, a, worN=np.linspace(0, np.pi, 2**15 + 1))
    assert np.max(np.abs(h)) <= gain + 1e-9
    assert np.max(np.abs(h)) == pytest.approx(gain, rel=1e-3)
    # Stable, causal with NTF(inf) = 1 (monic numerator and denominator), real coefficients.
    assert np.all(np.abs(ntf.poles) < 1)
    assert b[0] == pytest.approx(1.0) and a[0] == pytest.approx(1.0)
    assert len(b) == len(a) == order + 1
    z_big = 1e7
    assert ntf.gain * np.prod(z_big - ntf.zeros) / np.prod(z_big - ntf.poles) == pytest.approx(1.0)
    # Zeros on the unit circle at the Legendre positions scaled to the band edge.
    np.testing.assert_allclose(np.abs(ntf.zeros), 1.0, atol=1e-15)
    np.testing.assert_allclose(
        ntf.notch_frequencies(osr=osr), SNT_OPTIMAL_ZEROS[order][0], atol=TABLE_POS_TOL
    )
    assert (ntf.osr, ntf.out_of_band_gain_target, ntf.zero_layout) == (osr, gain, "spread")


@pytest.mark.parametrize("order", range(1, 9))
def test_design_with_zeros_at_dc(order):
    ntf = NoiseTransfer.designed(order, osr=64, zero_layout="dc")
    np.testing.assert_array_equal(ntf.zeros, np.ones(order))
    assert ntf.out_of_band_gain() == pytest.approx(1.5, abs=1e-6)
    assert ntf.zero_layout == "dc"


def test_first_order_design_matches_analytic_pole():
    # First principles: NTF = (z - 1)/(z - p) peaks at z = -1 with |H| = 2/(1 + p), so the
    # design for max gain g has p = 2/g - 1.
    for g in (1.2, 1.5, 3.0):
        ntf = NoiseTransfer.designed(1, osr=64, out_of_band_gain=g)
        assert ntf.poles[0].real == pytest.approx(2 / g - 1, abs=1e-9)
        assert ntf.largest_gain() == pytest.approx((g, 0.5), abs=1e-9)


@pytest.mark.parametrize("order", range(1, 9))
def test_designed_improvement_matches_closed_form(order):
    osr = 128
    dc = NoiseTransfer.designed(order, osr=osr, zero_layout="dc")
    opt = NoiseTransfer.designed(order, osr=osr)
    got_db = 10 * math.log10(dc.in_band_noise_fraction(osr) / opt.in_band_noise_fraction(osr))
    # The table entry itself is checked against the polynomial integrals above; here the
    # designs: the two designs have different poles; in band |NTF| ~ |N(e^jw)| / |A(1)|, so the
    # improvement is the A&S closed form plus 20log10(|A_opt(1)| / |A_dc(1)|). What is left is
    # the small-angle error (~order * (pi/OSR)^2 relative, < 0.01 dB at OSR 128): 0.02 dB.
    pole_term = 20 * math.log10(abs(opt.polynomials()[1].sum() / dc.polynomials()[1].sum()))
    assert got_db == pytest.approx(_legendre_improvement_db(order) + pole_term, abs=0.02)


def test_response_matches_scipy_freqz():
    freq = np.linspace(0, 0.5, 1001)
    eps = np.finfo(float).eps
    for order in range(1, 9):
        ntf = NoiseTransfer.designed(order, osr=32, out_of_band_gain=2.0)
        b, a = ntf.polynomials()
        # scipy.signal.freqz evaluates b(e^-jw)/a(e^-jw); equal-length b and a in powers of z
        # give the same ratio.
        _, h = signal.freqz(b, a, worN=2 * np.pi * freq)
        r = ntf.response(freq)
        if order <= 5:
            np.testing.assert_allclose(r, h, rtol=0, atol=1e-12)
        # Evaluating expanded polynomials loses accuracy where |A| is small (in band, high
        # order). Forward error bound of Horner evaluation (N. J. Higham, "Accuracy and
        # Stability of Numerical Algorithms", 2nd ed., 2002, eq. 5.3): gamma_2n sum|c_k|, plus
        # the rounding of the expanded coefficients, about 2 n eps relative each.
        den = np.abs(np.polyval(a, np.exp(2j * np.pi * freq)))
        bound = 4 * order * eps * (np.sum(np.abs(b)) + np.abs(r) * np.sum(np.abs(a))) / den
        assert np.all(np.abs(r - h) <= bound)


def test_largest_gain_finds_sharp_resonance():
    # A user NTF with a pole pair at radius 0.995: a narrow peak near 0.1 cycles/sample. The
    # true peak is bounded below by a very dense scipy.signal.freqz grid (2^20 points).
    r, f0 = 0.995, 0.1
    p = r * np.exp(2j * np.pi * f0)
    ntf = NoiseTransfer.from_roots(zeros=[1, 1], poles=[p, np.conj(p)])
    b, a = ntf.polynomials()
    _, h = signal.freqz(b, a, worN=np.linspace(0, np.pi, 2**20 + 1))
    gain, freq = ntf.largest_gain()
    assert gain >= np.max(np.abs(h)) - 1e-12
    assert gain == pytest.approx(np.max(np.abs(h)), rel=1e-6)
    assert freq == pytest.approx(f0, abs=1e-3)


# --------------------------------------------------------------------------------------------
# user NTFs, serialization, immutability


_radius = st.floats(0.0, 0.9)
_angle = st.floats(0.0, math.pi)


@settings(max_examples=40, deadline=None)
@given(
    pole_pairs=st.lists(st.tuples(_radius, _angle), min_size=0, max_size=3),
    zero_pairs=st.lists(st.tuples(st.floats(0.5, 1.5), _angle), min_size=3, max_size=3),
    real_pole=st.floats(-0.9, 0.9),
)
def test_random_user_ntfs_peak_and_parseval(pole_pairs, zero_pairs, real_pole):
    poles = [real_pole]
    for r, a in pole_pairs:
        poles += [r * np.exp(1j * a), r * np.exp(-1j * a)]
    zeros = [1.0]
    for r, a in zero_pairs[: len(pole_pairs)]:
        zeros += [r * np.exp(1j * a), r * np.exp(-1j * a)]
    ntf = NoiseTransfer.from_roots(zeros=zeros, poles=poles)
    b, a_ = ntf.polynomials()
    # The refined peak is at least the maximum on a dense scipy.signal.freqz grid, and close.
    _, h = signal.freqz(b, a_, worN=np.linspace(0, np.pi, 2**14 + 1))
    gain = ntf.out_of_band_gain()
    assert gain >= np.max(np.abs(h)) * (1 - 1e-12)
    assert gain == pytest.approx(np.max(np.abs(h)), rel=1e-4)
    # Parseval with scipy.signal.lfilter: pole radius <= 0.9, so 2000 samples leave < 1e-80.
    impulse = np.zeros(2000)
    impulse[0] = 1.0
    energy = np.sum(signal.lfilter(b, a_, impulse) ** 2)
    assert ntf.in_band_noise_fraction(1) == pytest.approx(energy, rel=1e-9)


def test_user_ntf_is_made_exactly_conjugate():
    p = 0.5 + 0.3j
    ntf = NoiseTransfer.from_roots(zeros=[1, 1], poles=[p, np.conj(p) + 1e-12j])
    assert ntf.poles[0] == np.conj(ntf.poles[1])
    assert ntf.osr is None and ntf.out_of_band_gain_target is None and ntf.zero_layout is None


def test_to_dict_from_dict_roundtrip_through_json():
    ntf = NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.7)
    data = json.loads(json.dumps(ntf.to_dict()))
    back = NoiseTransfer.from_dict(data)
    np.testing.assert_array_equal(back.zeros, ntf.zeros)
    np.testing.assert_array_equal(back.poles, ntf.poles)
    assert (back.osr, back.out_of_band_gain_target, back.zero_layout) == (64, 1.7, "spread")
    assert back.out_of_band_gain() == pytest.approx(1.7, abs=1e-9)


def test_result_is_frozen():
    ntf = NoiseTransfer.designed(2, osr=64)
    with pytest.raises(FrozenInstanceError):
        ntf.poles = np.zeros(2)
    with pytest.raises(ValueError):
        ntf.poles[0] = 0.0
    # eq=False: hashable, equality is identity (no element-wise array comparison).
    assert ntf in {ntf}
    assert ntf != NoiseTransfer.designed(2, osr=64)


def test_public_names():
    assert audiodsm.NoiseTransfer is NoiseTransfer


# --------------------------------------------------------------------------------------------
# bad input


@pytest.mark.parametrize(
    "kwargs,name",
    [
        ({"order": 0, "osr": 64}, "order"),
        ({"order": 9, "osr": 64}, "order"),
        ({"order": 2.0, "osr": 64}, "order"),
        ({"order": True, "osr": 64}, "order"),
        ({"order": 3, "osr": 3}, "osr"),
        ({"order": 3, "osr": 1025}, "osr"),
        ({"order": 3, "osr": float("nan")}, "osr"),
        ({"order": 3, "osr": "64"}, "osr"),
        ({"order": 3, "osr": 64, "out_of_band_gain": 1.0}, "out_of_band_gain"),
        ({"order": 3, "osr": 64, "out_of_band_gain": 0.5}, "out_of_band_gain"),
        ({"order": 3, "osr": 64, "out_of_band_gain": float("inf")}, "out_of_band_gain"),
        ({"order": 3, "osr": 64, "zero_layout": "yes"}, "zero_layout"),
        # Beyond what the pole family reaches at either end: clear errors, not a bad design.
        ({"order": 8, "osr": 4, "out_of_band_gain": 1.5}, "out_of_band_gain"),
        ({"order": 1, "osr": 64, "out_of_band_gain": 1e6}, "out_of_band_gain"),
    ],
)
def test_design_rejects_bad_input(kwargs, name):
    with pytest.raises(ParameterError) as err:
        NoiseTransfer.designed(**kwargs)
    assert err.value.name == name
    assert str(err.value).startswith(f"{name}=")
    assert "\n" not in str(err.value)


def test_unreachable_gain_message_gives_the_limit():
    with pytest.raises(ParameterError, match="lowest out-of-band gain reachable"):
        NoiseTransfer.designed(8, osr=4, out_of_band_gain=1.5)


P_OK = [0.5 + 0.3j, 0.5 - 0.3j]


@pytest.mark.parametrize(
    "zeros,poles,gain,name",
    [
        ([1, 1, 1], P_OK, 1.0, "zeros"),  # more zeros than poles: not causal
        ([1], P_OK, 1.0, "zeros"),  # fewer zeros: NTF(inf) = 0, not 1
        ([1, 1], P_OK, 2.0, "gain"),  # NTF(inf) = 2
        ([1, 1], [1.0, 0.5], 1.0, "poles"),  # pole on the unit circle
        ([1, 1], [0.6 + 0.9j, 0.6 - 0.9j], 1.0, "poles"),  # outside
        ([1, 1], [0.5 + 0.3j, 0.5 - 0.2j], 1.0, "poles"),  # not conjugate
        ([1 + 0.1j, 1 + 0.1j], P_OK, 1.0, "zeros"),  # not conjugate
        ([1, np.nan], P_OK, 1.0, "zeros"),  # not finite
        ([1, 1], [0.5, np.inf], 1.0, "poles"),
        ([[1, 1]], [P_OK], 1.0, "zeros"),  # 2-D
        ([], [], 1.0, "poles"),  # order 0
        ([1] * 9, [0] * 9, 1.0, "poles"),  # order 9
        ([1, 1], P_OK, float("nan"), "gain"),
        ([1, "a"], P_OK, 1.0, "zeros"),
    ],
)
def test_user_ntf_rejects_bad_input(zeros, poles, gain, name):
    with pytest.raises(ParameterError) as err:
        NoiseTransfer.from_roots(zeros=zeros, poles=poles, gain=gain)
    assert err.value.name == name
    assert "\n" not in str(err.value)


@pytest.mark.parametrize(
    "call,name",
    [
        (lambda n: n.in_band_noise_fraction(0.5), "osr"),
        (lambda n: n.in_band_noise_fraction(float("inf")), "osr"),
        (lambda n: n.linear_sqnr_db(levels=1, osr=64), "levels"),
        (lambda n: n.linear_sqnr_db(levels=2.0, osr=64), "levels"),
        (lambda n: n.linear_sqnr_db(levels=2, osr=64, level_dbfs=3.0), "level_dbfs"),
        (lambda n: n.notch_frequencies(osr=0), "osr"),
    ],
)
def test_methods_reject_bad_input(call, name):
    with pytest.raises(ParameterError) as err:
        call(NoiseTransfer.designed(3, osr=64))
    assert err.value.name == name


@pytest.mark.parametrize(
    "data,name",
    [
        ({"poles": [[0.5, 0.0]]}, "zeros"),
        ({"zeros": [[1, 0]], "poles": [[0.5, 0]], "colour": 1}, "data"),
        ({"zeros": [[1, 0]], "poles": [[1.5, 0]]}, "poles"),
        ({"zeros": [[1, 0]], "poles": [[0.5, 0]], "order": 2}, "order"),
        ({"zeros": [["x", 0]], "poles": [[0.5, 0]]}, "zeros"),
        ({"zeros": [[1, 0]], "poles": [[0.5, 0]], "zero_layout": "yes"}, "zero_layout"),
        ({"zeros": [[1, 0]], "poles": [[0.5, 0]], "osr": -2}, "osr"),
        ([1, 2], "data"),
    ],
)
def test_from_dict_rejects_bad_input(data, name):
    with pytest.raises(ParameterError) as err:
        NoiseTransfer.from_dict(data)
    assert err.value.name == name


# --------------------------------------------------------------------------------------------
# zeros optimized over a band narrower than the signal band (the band a product is judged in)


@pytest.mark.parametrize("order", [4, 5, 7])
def test_zeros_for_a_band_edge_are_the_legendre_roots_for_that_edge(order):
    # A 96 kHz input at OSR 64 judged over 0..20 kHz: edge B = 20 kHz / 6.144 MHz.
    osr, rate_hz = 64, 96000 * 64
    edge = 20000.0 / rate_hz
    ntf = NoiseTransfer.designed(order, osr=osr, zero_band_edge=edge)
    assert ntf.zero_band_edge == edge
    # S&T ch. 4: the optimal zeros are the Legendre roots scaled to the band edge. Against
    # numpy.polynomial.legendre directly, in Hz: every zero lies in the 20 kHz band.
    roots = legendre.legroots([0] * order + [1])
    want_hz = np.sort(roots[roots > -1e-12]) * 20000.0
    np.testing.assert_allclose(ntf.notch_frequencies() * rate_hz, want_hz, atol=1e-6)
    assert np.all(np.abs(np.abs(ntf.zeros) - 1.0) < 1e-12)
    # The placement for the default edge 0.5/osr reaches 48 kHz, above the judged band.
    assert NoiseTransfer.designed(order, osr=osr).notch_frequencies()[-1] * rate_hz > 30000.0
    # Round trip keeps the edge.
    assert NoiseTransfer.from_dict(ntf.to_dict()).zero_band_edge == edge


@pytest.mark.parametrize("order", [3, 5, 7])
def test_band_edge_zeros_give_the_published_improvement_over_20khz(order):
    # In-band noise over 0..20 kHz: zeros for B = 20 kHz against all zeros at DC. S&T ch. 4
    # table (whole dB, from memory) and the A&S closed form k_n^2; as in
    # test_designed_improvement_matches_closed_form the different poles add
    # 20log10(|A_opt(1)| / |A_dc(1)|), and the small-angle error is tiny at an effective OSR of
    # 153.6.
    osr, rate_hz = 64, 96000 * 64
    band_osr = rate_hz / (2 * 20000.0)
    dc = NoiseTransfer.designed(order, osr=osr, zero_layout="dc")
    opt = NoiseTransfer.designed(order, osr=osr, zero_band_edge=20000.0 / rate_hz)
    got_db = 10 * math.log10(
        dc.in_band_noise_fraction(band_osr) / opt.in_band_noise_fraction(band_osr)
    )
    pole_term = 20 * math.log10(abs(opt.polynomials()[1].sum() / dc.polynomials()[1].sum()))
    assert got_db == pytest.approx(_legendre_improvement_db(order) + pole_term, abs=0.02)
    # the book table as a rounded value, as in the table test above
    assert abs(got_db - SNT_OPTIMAL_ZEROS[order][1]) < TABLE_DB_STEP.get(order, 1.0)
    # ... and the zeros placed for 48 kHz (the old default) leave far more noise in 20 kHz.
    wide = NoiseTransfer.designed(order, osr=osr)
    assert wide.in_band_noise_fraction(band_osr) > 10 * opt.in_band_noise_fraction(band_osr)


def test_zero_band_edge_is_checked():
    for bad in (0.0, -1e-3, 0.5 / 64 * 1.001, math.nan, "x"):
        with pytest.raises(ParameterError, match="zero_band_edge"):
            NoiseTransfer.designed(5, osr=64, zero_band_edge=bad)
    # the signal band edge itself is the default, bit for bit
    a = NoiseTransfer.designed(5, osr=64, zero_band_edge=0.5 / 64)
    b = NoiseTransfer.designed(5, osr=64)
    assert np.array_equal(a.zeros, b.zeros) and np.array_equal(a.poles, b.poles)
