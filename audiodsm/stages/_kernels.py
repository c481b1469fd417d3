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
