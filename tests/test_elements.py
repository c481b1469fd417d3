"""Unit elements with mismatch and their selection logic (stages/elements.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import welch

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.errors import ParameterError
from audiodsm.stages import _element_kernels as _k
from audiodsm.stages.elements import SELECTION_METHODS, UnitElements, draw_element_errors
from audiodsm.stages.modulator import Modulator
from audiodsm.stages.output_stage import level_codes, nrz_waveform

LEVELS = 17
N_EL = LEVELS - 1


def _codes(n, *, amplitude=0.5, cycles_per_16384=5, osr=32, seed=1):
    """A 17-level modulator's output codes for a slow sine (a busy, realistic code stream)."""
    ntf = NoiseTransfer.designed(3, osr=osr, out_of_band_gain=2.0)
    mod = Modulator(ntf, levels=LEVELS, seed=seed)
    x = amplitude * np.sin(2 * np.pi * np.arange(n) * cycles_per_16384 / 16384)
    y, _ = mod.run(x)
    return level_codes(y, levels=LEVELS)


# -- slow pure-Python twins of the kernels ----------------------------------------------------


def _splitmix(state):
    mask = (1 << 64) - 1
    state = (state + 0x9E3779B97F4A7C15) & mask
    z = state
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & mask
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & mask
    return state, z ^ (z >> 31)


def _below(state, bound):
    """Lemire's bounded draw as written in his paper (ACM TOMACS 29(1), 2019, 32-bit form):
    ``m = x * bound`` with ``x`` the top 32 bits of a splitmix64 output; redraw while the low
    half of ``m`` is below ``(2**32 - bound) % bound``; the draw is ``m >> 32``."""
    reject = (2**32 - bound) % bound
    while True:
        state, z = _splitmix(state)
        m = (z >> 32) * bound
        if m % 2**32 >= reject:
            return state, m >> 32


def _twin(elements, codes):
    """Each method from its published description, one element at a time."""
    e = [float(v) for v in elements.errors]
    n_el = len(e)
    st = elements.initial_state()
    total = sum(e)
    out = []
    fwd = back = 0
    order = list(range(n_el))
    rng = int(st.rng[0])
    past1 = [0.0] * n_el
    past2 = [0.0] * n_el
    for n, k in enumerate(int(c) for c in codes):
        m = elements.method
        if m == "thermometer":
            chosen = list(range(k))
        elif m == "random":
            chosen = []
            for j in range(k):
                rng, r = _below(rng, n_el - j)
                r += j
                order[j], order[r] = order[r], order[j]
                chosen.append(order[j])
        elif m == "data-weighted" or (m == "bidirectional-weighted" and n % 2 == 0):
            chosen = [(fwd + j) % n_el for j in range(k)]
            fwd = (fwd + k) % n_el
        elif m == "bidirectional-weighted":
            chosen = [(back - 1 - j) % n_el for j in range(k)]
            back = (back - k) % n_el
        else:
            target = [k / n_el - 2 * past1[i] + past2[i] for i in range(n_el)]
            chosen = sorted(range(n_el), key=lambda i: (-target[i], i))[:k]
            past2 = past1
            past1 = [(1.0 if i in chosen else 0.0) - target[i] for i in range(n_el)]
        weights = [(1 + e[i]) / 2 if i in chosen else -(1 + e[i]) / 2 for i in range(n_el)]
        out.append((k - n_el / 2) + (sum(e[i] for i in chosen) - total / 2))
        assert abs(sum(weights) - out[-1]) < 1e-12
    return np.array(out)


@pytest.mark.parametrize("method", SELECTION_METHODS)
def test_kernels_match_twins(method):
    codes = _codes(3000)
    el = UnitElements(LEVELS, method, mismatch=0.01, seed=7)
    fast, _ = el.process(codes)
    np.testing.assert_allclose(fast, _twin(el, codes), rtol=0, atol=1e-13)


def test_bounded_draws_are_uniform_over_a_small_range():
    # chi-square goodness of fit against the uniform distribution (scipy.stats.chisquare);
    # 7 and 13 do not divide 2**32, so a plain multiply-shift or modulo would be biased (by
    # about 1e-9 here, far below what a test sees: the next test shows the rejection step)
    from scipy.stats import chisquare

    for bound, seed in ((7, 1), (13, 2), (16, 3)):
        rng = np.array([seed], dtype=np.uint64)
        draws = np.array([_k.uniform_below(rng, bound) for _ in range(70000)])
        assert draws.min() == 0 and draws.max() == bound - 1
        counts = np.bincount(draws, minlength=bound)
        assert chisquare(counts).pvalue > 1e-3, (bound, counts)


def test_bounded_draws_reject_exactly_the_biased_products():
    # bound = 3 * 2**30: without the rejection step of Lemire's method (ACM TOMACS 29(1),
    # 2019) the product x * bound / 2**32 = 3 x / 4 hits every multiple of 3 twice as often
    # as the other values (x = 4m and 4m + 1 both give 3m), so draws % 3 == 0 would come
    # half of the time instead of a third; the rejection of low halves below
    # (2**32 - bound) % bound = 2**30 (x = 0 mod 4) removes exactly the extra ones.
    from scipy.stats import chisquare

    bound = 3 << 30
    rng = np.array([11], dtype=np.uint64)
    draws = np.array([_k.uniform_below(rng, bound) for _ in range(30000)])
    assert draws.max() < bound
    assert chisquare(np.bincount(draws % 3, minlength=3)).pvalue > 1e-3
    # and the kernel is the paper's algorithm, draw for draw, redraws included
    state, twin = 11, []
    for _ in range(2000):
        state, r = _below(state, bound)
        twin.append(r)
    np.testing.assert_array_equal(draws[:2000], twin)
    # it redrew as often as the twin (about a quarter of the draws here): same state after
    rng = np.array([11], dtype=np.uint64)
    for _ in range(2000):
        _k.uniform_below(rng, bound)
    assert int(rng[0]) == state


@pytest.mark.parametrize("levels", [3, 5, 9, 10, 13, 17])
def test_vector_shaper_ranked_and_sorted_agree_bit_for_bit(levels):
    # The two ways of picking the k largest targets (rank counting in 16 lanes, insertion
    # sort) against each other: the same elements and the same sums in the same order, so
    # the same bits, state included. The first sample (all targets equal) and zero codes
    # exercise the ties; the sort itself is checked against the twin above.
    n_el = levels - 1
    rng = np.random.default_rng(levels)
    codes = np.concatenate(
        [[0, n_el, 0], _codes(4000)[:2000] * n_el // N_EL, rng.integers(0, levels, 2000)]
    ).astype(np.int64)
    errors = draw_element_errors(n_el, mismatch=0.01, seed=levels)
    results = []
    for kernel in (_k._vector_shaped_ranked, _k._vector_shaped_sorted):
        past, out = np.zeros((2, n_el)), np.empty(codes.size)
        kernel(codes, n_el / 2.0, errors, past, out)
        results.append((out, past))
    (a, past_a), (b, past_b) = results
    assert a.view(np.int64).tolist() == b.view(np.int64).tolist()
    assert past_a.view(np.int64).tolist() == past_b.view(np.int64).tolist()


@pytest.mark.parametrize("method", SELECTION_METHODS)
def test_zero_mismatch_is_the_ideal_nrz_output(method):
    codes = _codes(20000)
    el = UnitElements(LEVELS, method, mismatch=0.0, seed=3)
    out, _ = el.process(codes)
    y = -1.0 + 2.0 * codes / N_EL
    ideal = nrz_waveform(y, levels=LEVELS, frame_rate_hz=1e6, lsb_volts=1.0).levels[:, 0]
    assert np.array_equal(out, ideal)  # bit for bit, every method


@pytest.mark.parametrize("method", SELECTION_METHODS)
def test_blocks_equal_one_call(method):
    codes = _codes(5000)
    el = UnitElements(LEVELS, method, mismatch=0.003, seed=11)
    whole, _ = el.process(codes)
    parts, state = [], None
    for a, b in ((0, 1), (1, 777), (777, 778), (778, 5000)):
        piece, state = el.process(codes[a:b], state)
        parts.append(piece)
    assert np.array_equal(np.concatenate(parts), whole)


def test_part_is_drawn_once_per_seed():
    a = draw_element_errors(16, mismatch=0.001, seed=5)
    assert np.array_equal(a, draw_element_errors(16, mismatch=0.001, seed=5))
    assert not np.array_equal(a, draw_element_errors(16, mismatch=0.001, seed=6))
    assert abs(a.mean()) < 1e-18  # the common part is a gain error, not mismatch


# Slopes of the in-band mismatch error power against OSR: white error (random selection,
# Carley 1989) falls 3 dB per octave of OSR; first-order shaped (DWA, Baird & Fiez 1995,
# IEEE TCAS-II 42(12), sec. III) 9 dB; second-order shaped (Schreier & Zhang 1995; Schreier &
# Temes 2005, ch. 6) 15 dB -- the in-band power of L-th order shaped white noise goes as
# OSR^-(2L+1). Tolerance 1.5 dB/octave over OSR 32..256, as the issue asks.
@pytest.mark.parametrize(
    ("method", "slope_db"),
    [
        ("random", 3.0),
        ("data-weighted", 9.0),
        ("bidirectional-weighted", 9.0),
        ("vector-second-order", 15.0),
    ],
)
def test_mismatch_error_falls_with_osr_at_the_published_slope(method, slope_db):
    codes = _codes(1 << 19)
    el = UnitElements(LEVELS, method, mismatch=0.01, seed=3)
    out, _ = el.process(codes)
    error = out - (codes - N_EL / 2)
    # Blackman-Harris: its sidelobes keep the large out-of-band error out of the band
    f, psd = welch(error, nperseg=1 << 15, window="blackmanharris")
    osrs = np.array([32, 64, 128, 256])
    power_db = 10 * np.log10([psd[f <= 0.5 / osr].sum() for osr in osrs])
    slope = -np.polyfit(np.log2(osrs), power_db, 1)[0]
    assert abs(slope - slope_db) <= 1.5, (method, slope, power_db)


@pytest.mark.parametrize("seed", [3, 4])
def test_thermometer_harmonics_follow_the_integral_nonlinearity(seed):
    # With fixed selection the mismatch is a static nonlinearity: code k is off by its
    # integral nonlinearity INL_k = sum(e[:k]) - sum(e)/2 (LSB, from the end-point line since
    # the e_i sum to 0). A multi-level loop dithers between adjacent codes, so the in-band
    # transfer is INL interpolated linearly between codes; the harmonics of a sine through it
    # are its Fourier coefficients (Chebyshev expansion of a static nonlinearity). Computed
    # here from the drawn weights, independently of the element kernel's tables.
    n, cycles, amplitude = 1 << 18, 37, 0.7
    ntf = NoiseTransfer.designed(3, osr=64, out_of_band_gain=1.5)
    y, _ = Modulator(ntf, levels=LEVELS, seed=1).run(
        amplitude * np.sin(2 * np.pi * np.arange(n) * cycles / n)
    )
    codes = level_codes(y, levels=LEVELS)
    el = UnitElements(LEVELS, "thermometer", mismatch=0.01, seed=seed)
    out, _ = el.process(codes)
    spectrum = np.abs(np.fft.rfft(out)) * 2 / n
    e = el.errors
    inl = np.array([e[:k].sum() - e.sum() / 2 for k in range(LEVELS)])
    theta = 2 * np.pi * np.arange(4096) / 4096
    position = (amplitude * np.sin(theta) + 1) * N_EL / 2
    predicted = np.abs(np.fft.rfft(np.interp(position, np.arange(LEVELS), inl))) * 2 / 4096
    tone = amplitude * N_EL / 2
    checked = 0
    for h in (2, 3, 4):
        want_db = 20 * np.log10(predicted[h] / tone)
        if want_db < -75:  # too close to the loop's own in-bin noise to compare
            continue
        got_db = 20 * np.log10(spectrum[h * cycles] / spectrum[cycles])
        assert abs(got_db - want_db) <= 0.5, (h, got_db, want_db)
        checked += 1
    assert checked >= 2


def test_bad_settings_refused():
    with pytest.raises(ParameterError, match="mismatch"):
        UnitElements(LEVELS, "random", mismatch=-0.001)
    with pytest.raises(ParameterError, match="method"):
        UnitElements(LEVELS, "shuffled")
    with pytest.raises(ParameterError, match="levels"):
        UnitElements(2, "random")
    with pytest.raises(ParameterError, match="codes"):
        UnitElements(LEVELS).process(np.array([0, 17]))


def test_bidirectional_rotation_removes_the_tones_of_plain_dwa():
    # Plain DWA's pointer rotates at the mean code's rate, so a near-mid-scale constant input
    # turns the mismatch into in-band lines (the DWA tone problem, Baird & Fiez 1995, sec. IV);
    # bi-directional rotation (Fujimori et al. 2000) breaks the rotation up. There is no
    # published number to hold them to: the margins here (lines standing 30 dB above the
    # in-band median for DWA, none above 10 dB with bi-directional rotation) were chosen from
    # runs with seeds 3..5, where DWA's line stood 41..45 dB out and bi-DWA's spectrum 2..4 dB.
    n = 1 << 18
    ntf = NoiseTransfer.designed(3, osr=64, out_of_band_gain=1.5)
    y, _ = Modulator(ntf, levels=LEVELS, seed=1).run(np.full(n, 0.003))
    codes = level_codes(y, levels=LEVELS)
    prominence = {}
    for method in ("data-weighted", "bidirectional-weighted"):
        out, _ = UnitElements(LEVELS, method, mismatch=0.01, seed=4).process(codes)
        f, p = welch(out - (codes - N_EL / 2), nperseg=1 << 14, window="blackmanharris")
        band = p[(f <= 0.5 / 64)][4:]  # above the window's DC bins
        prominence[method] = 10 * np.log10(band.max() / np.median(band))
    assert prominence["data-weighted"] > 30.0, prominence
    assert prominence["bidirectional-weighted"] < 10.0, prominence
