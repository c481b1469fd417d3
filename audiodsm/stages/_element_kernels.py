"""Compiled inner loops of the unit-element, edge and analog-noise stages, and nothing else.

The stages are stages/elements.py, stages/jitter.py and stages/analog_noise.py.
Same rules as the other kernel modules: ``@njit(cache=True, nogil=True)``, no fastmath,
contiguous arrays in, caller-allocated outputs and state arrays updated in place, no
validation (the wrappers validate, convert, allocate and call). Each kernel has a slow
pure-Python twin in ``tests/test_elements.py`` or ``tests/test_jitter.py``.

Unit-element convention (all element kernels): ``n_elements = N`` bipolar unit elements, each
adding ``+(1 + e_i) / 2`` LSB when selected and ``-(1 + e_i) / 2`` LSB when not, so code ``k``
(``k`` elements selected) gives the centred level ``k - N / 2`` plus the mismatch error
``sum_selected(e_i) - total(e) / 2``. The output is that centred level in LSB; the ideal part
and the error are added last, so with every ``e_i = 0`` the output is exactly ``k - N / 2``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

# splitmix64 constants (S. Vigna's reference code of splitmix64, public domain; the generator
# of Steele, Lea & Flood, "Fast splittable pseudorandom number generators", OOPSLA 2014)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)


@njit(cache=True, nogil=True)
def _next_random(rng):
    """Advance the splitmix64 state ``rng[0]`` and return the next 64-bit output."""
    x = rng[0] + _GOLDEN
    rng[0] = x
    z = x
    z = (z ^ (z >> np.uint64(30))) * _MIX1
    z = (z ^ (z >> np.uint64(27))) * _MIX2
    return z ^ (z >> np.uint64(31))


# Marsaglia & Tsang's ziggurat for the standard normal, 128 layers: the base strip's edge
# ``r`` and the area ``v`` of every layer (G. Marsaglia and W. W. Tsang, "The ziggurat method
# for generating random variables", J. Statistical Software 5(8), 2000; constants from that
# paper, from memory, checked by the tests against scipy's normal distribution).
_ZIGGURAT_R = 3.442619855899
_ZIGGURAT_V = 9.91256303526217e-3
#: The signed 53-bit integer a draw starts from is scaled by this.
_ZIGGURAT_SCALE = 2.0**52


def _ziggurat_tables():
    """The ziggurat's layer tables, as in the setup code of Marsaglia & Tsang (2000).

    ``k``: a draw of the layer is accepted without more work when its integer is below it;
    ``w``: integer -> abscissa; ``f``: the density at the layer's outer edge.
    """
    k, w, f = np.zeros(128), np.zeros(128), np.zeros(128)
    d = t = _ZIGGURAT_R
    q = _ZIGGURAT_V / np.exp(-0.5 * d * d)
    k[0] = d / q * _ZIGGURAT_SCALE
    w[0] = q / _ZIGGURAT_SCALE
    w[127] = d / _ZIGGURAT_SCALE
    f[0] = 1.0
    f[127] = np.exp(-0.5 * d * d)
    for i in range(126, 0, -1):
        d = np.sqrt(-2.0 * np.log(_ZIGGURAT_V / d + np.exp(-0.5 * d * d)))
        k[i + 1] = d / t * _ZIGGURAT_SCALE
        t = d
        f[i] = np.exp(-0.5 * d * d)
        w[i] = d / _ZIGGURAT_SCALE
    return k, w, f


_ZIG_K, _ZIG_W, _ZIG_F = _ziggurat_tables()


@njit(cache=True, nogil=True)
def _open_uniform(rng):
    """A uniform draw in (0, 1) (53 bits, never 0 or 1)."""
    return (np.float64(_next_random(rng) >> np.uint64(11)) + 0.5) * (1.0 / 9007199254740992.0)


@njit(cache=True, nogil=True)
def _normal_beyond_fast_path(rng, u):
    """The ziggurat's rare cases for the draw ``u``: the wedges and the tail beyond ``r``."""
    while True:
        layer = np.int64(u & np.uint64(127))
        j = np.int64(u) >> np.int64(11)
        x = j * _ZIG_W[layer]
        if abs(j) < _ZIG_K[layer]:
            return x
        if layer == 0:  # the tail beyond r (Marsaglia's exponential method)
            while True:
                a = -np.log(_open_uniform(rng)) / _ZIGGURAT_R
                b = -np.log(_open_uniform(rng))
                if b + b >= a * a:
                    break
            return _ZIGGURAT_R + a if j > 0 else -_ZIGGURAT_R - a
        f_lo = _ZIG_F[layer]
        if f_lo + _open_uniform(rng) * (_ZIG_F[layer - 1] - f_lo) < np.exp(-0.5 * x * x):
            return x
        u = _next_random(rng)


@njit(cache=True, nogil=True)
def normal_draws(rng, scale, out):
    """``out[n] = scale * z_n``, ``z_n`` independent standard normal draws (state ``rng``).

    The ziggurat method (Marsaglia & Tsang 2000) on splitmix64: one 64-bit draw gives the
    layer (its low 7 bits) and a signed 53-bit abscissa (its high bits, independent of the
    layer's, which avoids the correlation of the original 32-bit version; Leong et al.,
    J. Statistical Software 12(7), 2005, from memory); about 99 % of draws end there. The
    same state gives the same numbers however the draws are split into calls.
    """
    for n in range(out.size):
        u = _next_random(rng)
        layer = np.int64(u & np.uint64(127))
        j = np.int64(u) >> np.int64(11)
        if abs(j) < _ZIG_K[layer]:
            z = j * _ZIG_W[layer]
        else:
            z = _normal_beyond_fast_path(rng, u)
        out[n] = scale * z


@njit(cache=True, nogil=True)
def select_thermometer(codes, half, table, out):
    """Thermometer selection: code ``k`` turns on elements ``0 .. k-1``, always the same ones.

    ``table[k]`` holds the static error of code ``k`` (``sum(e[:k]) - sum(e) / 2``).
    """
    for n in range(codes.size):
        k = codes[n]
        out[n] = (k - half) + table[k]


_LOW32 = np.uint64(0xFFFFFFFF)
_TWO32 = np.uint64(1 << 32)


@njit(cache=True, nogil=True)
def uniform_below(rng, bound):
    """A uniform integer in ``[0, bound)``, ``0 < bound < 2**32``, from the state ``rng``.

    Lemire's multiply-and-shift method with its exact rejection step (D. Lemire, "Fast random
    integer generation in an interval", ACM TOMACS 29(1), 2019, the 32-bit algorithm): the
    high 32 bits ``x`` of a splitmix64 output times ``bound`` is a 64-bit product ``m``;
    ``m >> 32`` is the draw unless the low half of ``m`` falls below ``(2**32 - bound) mod
    bound``, then ``x`` is drawn again. No modulo bias at all, and no division but in the
    rare case where the low half is below ``bound`` (probability ``bound / 2**32``).
    """
    s = np.uint64(bound)
    m = (_next_random(rng) >> np.uint64(32)) * s
    low = m & _LOW32
    if low < s:
        reject = (_TWO32 - s) % s
        while low < reject:
            m = (_next_random(rng) >> np.uint64(32)) * s
            low = m & _LOW32
    return np.int64(m >> np.uint64(32))


@njit(cache=True, nogil=True)
def select_random(codes, half, errors, rng, order, out):
    """Random selection: each sample, ``k`` elements drawn without replacement.

    A partial Fisher-Yates shuffle of the persistent index array ``order`` (state), the swap
    partner of place ``j`` drawn uniformly from ``j .. N - 1`` by :func:`uniform_below`
    (splitmix64, state ``rng``, one uint64; exact, without modulo bias).
    """
    n_el = errors.size
    total = 0.0
    for i in range(n_el):
        total += errors[i]
    for n in range(codes.size):
        k = codes[n]
        acc = 0.0
        for j in range(k):
            r = j + uniform_below(rng, n_el - j)
            t = order[j]
            order[j] = order[r]
            order[r] = t
            acc += errors[order[j]]
        out[n] = (k - half) + (acc - 0.5 * total)


@njit(cache=True, nogil=True)
def _cyclic_sum(prefix, start, count, n_el):
    """Sum of ``errors[start], ..., errors[start + count - 1]`` taken modulo ``n_el``.

    Both sums are formed and one is picked (a select, not a branch: whether the run wraps
    changes from sample to sample and would be mispredicted).
    """
    stop = start + count
    wraps = stop > n_el
    straight = prefix[min(stop, n_el)] - prefix[start]
    wrapped = straight + prefix[stop - n_el if wraps else 0]
    return wrapped if wraps else straight


@njit(cache=True, nogil=True)
def select_rotating(codes, half, prefix, pointers, bidirectional, out):
    """Data-weighted averaging, plain or bi-directional.

    Plain (Baird & Fiez 1995): the ``k`` elements from the pointer on, cyclically; the pointer
    then moves past them. Bi-directional (Fujimori et al. 2000): even samples go forward from
    ``pointers[0]``, odd samples backward from ``pointers[1]`` (elements ``p - 1, ..., p -
    k``), two interleaved rotations. ``pointers`` = (forward, backward, samples so far mod 2).
    ``prefix`` holds the cumulative sums of the element errors (``prefix[0] = 0``).
    """
    n_el = prefix.size - 1
    for n in range(codes.size):
        k = codes[n]
        if bidirectional and pointers[2] == 1:
            p = pointers[1] - k
            if p < 0:
                p += n_el
            acc = _cyclic_sum(prefix, p, k, n_el)
            pointers[1] = p
        else:
            p = pointers[0]
            acc = _cyclic_sum(prefix, p, k, n_el)
            p += k
            if p >= n_el:
                p -= n_el
            pointers[0] = p
        if bidirectional:
            pointers[2] = 1 - pointers[2]
        out[n] = (k - half) + (acc - 0.5 * prefix[n_el])


#: The vector shaper ranks its targets by counting, branch-free, in this many lanes when the
#: part has more than 8 and at most this many elements (the 17-level DAC's 16); other counts
#: sort (an insertion sort, cheaper for a few elements and, for many, adaptive). Both give
#: the same selection and the same sums, bit for bit (tests/test_elements.py).
RANKED_LANES = 16


@njit(cache=True, nogil=True)
def select_vector_shaped(codes, half, errors, past, out):
    """Second-order vector mismatch shaping (Schreier & Zhang 1995; Schreier & Temes 2005).

    Error feedback on the selection vector ``v`` (0/1 per element, ``k`` ones): the target is
    ``t = k / N - 2 eps[n-1] + eps[n-2]``, ``v`` selects the ``k`` largest ``t_i`` (ties to
    the lower index), ``eps = v - t``. So ``v = k / N + (1 - z^-1)^2 eps``: each element's use
    is second-order shaped, and so is the mismatch error ``sum(v_i e_i)``; ``sum(t) = k``
    at every sample, so the states do not drift as a whole. The selected elements' errors
    are summed in the order of their targets, largest first.
    ``past`` rows are ``eps[n-1]`` and ``eps[n-2]`` (state).
    """
    if 8 < errors.size <= RANKED_LANES:
        _vector_shaped_ranked(codes, half, errors, past, out)
    else:
        _vector_shaped_sorted(codes, half, errors, past, out)


@njit(cache=True, nogil=True)
def _vector_shaped_ranked(codes, half, errors, past, out):
    """:func:`select_vector_shaped` by counting ranks, for at most :data:`RANKED_LANES` elements.

    Element ``i``'s rank is the number of elements ahead of it, ``#{j: t_j > t_i or (t_j ==
    t_i and j < i)}``: a fixed count of comparisons without branches, which the compiler
    unrolls and vectorizes (the insertion sort's moves are branches the processor
    mispredicts, the order of 16 targets changing often). Element ``i`` is selected when its
    rank is below ``k``; the selected errors, put in rank order, are summed as the sort sums
    them. The lanes past the part's elements hold the target ``-inf``: ranked last, never
    selected.
    """
    n_el = errors.size
    total = 0.0
    for i in range(n_el):
        total += errors[i]
    now = np.zeros(RANKED_LANES)  # eps[n-1]
    before = np.zeros(RANKED_LANES)  # eps[n-2]
    error = np.zeros(RANKED_LANES)
    for i in range(n_el):
        now[i] = past[0, i]
        before[i] = past[1, i]
        error[i] = errors[i]
    target = np.empty(RANKED_LANES)
    rank = np.empty(RANKED_LANES, np.int64)
    in_order = np.empty(RANKED_LANES)
    for n in range(codes.size):
        k = codes[n]
        share = k / n_el
        for i in range(RANKED_LANES):
            t = share - 2.0 * now[i] + before[i]
            target[i] = t if i < n_el else -np.inf
        for i in range(RANKED_LANES):
            t = target[i]
            ahead = 0
            for j in range(RANKED_LANES):
                ahead += (target[j] > t) | ((target[j] == t) & (j < i))
            rank[i] = ahead
        for i in range(RANKED_LANES):
            in_order[rank[i]] = error[i]
        acc = 0.0
        for j in range(k):
            acc += in_order[j]
        for i in range(RANKED_LANES):
            eps = -target[i]
            before[i] = now[i]
            now[i] = eps + 1.0 if rank[i] < k else eps
        out[n] = (k - half) + (acc - 0.5 * total)
    for i in range(n_el):
        past[0, i] = now[i]
        past[1, i] = before[i]


@njit(cache=True, nogil=True)
def _vector_shaped_sorted(codes, half, errors, past, out):
    """:func:`select_vector_shaped` by an insertion sort of the targets (any element count).

    The sort starts from the last sample's order (kept within the call only: ties break by
    index, so the order a sort starts from does not change its result).
    """
    n_el = errors.size
    total = 0.0
    for i in range(n_el):
        total += errors[i]
    target = np.empty(n_el)
    ranked = np.arange(n_el)
    for n in range(codes.size):
        k = codes[n]
        share = k / n_el
        for i in range(n_el):
            target[i] = share - 2.0 * past[0, i] + past[1, i]
        # insertion sort by (target descending, index ascending), starting from the last
        # sample's order: the targets move little from one sample to the next, so few moves
        for j in range(1, n_el):
            item = ranked[j]
            t = target[item]
            m = j - 1
            while m >= 0 and (
                target[ranked[m]] < t or (target[ranked[m]] == t and ranked[m] > item)
            ):
                ranked[m + 1] = ranked[m]
                m -= 1
            ranked[m + 1] = item
        acc = 0.0
        for i in range(n_el):
            past[1, i] = past[0, i]
            past[0, i] = -target[i]
        for j in range(k):
            i = ranked[j]
            past[0, i] += 1.0
            acc += errors[i]
        out[n] = (k - half) + (acc - 0.5 * total)


@njit(cache=True, nogil=True)
def relaxation_noise(draws, start, frame_std, poles, gains, holds, relax, out):
    """White frame means plus a sum of held first-order relaxation processes (the 1/f part).

    ``draws`` is consumed in order, frame by frame: the white draw, then one draw for every
    process ``i`` whose update falls on the frame (global frame ``start + t`` a multiple of
    ``holds[i]``, a power of two): ``x_i <- gains[i] draw + poles[i] x_i``, held until its
    next update. ``out[t] = frame_std white + sum_i x_i`` (added in process order);
    ``relax``: the ``x_i``, updated.
    """
    p = poles.size
    # holds are powers of two and frames are not negative: "a multiple of the hold" is a
    # test of the low bits (an integer division per process and frame cost most of the time)
    masks = np.empty(p, np.int64)
    for i in range(p):
        masks[i] = holds[i] - 1
    e = 0
    for t in range(out.size):
        frame = start + t
        acc = frame_std * draws[e]
        e += 1
        for i in range(p):
            if frame & masks[i] == 0:
                relax[i] = gains[i] * draws[e] + poles[i] * relax[i]
                e += 1
            acc += relax[i]
        out[t] = acc


@njit(cache=True, nogil=True)
def jittered_frame_means(levels, shifts, held, out):
    """Exact frame means of a one-segment-per-frame waveform whose edges are displaced.

    The edge at the start of frame ``n`` (from ``levels[n-1]`` to ``levels[n]``) moves by
    ``shifts[n]`` frames (positive: later; the random and the sinusoidal parts added
    beforehand, :func:`add_sine_shifts`), clipped to ``[-1/2, 1/2]``. A late edge leaves the
    first ``shift`` of frame ``n`` at the old level; an early one puts the last ``-shift`` of
    frame ``n - 1`` at the new level. Either way the area moved is ``-(levels[n] -
    levels[n-1]) * shift``: it changes the mean of frame ``n`` (late) or ``n - 1`` (early).
    Frame ``n - 1`` is finished only when edge ``n`` is known, so the output runs one frame
    behind: ``out[n]`` is the mean of frame ``n - 1``. ``held`` = (level of the frame held
    back, its mean so far); updated in place.
    """
    prev = held[0]
    pending = held[1]
    for n in range(levels.size):
        level = levels[n]
        shift = min(max(shifts[n], -0.5), 0.5)
        moved = -(level - prev) * shift
        mean = level
        if shift > 0.0:
            mean += moved
        else:
            pending += moved
        out[n] = pending
        pending = mean
        prev = level
    held[0] = prev
    held[1] = pending


#: The sine of the sinusoidal jitter is computed exactly at every global edge index that is a
#: multiple of this, and from that anchor by the angle-sum formula between.
SINE_ANCHOR = 1024


@njit(cache=True, nogil=True)
def _angle_table(count, ratio):
    """Cosines and sines of ``2 pi (m ratio mod 1)`` for ``m = 0 .. count - 1``."""
    cos_m = np.empty(count)
    sin_m = np.empty(count)
    for m in range(count):
        y = 2.0 * np.pi * ((m * ratio) % 1.0)
        cos_m[m] = np.cos(y)
        sin_m[m] = np.sin(y)
    return cos_m, sin_m


@njit(cache=True, nogil=True)
def add_sine_shifts(shifts, start, peak, ratio):
    """Add ``peak sin(2 pi ((start + n) ratio mod 1))`` to ``shifts[n]`` (in place).

    The sine is computed exactly at every global index ``a`` that is a multiple of
    :data:`SINE_ANCHOR`, and at ``a + m`` between by the angle sum ``sin(x_a) cos(y_m) +
    cos(x_a) sin(y_m)``, ``y_m = 2 pi (m ratio mod 1)`` from a table of the offsets: a few
    roundings from the exact value (about 1e-16 of the peak), the same numbers whatever the
    block boundaries, no sine per edge, and no chain from one edge to the next (a rotated
    phasor would be one), so the loop vectorizes.
    """
    n = shifts.size
    if n == 0:
        return
    first = start % SINE_ANCHOR
    # offsets 0 .. table-1 are used
    cos_m, sin_m = _angle_table(min(SINE_ANCHOR, first + n), ratio)
    i = 0
    while i < n:
        index = start + i
        m0 = index % SINE_ANCHOR
        phase = 2.0 * np.pi * (((index - m0) * ratio) % 1.0)
        s = peak * np.sin(phase)
        c = peak * np.cos(phase)
        stop = min(n, i + SINE_ANCHOR - m0)
        for j in range(i, stop):
            m = m0 + j - i
            shifts[j] += s * cos_m[m] + c * sin_m[m]
        i = stop


@njit(cache=True, nogil=True, inline="always")
def _area_before(shift, ramp):
    """Area of a unit edge's ramp before its nominal instant (slot units).

    The edge starts at ``shift`` and rises linearly to 1 over ``ramp`` (a step when 0); the
    area of that ramp on ``(-inf, 0]`` is ``0`` (the ramp starts after 0), ``-shift - ramp/2``
    (it ends before 0) or ``shift^2 / (2 ramp)`` (it straddles 0).
    """
    if shift >= 0.0:
        return 0.0
    if ramp == 0.0 or shift + ramp <= 0.0:
        return -shift - 0.5 * ramp
    return shift * shift / (2.0 * ramp)


@njit(cache=True, nogil=True)
def edge_slot_means(levels, shifts, rise, fall, top, rz, held, out):
    """Exact slot means of a PDM / NRZ / RZ output whose edges ramp and are displaced.

    A frame is ``S`` slots of equal length (``S = 1``: NRZ, the frame's level; ``S = 2``:
    return-to-zero, the level then 0). Every slot starts with an edge, displaced by
    ``shifts[e]`` slots (``e`` the block's edge index; random and sinusoidal parts added
    beforehand, :func:`add_sine_shifts`), clipped to ``[-1/2, 1/2]``.
    An edge is an up part (ramp of ``rise`` slots) and a down part (``fall`` slots): NRZ, the
    net step (up when positive); RZ, the unit elements' parts, the ``k`` elements at ``+a``
    and the ``N - k`` at ``-a`` switching apart (``top = N a``: up ``(L + top) / 2`` and down
    ``(L - top) / 2`` into a level ``L``, the negatives back to 0). A part of step ``s``
    changes the slot before the edge by ``s P`` and the slot after it by ``s (-shift -
    ramp / 2 - P)``, ``P`` = :func:`_area_before` (exact integrals of the linear ramp, whose
    span lies inside those two slots when ``rise, fall < 1/2``). ``out[i]`` (shape (n, S)) is
    frame ``i - 1``; ``held`` = (last level, the held frame's ``S`` slot means), updated.
    """
    n = levels.shape[0]
    n_slots = out.shape[1]
    prev = held[0]
    last = np.empty(n_slots)
    cur = np.empty(n_slots)
    for s in range(n_slots):
        last[s] = held[1 + s]
    for i in range(n):
        level = levels[i]
        for s in range(n_slots):
            e = i * n_slots + s
            shift = min(max(shifts[e], -0.5), 0.5)
            if not rz:
                step = level - prev
                up = step if step > 0.0 else 0.0
                down = step if step < 0.0 else 0.0
                value = level
                prev = level
            elif s == 0:
                up = 0.5 * (level + top)
                down = 0.5 * (level - top)
                value = level
            else:
                up = 0.5 * (top - level)
                down = -0.5 * (level + top)
                value = 0.0
            b_up = _area_before(shift, rise)
            b_down = _area_before(shift, fall)
            before = up * b_up + down * b_down
            after = up * (-shift - 0.5 * rise - b_up) + down * (-shift - 0.5 * fall - b_down)
            if s == 0:
                last[n_slots - 1] += before
                for q in range(n_slots):
                    out[i, q] = last[q]
            else:
                cur[s - 1] += before
            cur[s] = value + after
        for q in range(n_slots):
            last[q] = cur[q]
    held[0] = prev
    for s in range(n_slots):
        held[1 + s] = last[s]


@njit(cache=True, nogil=True)
def add_tick_sine_shifts(levels, ticks, prev, start, ticks_per_frame, peak, ratio, shifts):
    """Add the sinusoidal jitter of every PWM edge to ``shifts`` (in place, in edge order).

    The edges are those of :func:`jittered_segments` (level changes between segments of
    nonzero length, ``prev`` the level before the block). An edge on tick ``t`` of frame
    ``i`` gets ``peak sin(2 pi (((start + i) ratio + t ratio / ticks_per_frame) mod 1))``
    (``ratio``: sine cycles a frame, ``start``: the block's first global frame). The frame's
    sine and cosine come from exact anchors every :data:`SINE_ANCHOR` frames by the angle sum
    (as in :func:`add_sine_shifts`), the tick's part from a table of ``ticks_per_frame``
    angles by one more angle sum: no sine per edge, the same numbers for any block split,
    within a few 1e-15 of the peak of the sine of the exact phase near the start; further
    on, the anchor's phase product rounds (tests/test_edges.py, docs/impairments.md).
    """
    n = levels.shape[0]
    n_seg = levels.shape[1]
    if n == 0:
        return
    first = start % SINE_ANCHOR
    cos_m, sin_m = _angle_table(min(SINE_ANCHOR, first + n), ratio)
    cos_t, sin_t = _angle_table(ticks_per_frame, ratio / ticks_per_frame)
    s_a = c_a = 0.0
    e = 0
    for i in range(n):
        frame = start + i
        m = frame % SINE_ANCHOR
        if i == 0 or m == 0:
            phase = 2.0 * np.pi * (((frame - m) * ratio) % 1.0)
            s_a = peak * np.sin(phase)
            c_a = peak * np.cos(phase)
        s_f = s_a * cos_m[m] + c_a * sin_m[m]
        c_f = c_a * cos_m[m] - s_a * sin_m[m]
        t = 0
        for j in range(n_seg):
            k = ticks[i, j]
            if k == 0:
                continue
            level = levels[i, j]
            if level != prev:
                shifts[e] += s_f * cos_t[t] + c_f * sin_t[t]
                e += 1
                prev = level
            t += k


@njit(cache=True, nogil=True)
def jittered_segments(levels, ticks, shifts, held_levels, held_ticks, held, out_levels, out_ticks):
    """Exact tick means of a PWM waveform whose every edge is displaced (in ticks).

    An edge is a level change between two consecutive segments of nonzero length (edges of
    both legs at one tick share the clock edge, so they move together). It moves by
    ``shifts[e]`` ticks (consumed in order; the random and the sinusoidal parts added
    beforehand, :func:`add_tick_sine_shifts`), clipped to ``[-1/2, 1/2]``. The area moved,
    ``-step * shift`` (tick units), lies inside the tick after the edge (late) or the tick
    before it (early). Every input segment ``j`` of ``k`` ticks becomes three output pieces
    ``3 j .. 3 j + 2``: its first tick, the ``k - 2`` ticks between, its last tick (``k = 1``:
    the first piece alone), and the moved area goes into the piece of that one tick, so the
    mean of every tick is exact and the moved area sits within a tick of its edge (a wider
    spread would misplace the nearly cancelling areas of a pulse's two edges). An early edge
    at a frame's start changes the previous frame, so the output runs one frame behind:
    ``out_*[i]`` (shape (n, 3 S)) is frame ``i - 1``. ``held_levels``, ``held_ticks``: (3 S,)
    the held frame's pieces, updated; ``held`` = (last level, piece index of the held frame's
    last nonzero tick), updated.
    """
    n = levels.shape[0]
    n_seg = levels.shape[1]
    n_out = 3 * n_seg
    prev = held[0]
    last_p = int(held[1])
    in_cur = False
    cur = np.empty(n_out)
    cur_ticks = np.empty(n_out, np.int64)
    e = 0
    for i in range(n):
        for j in range(n_seg):
            k = ticks[i, j]
            level = levels[i, j]
            cur[3 * j] = level
            cur[3 * j + 1] = level
            cur[3 * j + 2] = level
            cur_ticks[3 * j] = 1 if k > 0 else 0
            cur_ticks[3 * j + 1] = k - 2 if k > 2 else 0
            cur_ticks[3 * j + 2] = 1 if k > 1 else 0
        for j in range(n_seg):
            k = ticks[i, j]
            if k == 0:
                continue
            level = levels[i, j]
            if level != prev:
                shift = min(max(shifts[e], -0.5), 0.5)
                e += 1
                moved = -(level - prev) * shift
                if shift > 0.0:
                    cur[3 * j] += moved
                elif in_cur:
                    cur[last_p] += moved
                else:
                    held_levels[last_p] += moved
                prev = level
            last_p = 3 * j + 2 if k > 1 else 3 * j
            in_cur = True
        for q in range(n_out):
            out_levels[i, q] = held_levels[q]
            out_ticks[i, q] = held_ticks[q]
            held_levels[q] = cur[q]
            held_ticks[q] = cur_ticks[q]
        in_cur = False
    held[0] = prev
    held[1] = last_p
