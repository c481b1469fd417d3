"""The Modulator against textbook results, first principles and its own streaming contract."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.design.realize import STRUCTURES, LoopRealization
from audiodsm.errors import ParameterError
from audiodsm.stages.modulator import (
    Modulator,
    ModulatorState,
)


def band_power(x, osr, nperseg=32768):
    """Power of ``x`` in 0..0.5/osr cycles/sample from a Welch PSD.

    A Kaiser window with beta = 30 (sidelobes far below -150 dB) keeps the strong out-of-band
    noise of a shaped error from leaking into the band; its main lobe (about +-10 bins) is
    narrow next to the 128+ bins of the band at this segment length.
    """
    f, psd = signal.welch(x, fs=1.0, window=("kaiser", 30.0), nperseg=nperseg, detrend=False)
    band = f <= 0.5 / osr
    return np.sum(psd[band]) * (f[1] - f[0])


# ---------------------------------------------------------------------------------------------
# Textbook: ideal L-th order loop, zeros at DC, white quantization noise
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("order", [1, 2, 3])
@pytest.mark.parametrize("osr", [64, 128])
def test_ideal_loop_in_band_noise(order, osr, rng):
    # Schreier & Temes 2005, ch. 2: NTF = (1 - z^-1)^L with white quantization noise of power
    # Delta^2/12 leaves (Delta^2/12) pi^(2L) / ((2L+1) OSR^(2L+1)) in the band (small-angle
    # form of the integral of |2 sin(pi f)|^(2L)). The error-feedback loop has a signal transfer
    # of exactly 1, so y - x is the shaped error alone. A 257-level quantizer and a busy input
    # (two tones plus 4 LSB rms of seeded noise) keep the white-noise model valid; 1 dB covers
    # the Welch estimate's spread (31 averages, 64+ band bins; runs stay within 0.6 dB) and the
    # small-angle approximation (< 0.01 dB).
    levels = 257
    delta = 2.0 / (levels - 1)
    ntf = NoiseTransfer.from_roots(zeros=np.ones(order), poles=np.zeros(order))
    mod = Modulator(ntf, "error-feedback", levels=levels)
    n = 1 << 18
    t = np.arange(n)
    x = 0.45 * np.sin(2 * np.pi * 0.00123 * t) + 0.3 * np.sin(2 * np.pi * 0.000371 * t + 1.0)
    x += 4 * delta * rng.standard_normal(n)
    y, st = mod.run(x)
    assert st.overload_count[0] == 0
    expected = delta**2 / 12 * np.pi ** (2 * order) / ((2 * order + 1) * osr ** (2 * order + 1))
    got = band_power(y - x, osr, nperseg=16384)
    assert abs(10 * np.log10(got / expected)) < 1.0


def test_tpdf_dither_adds_twice_the_quantization_noise():
    # Lipshitz, Wannamaker & Vanderkooy, JAES 40(5) 1992: TPDF dither of 2 LSB peak-to-peak
    # makes the total error power Delta^2/4 (three times Delta^2/12). Shaped by (1 - z^-1)^2,
    # the in-band power scales the same way: 10 log10(3) = 4.77 dB more than undithered.
    levels = 65
    delta = 2.0 / (levels - 1)
    ntf = NoiseTransfer.from_roots(zeros=[1, 1], poles=[0, 0])
    mod = Modulator(ntf, "error-feedback", levels=levels, dither_lsb=1.0, seed=3)
    n = 1 << 17
    x = 0.3 * np.sin(2 * np.pi * 0.00071 * np.arange(n))
    y, st = mod.run(x)
    assert st.overload_count[0] == 0
    osr = 64
    expected = delta**2 / 4 * np.pi**4 / (5 * osr**5)
    assert abs(10 * np.log10(band_power(y - x, osr) / expected)) < 1.0


# ---------------------------------------------------------------------------------------------
# Simulated NTF against the designed one
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("structure", STRUCTURES)
def test_simulated_noise_spectrum_follows_designed_ntf(structure):
    # With zero input and TPDF dither (1 LSB) the error at the quantizer is white with power
    # Delta^2/4 (Lipshitz et al. 1992), so the output PSD is |NTF|^2 * Delta^2/4 / 0.5
    # (one-sided, per cycle/sample). The Welch PSD (Kaiser beta 20: sidelobes far below the
    # -130 dB the NTF reaches in band) is averaged over groups of >= 16 bins and compared with
    # |NTF|^2 averaged over the same bins, from 1/8 of the band edge (OSR 64) to Nyquist:
    # within +-1 dB (127 averages x 16 bins: the estimate's spread is about 0.1 dB).
    levels = 33
    delta = 2.0 / (levels - 1)
    ntf = NoiseTransfer.designed(4, osr=64, out_of_band_gain=2.5, zero_layout="spread")
    mod = Modulator(ntf, structure, levels=levels, dither_lsb=1.0, seed=11)
    y, st = mod.run(np.zeros(1 << 20))
    assert st.overload_count[0] == 0
    nper = 16384
    f, psd = signal.welch(y, fs=1.0, window=("kaiser", 20.0), nperseg=nper, detrend=False)
    model = np.abs(ntf.response(f)) ** 2 * delta**2 / 4 / 0.5
    edges = np.unique(np.r_[np.arange(16, 128, 16), np.geomspace(128, nper // 2, 20).astype(int)])
    assert f[edges[0]] < 0.5 / 64 / 4  # the check starts well inside the band
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        ratio_db = 10 * np.log10(psd[lo:hi].mean() / model[lo:hi].mean())
        assert abs(ratio_db) < 1.0, (f[lo], ratio_db)


# ---------------------------------------------------------------------------------------------
# First-order single-bit loop (first principles, common practice)
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("structure", STRUCTURES)
def test_first_order_single_bit_behaviour(structure, rng):
    ntf = NoiseTransfer.from_roots(zeros=[1], poles=[0])  # NTF = 1 - z^-1
    mod = Modulator(ntf, structure, levels=2)
    # zero input: the output alternates every clock, the fastest pattern
    y, _ = mod.run(np.zeros(64))
    assert np.all(y[1:] == -y[:-1])
    # constant input x: the integrator stays bounded (|state| <= 2), so over N samples the
    # count of +1s differs from N (1 + x) / 2 by at most 1, i.e. density within 1/N
    for x in rng.uniform(-0.95, 0.95, 20):
        for n in (64, 1000):
            y, _ = mod.run(np.full(n, x))
            density = np.count_nonzero(y > 0) / n
            assert abs(density - (1 + x) / 2) <= 1.0 / n
        # counting the +1s over 64 clocks recovers x to 6-bit resolution (2/64 of the range)
        y, _ = mod.run(np.full(64, x))
        assert abs(2 * np.count_nonzero(y > 0) / 64 - 1 - x) <= 2 / 64


# ---------------------------------------------------------------------------------------------
# Lee's rule (Chao, Nadeem, Lee & Sodini, IEEE Trans. Circuits Syst. 37(3), 1990)
# ---------------------------------------------------------------------------------------------


def test_lee_rule_stable_at_gain_1_5_and_overloads_at_gain_4():
    n = 1_000_000
    x = 10 ** (-6 / 20) * np.sin(2 * np.pi * 997 / (48000 * 64) * np.arange(n))
    calm = Modulator(NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.5), "feedback", levels=2)
    y, st = calm.run(x)
    assert st.overload_count[0] == 0
    assert np.all(np.abs(y) == 1)
    assert np.max(st.state_peak) < 10  # the states stay small: no runaway
    wild = Modulator(NoiseTransfer.designed(5, osr=64, out_of_band_gain=4.0), "feedback", levels=2)
    y, st = wild.run(x[:200_000])
    assert st.overload_count[0] > 0  # the guard saw it
    assert np.all(np.isfinite(y)) and np.all(np.abs(y) == 1)


# ---------------------------------------------------------------------------------------------
# Streaming, channels, tracing, guard
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("structure", STRUCTURES)
@pytest.mark.parametrize(("levels", "dither"), [(2, 0.0), (9, 1.0)])
def test_blocks_equal_one_call(structure, levels, dither, rng):
    mod = Modulator(
        NoiseTransfer.designed(4, osr=32), structure, levels=levels, dither_lsb=dither, seed=5
    )
    x = 0.4 * np.sin(np.arange(5000) * 0.01)[:, None] * np.array([1.0, -0.7])
    whole, st_whole = mod.run(x)
    parts, st = [], None
    start = 0
    while start < len(x):
        size = int(rng.integers(0, 700))
        y, st = mod.run(x[start : start + size], st)
        parts.append(y)
        start += size
    np.testing.assert_array_equal(np.concatenate(parts), whole)
    np.testing.assert_array_equal(st.integrators, st_whole.integrators)
    np.testing.assert_array_equal(st.state_peak, st_whole.state_peak)
    np.testing.assert_array_equal(st.rng_counter, st_whole.rng_counter)
    assert st.samples == st_whole.samples == len(x)


def test_channels_are_independent():
    mod = Modulator(NoiseTransfer.designed(3, osr=64), "feedback", levels=3)
    x = np.stack([0.3 * np.sin(np.arange(3000) * 0.02), 0.1 * np.cos(np.arange(3000) * 0.05)], 1)
    y, st = mod.run(x)
    for c in range(2):
        yc, stc = mod.run(x[:, c])
        np.testing.assert_array_equal(y[:, c], yc)
        np.testing.assert_array_equal(st.integrators[c], stc.integrators[0])
    dithered = Modulator(
        NoiseTransfer.designed(3, osr=64), "feedback", levels=3, dither_lsb=1.0, seed=9
    )
    y2, _ = dithered.run(x)
    y0, _ = dithered.run(x[:, 0])
    np.testing.assert_array_equal(y2[:, 0], y0)  # channel 0 uses the same stream alone
    assert not np.array_equal(y2[:, 0] - x[:, 0], y2[:, 1] - x[:, 1])


def test_same_seed_same_bits_other_seed_other_bits():
    x = 0.2 * np.sin(np.arange(4000) * 0.03)
    a, _ = Modulator(NoiseTransfer.designed(2, osr=64), levels=5, dither_lsb=1.0, seed=1).run(x)
    b, _ = Modulator(NoiseTransfer.designed(2, osr=64), levels=5, dither_lsb=1.0, seed=1).run(x)
    c, _ = Modulator(NoiseTransfer.designed(2, osr=64), levels=5, dither_lsb=1.0, seed=2).run(x)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_trace_states_matches_run(structure):
    mod = Modulator(NoiseTransfer.designed(5, osr=64), structure, levels=2)
    x = 0.3 * np.sin(np.arange(2000) * 0.01)
    y, st = mod.run(x)
    y2, states = mod.trace_states(x)
    np.testing.assert_array_equal(y, y2)
    assert states.shape == (2000, 5)
    np.testing.assert_array_equal(states[-1], st.integrators[0])
    np.testing.assert_allclose(np.abs(states).max(axis=0), st.state_peak[0])


@pytest.mark.parametrize("guard", ["reset", "clamp"])
@pytest.mark.parametrize("structure", STRUCTURES)
def test_never_nan_on_extreme_finite_input(guard, structure, rng):
    mod = Modulator(
        NoiseTransfer.designed(6, osr=32, out_of_band_gain=3.0), structure, levels=2, guard=guard
    )
    x = np.concatenate([np.full(50, 1e300), rng.uniform(-1, 1, 200) * 1.7e308, np.full(50, -3.0)])
    y, st = mod.run(x)
    assert np.all(np.isfinite(y)) and np.all(np.abs(y) <= 1)
    assert np.all(np.isfinite(st.integrators))
    assert st.overload_count[0] > 0


def test_clamp_keeps_states_within_bound():
    mod = Modulator(
        NoiseTransfer.designed(5, osr=64, out_of_band_gain=4.0),
        "feedback",
        guard="clamp",
        state_bound=3.0,
    )
    x = 0.7 * np.sin(np.arange(20000) * 0.003)
    _, states = mod.trace_states(x)
    assert np.max(np.abs(states)) <= 3.0


def test_output_levels_are_evenly_spaced():
    for levels in (2, 3, 4, 17, 1024):
        mod = Modulator(NoiseTransfer.designed(2, osr=16), "feedforward", levels=levels)
        y, _ = mod.run(0.9 * np.sin(np.arange(20000) * 0.002))
        k = (y + 1) * (levels - 1) / 2
        np.testing.assert_allclose(k, np.round(k), atol=1e-9)
        assert k.min() >= 0 and k.max() <= levels - 1


# ---------------------------------------------------------------------------------------------
# Stability limit and state scaling
# ---------------------------------------------------------------------------------------------


def test_stability_limit_single_bit_and_multi_bit():
    # Schreier & Temes 2005, ch. 4 (chapter from memory): a high-order single-bit loop cannot
    # take a full-scale input (its maximum stable amplitude is well below 1), while a multi-bit
    # loop with the same NTF goes close to full scale. The 0.3..0.9 bracket for a 5th-order,
    # gain-1.5 loop is common practice, not a published figure. The limit found must separate
    # a clean run from a collapsed one: a sine 0.1 above it fails the criterion.
    ntf = NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.5)
    one_bit = Modulator(ntf, "feedback", levels=2)
    lim = one_bit.probe_stability(osr=64)
    assert 0.3 < lim.stable_amplitude < 0.9
    again = one_bit.probe_stability(osr=64, run_samples=32768)
    assert again.stable_amplitude == lim.stable_amplitude  # deterministic
    n, settle = 32768, 4096
    x = (lim.stable_amplitude + 0.1) * np.sin(
        2 * np.pi * lim.test_frequency * np.arange(n + settle)
    )
    y, st = one_bit.run(x)
    from audiodsm.stages.modulator import _in_band_sqnr_db

    sqnr = _in_band_sqnr_db(y[settle:], int(round(lim.test_frequency * n)), 64)
    expected = lim.reference_sqnr_db + 20 * np.log10((lim.stable_amplitude + 0.1) / 0.01)
    assert st.overload_count[0] > 0 or sqnr < expected - 6
    multi = Modulator(ntf, "feedback", levels=17)
    assert multi.probe_stability(osr=64).stable_amplitude > 0.9


@pytest.mark.parametrize("structure", STRUCTURES)
def test_scale_states_bounds_the_states_and_keeps_the_ntf(structure):
    ntf = NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.5)
    mod = Modulator(ntf, structure, levels=2)
    scaled, lim = mod.with_scaled_states(osr=64, peak_target=1.0)
    peaks = lim.state_peaks
    scaled_states = peaks if structure == "feedforward" else peaks[:-1]
    # re-simulated after scaling: each scaled state peaks at the bound (rounding changes a few
    # decisions, so allow 10 %)
    np.testing.assert_allclose(scaled_states, 1.0, rtol=0.1)
    grid = np.geomspace(1e-5, 0.5, 300)
    back = scaled.loop.realized_ntf().response(grid)
    assert np.max(np.abs(back / ntf.response(grid) - 1)) < 1e-9


# ---------------------------------------------------------------------------------------------
# Bad input
# ---------------------------------------------------------------------------------------------


def test_bad_input():
    ntf = NoiseTransfer.designed(3, osr=64)
    with pytest.raises(ParameterError, match="structure"):
        Modulator(ntf, "round-robin")
    for levels in (1, 2**24 + 1, 2.5):
        with pytest.raises(ParameterError, match="levels"):
            Modulator(ntf, levels=levels)
    with pytest.raises(ParameterError, match="dither_lsb"):
        Modulator(ntf, dither_lsb=-0.1)
    with pytest.raises(ParameterError, match="guard"):
        Modulator(ntf, guard="ignore")
    with pytest.raises(ParameterError, match="state_bound"):
        Modulator(ntf, state_bound=0.0)
    mod = Modulator(ntf)
    with pytest.raises(ParameterError, match="x"):
        mod.run(np.array([0.0, np.nan, 0.1]))
    with pytest.raises(ParameterError, match="x"):
        mod.run(np.array([0.0, np.inf]))
    late = np.zeros(40_000)
    late[35_001] = np.nan  # past the first internal chunk
    with pytest.raises(ParameterError, match="frame 35001"):
        mod.run(late)
    two = np.zeros((100, 2))
    two[7, 1] = -np.inf
    with pytest.raises(ParameterError, match="frame 7"):
        mod.run(two)
    with pytest.raises(ParameterError, match="x.shape"):
        mod.run(np.zeros((4, 2, 2)))
    _, st = mod.run(np.zeros((10, 2)))
    with pytest.raises(ParameterError, match="state"):
        mod.run(np.zeros(10), st)
    with pytest.raises(ParameterError, match="osr"):
        mod.probe_stability(osr=2)
    assert isinstance(st, ModulatorState)
    with pytest.raises(AttributeError):
        st.samples = 3  # frozen value
    assert not st.integrators.flags.writeable


def test_realization_can_be_passed_in():
    loop = LoopRealization.for_ntf(NoiseTransfer.designed(4, osr=64), structure="feedforward")
    mod = Modulator(loop, levels=3)
    assert mod.structure == "feedforward" and mod.order == 4


@settings(max_examples=40, deadline=None)
@given(
    samples=st.lists(
        st.floats(allow_nan=False, allow_infinity=False, width=64), min_size=1, max_size=64
    ),
    structure=st.sampled_from(STRUCTURES),
    levels=st.sampled_from([2, 3, 17]),
    guard=st.sampled_from(["reset", "clamp"]),
)
def test_any_finite_input_gives_valid_levels(samples, structure, levels, guard):
    # Property: whatever finite samples come in (up to +-1.8e308), the output holds only the
    # quantizer's levels and the state stays finite.
    mod = Modulator(_PROPERTY_NTF, structure, levels=levels, guard=guard)
    y, st_ = mod.run(np.array(samples))
    k = (y + 1) * (levels - 1) / 2
    assert np.all(np.isfinite(y))
    np.testing.assert_allclose(k, np.round(k), atol=1e-9)
    assert np.all((k > -1e-9) & (k < levels - 1 + 1e-9))
    assert np.all(np.isfinite(st_.integrators)) and np.all(np.isfinite(st_.state_peak))


_PROPERTY_NTF = NoiseTransfer.designed(4, osr=32, out_of_band_gain=2.0)


# ---------------------------------------------------------------------------------------------
# Scaling by powers of two: exact arithmetic, so the very same bits
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("structure", STRUCTURES)
@pytest.mark.parametrize(("levels", "dither"), [(2, 0.0), (2, 0.5), (17, 1.0)])
def test_power_of_two_scaling_gives_the_same_bits(structure, levels, dither, rng):
    # IEEE Std 754-2019 (clause 4.3, from memory): every operation returns the exactly rounded
    # result, and multiplying by a power of two within range is exact, so it commutes with the
    # rounding of each product and sum of the loop. Hence the scaled loop must compute the
    # unscaled states divided by s exactly, and the quantizer must see exactly the same
    # values: no tolerance at all.
    ntf = NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.5 if levels == 2 else 3.0)
    plain = Modulator(ntf, structure, levels=levels, dither_lsb=dither, seed=3)
    peaks = np.array([0.003, 0.07, 2.5, 40.0, 900.0])  # any positive peaks will do
    # a single-bit feedback loop may scale its quantizer-facing state too
    last_too = structure == "feedback" and levels == 2
    loop = plain.loop.rescaled(
        peaks, peak_target=1.0, powers_of_two=True, include_quantizer_state=last_too
    )
    s = loop.state_scale
    assert (s[-1] != 1.0) == (structure == "feedforward" or last_too)
    assert np.all(np.exp2(np.round(np.log2(s))) == s)  # powers of two
    scaled = Modulator(loop, levels=levels, dither_lsb=dither, seed=3)
    x = 0.5 * np.sin(2 * np.pi * 0.0017 * np.arange(6000)) + 0.01 * rng.standard_normal(6000)
    y0, states0 = plain.trace_states(x)
    y1, states1 = scaled.trace_states(x)
    np.testing.assert_array_equal(y1, y0)
    np.testing.assert_array_equal(states1 * s, states0)
    # the compiled fast loop (run) agrees with the generic one (trace_states)
    np.testing.assert_array_equal(scaled.run(x)[0], y0)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_power_of_two_scale_states_peaks_between_half_bound_and_bound(structure):
    ntf = NoiseTransfer.designed(5, osr=64, out_of_band_gain=1.5)
    mod = Modulator(ntf, structure, levels=2)
    bound = 0.75
    scaled, lim = mod.with_scaled_states(
        osr=64, peak_target=bound, powers_of_two=True, run_samples=16384
    )
    # every state but the error-feedback loop's quantizer-facing one, which the quantizer
    # sizes (a single-bit feedback loop scales its last state too)
    inner = lim.state_peaks if structure != "error-feedback" else lim.state_peaks[:-1]
    # rounding s up to the next power of two puts every scaled peak in (bound/2, bound]; the
    # re-simulation is bit-exact (test above), so the bound holds with no tolerance
    assert np.all(inner <= bound) and np.all(inner > bound / 2)
    # and the NTF computed back from the scaled coefficients is the design to 1e-9 (the
    # contract of LoopRealization.for_ntf)
    grid = np.geomspace(1e-5, 0.5, 300)
    back = scaled.loop.realized_ntf().response(grid)
    assert np.max(np.abs(back / ntf.response(grid) - 1)) < 1e-9


# ---------------------------------------------------------------------------------------------
# Empty input
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("shape", [(0,), (0, 1), (0, 3)])
def test_empty_input_gives_empty_output_and_the_same_state(shape):
    mod = Modulator(
        NoiseTransfer.designed(3, osr=64), "feedforward", levels=5, dither_lsb=1.0, seed=9
    )
    channels = 1 if len(shape) == 1 else shape[1]
    _, state = mod.run(0.3 * np.ones((100, channels)))
    y, after = mod.run(np.zeros(shape), state)
    assert y.shape == shape
    for name in ("integrators", "rng_counter", "overload_count", "state_peak"):
        np.testing.assert_array_equal(getattr(after, name), getattr(state, name))
    assert after.samples == state.samples
    # from rest too, and through trace_states
    y, fresh = mod.run(np.zeros(shape))
    assert y.shape == shape and fresh.samples == 0
    y, states = mod.trace_states(np.zeros(shape))
    assert y.shape == shape and states.shape[0] == 0


def test_scaled_quantizer_state_needs_a_single_bit_feedback_loop():
    ntf = NoiseTransfer.designed(4, osr=64)
    peaks = np.array([0.5, 0.7, 0.9, 2.0])
    loop = LoopRealization.for_ntf(ntf, structure="feedback").rescaled(
        peaks, include_quantizer_state=True
    )
    assert loop.output_weight[-1] == 2.0
    Modulator(loop, levels=2)  # fine
    with pytest.raises(ParameterError, match="levels"):
        Modulator(loop, levels=3)
    with pytest.raises(ParameterError, match="include_quantizer_state"):
        LoopRealization.for_ntf(ntf, structure="error-feedback").rescaled(
            peaks, include_quantizer_state=True
        )
    # without the option the quantizer-facing state keeps its size
    assert LoopRealization.for_ntf(ntf, structure="feedback").rescaled(peaks).state_scale[-1] == 1.0


@pytest.mark.parametrize("shape", [(5000,), (5000, 2)])
def test_run_into_a_given_buffer(shape, rng):
    mod = Modulator(NoiseTransfer.designed(4, osr=64), levels=3, dither_lsb=0.5)
    x = 0.4 * rng.standard_normal(shape)
    y, st = mod.run(x)
    buf = np.full(shape, 7.0)
    y2, st2 = mod.run(x, out=buf)
    assert y2 is buf
    np.testing.assert_array_equal(y2, y)
    np.testing.assert_array_equal(st2.integrators, st.integrators)
    # a strided view is written too
    wide = np.zeros((shape[0], 2 * (shape[1] if len(shape) == 2 else 1)))
    view = wide[:, ::2] if len(shape) == 2 else wide[:, 0]
    y3, _ = mod.run(x, out=view)
    assert y3 is view
    np.testing.assert_array_equal(view, y)
    for bad in (np.empty(shape, dtype=np.float32), np.empty((shape[0] + 1, *shape[1:])), [0.0]):
        with pytest.raises(ParameterError, match="out"):
            mod.run(x, out=bad)
    frozen = np.empty(shape)
    frozen.setflags(write=False)
    with pytest.raises(ParameterError, match="out"):
        mod.run(x, out=frozen)


def test_non_finite_sample_is_found_in_any_block_and_channel():
    mod = Modulator(NoiseTransfer.designed(5, osr=64))
    x = np.zeros((300_000, 2))
    x[250_001, 1] = np.nan
    x[260_000, 0] = np.inf
    with pytest.raises(ParameterError, match="frame 260000"):  # channel 0 is reported first
        mod.run(x)
    with pytest.raises(ParameterError, match="frame 250001"):
        mod.run(x[:, 1].copy())
    with pytest.raises(ParameterError, match="frame 250001"):
        mod.trace_states(x[:, 1].copy())
