"""Compiled inner loops, and nothing else.

Every function here is ``@njit(cache=True, nogil=True)`` without fastmath (reordering would
change quantizer decisions). Kernels take contiguous float64/int arrays and scalars, write into
caller-allocated output and state arrays, and validate nothing: the public wrappers in the stage
modules validate, convert, allocate and call. Each kernel has a slow pure-Python twin in the
tests. The rate converters' loops live apart, in :mod:`audiodsm.stages._rate_kernels`, and the
output-stage and reconstruction-filter loops in :mod:`audiodsm.stages._waveform_kernels`.
"""

from __future__ import annotations

import math
import threading

import numpy as np
from numba import njit

# ---------------------------------------------------------------------------------------------
# Modulator loops (stages/modulator.py)
# ---------------------------------------------------------------------------------------------

# Every loop follows the update rule documented in audiodsm/design/realize.py. Coefficients
# arrive as one array ``coef`` of shape (6, order), rows: leak d, chain gain k, resonator g,
# feedback a, input gain b, quantizer-input weight c. Quantizer: ``levels`` output values
# evenly spaced in [-1, 1]; for two levels v = copysign(1, w) (+1 for w >= +0, -1 below), an
# exact and branch-free sign; otherwise the level index is
# floor(w * (levels-1)/2 + (levels-1)/2 + 0.5) clipped to 0..levels-1, and v = index*step - 1.
# TPDF dither: dither_scale * (r1 - r2), r1 and r2 uniform in [0, 1) from a counter-based
# generator (SplitMix64 output function; G. L. Steele, D. Lea and C. H. Flood, "Fast
# splittable pseudorandom number generators", OOPSLA 2014). The counter is the RNG state.
# Guard: after each update, a sample is an overload when |y| > input_bound or any
# |x[i]| > state_bound (or a value is not finite); then all states are zeroed (reset) or
# each is clipped to +-state_bound (non-finite -> 0). Peaks are taken after the guard.
# Quantizer overload (counted, the guard does not act): a multi-level quantizer whose input w
# (dither included) lies more than half a step beyond its outermost level, |w| > 1 + step/2,
# clips, and that sample counts as an overload too. A two-level quantizer never clips.

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S30 = np.uint64(30)
_S27 = np.uint64(27)
_S31 = np.uint64(31)
_S11 = np.uint64(11)
_INV_2_53 = 1.0 / 9007199254740992.0


@njit(cache=True, nogil=True, inline="always")
def _unit_from_counter(counter):
    """SplitMix64 output function of ``counter``, mapped to a float64 in [0, 1)."""
    z = counter
    z = (z ^ (z >> _S30)) * _MIX1
    z = (z ^ (z >> _S27)) * _MIX2
    z = z ^ (z >> _S31)
    return float(z >> _S11) * _INV_2_53


@njit(cache=True, nogil=True, inline="always")
def _clamp(x, bound):
    """Clip ``x`` to [-bound, bound]; a non-finite value becomes 0."""
    if x > bound:
        return bound
    if x < -bound:
        return -bound
    if x == x:
        return x
    return 0.0


@njit(cache=True, nogil=True)
def loop_any_structure(
    u,
    out,
    coef,
    state,
    rng,
    peaks,
    counts,
    structure,
    levels,
    dither_scale,
    input_bound,
    state_bound,
    reset,
    trace,
):
    """Run a loop of any order and structure over ``u``, writing the quantizer output to ``out``.

    Parameters
    ----------
    u, out : float64 (n,)
        Input and output samples.
    coef : float64 (6, order)
        Rows d, k, g, a, b, c (see the section comment).
    state : float64 (order,)
        Integrator states, updated in place.
    rng : uint64 (1,)
        Dither generator counter, updated in place.
    peaks : float64 (order,)
        Running peak |x[i]|, updated in place.
    counts : int64 (1,)
        Running count of overload samples, updated in place.
    structure : int
        0 feedback, 1 feedforward, 2 error feedback, 3 feedforward with the input fed straight
        to the quantizer too (``y = u + sum(c * x)``).
    levels : int
        Quantizer levels, 2 to 2**24 (16777216).
    dither_scale : float
        TPDF dither peak in full-scale units (0 = no dither).
    input_bound, state_bound : float
        Guard bounds on the quantizer input and on every state.
    reset : bool
        True: zero all states on overload; False: clip them.
    trace : float64 (n, order) or (0, order)
        When it has rows, the states after each sample are written to it.

    Returns
    -------
    int
        Index of the first non-finite input sample, or -1 (the caller raises; the loop has
        run on, its guard acting there, since a non-finite sample always trips it).
    """
    order = state.shape[0]
    last = order - 1
    tracing = trace.shape[0] > 0
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    clip_level = 1.0 + 0.5 * step
    counter = rng[0]
    overloads = counts[0]
    bad = -1
    x = state.copy()
    for t in range(u.shape[0]):
        ut = u[t]
        if structure == 0:
            y = x[last]
        elif structure == 1 or structure == 3:
            y = ut if structure == 3 else 0.0
            for i in range(order):
                y = y + coef[5, i] * x[i]
        else:
            y = ut + x[last]
        w = y
        if dither_scale != 0.0:
            counter += _GOLDEN
            r1 = _unit_from_counter(counter)
            counter += _GOLDEN
            r2 = _unit_from_counter(counter)
            w = y + dither_scale * (r1 - r2)
        q = 0.0
        if levels == 2:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        fed = x[last] + (v - y) if structure == 2 else v
        by_index = levels != 2 and structure != 2
        for i in range(last, -1, -1):
            if i > 0:
                acc = coef[0, i] * x[i] + coef[1, i] * x[i - 1]
            else:
                acc = coef[0, 0] * x[0] + coef[4, 0] * ut
            if by_index:
                # a * v written as a * (q * step - 1) = q * (a * step) - a: the level index q
                # is then one multiply-subtract away from the new state
                acc = (acc + coef[3, i]) - q * (coef[3, i] * step)
            else:
                acc = acc - coef[3, i] * fed
            if i < last:
                acc = acc - coef[2, i] * x[i + 1]
            x[i] = acc
        ok = abs(y) <= input_bound
        for i in range(order):
            ok = ok and abs(x[i]) <= state_bound
        if not ok:
            overloads += 1
            # a non-finite input sample always trips the guard (b[0] * u[t] reaches x[0])
            if bad < 0 and not math.isfinite(ut):
                bad = t
            for i in range(order):
                x[i] = 0.0 if reset else _clamp(x[i], state_bound)
        elif levels != 2 and abs(w) > clip_level:
            overloads += 1
        for i in range(order):
            peaks[i] = max(peaks[i], abs(x[i]))
            if tracing:
                trace[t, i] = x[i]
    state[:] = x
    rng[0] = counter
    counts[0] = overloads
    return bad


# The specialised loops. Each keeps every state in a local scalar (a loop over a state array
# runs several times slower) and leaves out the multiplications a given loop does not need: the
# leak when every zero is on the unit circle, the chain gain when the states are unscaled, and
# the resonator term on integrators that are not the upstream half of a resonator pair. One
# kernel per (structure, order, leak, chain gain, pairs) is written from the template below on
# first use and compiled with numba's on-disk cache (keyed to this file, so editing the template
# recompiles). Each computes exactly what loop_any_structure computes for its structure. The
# feedforward kernels assume, as LoopRealization.for_ntf builds them, that only the first integrator
# receives the quantizer output.

STRUCTURE_CODES = {"feedback": 0, "feedforward": 1, "error-feedback": 2, "feedforward-feed-in": 3}

#: samples per block of a specialised loop (see loop_kernel_source): small enough that a block
#: run again with the guard costs little, large enough that the per-block work does not show
LOOP_BLOCK = 1024


def loop_kernel_name(structure, order, lossless, unit_chain, pairs, variant=None):
    """Name of the specialised kernel for these properties (and quantizer/dither variant)."""
    kind = structure.replace("-", "_")
    leak = "l" if lossless else "d"
    chain = "u" if unit_chain else "k"
    resonators = "all" if pairs < 0 else pairs
    name = f"{kind}_loop_order{order}_{leak}{chain}_p{resonators}"
    if variant is not None:
        single_bit, dithered = variant
        name += ("_bit" if single_bit else "_levels") + ("_dither" if dithered else "")
    return name


def loop_kernel_source(structure, order, lossless, unit_chain, pairs, variant=None):
    """Python source of one specialised loop kernel (see loop_kernel).

    The kernel runs its samples in blocks of ``LOOP_BLOCK``. Each block first runs without
    the guard, keeping each state's largest magnitude over the block (and the quantizer
    input's, where it is not a state). When those stay within the bounds and the states are
    finite at the end (a non-finite value never leaves the chain: every update adds the
    state's own value), the guard would not have acted on any sample of the block, and the
    block stands. Otherwise the block is run again from its saved start with the guard on
    every sample, exactly as before. Either way the output is the same, bit for bit; the
    guard's comparisons just leave the per-sample work.

    Parameters
    ----------
    structure : str
        ``"feedback"``, ``"feedforward"``, ``"error-feedback"`` or ``"feedforward-feed-in"``
        (feedforward with the input fed straight to the quantizer too).
    order : int
        1..8.
    lossless : bool
        Every leak is exactly 1 (the multiplication by the leak is left out).
    unit_chain : bool
        Every chain gain is exactly 1 (unscaled loop).
    pairs : int
        Number of resonator pairs at the head of the chain (upstream integrators 0, 2, ...),
        or -1 to keep the resonator term on every integrator.
    variant : (bool, bool) or None
        ``(single_bit, dithered)``: the source of the kernel for only that quantizer (two
        levels or more) and dither (on or off), the one :func:`loop_kernel` compiles; None
        gives one function holding every case, chosen at run time.
    """
    n = order
    code = STRUCTURE_CODES[structure]
    feed_in = code == 3
    code = 1 if feed_in else code  # feedforward but for the input at the quantizer
    lines = []
    add = lines.append
    xs = ", ".join(f"x{i}" for i in range(n))
    ns = ", ".join(f"n{i}" for i in range(n))

    def has_g(i):
        return i < n - 1 and (pairs < 0 or (i % 2 == 0 and i < 2 * pairs))

    def has_a(i):
        return code != 1 or i == 0

    add(f"def {loop_kernel_name(structure, order, lossless, unit_chain, pairs, variant)}(")
    add("    u, out, coef, state, rng, peaks, counts, levels, dither_scale, input_bound,")
    add("    state_bound, reset,")
    add("):")
    add("    top = float(levels - 1)")
    add("    half = 0.5 * top")
    add("    offset = half + 0.5")
    add("    step = 2.0 / top")
    add("    clip_level = 1.0 + 0.5 * step")
    for i in range(n):
        if not lossless:
            add(f"    d{i} = coef[0, {i}]")
        if i > 0 and not unit_chain:
            add(f"    k{i} = coef[1, {i}]")
        if has_g(i):
            add(f"    g{i} = coef[2, {i}]")
        if has_a(i):
            add(f"    a{i} = coef[3, {i}]")
            add(f"    s{i} = a{i} * step")
        if code == 1:
            add(f"    c{i} = coef[5, {i}]")
    add("    b0 = coef[4, 0]")
    # a * v for v = copysign(1, w) is a with its sign flipped when w's sign bit is set, which
    # for a >= 0 is copysign(a, w): exact, and a sign-bit operation instead of a multiply
    # on the loop's critical path (limit.c's flip)
    signs = " and ".join(f"(a{i} >= 0.0)" for i in range(n) if has_a(i))
    add(f"    flip = {signs}")
    for i in range(n):
        add(f"    x{i} = state[{i}]")
        add(f"    p{i} = peaks[{i}]")
    add("    counter = rng[0]")
    add("    overloads = counts[0]")
    add("    bad = -1")
    add("    total = u.shape[0]")

    skip_zero = code == 1 and not feed_in  # see fast_loop

    def quantizer_input(from_zero=True):
        if code == 0:
            return f"x{n - 1}"
        if code == 1:
            y = "u[t]" if feed_in else ("0.0" if from_zero else "")
            for i in range(n):
                y = f"({y} + c{i} * x{i})" if y else f"c{i} * x{i}"
            return y
        return f"u[t] + x{n - 1}"

    def base(i):
        own = f"x{i}" if lossless else f"d{i} * x{i}"
        if i == 0:
            prev = "b0 * u[t]"
        else:
            prev = f"x{i - 1}" if unit_chain else f"k{i} * x{i - 1}"
        return f"({own} + {prev})"

    def update(ind, single_bit, flipped):
        """The quantizer and the state update, as ``loop_any_structure`` does them."""
        out = []
        if single_bit:
            out += [f"{ind}v = math.copysign(1.0, w)", f"{ind}out[t] = v"]
        else:
            out += [
                f"{ind}q = np.floor(w * half + offset)",
                f"{ind}q = min(max(q, 0.0), top)",
                f"{ind}v = q * step - 1.0",
                f"{ind}out[t] = v",
            ]
        if code == 2:
            out.append(f"{ind}f = x{n - 1} + (v - y)")
        for i in range(n - 1, -1, -1):
            expr = base(i)
            if has_a(i):
                if code == 2:
                    expr = f"{expr} - a{i} * f"
                elif single_bit and flipped:
                    expr = f"{expr} - math.copysign(a{i}, w)"
                elif single_bit:
                    expr = f"{expr} - a{i} * v"
                else:
                    expr = f"({expr} + a{i}) - q * s{i}"
            if has_g(i):
                expr = f"({expr}) - g{i} * n{i + 1}"
            out.append(f"{ind}n{i} = {expr}")
        out.append(f"{ind}{xs} = {ns}")
        return out

    def dither(ind):
        return [
            f"{ind}counter += _GOLDEN",
            f"{ind}r1 = _unit_from_counter(counter)",
            f"{ind}counter += _GOLDEN",
            f"{ind}r2 = _unit_from_counter(counter)",
            f"{ind}w = y + dither_scale * (r1 - r2)",
        ]

    def fast_loop(ind, single_bit, dithered, flipped):
        """One block without the guard: block peaks ``m*`` (and ``my``, the quantizer input).

        Feedforward without input feed-in: the weighted sum of the states starts from the
        first product instead of from 0.0, one addition less on the loop's critical path (the
        states, their sum, the quantizer, the first state's update). The two sums are the same
        number except where both are zero: the sum from 0.0 is then +0.0, this one may be
        -0.0, and a single-bit quantizer would read the other sign. So the block also keeps
        its smallest ``|y|`` (``mz``), and a block in which a sum came out exactly zero (rare:
        a loop at rest, say) is run again with the guard, in the plain form. Either way the
        output is the same, bit for bit.
        """
        y = quantizer_input(from_zero=not skip_zero)
        out = [f"{ind}for t in range(start, stop):", f"{ind}    y = {y}"]
        out += dither(ind + "    ") if dithered else [f"{ind}    w = y"]
        out += update(ind + "    ", single_bit, flipped)
        if skip_zero:
            out.append(f"{ind}    mz = min(mz, abs(y))")
        out += [f"{ind}    m{i} = max(m{i}, abs(x{i}))" for i in range(n)]
        if code != 0:
            out.append(f"{ind}    my = max(my, abs(y))")
        if not single_bit:
            out.append(f"{ind}    mw = max(mw, abs(w))")
        return out

    def guarded_loop(ind):
        """One block with the guard on every sample (the variant's case, or all four)."""
        out = [f"{ind}for t in range(start, stop):", f"{ind}    y = {quantizer_input()}"]
        if variant is None:
            out.append(f"{ind}    if dither_scale != 0.0:")
            out += dither(ind + "        ")
            out += [f"{ind}    else:", f"{ind}        w = y", f"{ind}    if levels == 2:"]
            out += update(ind + "        ", True, False)
            out.append(f"{ind}    else:")
            out += update(ind + "        ", False, False)
        else:
            out += dither(ind + "    ") if variant[1] else [f"{ind}    w = y"]
            out += update(ind + "    ", variant[0], False)
        conds = " & ".join(
            ["(abs(y) <= input_bound)"] + [f"(abs(x{i}) <= state_bound)" for i in range(n)]
        )
        out += [
            f"{ind}    if not ({conds}):",
            f"{ind}        overloads += 1",
            # a non-finite input sample always trips the guard (b0 * u[t] reaches x0)
            f"{ind}        if bad < 0 and not math.isfinite(u[t]):",
            f"{ind}            bad = t",
            f"{ind}        if reset:",
            f"{ind}            {xs} = " + ", ".join("0.0" for _ in range(n)),
            f"{ind}        else:",
        ]
        out += [f"{ind}            x{i} = _clamp(x{i}, state_bound)" for i in range(n)]
        if variant is None:
            out += [f"{ind}    elif levels != 2 and abs(w) > clip_level:"]
            out += [f"{ind}        overloads += 1"]
        elif not variant[0]:
            out += [f"{ind}    elif abs(w) > clip_level:", f"{ind}        overloads += 1"]
        out += [f"{ind}    p{i} = max(p{i}, abs(x{i}))" for i in range(n)]
        return out

    cases = []
    for single_bit in (True, False):
        for dithered in (False, True):
            if variant is not None and variant != (single_bit, dithered):
                continue
            cond = f"{'levels == 2' if single_bit else 'levels != 2'} and "
            cond += "dither_scale != 0.0" if dithered else "dither_scale == 0.0"
            if variant is not None:
                cond = "True"
            if single_bit and code != 2:
                cases.append(
                    ("flip" if variant else f"{cond} and flip", *(single_bit, dithered), True)
                )
            cases.append((cond, single_bit, dithered, False))

    add("    start = 0")
    add("    while start < total:")
    add(f"        stop = min(start + {LOOP_BLOCK}, total)")
    add(f"        {', '.join(f'o{i}' for i in range(n))} = {xs}")
    add("        counter_start = counter")
    add(f"        {', '.join(f'm{i}' for i in range(n))} = " + ", ".join("0.0" for _ in range(n)))
    if code != 0:
        add("        my = 0.0")
    if skip_zero:
        add("        mz = np.inf")
    add("        mw = 0.0")
    for j, (cond, single_bit, dithered, flipped) in enumerate(cases):
        if j == len(cases) - 1 and j > 0:
            add("        else:")  # the last case needs no test
        else:
            add(f"        {'if' if j == 0 else 'elif'} {cond}:")
        lines.extend(fast_loop("            ", single_bit, dithered, flipped))
    if code == 0:
        # y is the last state at the start of each sample: the block's first value, then
        # the block's updates (the last one conservatively too)
        y_ok = f"(abs(o{n - 1}) <= input_bound) & (m{n - 1} <= input_bound)"
    else:
        y_ok = "(my <= input_bound)"
    if skip_zero:
        y_ok += " & (mz > 0.0)"
    conds = " & ".join(
        [y_ok, "(mw <= clip_level)"]
        + [f"(m{i} <= state_bound)" for i in range(n)]
        + [f"(abs(x{i}) <= state_bound)" for i in range(n)]
    )
    add(f"        if {conds}:")
    lines.extend(f"            p{i} = max(p{i}, m{i})" for i in range(n))
    add("        else:")
    add(f"            {xs} = {', '.join(f'o{i}' for i in range(n))}")
    add("            counter = counter_start")
    lines.extend(guarded_loop("            "))
    add("        start = stop")
    for i in range(n):
        add(f"    state[{i}] = x{i}")
    for i in range(n):
        add(f"    peaks[{i}] = p{i}")
    add("    rng[0] = counter")
    add("    counts[0] = overloads")
    add("    return bad")
    return "\n".join(lines) + "\n"


_LOOP_KERNELS = {}


class _LoopKernel:
    """The specialised loop for one set of properties, one compiled kernel per variant.

    A call runs the variant for the quantizer (two levels or more) and dither (on or off) it
    is given, compiling that variant (or loading it from numba's on-disk cache) on first use.
    Only the variants a program uses are ever compiled, each a fraction of the code of one
    kernel for every case.
    """

    def __init__(self, key):
        self.key = key
        self._variants = {}
        self._lock = threading.Lock()  # channels in threads: build each variant once

    def variant(self, single_bit, dithered):
        """The compiled kernel for one quantizer and dither case."""
        which = (bool(single_bit), bool(dithered))
        kernel = self._variants.get(which)
        if kernel is None:
            with self._lock:
                kernel = self._variants.get(which)
                if kernel is None:
                    kernel = _compile_loop_source(*self.key, which)
                    self._variants[which] = kernel
        return kernel

    def has_variant(self, single_bit, dithered):
        """Whether that variant is compiled or loaded in this process already."""
        return (bool(single_bit), bool(dithered)) in self._variants

    def __call__(self, u, out, coef, state, rng, peaks, counts, levels, dither_scale, *bounds):
        kernel = self.variant(levels == 2, dither_scale != 0.0)
        return kernel(u, out, coef, state, rng, peaks, counts, levels, dither_scale, *bounds)


def _compile_loop_source(structure, order, lossless, unit_chain, pairs, variant):
    source = loop_kernel_source(structure, order, lossless, unit_chain, pairs, variant)
    name = loop_kernel_name(structure, order, lossless, unit_chain, pairs, variant)
    namespace = {}
    # compiled under this file's name so numba's cache can find (and invalidate) it: the
    # cache index is keyed by the function's qualified name and this file's time stamp
    exec(compile(source, __file__, "exec"), globals(), namespace)
    function = namespace[name]
    function.__module__ = __name__
    function.__qualname__ = name
    return njit(cache=True, nogil=True)(function)


def loop_kernel(structure, order, lossless, unit_chain, pairs):
    """Specialised loop for these properties (each variant built from the template on first use).

    Arguments of the returned callable: ``(u, out, coef, state, rng, peaks, counts, levels,
    dither_scale, input_bound, state_bound, reset)``, as for ``loop_any_structure``; it returns
    the index of the first non-finite input sample, or -1. ``.variant(single_bit, dithered)``
    gives the compiled kernel of one case.
    """
    key = (str(structure), int(order), bool(lossless), bool(unit_chain), int(pairs))
    kernel = _LOOP_KERNELS.get(key)
    if kernel is None:
        kernel = _LoopKernel(key)
        _LOOP_KERNELS[key] = kernel
    return kernel
