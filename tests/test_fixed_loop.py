"""Tests of the bit-true fixed-point loop (stages/fixed_loop.py, stages/_fixed_kernels.py)."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from audiodsm.design.fixed_point import (
    FixedPointFormat,
    NodeFormat,
    node_noise_gains,
    rounding_noise_power,
)
from audiodsm.errors import ParameterError
from audiodsm.profile import parse_profile
from audiodsm.stages.chain import Chain
from audiodsm.stages.fixed_loop import FixedPointModulator, in_band_noise_power, quantize_words

# ---------------------------------------------------------------------------------------------
# The slow twin: exact rational arithmetic, rounding written from the rules' definitions
# ---------------------------------------------------------------------------------------------


def _round_rule(value: Fraction, rule: str) -> int:
    """Round an exact rational to an integer by the rule's definition."""
    if rule == "truncate":
        return math.floor(value)
    if rule == "round-half-up":
        return math.floor(value + Fraction(1, 2))
    low = math.floor(value)
    rest = value - low
    if rest > Fraction(1, 2) or (rest == Fraction(1, 2) and low % 2 == 1):
        return low + 1
    return low


def _fit(word: int, node: NodeFormat) -> int:
    hi = 2 ** (node.word_bits - 1) - 1
    lo = -hi - 1
    if lo <= word <= hi:
        return word
    if node.overflow == "saturate":
        return hi if word > hi else lo
    span = 2**node.word_bits
    return (word - lo) % span + lo


_MASK64 = 2**64 - 1


def _splitmix_output(z: int) -> int:
    # SplitMix64's output function (Steele, Lea & Flood, OOPSLA 2014), in Python integers
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK64
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK64
    return z ^ (z >> 31)


def twin_dither(fx: FixedPointModulator, n: int, counter: int):
    """The float loop's TPDF dither as last-state words, from its definition: per sample two
    SplitMix64 draws of the counter advanced by the golden-ratio increment, r = top 53 bits /
    2**53, d = dither_lsb * step / g * (r1 - r2), word = floor(d * 2**F)."""
    g = float(fx.loop.output_weight[-1]) if fx.levels == 2 else 1.0
    scale = fx.dither_lsb * (2.0 / (fx.levels - 1)) / g
    f_last = fx.format.states[-1].fraction_bits
    out = []
    for _ in range(n):
        counter = (counter + 0x9E3779B97F4A7C15) & _MASK64
        r1 = float(_splitmix_output(counter) >> 11) / 2.0**53
        counter = (counter + 0x9E3779B97F4A7C15) & _MASK64
        r2 = float(_splitmix_output(counter) >> 11) / 2.0**53
        out.append(math.floor(scale * (r1 - r2) * 2.0**f_last))
    return out


def twin_run(fx: FixedPointModulator, words, state=None, dither=None):
    """The fixed-point loop in Python integers and Fractions (values, not shifts)."""
    fmt = fx.format
    n = fmt.order
    fc = Fraction(1, 2**fmt.coefficient_fraction_bits)
    c = {row: [Fraction(v) * fc for v in vals] for row, vals in fx.coefficients.items()}
    step = [Fraction(1, 2**s.fraction_bits) for s in fmt.states]
    u_step = Fraction(1, 2**fmt.input.fraction_bits)
    x = [Fraction(0)] * n if state is None else list(state)
    levels = fx.levels
    out = []
    for t, u in enumerate(words):
        y = x[-1]
        if dither is not None:
            y += dither[t] * step[-1]
        if levels == 2:
            q = 1 if y >= 0 else 0
        else:
            half = Fraction(levels - 1, 2)
            q = min(max(math.floor(y * half + half + Fraction(1, 2)), 0), levels - 1)
        v = Fraction(2 * q, levels - 1) - 1
        out.append(q)
        new = list(x)
        for i in range(n - 1, -1, -1):
            prev = c["chain_gain"][i] * x[i - 1] if i > 0 else c["input_gain"][0] * u * u_step
            acc = c["leak"][i] * x[i] + prev - c["feedback"][i] * v
            if i < n - 1:
                acc -= c["resonator"][i] * new[i + 1]
            word = _fit(_round_rule(acc / step[i], fmt.states[i].rounding), fmt.states[i])
            new[i] = word * step[i]
        x = new
    return np.array(out), x


def _loop(order=3, structure="feedback"):
    # A loop built from the realization layer (one place; switch with the design-layer rename)
    from audiodsm.design.ntf import NoiseTransfer
    from audiodsm.design.realize import LoopRealization

    ntf = NoiseTransfer.designed(order, osr=32, out_of_band_gain=1.5)
    return LoopRealization.for_ntf(ntf, structure=structure)


def _mixed_format(order):
    rules = ["truncate", "round-half-up", "convergent"]
    states = tuple(
        NodeFormat(
            f"state {i + 1}", 1 + i % 2, 9 + 2 * i, rules[i % 3], ("saturate", "wrap")[i % 2]
        )
        for i in range(order)
    )
    return FixedPointFormat(
        input=NodeFormat("input", 0, 12, "convergent", "saturate"),
        states=states,
        coefficient_fraction_bits=10,
        coefficient_digits=3,
    )


@pytest.mark.parametrize("levels", [2, 9])
def test_kernel_equals_exact_twin(levels):
    loop = _loop(4)
    fmt = _mixed_format(4)
    fx = FixedPointModulator(loop, fmt, levels)
    rng = np.random.default_rng(3)
    x = 0.6 * np.sin(2 * np.pi * 0.004 * np.arange(3000)) + 0.05 * rng.standard_normal(3000)
    words = fx.input_words(x)
    q, st = fx.run_words(words)
    q_twin, x_twin = twin_run(fx, words)
    np.testing.assert_array_equal(q, q_twin)
    steps = [Fraction(1, 2**s.fraction_bits) for s in fmt.states]
    assert [int(v / s) for v, s in zip(x_twin, steps, strict=True)] == list(st.words)


@pytest.mark.parametrize("levels", [2, 9])
def test_dithered_kernel_equals_exact_twin(levels):
    # the float loop's dither sequence, as words of the last state, joins it at the quantizer
    loop = _loop(4)
    fmt = _mixed_format(4)
    fx = FixedPointModulator(loop, fmt, levels, dither_lsb=0.5, seed=7)
    x = 0.3 * np.sin(2 * np.pi * 0.004 * np.arange(3000))
    words = fx.input_words(x)
    q, st = fx.run_words(words)
    start = fx.initial_state().dither_counter
    dither = twin_dither(fx, len(words), start)
    assert dither == list(fx.dither_words(len(words), start)[0])
    q_twin, x_twin = twin_run(fx, words, dither=dither)
    np.testing.assert_array_equal(q, q_twin)
    steps = [Fraction(1, 2**s.fraction_bits) for s in fmt.states]
    assert [int(v / s) for v, s in zip(x_twin, steps, strict=True)] == list(st.words)
    undithered, _ = FixedPointModulator(loop, fmt, levels).run_words(words)
    assert np.any(undithered != q)  # the dither acted
    # streamed: the counter goes on from block to block
    q1, s1 = fx.run_words(words[:1111])
    q2, s2 = fx.run_words(words[1111:], s1)
    np.testing.assert_array_equal(np.r_[q1, q2], q)
    assert s2.dither_counter == st.dither_counter
    y, _ = fx.run(x)
    np.testing.assert_array_equal(y, fx.levels_from_indices(q))


def test_dither_is_triangular_with_the_float_loops_seeding():
    # TPDF of peak dither_lsb steps: the words over 2**F are triangular on +-peak
    # (scipy.stats.triang, Kolmogorov-Smirnov); the first channel's seed of the float loop
    from scipy import stats

    from audiodsm.stages.modulator import Modulator

    loop = _loop(3)
    fmt = FixedPointFormat.uniform(3, fraction_bits=30)
    fx = FixedPointModulator(loop, fmt, 2, dither_lsb=1.0, seed=3)
    st = fx.initial_state()
    assert st.dither_counter == int(
        Modulator(loop, dither_lsb=1.0, seed=3).initial_state(1).rng_counter[0]
    )
    words, _ = fx.dither_words(20000, st.dither_counter)
    peak = 1.0 * 2.0 / float(loop.output_weight[-1])  # dither_lsb x step / g, state units
    values = words / 2.0**30
    assert np.max(np.abs(values)) <= peak
    p = stats.kstest(values, stats.triang(c=0.5, loc=-peak, scale=2 * peak).cdf).pvalue
    assert p > 0.01


@pytest.mark.parametrize("levels", [2, 17])
def test_specialised_kernel_equals_the_generic_loop(levels):
    # run_words uses the loop written out for its format; the generic array-indexed loop
    # (the one the exact twin above reads like) must give the same words and state
    from audiodsm.stages import _fixed_kernels

    # (the 17-level case with dither)
    dither_lsb = 0.7 if levels == 17 else 0.0
    fx = FixedPointModulator(_loop(5), _mixed_format(5), levels, dither_lsb=dither_lsb)
    x = 0.8 * np.sin(2 * np.pi * 0.0037 * np.arange(5000))
    words = fx.input_words(x)
    q, st = fx.run_words(words)
    out = np.empty(len(words), dtype=np.int64)
    state = np.zeros(5, dtype=np.int64)
    peaks = np.zeros(5, dtype=np.int64)
    counts = np.zeros(5, dtype=np.int64)
    _fixed_kernels.fixed_feedback_loop(
        words,
        out,
        fx._coef,
        fx._shifts,
        fx._rules,
        state,
        peaks,
        counts,
        fx._quantizer,
        fx.dither_words(len(words), fx.initial_state().dither_counter)[0]
        if dither_lsb
        else np.zeros(0, dtype=np.int64),
    )
    np.testing.assert_array_equal(out, q)
    np.testing.assert_array_equal(state, st.words)
    np.testing.assert_array_equal(peaks, st.peak_words)
    np.testing.assert_array_equal(counts, st.overflow_count)
    assert counts.sum() > 0  # the wrap and saturate branches ran


def test_overflow_rules_act_like_their_twin():
    loop = _loop(3)
    fmt = FixedPointFormat.uniform(3, integer_bits=0, fraction_bits=10, overflow="wrap")
    fx = FixedPointModulator(loop, fmt, 2)
    x = 0.9 * np.sin(2 * np.pi * 0.003 * np.arange(2000))
    words = fx.input_words(x)
    q, st = fx.run_words(words)
    assert st.overflow_count.sum() > 0
    np.testing.assert_array_equal(q, twin_run(fx, words)[0])


def test_block_runs_equal_one_run():
    fx = FixedPointModulator(_loop(5), FixedPointFormat.uniform(5), 17)
    # 80000 samples: run() itself works in chunks of 32768, so both sides cross chunk edges
    x = 0.5 * np.sin(2 * np.pi * 0.0021 * np.arange(80000))
    y, st = fx.run(x)
    parts, s = [], None
    for a, b in [(0, 1), (1, 777), (777, 777), (777, 40001), (40001, 80000)]:
        yy, s = fx.run(x[a:b], s)
        parts.append(yy)
    np.testing.assert_array_equal(np.concatenate(parts), y)
    np.testing.assert_array_equal(s.words, st.words)
    np.testing.assert_array_equal(s.peak_words, st.peak_words)
    assert s.samples == 80000
    q, _ = fx.run_words(fx.input_words(x))  # and run() is run_words on the input words
    np.testing.assert_array_equal(fx.levels_from_indices(q), y)


def test_input_words_follow_the_rules():
    node = NodeFormat("input", 0, 2, "truncate", "saturate")
    x = np.array([0.375, -0.375, 0.125, 0.625, 5.0, -5.0])
    np.testing.assert_array_equal(quantize_words(x, node), [1, -2, 0, 2, 3, -4])
    node = NodeFormat("input", 0, 2, "round-half-up", "saturate")
    np.testing.assert_array_equal(quantize_words(x, node), [2, -1, 1, 3, 3, -4])
    node = NodeFormat("input", 0, 2, "convergent", "wrap")
    # 0.375*4 = 1.5 -> 2 (even); -1.5 -> -2; 0.5 -> 0; 2.5 -> 2; 20 wraps in 3 bits to -4
    np.testing.assert_array_equal(quantize_words(x, node), [2, -2, 0, 2, -4, -4])


@pytest.mark.parametrize("rule", ["truncate", "round-half-up", "convergent"])
@pytest.mark.parametrize("overflow", ["saturate", "wrap"])
def test_input_words_equal_a_numpy_twin(rule, overflow):
    node = NodeFormat("input", 0, 6, rule, overflow)
    rng = np.random.default_rng(5)
    # random values, exact ties (k + 1/2 steps, both signs) and out-of-range values
    x = np.r_[rng.uniform(-1.5, 1.5, 4000), np.arange(-70, 70) / 64.0 + 1 / 128.0]
    s = x * 64.0
    words = {"truncate": np.floor(s), "round-half-up": np.floor(s + 0.5), "convergent": np.round(s)}
    w = words[rule]  # numpy's round is half to even
    if overflow == "saturate":  # a 7-bit word: sign, no integer bits, 6 fractional bits
        w = np.clip(w, -64, 63)
    else:
        w = (w.astype(np.int64) + 64) % 128 - 64
    assert np.count_nonzero(s % 1.0 == 0.5) >= 100  # the ties are there
    np.testing.assert_array_equal(quantize_words(x, node), w.astype(np.int64))


@pytest.mark.parametrize("rule", ["truncate", "round-half-up", "convergent"])
@pytest.mark.parametrize("overflow", ["saturate", "wrap"])
@pytest.mark.parametrize("levels", [2, 9])
def test_run_on_floats_equals_run_words_on_its_input_words(rule, overflow, levels):
    # run() fits the input to its word inside the compiled loop; that must be input_words'
    # fit exactly (ties and out-of-range samples included), across block and call edges, and
    # with the overflow rules acting (the blocks run again with the rules on)
    fmt = _mixed_format(4)
    fmt = FixedPointFormat(
        input=NodeFormat("input", 0, 7, rule, overflow),
        states=fmt.states,
        coefficient_fraction_bits=fmt.coefficient_fraction_bits,
        coefficient_digits=fmt.coefficient_digits,
    )
    fx = FixedPointModulator(_loop(4), fmt, levels)
    rng = np.random.default_rng(11)
    x = np.r_[rng.uniform(-1.2, 1.2, 3000), (np.arange(-140, 140) + 0.5) / 128.0]
    x = np.tile(x, 2)
    y, st = fx.run(x)
    q, st_words = fx.run_words(quantize_words(x, fmt.input))
    np.testing.assert_array_equal(y, fx.levels_from_indices(q))
    for field in ("words", "peak_words", "overflow_count"):
        np.testing.assert_array_equal(getattr(st, field), getattr(st_words, field))
    assert st.overflow_count.sum() > 0
    buffer = np.full(len(x), np.nan)
    y1, s1 = fx.run(x[:1500], out=buffer[:1500])
    y2, s2 = fx.run(x[1500:], s1, out=buffer[1500:])
    assert y1.base is buffer and y2.base is buffer  # the caller's buffer, written in place
    np.testing.assert_array_equal(buffer, y)
    np.testing.assert_array_equal(s2.words, st.words)


def test_refusals():
    loop = _loop(3)
    fx = FixedPointModulator(loop, FixedPointFormat.uniform(3))
    top = (1 << (fx.format.input.word_bits - 1)) - 1
    words = np.zeros(5000, dtype=np.int64)
    words[4500] = top + 1  # past the first block of the compiled loop
    with pytest.raises(ParameterError, match="outside the input word"):
        fx.run_words(words)
    words[4500] = -top - 1
    fx.run_words(words)  # the most negative word is in range
    with pytest.raises(ParameterError, match="out"):
        fx.run(np.zeros(10), out=np.zeros(9))
    with pytest.raises(ParameterError, match="structure"):
        FixedPointModulator(_loop(3, "feedforward"), FixedPointFormat.uniform(3))
    with pytest.raises(ParameterError, match="fmt.states"):
        FixedPointModulator(loop, FixedPointFormat.uniform(4))
    with pytest.raises(ParameterError, match="levels"):
        FixedPointModulator(loop, FixedPointFormat.uniform(3), 16)
    big = FixedPointFormat.uniform(
        3, integer_bits=8, fraction_bits=40, coefficient_fraction_bits=30
    )
    with pytest.raises(ParameterError, match="state 1 accumulator"):
        FixedPointModulator(loop, big)


# ---------------------------------------------------------------------------------------------
# Against the float loop and the classic rounding-noise model
# ---------------------------------------------------------------------------------------------

OSR = 64
N = 1 << 21
# a coherent tone at 0.6 of the band edge: its harmonics fall out of band, so what is left in
# band is the loop's shaped noise
TONE_BIN = int(N / OSR / 2 * 0.6) | 1


@pytest.fixture(scope="module")
def chain_loop():
    """The state-scaled 5th-order single-bit feedback loop a chain builds, and its float twin.

    Zeros placed for the whole 24 kHz band (0.5/osr): with the default 20 kHz placement the
    resonator gains are so small that 7 fractional bits round them to 0 and every zero falls
    to DC, where no sub-band noise reading can tell the two NTFs apart.
    """
    profile = parse_profile(
        '[upsampler]\nosr = 64\n[modulator]\norder = 5\nstructure = "feedback"\nlevels = 2\n'
        "zero_band_edge_hz = 24000.0\n"
    )
    chain = Chain.from_profile(profile, 48000, 1)
    return chain.modulator


@pytest.fixture(scope="module")
def tone():
    return 0.5 * np.sin(2 * np.pi * TONE_BIN / N * np.arange(N))


def _ample(order):
    return FixedPointFormat.uniform(
        order,
        integer_bits=2,
        fraction_bits=32,
        input_fraction_bits=30,
        coefficient_fraction_bits=20,
    )


@pytest.fixture(scope="module")
def ample_run(chain_loop, tone):
    fx = FixedPointModulator(chain_loop.loop, _ample(chain_loop.order), 2)
    y, st = fx.run(tone)
    assert st.overflow_count.sum() == 0
    return fx, in_band_noise_power(y, osr=OSR, tone_bin=TONE_BIN)


def test_ample_words_give_the_float_loops_in_band_noise(chain_loop):
    # with 32 fractional bits per state and 20 per coefficient the fixed-point loop is the float
    # loop up to rounding far below its own quantization noise: same in-band noise within
    # 0.2 dB. The two loops part after a few hundred samples (a single-bit loop is chaotic), so
    # each run is a fresh draw that scatters by about +-0.15 dB at 2**21 samples; the powers of
    # four tones are summed, which brings the scatter to a few hundredths of a dB.
    fx = FixedPointModulator(chain_loop.loop, _ample(chain_loop.order), 2)
    p_fixed = p_float = 0.0
    for fraction in (0.55, 0.6, 0.7, 0.8):  # of the band edge: harmonics fall out of band
        tone_bin = int(N / OSR / 2 * fraction) | 1
        x = 0.5 * np.sin(2 * np.pi * tone_bin / N * np.arange(N))
        y_fixed, st = fx.run(x)
        assert st.overflow_count.sum() == 0
        p_fixed += in_band_noise_power(y_fixed, osr=OSR, tone_bin=tone_bin)
        p_float += in_band_noise_power(chain_loop.run(x)[0], osr=OSR, tone_bin=tone_bin)
    assert abs(10 * np.log10(p_fixed / p_float)) < 0.2


def test_ample_words_with_dither_give_the_dithered_float_loop(chain_loop):
    # the same dither (seed and sequence) in both: the loops take the same decisions until the
    # chaos parts them (here after about 100 samples, as without dither; with another seed
    # they part within a few), and their in-band noise agrees within 0.2 dB (two tones, as
    # above)
    from audiodsm.stages.modulator import Modulator

    dither_lsb = 0.1
    fx = FixedPointModulator(
        chain_loop.loop, _ample(chain_loop.order), 2, dither_lsb=dither_lsb, seed=5
    )
    flt = Modulator(chain_loop.loop, levels=2, dither_lsb=dither_lsb, seed=5)
    other = Modulator(chain_loop.loop, levels=2, dither_lsb=dither_lsb, seed=6)
    p_fixed = p_float = 0.0
    for fraction in (0.6, 0.7):
        tone_bin = int(N / OSR / 2 * fraction) | 1
        x = 0.25 * np.sin(2 * np.pi * tone_bin / N * np.arange(N))  # well inside the stable range
        y_fixed, st = fx.run(x)
        y_float, st_float = flt.run(x)
        assert st.overload_count == 0 and st_float.overload_count == 0
        np.testing.assert_array_equal(y_fixed[:50], y_float[:50])
        assert np.any(other.run(x[:50])[0] != y_float[:50])  # another seed: not so
        p_fixed += in_band_noise_power(y_fixed, osr=OSR, tone_bin=tone_bin)
        p_float += in_band_noise_power(y_float, osr=OSR, tone_bin=tone_bin)
    assert abs(10 * np.log10(p_fixed / p_float)) < 0.2


@pytest.mark.parametrize(
    ("node", "rule"),
    [
        (0, "truncate"),
        (0, "round-half-up"),
        (1, "convergent"),
        (2, "truncate"),
        (4, "round-half-up"),
    ],
)
def test_removing_bits_at_one_node_adds_the_classic_rounding_noise(
    chain_loop, tone, ample_run, node, rule
):
    # Widrow & Kollar 2008 (Quantization Noise): a rounding adds a white error of power
    # step^2/12, truncation also a mean of -step/2; at the output that is step^2/12 times the
    # node's in-band power gain plus (step/2 * H(0))^2. The bits are chosen so the added noise
    # is about 15 dB over the loop's own; the model must hold within 1 dB.
    fx_ample, p_base = ample_run
    gains = node_noise_gains(fx_ample.quantized_loop, osr=OSR)
    gain, dc = gains.in_band_power_gain[node + 1], gains.dc_gain[node + 1]
    step_wanted = np.sqrt(p_base * 30.0 * 12.0 / gain)
    bits = int(np.round(-np.log2(step_wanted)))
    assert bits < 32  # bits really are removed
    fmt = _ample(chain_loop.order).with_state(node, fraction_bits=bits, rounding=rule)
    fx = FixedPointModulator(chain_loop.loop, fmt, 2)
    y, st = fx.run(tone)
    assert st.overflow_count.sum() == 0
    added = in_band_noise_power(y, osr=OSR, tone_bin=TONE_BIN) - p_base
    model = rounding_noise_power(2.0**-bits, rule, gain, dc)
    assert added > 3 * p_base
    assert abs(10 * np.log10(added / model)) < 1.0


def _sub_band_levels_db(y, response):
    """Welch spectrum of y in 8 sub-bands of the band, over sum |response|^2 there (dB)."""
    from scipy.signal import welch

    seg = 1 << 14
    f, p = welch(y, window=("kaiser", 20.0), nperseg=seg, noverlap=seg // 2, detrend=False)
    edges = np.linspace(0.0, 0.5 / OSR, 9)
    away = (np.abs(f - TONE_BIN / N) > 12 / seg) & (f > 8 / seg)
    out = []
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        sel = (f >= lo) & (f < hi) & away
        out.append(10 * np.log10(p[sel].sum() / np.sum(np.abs(response(f[sel])) ** 2)))
    out = np.array(out)
    return out - out.mean()


def test_realized_ntf_of_quantized_coefficients_predicts_the_spectrum(chain_loop, tone):
    # Coefficients cut to 7 fractional bits move the NTF's poles and zeros; the NTF computed
    # back from the quantized coefficients must predict the shape of the simulated in-band
    # noise (Welch average, 8 sub-bands) within 1 dB, where the designed NTF misses by far
    # more. The prediction is the linear model of the loop (Schreier & Temes 2005, ch. 4:
    # output noise = |NTF|^2 times the quantizer's error spectrum, taken as white).
    fmt = _ample(chain_loop.order)
    fmt = FixedPointFormat(fmt.input, fmt.states, coefficient_fraction_bits=7)
    fx = FixedPointModulator(chain_loop.loop, fmt, 2)
    y, st = fx.run(tone)
    assert st.overflow_count.sum() == 0
    realized = _realized_ntf(fx.quantized_loop)
    assert np.max(np.abs(_sub_band_levels_db(y, realized.response))) < 1.0
    assert np.max(np.abs(_sub_band_levels_db(y, chain_loop.loop.ntf.response))) > 3.0


def _realized_ntf(loop):
    # the design layer's name for the NTF computed back from a loop's coefficients
    return loop.realized_ntf()
