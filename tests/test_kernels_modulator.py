"""Modulator kernels against their slow pure-Python twin, operation for operation."""

import dataclasses
import math

import numpy as np
import pytest

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.design.realize import STRUCTURES, LoopRealization
from audiodsm.stages import _kernels
from audiodsm.stages.modulator import _kernel_key

MASK = (1 << 64) - 1
GOLDEN = 0x9E3779B97F4A7C15
CODES = {"feedback": 0, "feedforward": 1, "error-feedback": 2, "feedforward-feed-in": 3}


def unit_from_counter(counter):
    """SplitMix64 output function (Steele, Lea & Flood, OOPSLA 2014) -> [0, 1)."""
    z = counter & MASK
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & MASK
    z ^= z >> 31
    return float(z >> 11) * (1.0 / 9007199254740992.0)


def clamp(x, bound):
    if x > bound:
        return bound
    if x < -bound:
        return -bound
    return x if x == x else 0.0


def twin(u, coef, state, counter, peaks, count, structure, levels, dscale, ib, sb, reset):
    """Slow reference of loop_any_structure, written from the rule in design/realize.py."""
    d, k, g, a, b, c = (list(map(float, row)) for row in coef)
    n = len(state)
    x = [float(v) for v in state]
    peaks = [float(v) for v in peaks]
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    out = []
    trace = []
    for ut in map(float, u):
        if structure == 0:
            y = x[-1]
        elif structure in (1, 3):  # 3: feedforward with the input fed to the quantizer
            y = ut if structure == 3 else 0.0
            for i in range(n):
                y = y + c[i] * x[i]
        else:
            y = ut + x[-1]
        w = y
        if dscale != 0.0:
            counter = (counter + GOLDEN) & MASK
            r1 = unit_from_counter(counter)
            counter = (counter + GOLDEN) & MASK
            r2 = unit_from_counter(counter)
            w = y + dscale * (r1 - r2)
        if levels == 2:
            v = math.copysign(1.0, w)
        else:
            q = min(max(math.floor(w * half + offset), 0.0), top)
            v = q * step - 1.0
        out.append(v)
        fed = x[-1] + (v - y) if structure == 2 else v
        new = list(x)
        for i in range(n - 1, -1, -1):
            prev = k[i] * x[i - 1] if i > 0 else b[0] * ut
            acc = d[i] * x[i] + prev
            if levels != 2 and structure != 2:
                acc = (acc + a[i]) - q * (a[i] * step)  # = acc - a[i] * v, rounded this way
            else:
                acc = acc - a[i] * fed
            if i < n - 1:
                acc = acc - g[i] * new[i + 1]
            new[i] = acc
        x = new
        ok = abs(y) <= ib and all(abs(v_) <= sb for v_ in x)
        if not ok:
            count += 1
            x = [0.0] * n if reset else [clamp(v_, sb) for v_ in x]
        elif levels != 2 and abs(w) > 1.0 + 0.5 * step:
            count += 1  # the multi-level quantizer clipped: more than half a step past +-1
        peaks = [max(p, abs(v_)) for p, v_ in zip(peaks, x, strict=True)]
        trace.append(list(x))
    return np.array(out), np.array(x), counter, np.array(peaks), count, np.array(trace)


def coefficients(loop):
    return np.ascontiguousarray(
        np.vstack(
            [
                loop.leak,
                loop.chain_gain,
                loop.resonator,
                loop.feedback,
                loop.input_gain,
                loop.output_weight,
            ]
        )
    )


def run_kernel(fast, loop, u, levels, dscale, ib, sb, reset, start):
    n = loop.order
    out = np.empty(len(u))
    st = np.array(start, dtype=float)
    rng = np.array([12345], dtype=np.uint64)
    pk = np.zeros(n)
    cnt = np.zeros(1, dtype=np.int64)
    tr = np.empty((len(u), n))
    coef = coefficients(loop)
    if fast:
        kernel = _kernels.loop_kernel(*fast)
        kernel(u, out, coef, st, rng, pk, cnt, levels, dscale, ib, sb, reset)
        tr = None
    else:
        code = CODES[loop.structure]
        _kernels.loop_any_structure(
            u, out, coef, st, rng, pk, cnt, code, levels, dscale, ib, sb, reset, tr
        )
    return out, st, int(rng[0]), pk, int(cnt[0]), tr


CASES = [
    # (levels, dither in LSB, input bound, state bound, reset)
    (2, 0.0, 8.0, 1e6, True),
    (17, 0.0, 8.0, 1e6, True),
    (5, 1.0, 8.0, 1e6, False),
    (2, 0.3, 8.0, 1e6, True),
    (3, 0.0, 1.0, 0.05, True),  # tight bounds: the guard acts often (reset)
    (2, 0.0, 1.0, 0.05, False),  # tight bounds: the guard acts often (clamp)
]


def make_loop(order, structure, kind, rng):
    """A realized loop: as designed, scaled (chain gains != 1) or with leaky zeros."""
    if kind == "leaky":
        zeros = 0.99 * NoiseTransfer.designed(order, osr=32).zeros
        ntf = NoiseTransfer.from_roots(
            zeros=zeros, poles=NoiseTransfer.designed(order, osr=32, out_of_band_gain=1.7).poles
        )
        return LoopRealization.for_ntf(ntf, structure=structure)
    ntf = NoiseTransfer.designed(
        order,
        osr=32,
        out_of_band_gain=1.5 + 0.2 * (order % 3),
        zero_layout=("spread" if order % 2 == 0 else "dc"),
    )
    loop = LoopRealization.for_ntf(ntf, structure=structure)
    if kind == "scaled":
        loop = loop.rescaled(rng.uniform(0.5, 4.0, order))
    return loop


# The generic loop for every order and structure; the specialised kernels for every order of
# the feedback structure (the fast path) and a spread of orders of the others, as designed,
# scaled (chain gains != 1) and with leaky zeros. Each specialised kernel compiles once (then
# numba's cache serves it), so the set is kept to what exercises different template branches.
CASES_BY_STRUCTURE = [("feedback", order, "designed") for order in range(1, 9)]
CASES_BY_STRUCTURE += [("feedback", 3, "scaled"), ("feedback", 8, "leaky")]
for _structure in STRUCTURES[1:]:  # feedforward, error feedback
    CASES_BY_STRUCTURE += [(_structure, order, "designed") for order in (1, 2, 5)]
    CASES_BY_STRUCTURE += [(_structure, 3, "scaled"), (_structure, 8, "leaky")]


@pytest.mark.parametrize(("structure", "order", "kind"), CASES_BY_STRUCTURE)
def test_kernels_equal_python_twin(structure, order, kind, rng):
    loop = make_loop(order, structure, kind, rng)
    u = 0.5 * np.sin(np.arange(300) * 0.05) + 0.05 * rng.standard_normal(300)
    start = 0.01 * rng.standard_normal(order)
    for levels, dither, ib, sb, reset in CASES:
        dscale = dither * 2.0 / (levels - 1)
        expected = twin(
            u,
            coefficients(loop),
            start,
            12345,
            np.zeros(order),
            0,
            CODES[structure],
            levels,
            dscale,
            ib,
            sb,
            reset,
        )
        # the generic loop, the specialised kernel that fits this loop, and (for a few orders)
        # the least specialised one
        kernels = [False, _kernel_key(loop)]
        if kind == "designed" and order in (1, 4) and structure == "feedback":
            kernels.append((structure, order, False, False, -1))
        for fast in kernels:
            got = run_kernel(fast, loop, u, levels, dscale, ib, sb, reset, start)
            np.testing.assert_array_equal(got[0], expected[0])  # outputs, bit for bit
            np.testing.assert_array_equal(got[1], expected[1])  # final states
            assert got[2] == expected[2]  # generator counter
            np.testing.assert_array_equal(got[3], expected[3])  # peaks
            assert got[4] == expected[4]  # overload count
            if got[5] is not None:
                np.testing.assert_array_equal(got[5], expected[5])
        if ib < 2:
            assert expected[4] > 0  # the tight-bound cases really exercise the guard


def test_generator_matches_splitmix64_reference_values():
    # SplitMix64 reference: seeded with 0, the first outputs are 0xE220A8397B1DCDAF and
    # 0x6E789E6AA1B965F4 (Steele, Lea & Flood 2014 algorithm; values as printed by the
    # reference C implementation of splitmix64.c, from memory).
    z1 = unit_from_counter(GOLDEN)
    z2 = unit_from_counter(2 * GOLDEN)
    assert z1 == float(0xE220A8397B1DCDAF >> 11) / 2**53
    assert z2 == float(0x6E789E6AA1B965F4 >> 11) / 2**53
    with np.errstate(over="ignore"):  # uint64 wrap-around is the algorithm
        assert _kernels._unit_from_counter.py_func(np.uint64(GOLDEN)) == z1


def test_specialised_kernel_is_chosen_for_designed_loops():
    loop = LoopRealization.for_ntf(NoiseTransfer.designed(5, osr=64), structure="feedback")
    assert _kernel_key(loop) == ("feedback", 5, True, True, 2)
    loop = LoopRealization.for_ntf(
        NoiseTransfer.designed(4, osr=64, zero_layout="dc"), structure="error-feedback"
    )
    assert _kernel_key(loop) == ("error-feedback", 4, True, True, 0)
    scaled = LoopRealization.for_ntf(
        NoiseTransfer.designed(3, osr=64), structure="feedforward"
    ).rescaled([2.0, 3.0, 1.0])
    assert _kernel_key(scaled) == ("feedforward", 3, True, False, 1)


# The specialised kernels run their samples in blocks of LOOP_BLOCK: a block first runs
# without the guard and is run again with it when its peaks say the guard would have acted.
# Over several blocks, with a burst that overloads in the middle one only, the result must
# still be the twin's, bit for bit, for every quantizer and dither variant and structure.
@pytest.mark.parametrize("structure", STRUCTURES)
@pytest.mark.parametrize(("levels", "dither"), [(2, 0.0), (2, 0.5), (9, 0.0), (9, 1.0)])
def test_blocks_with_an_overload_in_one_equal_the_twin(structure, levels, dither, rng):
    loop = make_loop(4, structure, "scaled", rng)
    block = _kernels.LOOP_BLOCK
    n = 3 * block + 77
    u = 0.3 * np.sin(np.arange(n) * 0.01)
    u[block + 200 : block + 260] = 40.0  # far beyond full scale: the guard must act here
    dscale = dither * 2.0 / (levels - 1)
    start = np.zeros(4)
    expected = twin(
        u,
        coefficients(loop),
        start,
        12345,
        np.zeros(4),
        0,
        CODES[structure],
        levels,
        dscale,
        8.0,
        1e6,
        True,
    )
    got = run_kernel(_kernel_key(loop), loop, u, levels, dscale, 8.0, 1e6, True, start)
    assert expected[4] > 0  # the burst did trip the guard
    np.testing.assert_array_equal(got[0], expected[0])
    np.testing.assert_array_equal(got[1], expected[1])
    assert got[2] == expected[2]
    np.testing.assert_array_equal(got[3], expected[3])
    assert got[4] == expected[4]


@pytest.mark.parametrize("structure", STRUCTURES)
def test_kernels_report_the_first_non_finite_input_sample(structure, rng):
    loop = make_loop(3, structure, "designed", rng)
    n = 2 * _kernels.LOOP_BLOCK + 5
    u = 0.1 * np.ones(n)
    u[1500] = np.inf
    u[1700] = np.nan
    coef = coefficients(loop)
    args = (2, 0.0, 8.0, 1e6, True)
    fast = _kernels.loop_kernel(*_kernel_key(loop))
    bad = fast(
        u,
        np.empty(n),
        coef,
        np.zeros(3),
        np.zeros(1, np.uint64),
        np.zeros(3),
        np.zeros(1, np.int64),
        *args,
    )
    generic = _kernels.loop_any_structure(
        u,
        np.empty(n),
        coef,
        np.zeros(3),
        np.zeros(1, np.uint64),
        np.zeros(3),
        np.zeros(1, np.int64),
        CODES[structure],
        *args,
        np.empty((0, 3)),
    )
    assert bad == generic == 1500
    clean = fast(
        0.1 * np.ones(n),
        np.empty(n),
        coef,
        np.zeros(3),
        np.zeros(1, np.uint64),
        np.zeros(3),
        np.zeros(1, np.int64),
        *args,
    )
    assert clean == -1


def test_general_chain_kernel_gives_the_unit_chain_kernels_numbers(rng):
    # x * 1.0 == x exactly (IEEE 754), so the kernel that multiplies by the chain gains gives
    # an unscaled loop's numbers too (the modulator uses it for short runs)
    loop = make_loop(5, "feedback", "designed", rng)
    key = _kernel_key(loop)
    assert key[3]  # unit chain
    u = 0.5 * np.sin(np.arange(5000) * 0.003) + 0.01 * rng.standard_normal(5000)
    for levels, dither in [(2, 0.0), (2, 0.4), (5, 0.0)]:
        dscale = dither * 2.0 / (levels - 1)
        unit = run_kernel(key, loop, u, levels, dscale, 8.0, 1e6, True, np.zeros(5))
        general = (key[0], key[1], key[2], False, key[4])
        got = run_kernel(general, loop, u, levels, dscale, 8.0, 1e6, True, np.zeros(5))
        for a, b in zip(unit[:5], got[:5], strict=True):
            np.testing.assert_array_equal(a, b)


def test_second_order_loop_equals_the_c_reference_loop():
    # The 2nd-order single-bit loop of the project's C speed reference (shared/perf/limit.c,
    # feedback2_1bit), transcribed as written there: two integrators, NTF (1 - z^-1)^2,
    # a = (1, 2), unit gains, v = +1 when s2 >= 0 else -1, the update as a branch.
    n = 3000
    w = 2.0 * 3.141592653589793 * 1000.0 / 3072000.0
    u = [0.5 * math.sin(w * i) for i in range(n)]
    s1 = s2 = 0.0
    expected = []
    for ui in u:
        t2 = s2 + 1.0 * s1
        t1 = s1 + ui
        if s2 >= 0.0:
            expected.append(1.0)
            s2, s1 = t2 - 2.0, t1 - 1.0
        else:
            expected.append(-1.0)
            s2, s1 = t2 + 2.0, t1 + 1.0
    ntf = NoiseTransfer.from_roots(zeros=[1.0, 1.0], poles=[0.0, 0.0])
    loop = LoopRealization.for_ntf(ntf, structure="feedback")
    np.testing.assert_allclose(loop.feedback, [1.0, 2.0], rtol=1e-15)
    np.testing.assert_allclose(loop.input_gain, [1.0, 0.0], rtol=1e-15)
    exact = dataclasses.replace(loop, feedback=np.array([1.0, 2.0]), input_gain=np.eye(2)[0])
    got = run_kernel(_kernel_key(exact), exact, np.array(u), 2, 0.0, 8.0, 1e6, True, [0.0, 0.0])
    np.testing.assert_array_equal(got[0], expected)
    np.testing.assert_array_equal(got[1], [s1, s2])


@pytest.mark.parametrize(("order", "kind"), [(1, "designed"), (2, "designed"), (5, "scaled")])
def test_feed_in_kernels_equal_python_twin(order, kind, rng):
    ntf = NoiseTransfer.designed(order, osr=32, out_of_band_gain=1.7)
    loop = LoopRealization.for_ntf(ntf, structure="feedforward", input_feed_in=True)
    if kind == "scaled":
        loop = loop.rescaled(rng.uniform(0.5, 4.0, order))
    key = _kernel_key(loop)
    assert key[0] == "feedforward-feed-in"
    u = 0.5 * np.sin(np.arange(300) * 0.05) + 0.05 * rng.standard_normal(300)
    start = 0.01 * rng.standard_normal(order)
    code = CODES["feedforward-feed-in"]
    for levels, dither, ib, sb, reset in CASES:
        dscale = dither * 2.0 / (levels - 1)
        args = (levels, dscale, ib, sb, reset)
        expected = twin(u, coefficients(loop), start, 12345, np.zeros(order), 0, code, *args)
        for fast in (False, key):
            if fast is False:
                # the generic loop, told the feed-in code
                n = loop.order
                out, st = np.empty(len(u)), np.array(start, dtype=float)
                rng_c, pk = np.array([12345], dtype=np.uint64), np.zeros(n)
                cnt, tr = np.zeros(1, dtype=np.int64), np.empty((len(u), n))
                _kernels.loop_any_structure(
                    u, out, coefficients(loop), st, rng_c, pk, cnt, code, *args, tr
                )
                got = (out, st, int(rng_c[0]), pk, int(cnt[0]))
            else:
                got = run_kernel(fast, loop, u, *args, start)
            np.testing.assert_array_equal(got[0], expected[0])
            np.testing.assert_array_equal(got[1], expected[1])
            assert got[2] == expected[2]
            np.testing.assert_array_equal(got[3], expected[3])
            assert got[4] == expected[4]


@pytest.mark.parametrize("dither", [0.0, 0.5])
def test_feedforward_sum_of_zeros_keeps_the_sign_of_the_plain_sum(dither, rng):
    # The feedforward kernels sum the weighted states from the first product, not from 0.0
    # (one addition less on the critical path). The two sums differ only where both are zero:
    # from 0.0 the sum is +0.0, from the first product -0.0 when every product is -0.0, which a
    # single-bit quantizer would read as -1 (IEEE 754 signed zeros). A loop at rest whose
    # weights are all negative makes exactly that sum at its first sample (a short silent input:
    # that loop is not stable, and states past the guard's bound would send the block to the
    # guarded loop anyway); the kernel must still give the twin's numbers.
    loop = make_loop(5, "feedforward", "designed", rng)
    negative = dataclasses.replace(loop, output_weight=-np.abs(loop.output_weight))
    program = np.concatenate([np.zeros(5), 0.4 * np.sin(np.arange(3000) * 0.01)])
    dscale = dither * 2.0
    for this, u in ((loop, program), (negative, np.zeros(16))):  # the guard never acts on the 16
        expected = twin(
            u, coefficients(this), np.zeros(5), 12345, np.zeros(5), 0, 1, 2, dscale, 1e9, 1e12, True
        )
        got = run_kernel(_kernel_key(this), this, u, 2, dscale, 1e9, 1e12, True, np.zeros(5))
        assert got[4] == expected[4]
        np.testing.assert_array_equal(got[0], expected[0])
        if dither == 0.0:
            assert got[0][0] == 1.0  # copysign(1, +0.0): the plain sum's reading of zero
        # states bit for bit, signed zeros included
        np.testing.assert_array_equal(got[1].view(np.int64), np.asarray(expected[1]).view(np.int64))
        np.testing.assert_array_equal(got[3], expected[3])
