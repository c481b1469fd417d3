"""Compiled inner loop of the fixed-point feedback modulator, and nothing else.

``@njit(cache=True, nogil=True)``, integer arithmetic only (int64), no validation: the wrapper
in :mod:`audiodsm.stages.fixed_loop` checks that every product and sum fits in 63 bits,
computes the shifts and allocates. Its pure-Python twin (Python integers and exact fractions)
lives in ``tests/test_fixed_loop.py``.

The loop is the feedback structure of :mod:`audiodsm.design.realize` in integers. A node value
is an integer ``X`` standing for ``X * 2**-F`` (``F`` the node's fractional bits); coefficients
are integers with ``Fc`` fractional bits. States update from the last one down to the first::

    acc = (d[i] X[i] << s0) + (k[i] X[i-1] << s1) - (a[i] V << s2) - (g[i] Xnew[i+1] << s3)
    X[i] = fit(round(acc, r[i]))

(for ``i = 0`` the second term is ``b[0] U``, the input word), where the left shifts align
every product to the finest binary point among the node's terms and ``r[i]`` drops the
surplus fractional bits with the node's rounding rule; ``fit`` applies its overflow rule to
its word. The quantizer reads the last state ``Y = X[last]`` before the update: two levels,
``q = 1`` when ``Y >= 0`` else 0 and ``V = 2q - 1``; ``2**m + 1`` levels,
``q = clip(floor(Y 2**(m-1) / 2**F + 2**(m-1) + 1/2), 0, 2**m)`` (the float loop's rule in
integers) and ``V = q - 2**(m-1)`` with ``m - 1`` fractional bits.
"""

from __future__ import annotations

from numba import njit

# rounding codes: 0 truncate, 1 round half up, 2 convergent; overflow codes: 0 saturate, 1 wrap


@njit(cache=True, nogil=True, inline="always")
def _round_shift(acc, r, rule):
    """Drop the ``r`` low bits of ``acc`` with a rounding rule (r >= 0)."""
    if r == 0:
        return acc
    if rule == 0:
        return acc >> r
    half = 1 << (r - 1)
    if rule == 1:
        return (acc + half) >> r
    q = acc >> r
    rem = acc - (q << r)
    if rem > half or (rem == half and (q & 1) == 1):
        q += 1
    return q


@njit(cache=True, nogil=True)
def fixed_feedback_loop(u, out, coef, shifts, rules, state, peaks, counts, quantizer):
    """Run the fixed-point feedback loop over the input words ``u``.

    Parameters
    ----------
    u : int64 (n,)
        Input words.
    out : int64 (n,)
        Written: the quantizer's level index ``q`` (0 .. levels - 1) per sample.
    coef : int64 (5, order)
        Rows d, k, g, a, b (leak, chain gain, resonator, feedback, input gain) as integers.
    shifts : int64 (5, order)
        Rows: left shifts of the d, k (or b), a and g products, and the right shift ``r``.
    rules : int64 (3, order)
        Rows: rounding code, overflow code, word bits of each state.
    state : int64 (order,)
        State words, updated in place.
    peaks : int64 (order,)
        Running peak |state word|, updated in place.
    counts : int64 (order,)
        Running count of overflow events per state, updated in place.
    quantizer : int64 (3,)
        ``m`` (levels = 2**m + 1, or 0 for two levels), fractional bits of the last state,
        fractional bits of the quantizer output word ``V``.
    """
    order = state.shape[0]
    last = order - 1
    m = quantizer[0]
    f_last = quantizer[1]
    top = (1 << m) if m > 0 else 1
    x = state.copy()
    for t in range(u.shape[0]):
        y = x[last]
        if m == 0:
            q = 1 if y >= 0 else 0
            v = 2 * q - 1
        else:
            q = ((y << m) + (1 << (m + f_last)) + (1 << f_last)) >> (f_last + 1)
            if q < 0:
                q = 0
            elif q > top:
                q = top
            v = q - (1 << (m - 1))
        out[t] = q
        for i in range(last, -1, -1):
            acc = (coef[0, i] * x[i]) << shifts[0, i]
            if i > 0:
                acc += (coef[1, i] * x[i - 1]) << shifts[1, i]
            else:
                acc += (coef[4, 0] * u[t]) << shifts[1, 0]
            acc -= (coef[3, i] * v) << shifts[2, i]
            if i < last:
                acc -= (coef[2, i] * x[i + 1]) << shifts[3, i]
            val = _round_shift(acc, shifts[4, i], rules[0, i])
            hi = (1 << (rules[2, i] - 1)) - 1
            lo = -hi - 1
            if val > hi or val < lo:
                counts[i] += 1
                if rules[1, i] == 0:
                    val = hi if val > hi else lo
                else:
                    val = ((val - lo) & (2 * hi + 1)) + lo
            x[i] = val
            a = val if val >= 0 else -val
            if a > peaks[i]:
                peaks[i] = a
    state[:] = x
