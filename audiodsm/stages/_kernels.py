"""Compiled inner loops, and nothing else.

Every function here is ``@njit(cache=True, nogil=True)`` without fastmath (reordering would
change quantizer decisions). Kernels take contiguous float64/int arrays and scalars, write into
caller-allocated output and state arrays, and validate nothing: the public wrappers in the stage
modules validate, convert, allocate and call. Each kernel has a slow pure-Python twin in the
tests.
"""

from __future__ import annotations

import math

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
        0 feedback, 1 feedforward, 2 error feedback.
    levels : int
        Quantizer levels, 2..1024.
    dither_scale : float
        TPDF dither peak in full-scale units (0 = no dither).
    input_bound, state_bound : float
        Guard bounds on the quantizer input and on every state.
    reset : bool
        True: zero all states on overload; False: clip them.
    trace : float64 (n, order) or (0, order)
        When it has rows, the states after each sample are written to it.
    """
    order = state.shape[0]
    last = order - 1
    tracing = trace.shape[0] > 0
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    counter = rng[0]
    overloads = counts[0]
    x = state.copy()
    for t in range(u.shape[0]):
        ut = u[t]
        if structure == 0:
            y = x[last]
        elif structure == 1:
            y = 0.0
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
        if levels == 2:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        fed = x[last] + (v - y) if structure == 2 else v
        for i in range(last, -1, -1):
            if i > 0:
                acc = (coef[0, i] * x[i] + coef[1, i] * x[i - 1]) - coef[3, i] * fed
            else:
                acc = (coef[0, 0] * x[0] + coef[4, 0] * ut) - coef[3, 0] * fed
            if i < last:
                acc = acc - coef[2, i] * x[i + 1]
            x[i] = acc
        ok = abs(y) <= input_bound
        for i in range(order):
            ok = ok and abs(x[i]) <= state_bound
        if not ok:
            overloads += 1
            for i in range(order):
                x[i] = 0.0 if reset else _clamp(x[i], state_bound)
        for i in range(order):
            peaks[i] = max(peaks[i], abs(x[i]))
            if tracing:
                trace[t, i] = x[i]
    state[:] = x
    rng[0] = counter
    counts[0] = overloads


# The feedback structure is the fast path: one kernel per order keeps every state in a local
# scalar (a loop over a state array runs several times slower). They are written out from one
# template (tests/test_kernels_modulator.py regenerates it and checks this text is current) and
# compute exactly what loop_any_structure computes for structure 0.


@njit(cache=True, nogil=True)
def feedback_loop_order1(
    u, out, coef, state, rng, peaks, counts, levels, dither_scale, input_bound, state_bound, reset
):
    """Feedback loop of order 1: same arguments and result as ``loop_any_structure``."""
    d0 = coef[0, 0]
    a0 = coef[3, 0]
    b0 = coef[4, 0]
    x0 = state[0]
    p0 = peaks[0]
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    dithered = dither_scale != 0.0
    single_bit = levels == 2
    counter = rng[0]
    overloads = counts[0]
    for t in range(u.shape[0]):
        y = x0
        w = y
        if dithered:
            counter += _GOLDEN
            r1 = _unit_from_counter(counter)
            counter += _GOLDEN
            r2 = _unit_from_counter(counter)
            w = y + dither_scale * (r1 - r2)
        if single_bit:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        n0 = (d0 * x0 + b0 * u[t]) - a0 * v
        x0 = n0
        if not ((abs(y) <= input_bound) & (abs(x0) <= state_bound)):
            overloads += 1
            if reset:
                x0 = 0.0
            else:
                x0 = _clamp(x0, state_bound)
        p0 = max(p0, abs(x0))
    state[0] = x0
    peaks[0] = p0
    rng[0] = counter
    counts[0] = overloads


@njit(cache=True, nogil=True)
def feedback_loop_order2(
    u, out, coef, state, rng, peaks, counts, levels, dither_scale, input_bound, state_bound, reset
):
    """Feedback loop of order 2: same arguments and result as ``loop_any_structure``."""
    d0 = coef[0, 0]
    g0 = coef[2, 0]
    a0 = coef[3, 0]
    d1 = coef[0, 1]
    k1 = coef[1, 1]
    a1 = coef[3, 1]
    b0 = coef[4, 0]
    x0 = state[0]
    p0 = peaks[0]
    x1 = state[1]
    p1 = peaks[1]
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    dithered = dither_scale != 0.0
    single_bit = levels == 2
    counter = rng[0]
    overloads = counts[0]
    for t in range(u.shape[0]):
        y = x1
        w = y
        if dithered:
            counter += _GOLDEN
            r1 = _unit_from_counter(counter)
            counter += _GOLDEN
            r2 = _unit_from_counter(counter)
            w = y + dither_scale * (r1 - r2)
        if single_bit:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        n1 = (d1 * x1 + k1 * x0) - a1 * v
        n0 = ((d0 * x0 + b0 * u[t]) - a0 * v) - g0 * n1
        x0, x1 = n0, n1
        if not ((abs(y) <= input_bound) & (abs(x0) <= state_bound) & (abs(x1) <= state_bound)):
            overloads += 1
            if reset:
                x0, x1 = 0.0, 0.0
            else:
                x0 = _clamp(x0, state_bound)
                x1 = _clamp(x1, state_bound)
        p0 = max(p0, abs(x0))
        p1 = max(p1, abs(x1))
    state[0] = x0
    state[1] = x1
    peaks[0] = p0
    peaks[1] = p1
    rng[0] = counter
    counts[0] = overloads


@njit(cache=True, nogil=True)
def feedback_loop_order3(
    u, out, coef, state, rng, peaks, counts, levels, dither_scale, input_bound, state_bound, reset
):
    """Feedback loop of order 3: same arguments and result as ``loop_any_structure``."""
    d0 = coef[0, 0]
    g0 = coef[2, 0]
    a0 = coef[3, 0]
    d1 = coef[0, 1]
    k1 = coef[1, 1]
    g1 = coef[2, 1]
    a1 = coef[3, 1]
    d2 = coef[0, 2]
    k2 = coef[1, 2]
    a2 = coef[3, 2]
    b0 = coef[4, 0]
    x0 = state[0]
    p0 = peaks[0]
    x1 = state[1]
    p1 = peaks[1]
    x2 = state[2]
    p2 = peaks[2]
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    dithered = dither_scale != 0.0
    single_bit = levels == 2
    counter = rng[0]
    overloads = counts[0]
    for t in range(u.shape[0]):
        y = x2
        w = y
        if dithered:
            counter += _GOLDEN
            r1 = _unit_from_counter(counter)
            counter += _GOLDEN
            r2 = _unit_from_counter(counter)
            w = y + dither_scale * (r1 - r2)
        if single_bit:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        n2 = (d2 * x2 + k2 * x1) - a2 * v
        n1 = ((d1 * x1 + k1 * x0) - a1 * v) - g1 * n2
        n0 = ((d0 * x0 + b0 * u[t]) - a0 * v) - g0 * n1
        x0, x1, x2 = n0, n1, n2
        if not (
            (abs(y) <= input_bound)
            & (abs(x0) <= state_bound)
            & (abs(x1) <= state_bound)
            & (abs(x2) <= state_bound)
        ):
            overloads += 1
            if reset:
                x0, x1, x2 = 0.0, 0.0, 0.0
            else:
                x0 = _clamp(x0, state_bound)
                x1 = _clamp(x1, state_bound)
                x2 = _clamp(x2, state_bound)
        p0 = max(p0, abs(x0))
        p1 = max(p1, abs(x1))
        p2 = max(p2, abs(x2))
    state[0] = x0
    state[1] = x1
    state[2] = x2
    peaks[0] = p0
    peaks[1] = p1
    peaks[2] = p2
    rng[0] = counter
    counts[0] = overloads


@njit(cache=True, nogil=True)
def feedback_loop_order4(
    u, out, coef, state, rng, peaks, counts, levels, dither_scale, input_bound, state_bound, reset
):
    """Feedback loop of order 4: same arguments and result as ``loop_any_structure``."""
    d0 = coef[0, 0]
    g0 = coef[2, 0]
    a0 = coef[3, 0]
    d1 = coef[0, 1]
    k1 = coef[1, 1]
    g1 = coef[2, 1]
    a1 = coef[3, 1]
    d2 = coef[0, 2]
    k2 = coef[1, 2]
    g2 = coef[2, 2]
    a2 = coef[3, 2]
    d3 = coef[0, 3]
    k3 = coef[1, 3]
    a3 = coef[3, 3]
    b0 = coef[4, 0]
    x0 = state[0]
    p0 = peaks[0]
    x1 = state[1]
    p1 = peaks[1]
    x2 = state[2]
    p2 = peaks[2]
    x3 = state[3]
    p3 = peaks[3]
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    dithered = dither_scale != 0.0
    single_bit = levels == 2
    counter = rng[0]
    overloads = counts[0]
    for t in range(u.shape[0]):
        y = x3
        w = y
        if dithered:
            counter += _GOLDEN
            r1 = _unit_from_counter(counter)
            counter += _GOLDEN
            r2 = _unit_from_counter(counter)
            w = y + dither_scale * (r1 - r2)
        if single_bit:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        n3 = (d3 * x3 + k3 * x2) - a3 * v
        n2 = ((d2 * x2 + k2 * x1) - a2 * v) - g2 * n3
        n1 = ((d1 * x1 + k1 * x0) - a1 * v) - g1 * n2
        n0 = ((d0 * x0 + b0 * u[t]) - a0 * v) - g0 * n1
        x0, x1, x2, x3 = n0, n1, n2, n3
        if not (
            (abs(y) <= input_bound)
            & (abs(x0) <= state_bound)
            & (abs(x1) <= state_bound)
            & (abs(x2) <= state_bound)
            & (abs(x3) <= state_bound)
        ):
            overloads += 1
            if reset:
                x0, x1, x2, x3 = 0.0, 0.0, 0.0, 0.0
            else:
                x0 = _clamp(x0, state_bound)
                x1 = _clamp(x1, state_bound)
                x2 = _clamp(x2, state_bound)
                x3 = _clamp(x3, state_bound)
        p0 = max(p0, abs(x0))
        p1 = max(p1, abs(x1))
        p2 = max(p2, abs(x2))
        p3 = max(p3, abs(x3))
    state[0] = x0
    state[1] = x1
    state[2] = x2
    state[3] = x3
    peaks[0] = p0
    peaks[1] = p1
    peaks[2] = p2
    peaks[3] = p3
    rng[0] = counter
    counts[0] = overloads


@njit(cache=True, nogil=True)
def feedback_loop_order5(
    u, out, coef, state, rng, peaks, counts, levels, dither_scale, input_bound, state_bound, reset
):
    """Feedback loop of order 5: same arguments and result as ``loop_any_structure``."""
    d0 = coef[0, 0]
    g0 = coef[2, 0]
    a0 = coef[3, 0]
    d1 = coef[0, 1]
    k1 = coef[1, 1]
    g1 = coef[2, 1]
    a1 = coef[3, 1]
    d2 = coef[0, 2]
    k2 = coef[1, 2]
    g2 = coef[2, 2]
    a2 = coef[3, 2]
    d3 = coef[0, 3]
    k3 = coef[1, 3]
    g3 = coef[2, 3]
    a3 = coef[3, 3]
    d4 = coef[0, 4]
    k4 = coef[1, 4]
    a4 = coef[3, 4]
    b0 = coef[4, 0]
    x0 = state[0]
    p0 = peaks[0]
    x1 = state[1]
    p1 = peaks[1]
    x2 = state[2]
    p2 = peaks[2]
    x3 = state[3]
    p3 = peaks[3]
    x4 = state[4]
    p4 = peaks[4]
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    dithered = dither_scale != 0.0
    single_bit = levels == 2
    counter = rng[0]
    overloads = counts[0]
    for t in range(u.shape[0]):
        y = x4
        w = y
        if dithered:
            counter += _GOLDEN
            r1 = _unit_from_counter(counter)
            counter += _GOLDEN
            r2 = _unit_from_counter(counter)
            w = y + dither_scale * (r1 - r2)
        if single_bit:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        n4 = (d4 * x4 + k4 * x3) - a4 * v
        n3 = ((d3 * x3 + k3 * x2) - a3 * v) - g3 * n4
        n2 = ((d2 * x2 + k2 * x1) - a2 * v) - g2 * n3
        n1 = ((d1 * x1 + k1 * x0) - a1 * v) - g1 * n2
        n0 = ((d0 * x0 + b0 * u[t]) - a0 * v) - g0 * n1
        x0, x1, x2, x3, x4 = n0, n1, n2, n3, n4
        if not (
            (abs(y) <= input_bound)
            & (abs(x0) <= state_bound)
            & (abs(x1) <= state_bound)
            & (abs(x2) <= state_bound)
            & (abs(x3) <= state_bound)
            & (abs(x4) <= state_bound)
        ):
            overloads += 1
            if reset:
                x0, x1, x2, x3, x4 = 0.0, 0.0, 0.0, 0.0, 0.0
            else:
                x0 = _clamp(x0, state_bound)
                x1 = _clamp(x1, state_bound)
                x2 = _clamp(x2, state_bound)
                x3 = _clamp(x3, state_bound)
                x4 = _clamp(x4, state_bound)
        p0 = max(p0, abs(x0))
        p1 = max(p1, abs(x1))
        p2 = max(p2, abs(x2))
        p3 = max(p3, abs(x3))
        p4 = max(p4, abs(x4))
    state[0] = x0
    state[1] = x1
    state[2] = x2
    state[3] = x3
    state[4] = x4
    peaks[0] = p0
    peaks[1] = p1
    peaks[2] = p2
    peaks[3] = p3
    peaks[4] = p4
    rng[0] = counter
    counts[0] = overloads


@njit(cache=True, nogil=True)
def feedback_loop_order6(
    u, out, coef, state, rng, peaks, counts, levels, dither_scale, input_bound, state_bound, reset
):
    """Feedback loop of order 6: same arguments and result as ``loop_any_structure``."""
    d0 = coef[0, 0]
    g0 = coef[2, 0]
    a0 = coef[3, 0]
    d1 = coef[0, 1]
    k1 = coef[1, 1]
    g1 = coef[2, 1]
    a1 = coef[3, 1]
    d2 = coef[0, 2]
    k2 = coef[1, 2]
    g2 = coef[2, 2]
    a2 = coef[3, 2]
    d3 = coef[0, 3]
    k3 = coef[1, 3]
    g3 = coef[2, 3]
    a3 = coef[3, 3]
    d4 = coef[0, 4]
    k4 = coef[1, 4]
    g4 = coef[2, 4]
    a4 = coef[3, 4]
    d5 = coef[0, 5]
    k5 = coef[1, 5]
    a5 = coef[3, 5]
    b0 = coef[4, 0]
    x0 = state[0]
    p0 = peaks[0]
    x1 = state[1]
    p1 = peaks[1]
    x2 = state[2]
    p2 = peaks[2]
    x3 = state[3]
    p3 = peaks[3]
    x4 = state[4]
    p4 = peaks[4]
    x5 = state[5]
    p5 = peaks[5]
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    dithered = dither_scale != 0.0
    single_bit = levels == 2
    counter = rng[0]
    overloads = counts[0]
    for t in range(u.shape[0]):
        y = x5
        w = y
        if dithered:
            counter += _GOLDEN
            r1 = _unit_from_counter(counter)
            counter += _GOLDEN
            r2 = _unit_from_counter(counter)
            w = y + dither_scale * (r1 - r2)
        if single_bit:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        n5 = (d5 * x5 + k5 * x4) - a5 * v
        n4 = ((d4 * x4 + k4 * x3) - a4 * v) - g4 * n5
        n3 = ((d3 * x3 + k3 * x2) - a3 * v) - g3 * n4
        n2 = ((d2 * x2 + k2 * x1) - a2 * v) - g2 * n3
        n1 = ((d1 * x1 + k1 * x0) - a1 * v) - g1 * n2
        n0 = ((d0 * x0 + b0 * u[t]) - a0 * v) - g0 * n1
        x0, x1, x2, x3, x4, x5 = n0, n1, n2, n3, n4, n5
        if not (
            (abs(y) <= input_bound)
            & (abs(x0) <= state_bound)
            & (abs(x1) <= state_bound)
            & (abs(x2) <= state_bound)
            & (abs(x3) <= state_bound)
            & (abs(x4) <= state_bound)
            & (abs(x5) <= state_bound)
        ):
            overloads += 1
            if reset:
                x0, x1, x2, x3, x4, x5 = 0.0, 0.0, 0.0, 0.0, 0.0, 0.0
            else:
                x0 = _clamp(x0, state_bound)
                x1 = _clamp(x1, state_bound)
                x2 = _clamp(x2, state_bound)
                x3 = _clamp(x3, state_bound)
                x4 = _clamp(x4, state_bound)
                x5 = _clamp(x5, state_bound)
        p0 = max(p0, abs(x0))
        p1 = max(p1, abs(x1))
        p2 = max(p2, abs(x2))
        p3 = max(p3, abs(x3))
        p4 = max(p4, abs(x4))
        p5 = max(p5, abs(x5))
    state[0] = x0
    state[1] = x1
    state[2] = x2
    state[3] = x3
    state[4] = x4
    state[5] = x5
    peaks[0] = p0
    peaks[1] = p1
    peaks[2] = p2
    peaks[3] = p3
    peaks[4] = p4
    peaks[5] = p5
    rng[0] = counter
    counts[0] = overloads


@njit(cache=True, nogil=True)
def feedback_loop_order7(
    u, out, coef, state, rng, peaks, counts, levels, dither_scale, input_bound, state_bound, reset
):
    """Feedback loop of order 7: same arguments and result as ``loop_any_structure``."""
    d0 = coef[0, 0]
    g0 = coef[2, 0]
    a0 = coef[3, 0]
    d1 = coef[0, 1]
    k1 = coef[1, 1]
    g1 = coef[2, 1]
    a1 = coef[3, 1]
    d2 = coef[0, 2]
    k2 = coef[1, 2]
    g2 = coef[2, 2]
    a2 = coef[3, 2]
    d3 = coef[0, 3]
    k3 = coef[1, 3]
    g3 = coef[2, 3]
    a3 = coef[3, 3]
    d4 = coef[0, 4]
    k4 = coef[1, 4]
    g4 = coef[2, 4]
    a4 = coef[3, 4]
    d5 = coef[0, 5]
    k5 = coef[1, 5]
    g5 = coef[2, 5]
    a5 = coef[3, 5]
    d6 = coef[0, 6]
    k6 = coef[1, 6]
    a6 = coef[3, 6]
    b0 = coef[4, 0]
    x0 = state[0]
    p0 = peaks[0]
    x1 = state[1]
    p1 = peaks[1]
    x2 = state[2]
    p2 = peaks[2]
    x3 = state[3]
    p3 = peaks[3]
    x4 = state[4]
    p4 = peaks[4]
    x5 = state[5]
    p5 = peaks[5]
    x6 = state[6]
    p6 = peaks[6]
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    dithered = dither_scale != 0.0
    single_bit = levels == 2
    counter = rng[0]
    overloads = counts[0]
    for t in range(u.shape[0]):
        y = x6
        w = y
        if dithered:
            counter += _GOLDEN
            r1 = _unit_from_counter(counter)
            counter += _GOLDEN
            r2 = _unit_from_counter(counter)
            w = y + dither_scale * (r1 - r2)
        if single_bit:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        n6 = (d6 * x6 + k6 * x5) - a6 * v
        n5 = ((d5 * x5 + k5 * x4) - a5 * v) - g5 * n6
        n4 = ((d4 * x4 + k4 * x3) - a4 * v) - g4 * n5
        n3 = ((d3 * x3 + k3 * x2) - a3 * v) - g3 * n4
        n2 = ((d2 * x2 + k2 * x1) - a2 * v) - g2 * n3
        n1 = ((d1 * x1 + k1 * x0) - a1 * v) - g1 * n2
        n0 = ((d0 * x0 + b0 * u[t]) - a0 * v) - g0 * n1
        x0, x1, x2, x3, x4, x5, x6 = n0, n1, n2, n3, n4, n5, n6
        if not (
            (abs(y) <= input_bound)
            & (abs(x0) <= state_bound)
            & (abs(x1) <= state_bound)
            & (abs(x2) <= state_bound)
            & (abs(x3) <= state_bound)
            & (abs(x4) <= state_bound)
            & (abs(x5) <= state_bound)
            & (abs(x6) <= state_bound)
        ):
            overloads += 1
            if reset:
                x0, x1, x2, x3, x4, x5, x6 = 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0
            else:
                x0 = _clamp(x0, state_bound)
                x1 = _clamp(x1, state_bound)
                x2 = _clamp(x2, state_bound)
                x3 = _clamp(x3, state_bound)
                x4 = _clamp(x4, state_bound)
                x5 = _clamp(x5, state_bound)
                x6 = _clamp(x6, state_bound)
        p0 = max(p0, abs(x0))
        p1 = max(p1, abs(x1))
        p2 = max(p2, abs(x2))
        p3 = max(p3, abs(x3))
        p4 = max(p4, abs(x4))
        p5 = max(p5, abs(x5))
        p6 = max(p6, abs(x6))
    state[0] = x0
    state[1] = x1
    state[2] = x2
    state[3] = x3
    state[4] = x4
    state[5] = x5
    state[6] = x6
    peaks[0] = p0
    peaks[1] = p1
    peaks[2] = p2
    peaks[3] = p3
    peaks[4] = p4
    peaks[5] = p5
    peaks[6] = p6
    rng[0] = counter
    counts[0] = overloads


@njit(cache=True, nogil=True)
def feedback_loop_order8(
    u, out, coef, state, rng, peaks, counts, levels, dither_scale, input_bound, state_bound, reset
):
    """Feedback loop of order 8: same arguments and result as ``loop_any_structure``."""
    d0 = coef[0, 0]
    g0 = coef[2, 0]
    a0 = coef[3, 0]
    d1 = coef[0, 1]
    k1 = coef[1, 1]
    g1 = coef[2, 1]
    a1 = coef[3, 1]
    d2 = coef[0, 2]
    k2 = coef[1, 2]
    g2 = coef[2, 2]
    a2 = coef[3, 2]
    d3 = coef[0, 3]
    k3 = coef[1, 3]
    g3 = coef[2, 3]
    a3 = coef[3, 3]
    d4 = coef[0, 4]
    k4 = coef[1, 4]
    g4 = coef[2, 4]
    a4 = coef[3, 4]
    d5 = coef[0, 5]
    k5 = coef[1, 5]
    g5 = coef[2, 5]
    a5 = coef[3, 5]
    d6 = coef[0, 6]
    k6 = coef[1, 6]
    g6 = coef[2, 6]
    a6 = coef[3, 6]
    d7 = coef[0, 7]
    k7 = coef[1, 7]
    a7 = coef[3, 7]
    b0 = coef[4, 0]
    x0 = state[0]
    p0 = peaks[0]
    x1 = state[1]
    p1 = peaks[1]
    x2 = state[2]
    p2 = peaks[2]
    x3 = state[3]
    p3 = peaks[3]
    x4 = state[4]
    p4 = peaks[4]
    x5 = state[5]
    p5 = peaks[5]
    x6 = state[6]
    p6 = peaks[6]
    x7 = state[7]
    p7 = peaks[7]
    top = float(levels - 1)
    half = 0.5 * top
    offset = half + 0.5
    step = 2.0 / top
    dithered = dither_scale != 0.0
    single_bit = levels == 2
    counter = rng[0]
    overloads = counts[0]
    for t in range(u.shape[0]):
        y = x7
        w = y
        if dithered:
            counter += _GOLDEN
            r1 = _unit_from_counter(counter)
            counter += _GOLDEN
            r2 = _unit_from_counter(counter)
            w = y + dither_scale * (r1 - r2)
        if single_bit:
            v = math.copysign(1.0, w)
        else:
            q = np.floor(w * half + offset)
            q = min(max(q, 0.0), top)
            v = q * step - 1.0
        out[t] = v
        n7 = (d7 * x7 + k7 * x6) - a7 * v
        n6 = ((d6 * x6 + k6 * x5) - a6 * v) - g6 * n7
        n5 = ((d5 * x5 + k5 * x4) - a5 * v) - g5 * n6
        n4 = ((d4 * x4 + k4 * x3) - a4 * v) - g4 * n5
        n3 = ((d3 * x3 + k3 * x2) - a3 * v) - g3 * n4
        n2 = ((d2 * x2 + k2 * x1) - a2 * v) - g2 * n3
        n1 = ((d1 * x1 + k1 * x0) - a1 * v) - g1 * n2
        n0 = ((d0 * x0 + b0 * u[t]) - a0 * v) - g0 * n1
        x0, x1, x2, x3, x4, x5, x6, x7 = n0, n1, n2, n3, n4, n5, n6, n7
        if not (
            (abs(y) <= input_bound)
            & (abs(x0) <= state_bound)
            & (abs(x1) <= state_bound)
            & (abs(x2) <= state_bound)
            & (abs(x3) <= state_bound)
            & (abs(x4) <= state_bound)
            & (abs(x5) <= state_bound)
            & (abs(x6) <= state_bound)
            & (abs(x7) <= state_bound)
        ):
            overloads += 1
            if reset:
                x0, x1, x2, x3, x4, x5, x6, x7 = 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0
            else:
                x0 = _clamp(x0, state_bound)
                x1 = _clamp(x1, state_bound)
                x2 = _clamp(x2, state_bound)
                x3 = _clamp(x3, state_bound)
                x4 = _clamp(x4, state_bound)
                x5 = _clamp(x5, state_bound)
                x6 = _clamp(x6, state_bound)
                x7 = _clamp(x7, state_bound)
        p0 = max(p0, abs(x0))
        p1 = max(p1, abs(x1))
        p2 = max(p2, abs(x2))
        p3 = max(p3, abs(x3))
        p4 = max(p4, abs(x4))
        p5 = max(p5, abs(x5))
        p6 = max(p6, abs(x6))
        p7 = max(p7, abs(x7))
    state[0] = x0
    state[1] = x1
    state[2] = x2
    state[3] = x3
    state[4] = x4
    state[5] = x5
    state[6] = x6
    state[7] = x7
    peaks[0] = p0
    peaks[1] = p1
    peaks[2] = p2
    peaks[3] = p3
    peaks[4] = p4
    peaks[5] = p5
    peaks[6] = p6
    peaks[7] = p7
    rng[0] = counter
    counts[0] = overloads


FEEDBACK_LOOPS = (
    None,
    feedback_loop_order1,
    feedback_loop_order2,
    feedback_loop_order3,
    feedback_loop_order4,
    feedback_loop_order5,
    feedback_loop_order6,
    feedback_loop_order7,
    feedback_loop_order8,
)


# ---------------------------------------------------------------------------------------------
# Rate conversion (stages/upsample.py)
# ---------------------------------------------------------------------------------------------
#
# Layout: every signal here is (channels, samples), C-contiguous float64, with the stage's
# history already prepended by the wrapper. Every output is summed tap by tap in a fixed order
# that does not depend on where a block starts, so block-wise and one-shot runs agree bit for
# bit. The loops over output samples are innermost, over slices (which spares the
# negative-index checks), so that they vectorise without reordering any sum.

_RATE_CHUNK = 512


@njit(cache=True, nogil=True)
def interpolate_halfband(buf, dense, out):
    """Interpolate by 2 with a half-band FIR (polyphase; zeros are never multiplied).

    ``dense`` holds the 2K taps of the dense phase (symmetric, ``dense[m] == dense[2K-1-m]``),
    scaled for an interpolation gain of 2; the other phase is the centre tap, a pure delay of
    K - 1 input samples. ``buf`` is (channels, 2K - 1 + n): the last 2K - 1 input samples of
    the previous block, then the new block. ``out`` is (channels, 2n):
    ``out[c, 2i] = sum_m dense[m] * (buf[c, i+2K-1-m] + buf[c, i+m])`` for m < K, summed in
    increasing m, and ``out[c, 2i+1] = buf[c, i+K]``.
    """
    n_ch = buf.shape[0]
    two_k = dense.shape[0]
    k = two_k // 2
    n = out.shape[1] // 2
    acc = np.empty(_RATE_CHUNK)
    for c in range(n_ch):
        row = buf[c]
        for start in range(0, n, _RATE_CHUNK):
            length = min(start + _RATE_CHUNK, n) - start
            acc[:length] = 0.0
            for m in range(k):
                coef = dense[m]
                a = row[start + two_k - 1 - m : start + two_k - 1 - m + length]
                b = row[start + m : start + m + length]
                for i in range(length):
                    acc[i] += coef * (a[i] + b[i])
            even = out[c, 2 * start : 2 * (start + length) : 2]
            odd = out[c, 2 * start + 1 : 2 * (start + length) : 2]
            centre = row[start + k : start + k + length]
            for i in range(length):
                even[i] = acc[i]
                odd[i] = centre[i]


@njit(cache=True, nogil=True)
def interpolate_polyphase(buf, phases, lengths, out):
    """Interpolate by R with a general FIR split into R phases (zeros never multiplied).

    ``phases`` is (R, M): ``phases[p, m]`` is tap ``p + m R`` of the interpolation filter
    (gain R); only the first ``lengths[p]`` taps of phase p are used. ``buf`` is
    (channels, M - 1 + n) with the previous block's last M - 1 samples first; ``out`` is
    (channels, R n) with ``out[c, R i + p] = sum_m phases[p, m] * buf[c, i + M - 1 - m]``,
    summed in increasing m.
    """
    n_ch = buf.shape[0]
    ratio = phases.shape[0]
    taps = phases.shape[1]
    n = out.shape[1] // ratio
    acc = np.empty(_RATE_CHUNK)
    for c in range(n_ch):
        row = buf[c]
        for start in range(0, n, _RATE_CHUNK):
            length = min(start + _RATE_CHUNK, n) - start
            for p in range(ratio):
                acc[:length] = 0.0
                for m in range(lengths[p]):
                    coef = phases[p, m]
                    seg = row[start + taps - 1 - m : start + taps - 1 - m + length]
                    for i in range(length):
                        acc[i] += coef * seg[i]
                dst = out[c, ratio * start + p : ratio * (start + length) : ratio]
                for i in range(length):
                    dst[i] = acc[i]


@njit(cache=True, nogil=True)
def decimate_halfband(held, new, half, out):
    """Decimate by 2 with a half-band FIR of length N = 4K - 1 (zeros never multiplied).

    ``half`` holds the K distinct outer taps (``h[2m]`` for m < K, the filter having unit DC
    gain); the centre tap is 1/2. The input is ``held`` (channels, H) followed by ``new``
    (channels, n), any strides: call it ``buf``, whose first sample is the oldest one the
    first output needs. Output i uses the newest sample ``t = N - 1 + 2 i``:
    ``out[c, i] = sum_m half[m] * (buf[c, t-2m] + buf[c, t-2(2K-1-m)]) + 0.5 * buf[c, t-2K+1]``,
    summed in increasing m, the centre term last. Each channel is first split into its even
    and odd samples (the paired taps all fall on the parity of t, the centre on the other),
    so the inner loops run over contiguous memory.
    """
    n_ch = held.shape[0]
    n_held = held.shape[1]
    n_new = new.shape[1]
    k = half.shape[0]
    n = out.shape[1]
    n_even = (n_held + n_new + 1) // 2
    even = np.empty(n_even)
    odd = np.empty(n_even)
    acc = np.empty(_RATE_CHUNK)
    for c in range(n_ch):
        for j in range(n_held):
            if j % 2 == 0:
                even[j // 2] = held[c, j]
            else:
                odd[j // 2] = held[c, j]
        # new[j] sits at buf index n_held + j
        first_even = n_held % 2  # index into new of its first even-buf sample
        src_even = new[c, first_even::2]
        src_odd = new[c, 1 - first_even :: 2]
        e0 = (n_held + first_even) // 2
        o0 = (n_held + 1 - first_even) // 2
        for j in range(src_even.shape[0]):
            even[e0 + j] = src_even[j]
        for j in range(src_odd.shape[0]):
            odd[o0 + j] = src_odd[j]
        # t = 4K - 2 + 2i is even: t - 2m -> even[2K-1+i-m], t - 2(2K-1-m) -> even[i+m],
        # t - (2K-1) -> odd[K-1+i]
        for start in range(0, n, _RATE_CHUNK):
            length = min(start + _RATE_CHUNK, n) - start
            acc[:length] = 0.0
            for m in range(k):
                coef = half[m]
                a = even[start + 2 * k - 1 - m : start + 2 * k - 1 - m + length]
                b = even[start + m : start + m + length]
                for i in range(length):
                    acc[i] += coef * (a[i] + b[i])
            centre = odd[start + k - 1 : start + k - 1 + length]
            dst = out[c, start : start + length]
            for i in range(length):
                dst[i] = acc[i] + 0.5 * centre[i]


@njit(cache=True, nogil=True)
def resample_rational(buf, phases, lengths, first_time, step, out):
    """Resample by L/M with a polyphase FIR (zeros never multiplied).

    ``phases`` is (L, P): ``phases[p, i]`` is tap ``p + i L`` of the filter designed at L times
    the input rate (gain L); only the first ``lengths[p]`` taps of phase p are used. ``buf``
    is (channels, P - 1 + n): the previous block's last P - 1 input samples, then the block.
    Output j sits at time ``first_time + j * step`` in units of 1/L input sample from the
    block's first sample; with ``q, p = divmod(time, L)``:
    ``out[c, j] = sum_i phases[p, i] * buf[c, q + P - 1 - i]``, summed in increasing i.
    """
    n_ch = buf.shape[0]
    up = phases.shape[0]
    taps = phases.shape[1]
    n_out = out.shape[1]
    for c in range(n_ch):
        row = buf[c]
        t = first_time
        for j in range(n_out):
            q = t // up
            p = t - q * up
            base = q + taps - 1
            acc = 0.0
            for i in range(lengths[p]):
                acc += phases[p, i] * row[base - i]
            out[c, j] = acc
            t += step


# ---------------------------------------------------------------------------------------------
# Output stages (stages/output_stage.py)
# ---------------------------------------------------------------------------------------------


@njit(cache=True, nogil=True)
def pwm_segments(
    codes_a,
    codes_b,
    n_legs,
    invert_b,
    double_edge,
    steps,
    sub,
    dead,
    volts,
    half_bridge,
    run,
    last,
    levels,
    ticks,
    counts,
):
    """Build PWM frames: leg intervals from counter codes, dead time, merged segments.

    Per frame and leg, the commanded high intervals (at most two) come from the code:
    trailing edge ``[0, k sub)`` (or its complement ``[k sub, F)`` for an inverted leg);
    double edge ``[c - k sub, c + k sub)`` about the centre ``c = steps sub`` (or the two
    pieces outside it). Dead time: an interval's start moves to ``start + dead - elapsed``
    (capped at its end), where ``elapsed`` is how long the command has already been high
    (``run``, carried from the previous frame, for an interval starting at 0). The sorted
    interval ends cut the frame into ``1 + 4 n_legs`` segments (zero-length ones included);
    each segment's level is ``volts (2 A - 1)`` (half bridge) or ``volts (A - B)``.

    ``codes_a``, ``codes_b``: (n,) int64; ``run``, ``last``: (n_legs,) int64 state, updated;
    ``levels``: (n, S) float64 and ``ticks``: (n, S) int64 written; ``counts``: (3,) int64
    incremented with [pulses lost to dead time, transitions of leg A, transitions of leg B].
    """
    n = codes_a.shape[0]
    frame = steps * sub * (2 if double_edge else 1)
    centre = steps * sub
    n_cut = 2 + 4 * n_legs
    st = np.empty((2, 2), np.int64)
    en = np.empty((2, 2), np.int64)
    cuts = np.empty(n_cut, np.int64)
    for i in range(n):
        for leg in range(n_legs):
            k = codes_a[i] if leg == 0 else codes_b[i]
            inv = leg == 1 and invert_b
            s0 = frame
            e0 = frame
            s1 = frame
            e1 = frame
            if not double_edge:
                if inv:
                    s0 = k * sub
                else:
                    s0 = 0
                    e0 = k * sub
            else:
                h = k * sub
                if not inv:
                    s0 = centre - h
                    e0 = centre + h
                elif h > 0:
                    s0 = 0
                    e0 = centre - h
                    s1 = centre + h
                else:
                    s0 = 0
            st[leg, 0] = s0
            en[leg, 0] = e0
            st[leg, 1] = s1
            en[leg, 1] = e1
            new_run = 0
            for j in range(2):
                s = st[leg, j]
                e = en[leg, j]
                if e > s:
                    if e == frame:
                        new_run = dead if s == 0 else min(frame - s, dead)
                    elapsed = run[leg] if s == 0 else 0
                    delay = dead - elapsed
                    if delay > 0:
                        s = min(e, s + delay)
                        if s == e:
                            counts[0] += 1
                        st[leg, j] = s
            run[leg] = new_run
        # cut points, sorted (insertion sort of a handful of values)
        cuts[0] = 0
        c = 1
        for leg in range(n_legs):
            for j in range(2):
                cuts[c] = st[leg, j]
                cuts[c + 1] = en[leg, j]
                c += 2
        cuts[c] = frame
        for a in range(1, n_cut):
            v = cuts[a]
            b = a - 1
            while b >= 0 and cuts[b] > v:
                cuts[b + 1] = cuts[b]
                b -= 1
            cuts[b + 1] = v
        for j in range(n_cut - 1):
            t = cuts[j + 1] - cuts[j]
            mid2 = cuts[j] + cuts[j + 1]
            high_a = 0
            high_b = 0
            for leg in range(n_legs):
                hi = 0
                for q in range(2):
                    if 2 * st[leg, q] <= mid2 and mid2 < 2 * en[leg, q]:
                        hi = 1
                if leg == 0:
                    high_a = hi
                else:
                    high_b = hi
                if t > 0 and hi != last[leg]:
                    counts[1 + leg] += 1
                    last[leg] = hi
            ticks[i, j] = t
            if half_bridge:
                levels[i, j] = volts * (2.0 * high_a - 1.0)
            else:
                levels[i, j] = volts * (float(high_a) - float(high_b))


# ---------------------------------------------------------------------------------------------
# Reconstruction filters (stages/reconstruct.py)
# ---------------------------------------------------------------------------------------------


@njit(cache=True, nogil=True)
def zoh_segments(levels, ticks, phis, gammas, c, d, x, y):
    """Propagate a state-space filter through a piecewise-constant waveform, frame by frame.

    For every segment of ``k`` ticks holding ``u``: ``x <- Phi(k) x + Gamma(k) u`` with the
    zero-order-hold-exact matrices ``Phi(k) = expm(A k dt)``, ``Gamma(k) = int_0^{k dt}
    expm(A s) ds B``. At each frame end ``y = C x + D u_last``. Zero-length segments are
    skipped. ``levels``, ``ticks``: (n, s); ``phis``: (F + 1, m, m); ``gammas``: (F + 1, m);
    ``x``: (m,) updated in place; ``y``: (n,) written.
    """
    n = levels.shape[0]
    s = levels.shape[1]
    m = x.shape[0]
    tmp = np.empty(m)
    u = 0.0
    for i in range(n):
        for j in range(s):
            k = ticks[i, j]
            if k == 0:
                continue
            u = levels[i, j]
            for r in range(m):
                acc = gammas[k, r] * u
                for q in range(m):
                    acc += phis[k, r, q] * x[q]
                tmp[r] = acc
            for r in range(m):
                x[r] = tmp[r]
        out = d * u
        for r in range(m):
            out += c[r] * x[r]
        y[i] = out


@njit(cache=True, nogil=True)
def zoh_modal_steps(u, real_phi, real_gamma, real_c, pair_phi, pair_gamma, pair_c, d, xr, xp, y):
    """One-segment frames through a filter in real modal form: the fast path for PDM / NRZ.

    The state holds ``nr`` real modes then ``np`` complex-pair modes, each pair as (re, im)
    with the 2x2 block ``[[a, -b], [b, a]]`` (``a + jb = exp(lambda dt)``). Per sample:
    ``x <- Phi x + Gamma u``, ``y = C x + D u``, with the same operation order as
    :func:`zoh_segments` on the block-diagonal matrices, so both give identical numbers.
    ``real_*``: (nr,); ``pair_phi``: (np, 2) as (a, b); ``pair_gamma``, ``pair_c``: (np, 2);
    ``xr``: (nr,), ``xp``: (np, 2), updated in place.
    """
    n = u.shape[0]
    nr = xr.shape[0]
    npair = xp.shape[0]
    for i in range(n):
        un = u[i]
        out = d * un
        for r in range(nr):
            v = real_gamma[r] * un
            v += real_phi[r] * xr[r]
            xr[r] = v
            out += real_c[r] * v
        for p in range(npair):
            a = pair_phi[p, 0]
            b = pair_phi[p, 1]
            re = xp[p, 0]
            im = xp[p, 1]
            nre = pair_gamma[p, 0] * un
            nre += a * re
            nre += -b * im
            nim = pair_gamma[p, 1] * un
            nim += b * re
            nim += a * im
            xp[p, 0] = nre
            xp[p, 1] = nim
            out += pair_c[p, 0] * nre
            out += pair_c[p, 1] * nim
        y[i] = out


@njit(cache=True, nogil=True)
def zoh_modal_steps_pair(u, pair_phi, pair_gamma, pair_c, d, xp, y):
    """:func:`zoh_modal_steps` for exactly one complex pair and no real mode (2nd order).

    The state lives in local scalars for the whole loop; same operation order, same numbers.
    """
    a = pair_phi[0, 0]
    b = pair_phi[0, 1]
    gre = pair_gamma[0, 0]
    gim = pair_gamma[0, 1]
    cre = pair_c[0, 0]
    cim = pair_c[0, 1]
    re = xp[0, 0]
    im = xp[0, 1]
    for i in range(u.shape[0]):
        un = u[i]
        nre = gre * un + a * re + -b * im
        nim = gim * un + b * re + a * im
        re = nre
        im = nim
        y[i] = d * un + cre * re + cim * im
    xp[0, 0] = re
    xp[0, 1] = im


@njit(cache=True, nogil=True)
def zoh_modal_steps_real_pair(
    u, real_phi, real_gamma, real_c, pair_phi, pair_gamma, pair_c, d, xr, xp, y
):
    """:func:`zoh_modal_steps` for exactly one real mode and one pair (3rd order).

    The state lives in local scalars for the whole loop; same operation order, same numbers.
    """
    p0 = real_phi[0]
    g0 = real_gamma[0]
    c0 = real_c[0]
    a = pair_phi[0, 0]
    b = pair_phi[0, 1]
    gre = pair_gamma[0, 0]
    gim = pair_gamma[0, 1]
    cre = pair_c[0, 0]
    cim = pair_c[0, 1]
    x0 = xr[0]
    re = xp[0, 0]
    im = xp[0, 1]
    for i in range(u.shape[0]):
        un = u[i]
        x0 = g0 * un + p0 * x0
        nre = gre * un + a * re + -b * im
        nim = gim * un + b * re + a * im
        re = nre
        im = nim
        y[i] = d * un + c0 * x0 + cre * re + cim * im
    xr[0] = x0
    xp[0, 0] = re
    xp[0, 1] = im


# ---------------------------------------------------------------------------------------------
# Measurement helpers (measure/*)
# ---------------------------------------------------------------------------------------------
