"""Compiled loops of the output stage and the reconstruction filter, and nothing else.

PWM segment building, the dead-time PWM stage fused with its LC filter, and the frame means
(and mean squares) of the analog filter driven by piecewise-constant waveforms. Same rules as
:mod:`audiodsm.stages._kernels`: ``@njit(cache=True, nogil=True)``, no fastmath, contiguous
arrays in, caller-allocated outputs and states, no validation; each has a slow pure-Python twin
in the tests.
"""

from __future__ import annotations

import numpy as np
from numba import njit

# ---------------------------------------------------------------------------------------------
# Output stages (stages/output_stage.py)
# ---------------------------------------------------------------------------------------------


@njit(cache=True, nogil=True, inline="always")
def _leg_pulse(k, sub, centre, frame, inv, double_edge):
    """Where one leg is high in a frame of code ``k``: ticks ``[s0, e0)`` and ``[s1, e1)``.

    Trailing edge: high from 0 for ``k`` steps (inverted: from ``k`` steps to the end); double
    edge: centred on the frame (inverted: the complement, split around the centre). An
    interval ``[frame, frame)`` is empty.
    """
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
    return s0, e0, s1, e1


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
            s0, e0, s1, e1 = _leg_pulse(k, sub, centre, frame, leg == 1 and invert_b, double_edge)
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


@njit(cache=True, nogil=True, inline="always")
def _leg_high(st, en, leg, half_tick2):
    """Whether a leg's command is high at the doubled time ``half_tick2``.

    ``half_tick2`` is ``2 t`` for tick ``t``, or ``2 t - 1`` for the instant just before it.
    """
    hi = 0
    for q in range(2):
        if 2 * st[leg, q] <= half_tick2 and half_tick2 < 2 * en[leg, q]:
            hi = 1
    return hi


@njit(cache=True, nogil=True, inline="always")
def _add_segment_mean(acc, x, w, w_u, u):
    """``acc + w_u u + w . x`` added term by term (the segment's share of the frame mean)."""
    acc += w_u * u
    for q in range(x.shape[0]):
        acc += w[q] * x[q]
    return acc


@njit(cache=True, nogil=True, inline="always")
def _add_segment_square(sq, x, quad, u):
    """``sq + z' Q z`` with ``z = [x; u]``, row by row (the segment's share of the mean square)."""
    m = x.shape[0]
    for r in range(m + 1):
        zr = x[r] if r < m else u
        row = quad[r, m] * u
        for q in range(m):
            row += quad[r, q] * x[q]
        sq += zr * row
    return sq


@njit(cache=True, nogil=True, inline="always")
def _advance_state(x, tmp, phi, gamma, u):
    """``x <- Phi x + Gamma u`` in place (``tmp``: scratch of the state's size)."""
    m = x.shape[0]
    for r in range(m):
        v = gamma[r] * u
        for q in range(m):
            v += phi[r, q] * x[q]
        tmp[r] = v
    for r in range(m):
        x[r] = tmp[r]


@njit(cache=True, nogil=True)
def pwm_dead_time_means(
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
    command,
    dead_left,
    dead_level,
    leg_level,
    phis,
    gammas,
    wx,
    wu,
    qs,
    current_w,
    x,
    y,
    power,
    counts,
    ripple=0.0,
    ripple_ratio=0.0,
    first_frame=0,
):
    """PWM with load-current-dependent dead time, run through the filter frame by frame.

    The legs' commanded high intervals come from the codes as in :func:`pwm_segments`. Every
    change of a leg's command starts a dead interval of ``dead`` ticks in which both switches
    of the leg are off and the freewheeling diodes set the leg: low when the leg's inductor
    current flows out of the leg (``i > 0``), high when it flows in (``i < 0``), unchanged at
    ``i == 0``. The current is read from the filter state at the start of the dead interval:
    leg A's current is ``current_w . x``, leg B's (a full bridge) its negative. A command
    change inside a dead interval extends it to ``dead`` ticks after that change, keeping its
    level (counted as a pulse lost to dead time). Outside dead intervals a leg follows its
    command. The frame is cut at every command change and dead-interval end; each segment's
    level is ``volts (2 A - 1)`` (half bridge) or ``volts (A - B)``, and it updates the frame
    mean, the frame's mean square and the state as in :func:`frame_power_segments`.
    The tables carry a leading switch-configuration axis (``phis``: (C, F + 1, m, m), ...):
    with ``C == 1`` every segment uses the one filter; otherwise the segment's configuration
    (the conducting switches, whose on-resistance is part of the filter) is ``A`` for a half
    bridge and ``2 A + B`` for a full bridge, ``A``, ``B`` the legs' actual levels.

    ``command``, ``dead_left``, ``dead_level``, ``leg_level``: (n_legs,) int64 state, updated
    (command level at the end of the last frame, dead ticks still to run at the frame start,
    the level of that dead interval, the leg's actual level); tables over lengths 0..frame;
    ``x``: (m,) updated; ``y``, ``power``: (n,) frame means and mean squares written;
    ``counts``: (3,) int64 incremented
    with [pulses lost to dead time, transitions of leg A, transitions of leg B].
    ``ripple`` > 0: the supply is ``V (1 + ripple sin(2 pi f_r t))`` with ``ripple_ratio =
    f_r / frame rate`` (ripple cycles per frame) and ``first_frame`` the index of the first
    frame since the start; each segment's level is its exact mean over the segment, as in
    :func:`audiodsm.stages.supply.apply_supply_ripple`.
    """
    n = codes_a.shape[0]
    m = x.shape[0]
    frame = steps * sub * (2 if double_edge else 1)
    centre = steps * sub
    st = np.empty((2, 2), np.int64)
    en = np.empty((2, 2), np.int64)
    cand = np.empty((2, 5), np.int64)
    in_dead = np.zeros(2, np.int64)
    dead_end = np.zeros(2, np.int64)
    tmp = np.empty(m)
    for i in range(n):
        for leg in range(n_legs):
            k = codes_a[i] if leg == 0 else codes_b[i]
            s0, e0, s1, e1 = _leg_pulse(k, sub, centre, frame, leg == 1 and invert_b, double_edge)
            st[leg, 0] = s0
            en[leg, 0] = e0
            st[leg, 1] = s1
            en[leg, 1] = e1
            cand[leg, 0] = 0
            cand[leg, 1] = s0
            cand[leg, 2] = e0
            cand[leg, 3] = s1
            cand[leg, 4] = e1
            in_dead[leg] = 1 if dead_left[leg] > 0 else 0
            dead_end[leg] = dead_left[leg]
        acc = 0.0
        sq = 0.0
        t = 0
        while t < frame:
            u_high_a = 0
            u_high_b = 0
            for leg in range(n_legs):
                if in_dead[leg] == 1 and dead_end[leg] <= t:
                    in_dead[leg] = 0
                now = _leg_high(st, en, leg, 2 * t)
                before = command[leg] if t == 0 else _leg_high(st, en, leg, 2 * t - 1)
                if now != before and dead > 0:
                    if in_dead[leg] == 1:
                        counts[0] += 1
                    else:
                        in_dead[leg] = 1
                        cur = 0.0
                        for q in range(m):
                            cur += current_w[q] * x[q]
                        if leg == 1:
                            cur = -cur
                        if cur > 0.0:
                            dead_level[leg] = 0
                        elif cur < 0.0:
                            dead_level[leg] = 1
                        else:
                            dead_level[leg] = leg_level[leg]
                    dead_end[leg] = t + dead
                level = dead_level[leg] if in_dead[leg] == 1 else now
                if level != leg_level[leg]:
                    counts[1 + leg] += 1
                    leg_level[leg] = level
                if leg == 0:
                    u_high_a = level
                else:
                    u_high_b = level
            t_next = frame
            for leg in range(n_legs):
                for c in range(5):
                    tc = cand[leg, c]
                    if tc > t and tc < t_next:
                        if _leg_high(st, en, leg, 2 * tc) != _leg_high(st, en, leg, 2 * tc - 1):
                            t_next = tc
                if in_dead[leg] == 1 and dead_end[leg] > t and dead_end[leg] < t_next:
                    t_next = dead_end[leg]
            kk = t_next - t
            if half_bridge:
                u = volts * (2.0 * u_high_a - 1.0)
            else:
                u = volts * (float(u_high_a) - float(u_high_b))
            if ripple > 0.0:
                base = ((first_frame + i) * 1.0 * ripple_ratio) % 1.0
                p0 = 2.0 * np.pi * (base + (t / frame) * ripple_ratio)
                p1 = 2.0 * np.pi * (base + (t_next / frame) * ripple_ratio)
                width = 2.0 * np.pi * (kk / frame) * ripple_ratio
                u = u * (1.0 + ripple * ((np.cos(p0) - np.cos(p1)) / width))
            cf = 0
            if phis.shape[0] > 1:
                cf = u_high_a if half_bridge else 2 * u_high_a + u_high_b
            acc = _add_segment_mean(acc, x, wx[cf, kk], wu[cf, kk], u)
            sq = _add_segment_square(sq, x, qs[cf, kk], u)
            _advance_state(x, tmp, phis[cf, kk], gammas[cf, kk], u)
            t = t_next
        y[i] = acc
        power[i] = sq
        for leg in range(n_legs):
            command[leg] = _leg_high(st, en, leg, 2 * frame - 1)
            if in_dead[leg] == 1 and dead_end[leg] > frame:
                dead_left[leg] = dead_end[leg] - frame
            else:
                dead_left[leg] = 0


# ---------------------------------------------------------------------------------------------
# Reconstruction filters (stages/reconstruct.py)
# ---------------------------------------------------------------------------------------------


@njit(cache=True, nogil=True)
def frame_means_segments(levels, ticks, phis, gammas, wx, wu, x, y):
    """Mean of a state-space filter's output over every frame of a piecewise-constant waveform.

    For every segment of ``k`` ticks holding ``u``: the frame's mean gains
    ``wx(k) . x + wu(k) u`` (the exact integral of ``C x(t) + D u`` over the segment, divided
    by the frame length), then ``x <- Phi(k) x + Gamma(k) u`` (zero-order-hold exact).
    Zero-length segments are skipped. ``levels``, ``ticks``: (n, s); ``phis``: (F + 1, m, m);
    ``gammas``, ``wx``: (F + 1, m); ``wu``: (F + 1,); ``x``: (m,) updated in place;
    ``y``: (n,) written with the frame means.
    """
    n = levels.shape[0]
    s = levels.shape[1]
    m = x.shape[0]
    tmp = np.empty(m)
    for i in range(n):
        acc = 0.0
        for j in range(s):
            k = ticks[i, j]
            if k == 0:
                continue
            u = levels[i, j]
            acc = _add_segment_mean(acc, x, wx[k], wu[k], u)
            _advance_state(x, tmp, phis[k], gammas[k], u)
        y[i] = acc


@njit(cache=True, nogil=True)
def frame_power_segments(levels, ticks, phis, gammas, wx, wu, qs, x, y, power):
    """:func:`frame_means_segments`, and the mean square of the output over every frame.

    Per segment of ``k`` ticks, with ``z = [x; u]`` at its start, the frame's mean square gains
    ``z' Q(k) z`` (``qs``: (F + 1, m + 1, m + 1), the output's squared integral over the
    segment as a quadratic form, divided by the frame length). The means, the state and their
    operation order are those of :func:`frame_means_segments`. ``power``: (n,) written.
    """
    n = levels.shape[0]
    s = levels.shape[1]
    m = x.shape[0]
    tmp = np.empty(m)
    for i in range(n):
        acc = 0.0
        sq = 0.0
        for j in range(s):
            k = ticks[i, j]
            if k == 0:
                continue
            u = levels[i, j]
            acc = _add_segment_mean(acc, x, wx[k], wu[k], u)
            sq = _add_segment_square(sq, x, qs[k], u)
            _advance_state(x, tmp, phis[k], gammas[k], u)
        y[i] = acc
        power[i] = sq


@njit(cache=True, nogil=True)
def frame_means_modal(u, real_phi, real_gamma, real_w, pair_phi, pair_gamma, pair_w, wu, xr, xp, y):
    """One-segment frames through a filter in real modal form: the fast path for PDM / NRZ.

    The state holds ``nr`` real modes then ``np`` complex-pair modes, each pair as (re, im)
    with the 2x2 block ``[[a, -b], [b, a]]`` (``a + jb = exp(lambda dt)``). Per sample:
    ``y = wu u + w . x`` (the frame mean, from the state at the frame start), then
    ``x <- Phi x + Gamma u``, with the same operation order as :func:`frame_means_segments` on
    the block-diagonal matrices, so both give identical numbers. ``real_*``: (nr,);
    ``pair_phi``: (np, 2) as (a, b); ``pair_gamma``, ``pair_w``: (np, 2); ``xr``: (nr,),
    ``xp``: (np, 2), updated in place.
    """
    n = u.shape[0]
    nr = xr.shape[0]
    npair = xp.shape[0]
    for i in range(n):
        un = u[i]
        out = wu * un
        for r in range(nr):
            out += real_w[r] * xr[r]
        for p in range(npair):
            out += pair_w[p, 0] * xp[p, 0]
            out += pair_w[p, 1] * xp[p, 1]
        y[i] = out
        for r in range(nr):
            v = real_gamma[r] * un
            v += real_phi[r] * xr[r]
            xr[r] = v
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


@njit(cache=True, nogil=True)
def frame_means_modal_pair(u, pair_phi, pair_gamma, pair_w, wu, xp, y):
    """:func:`frame_means_modal` for exactly one complex pair and no real mode (2nd order).

    The state lives in local scalars for the whole loop; same operation order, same numbers.
    """
    a = pair_phi[0, 0]
    b = pair_phi[0, 1]
    gre = pair_gamma[0, 0]
    gim = pair_gamma[0, 1]
    wre = pair_w[0, 0]
    wim = pair_w[0, 1]
    re = xp[0, 0]
    im = xp[0, 1]
    for i in range(u.shape[0]):
        un = u[i]
        y[i] = wu * un + wre * re + wim * im
        nre = gre * un + a * re + -b * im
        nim = gim * un + b * re + a * im
        re = nre
        im = nim
    xp[0, 0] = re
    xp[0, 1] = im


@njit(cache=True, nogil=True)
def frame_means_modal_real_pair(
    u, real_phi, real_gamma, real_w, pair_phi, pair_gamma, pair_w, wu, xr, xp, y
):
    """:func:`frame_means_modal` for exactly one real mode and one pair (3rd order).

    The state lives in local scalars for the whole loop; same operation order, same numbers.
    """
    p0 = real_phi[0]
    g0 = real_gamma[0]
    w0 = real_w[0]
    a = pair_phi[0, 0]
    b = pair_phi[0, 1]
    gre = pair_gamma[0, 0]
    gim = pair_gamma[0, 1]
    wre = pair_w[0, 0]
    wim = pair_w[0, 1]
    x0 = xr[0]
    re = xp[0, 0]
    im = xp[0, 1]
    for i in range(u.shape[0]):
        un = u[i]
        y[i] = wu * un + w0 * x0 + wre * re + wim * im
        x0 = g0 * un + p0 * x0
        nre = gre * un + a * re + -b * im
        nim = gim * un + b * re + a * im
        re = nre
        im = nim
    xr[0] = x0
    xp[0, 0] = re
    xp[0, 1] = im


# ---------------------------------------------------------------------------------------------
# Filters whose matrices follow the conducting switches (stages/power_stage.py)
# ---------------------------------------------------------------------------------------------


@njit(cache=True, nogil=True)
def frame_power_switched(levels, ticks, configs, phis, gammas, wx, wu, qs, x, y, power):
    """:func:`frame_power_segments` with one set of tables per switch configuration.

    A segment of ``k`` ticks in configuration ``c = configs[i, j]`` uses ``phis[c, k]``,
    ``gammas[c, k]``, ``wx[c, k]``, ``wu[c, k]`` and ``qs[c, k]`` (the filter with that
    configuration's source resistance). ``configs``: (n, s) int64; tables (C, F + 1, ...);
    ``x``: (m,) updated; ``y``, ``power``: (n,) written.
    """
    n = levels.shape[0]
    s = levels.shape[1]
    m = x.shape[0]
    tmp = np.empty(m)
    for i in range(n):
        acc = 0.0
        sq = 0.0
        for j in range(s):
            k = ticks[i, j]
            if k == 0:
                continue
            c = configs[i, j]
            u = levels[i, j]
            acc = _add_segment_mean(acc, x, wx[c, k], wu[c, k], u)
            sq = _add_segment_square(sq, x, qs[c, k], u)
            _advance_state(x, tmp, phis[c, k], gammas[c, k], u)
        y[i] = acc
        power[i] = sq


@njit(cache=True, nogil=True)
def segment_starts_switched(levels, ticks, configs, phis, gammas, x, starts):
    """The filter state at the start of every segment (switched tables as above).

    ``starts``: (n, s, m) written with the state before each segment (zero-length segments
    included: the state there equals the next one's); ``x``: (m,) updated to the state after
    the last segment.
    """
    n = levels.shape[0]
    s = levels.shape[1]
    m = x.shape[0]
    tmp = np.empty(m)
    for i in range(n):
        for j in range(s):
            for r in range(m):
                starts[i, j, r] = x[r]
            k = ticks[i, j]
            if k == 0:
                continue
            c = configs[i, j]
            _advance_state(x, tmp, phis[c, k], gammas[c, k], levels[i, j])
