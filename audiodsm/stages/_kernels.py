"""Compiled inner loops, and nothing else.

Every function here is ``@njit(cache=True, nogil=True)`` without fastmath (reordering would
change quantizer decisions). Kernels take contiguous float64/int arrays and scalars, write into
caller-allocated output and state arrays, and validate nothing: the public wrappers in the stage
modules validate, convert, allocate and call. Each kernel has a slow pure-Python twin in the
tests.
"""

from __future__ import annotations

import numpy as np  # noqa: F401
from numba import njit  # noqa: F401

# ---------------------------------------------------------------------------------------------
# Modulator loops (stages/modulator.py)
# ---------------------------------------------------------------------------------------------




# ---------------------------------------------------------------------------------------------
# Rate conversion (stages/upsample.py)
# ---------------------------------------------------------------------------------------------




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
