"""Tests of the fixed-point interpolator (stages/fixed_upsample.py, its kernel)."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from scipy import signal

from audiodsm.errors import ParameterError
from audiodsm.stages.fixed_loop import quantize_words
from audiodsm.stages.fixed_upsample import FixedInterpolatorFormat, FixedPointUpsampler
from audiodsm.stages.upsample import Upsampler, design_upsampler


@pytest.fixture(scope="module")
def design():
    # the chain's default interpolator at 48 kHz, 64x: five half-bands, a compensator and a
    # sinc^4 last stage of ratio 2
    return design_upsampler(48000.0, 64)


# ---------------------------------------------------------------------------------------------
# The slow twin: zero-stuffing and direct convolution in Python integers (not polyphase)
# ---------------------------------------------------------------------------------------------


def _round_rule(value: Fraction, rule: str) -> int:
    if rule == "truncate":
        return math.floor(value)
    if rule == "round-half-up":
        return math.floor(value + Fraction(1, 2))
    low = math.floor(value)
    rest = value - low
    return low + 1 if rest > Fraction(1, 2) or (rest == Fraction(1, 2) and low % 2 == 1) else low


def _fit(word: int, fmt: FixedInterpolatorFormat) -> int:
    bits = fmt.integer_bits + fmt.fraction_bits + 1
    hi, lo = 2 ** (bits - 1) - 1, -(2 ** (bits - 1))
    if lo <= word <= hi:
        return word
    if fmt.overflow == "saturate":
        return hi if word > hi else lo
    return (word - lo) % 2**bits + lo


def twin_words(fu: FixedPointUpsampler, words):
    """The fixed stages on input words: zero-stuff by R, convolve with the integer taps,
    round the exact sum by the rule's definition, fit the word."""
    fmt = fu.format
    scale = 2**fmt.coefficient_fraction_bits
    w = [int(v) for v in words]
    for taps, ratio in zip(fu.tap_integers, fu.fixed_stage_ratios, strict=True):
        stuffed = [0] * (len(w) * ratio)
        stuffed[::ratio] = w
        taps = [int(t) for t in taps]
        out = []
        for m in range(len(stuffed)):
            acc = sum(t * stuffed[m - j] for j, t in enumerate(taps) if m - j >= 0)
            out.append(_fit(_round_rule(Fraction(acc, scale), fmt.rounding), fmt))
        w = out
    return np.array(w, dtype=np.int64)


@pytest.mark.parametrize(
    ("rounding", "overflow", "digits"),
    [("truncate", "wrap", 0), ("round-half-up", "saturate", 3), ("convergent", "wrap", 0)],
)
def test_whole_cascade_equals_its_integer_twin(design, rounding, overflow, digits):
    # short words and loud input: the overflow rules act too
    fmt = FixedInterpolatorFormat(
        integer_bits=0,
        fraction_bits=9,
        coefficient_fraction_bits=8,
        coefficient_digits=digits,
        rounding=rounding,
        overflow=overflow,
    )
    fu = FixedPointUpsampler(design, fmt, "all")
    rng = np.random.default_rng(4)
    x = np.r_[0.99 * np.sign(np.sin(0.3 * np.arange(40))), rng.uniform(-1, 1, 40)]
    y, st = fu.process(x)
    expected = twin_words(fu, quantize_words(x, fmt.word))
    np.testing.assert_array_equal(np.round(y / fmt.step).astype(np.int64), expected)
    assert st.overflow_count > 0


def test_last_stage_equals_its_twin_after_the_float_stages(design):
    fmt = FixedInterpolatorFormat(fraction_bits=14, coefficient_fraction_bits=12)
    fu = FixedPointUpsampler(design, fmt, "last")
    assert len(fu.tap_integers) == 1 and fu.fixed_stage_ratios == [design.final_ratio]
    x = 0.7 * np.sin(2 * np.pi * 0.031 * np.arange(300))
    y, _ = fu.process(x)
    # the float stages ahead: the float interpolator without its last stage, bit for bit
    ahead = FixedPointUpsampler(design, fmt, "last")._float_prefix(
        x[:, None], np.zeros((len(fu._float._stages) - 1, 1, 200))
    )[0][:, 0]
    expected = twin_words(fu, quantize_words(ahead, fmt.word))
    np.testing.assert_array_equal(np.round(y / fmt.step).astype(np.int64), expected)


@pytest.mark.parametrize("scope", ["last", "all"])
def test_block_runs_equal_one_run(design, scope):
    fu = FixedPointUpsampler(design, FixedInterpolatorFormat(), scope)
    x = np.column_stack(
        [0.9 * np.sin(2 * np.pi * 0.01 * np.arange(3000)), np.linspace(-1, 1, 3000)]
    )
    y, st = fu.process(x)
    parts, s = [], None
    for a, b in [(0, 1), (1, 1), (1, 250), (250, 2999), (2999, 3000)]:
        yy, s = fu.process(x[a:b], s)
        parts.append(yy)
    np.testing.assert_array_equal(np.concatenate(parts), y)
    for h1, h2 in zip(s.word_histories, st.word_histories, strict=True):
        np.testing.assert_array_equal(h1, h2)
    assert y.shape == (3000 * 64, 2)


# ---------------------------------------------------------------------------------------------
# Against the float interpolator: a bound derived from the arithmetic, and the noise model
# ---------------------------------------------------------------------------------------------


def _float_stages(design, scope):
    from audiodsm.stages.fixed_upsample import _float_stage_taps

    stages = _float_stage_taps(design)
    return stages if scope == "all" else stages[-1:]


def _worst_case_bound(design, fu, x_peak):
    """Largest |fixed - float| output any input of peak ``x_peak`` can give.

    Stage s computes ``y = sum h x`` (one phase at a time); in fixed point ``Q(sum h' x')``
    with ``x' = x + e_in`` and ``h' = h + d``. So ``y' - y = sum h e_in + sum d x' + e_q``
    and ``|y' - y| <= A E + D M + q``, with A the largest phase sum of |h|, D that of |d|,
    M the largest |x'| and q the largest rounding error (half a step, a step for
    truncation). The input rounding gives E = q to start with. (A worst-case error bound as
    in Widrow & Kollar 2008, ch. 12, on the additive model of each rounding.)
    """
    fmt = fu.format
    q = fmt.step if fmt.rounding == "truncate" else 0.5 * fmt.step
    err, peak = q, x_peak + q
    for (taps, ratio), taps_q in zip(
        _float_stages(design, fu.scope), fu.quantized_taps, strict=True
    ):
        a = max(np.sum(np.abs(taps[p::ratio])) for p in range(ratio))
        d = max(np.sum(np.abs((taps_q - taps)[p::ratio])) for p in range(ratio))
        err = a * err + d * peak + q
        peak = a * peak + err
    return err


def _dropped_bits_noise(k_values: int, rule: str) -> float:
    """Mean-square error, in steps squared, of dropping bits that leave ``k_values`` possible
    remainders, equally likely (a signal already on a grid ``k_values`` times finer than the
    word): the error is then a discrete uniform variable. Rounding to nearest: values
    j/K for |j| < K/2 plus the tie +-1/2, so (K**2 + 2) / (12 K**2) (round half up: the same
    mean square, its mean 1/(2K) included); truncation: j/K for j = 0..K-1, so
    (K - 1)(2K - 1) / (6 K**2); no dropped bits (K = 1): 0. As K grows these tend to the
    continuous model's step**2/12 (and step**2/3 for truncation with its mean), Widrow &
    Kollar 2008, ch. 4-5; the discrete sums are elementary."""
    k = float(k_values)
    if k_values == 1:
        return 0.0
    if rule == "truncate":
        return (k - 1) * (2 * k - 1) / (6 * k * k)
    return (k * k + 2) / (12 * k * k)


def _noise_power(design, fu, input_continuous=True):
    """Mean output power of the roundings by the additive-noise model: each rounding adds an
    independent error (power from _dropped_bits_noise per output phase: a phase whose taps
    all end in t zero bits drops K = 2**(Fc - t) possible remainders; the float input's
    rounding: step**2/12, Widrow & Kollar 2008). A cascade of interpolators after it (taps
    h_j, ratios R_j) is one interpolator by R = prod R_j with G(z) = prod_j H_j(z**L_j) (L_j
    the ratio after stage j); independent input errors of mean power s2 come out with mean
    power s2 * sum(g**2) / R (Crochiere & Rabiner 1983, polyphase interpolators)."""
    fmt = fu.format
    fc = fmt.coefficient_fraction_bits
    stages = list(zip(fu.quantized_taps, fu.fixed_stage_ratios, strict=True))
    step2 = fmt.step**2
    sources = [step2 / 12.0 if fmt.rounding != "truncate" else step2 / 3.0]
    for ints, ratio in zip(fu.tap_integers, fu.fixed_stage_ratios, strict=True):
        per_phase = []
        for p in range(ratio):
            part = [int(v) for v in ints[p::ratio] if v != 0]
            zeros = min(min((v & -v).bit_length() - 1 for v in part), fc)
            per_phase.append(_dropped_bits_noise(2 ** (fc - zeros), fmt.rounding))
        sources.append(step2 * float(np.mean(per_phase)))
    total = 0.0
    for k, s2 in enumerate(sources):  # k = 0: the input's rounding; k: stage k's output
        rest = stages[k:]
        g = np.ones(1)
        later = int(np.prod([r for _, r in rest])) if rest else 1
        after = later
        for taps, ratio in rest:
            after //= ratio
            up = np.zeros((len(taps) - 1) * after + 1)
            up[::after] = taps
            g = np.convolve(g, up)
        total += s2 * float(np.sum(g**2)) / later
    return total


@pytest.mark.parametrize("scope", ["last", "all"])
def test_ample_words_equal_the_float_interpolator_within_the_bound(design, scope):
    fmt = FixedInterpolatorFormat(fraction_bits=20, coefficient_fraction_bits=34)
    fu = FixedPointUpsampler(design, fmt, scope)
    n = 6000
    x = 0.5 * np.sin(2 * np.pi * 997.0 / 48000.0 * np.arange(n) + 0.3)
    x += 0.3 * np.sin(2 * np.pi * 7123.0 / 48000.0 * np.arange(n))
    y_fixed, st = fu.process(x)
    y_float, _ = Upsampler(design).process(x)
    assert st.overflow_count == 0
    err = y_fixed - y_float
    bound = _worst_case_bound(design, fu, float(np.max(np.abs(x))))
    assert np.max(np.abs(err)) <= bound
    assert bound < 2e-4 if scope == "all" else bound < 4 * fmt.step
    # and its power is the rounding noise the model predicts (coefficient error ~1e-9 here,
    # far under it), within 0.3 dB; the first 100 input samples (the filters fill) left out
    measured = float(np.mean(err[100 * 64 :] ** 2))
    predicted = _noise_power(design, fu)
    assert abs(10 * np.log10(measured / predicted)) < 0.3


def test_image_rejection_with_coarse_taps_is_what_freqz_predicts(design):
    # 8-bit taps raise the first image (fs - f0, the first half-band's stopband) far above
    # the float design's 100 dB; the simulated image equals the one scipy.signal.freqz
    # computes from the quantized taps of every stage (each at its own rate), within 0.5 dB
    fmt = FixedInterpolatorFormat(fraction_bits=30, coefficient_fraction_bits=8)
    fu = FixedPointUpsampler(design, fmt, "all")
    rate, osr = 48000.0, 64
    window, k, settle = 8192, 1001, 512
    f0 = k * rate / window
    n = settle + window + 256
    x = 0.5 * np.sin(2 * np.pi * f0 / rate * np.arange(n))
    y, _ = fu.process(x)
    seg = y[settle * osr : (settle + window) * osr]
    spec = np.abs(np.fft.rfft(seg))  # coherent: the tone and its images sit on bins
    measured_db = 20 * np.log10(spec[window - k] / spec[k])

    def response(taps_list, freq_hz):
        h = 1.0
        stage_rate = rate
        for taps, ratio in zip(taps_list, fu.fixed_stage_ratios, strict=True):
            stage_rate *= ratio
            _, resp = signal.freqz(taps, worN=[freq_hz], fs=stage_rate)
            h *= abs(resp[0])
        return h

    img = rate - f0
    predicted_db = 20 * np.log10(response(fu.quantized_taps, img) / response(fu.quantized_taps, f0))
    designed = [t for t, _ in _float_stages(design, "all")]
    designed_db = 20 * np.log10(response(designed, img) / response(designed, f0))
    assert abs(measured_db - predicted_db) < 0.5
    assert predicted_db > designed_db + 10  # the quantized taps, not the design, decide it


def test_refusals(design):
    with pytest.raises(ParameterError, match="scope"):
        FixedPointUpsampler(design, FixedInterpolatorFormat(), "float")
    with pytest.raises(ParameterError, match="rounding"):
        FixedInterpolatorFormat(rounding="nearest")
    with pytest.raises(ParameterError, match="fraction_bits"):
        FixedInterpolatorFormat(integer_bits=8, fraction_bits=48)
    with pytest.raises(ParameterError, match="coefficient_fraction_bits"):
        FixedPointUpsampler(
            design, FixedInterpolatorFormat(fraction_bits=40, coefficient_fraction_bits=30)
        )


@pytest.mark.parametrize("scope", ["last", "all"])
def test_chain_runs_the_fixed_point_interpolator(scope):
    # fixed_point.interpolator puts the integer interpolator into the chain's signal path
    # (ahead of the integer loop): the modulator output is the two models', bit for bit
    from audiodsm.profile import parse_profile
    from audiodsm.signals import sine
    from audiodsm.stages.chain import Chain, run_chain

    prof = parse_profile(
        '[upsampler]\nosr = 64\n[modulator]\norder = 3\nstructure = "feedback"\n'
        "[fixed_point]\nstate_integer_bits = [1, 1, 1]\nstate_fraction_bits = [20, 20, 20]\n"
        f'interpolator = "{scope}"\ninterpolator_fraction_bits = 18\n'
        "interpolator_coefficient_fraction_bits = 14\n"
    )
    x = sine(997.0, -6.0, rate_hz=48000, duration_s=0.02)
    res = run_chain(prof, x, rate_hz=48000, keep=("modulator",))
    chain = Chain.from_profile(prof, 48000, 1)
    fu = FixedPointUpsampler(chain.upsampler_design, FixedInterpolatorFormat(1, 18, 14), scope)
    xq = chain.requantizer.process(x[:, None])[0][:, 0]
    xu, _ = fu.process(xq * chain.input_scale)
    assert np.array_equal(xu, np.round(xu * 2.0**18) / 2.0**18)  # 18-bit words
    expected, _ = chain.fixed_loop.run(xu)
    np.testing.assert_array_equal(np.asarray(res.modulator, dtype=float).reshape(-1), expected)
    with pytest.raises(Exception, match="interpolator"):
        parse_profile(
            '[upsampler]\nosr = 64\n[modulator]\norder = 3\nstructure = "feedback"\n'
            '[fixed_point]\ninterpolator = "all"\n'
        )
