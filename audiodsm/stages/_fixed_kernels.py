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

import math

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


@njit(cache=True, nogil=True)
def float_to_words(x, out, scale, rule, word_bits, wrap):
    """Fit float samples into words: ``x * scale`` (a power of two) rounded by ``rule``.

    ``out`` (int64) receives the words; ``rule`` 0 truncate, 1 round half up, 2 convergent;
    ``wrap`` True keeps the low ``word_bits`` bits, False saturates.
    """
    hi = (1 << (word_bits - 1)) - 1
    lo = -hi - 1
    fhi = float(hi)
    flo = float(lo)
    for t in range(x.shape[0]):
        s = x[t] * scale
        if rule == 0:
            r = math.floor(s)
        elif rule == 1:
            r = math.floor(s + 0.5)
        else:
            r = math.floor(s)
            rest = s - r
            if rest > 0.5 or (rest == 0.5 and r % 2.0 != 0.0):
                r += 1.0
        if not wrap:
            if r > fhi:
                r = fhi
            elif r < flo:
                r = flo
            out[t] = int(r)
        else:
            w = int(r)
            out[t] = ((w - lo) & (2 * hi + 1)) + lo


# The specialised loops: the same arithmetic as fixed_feedback_loop, written out for one loop
# format. Every state lives in a local variable, and the format (shifts, rounding and overflow
# rules, word bounds, quantizer) is written into the source as constants, so the compiler drops
# the shifts by zero, the rules a node does not use and the resonator terms a loop does not
# have (an array-indexed loop with run-time rules runs several times slower). One kernel per
# format is written from the template below on first use and compiled with numba's on-disk
# cache (keyed to this file; the name carries a digest of the format). The generic loop above
# is what the tests check them against.


def fixed_loop_kernel_name(key):
    """Name of the specialised kernel for a format key (see fixed_loop_kernel)."""
    import hashlib

    digest = hashlib.sha256(repr(key).encode()).hexdigest()[:16]
    return f"fixed_feedback_order{key[0]}_{digest}"


def _shifted(expr, shift):
    return f"({expr})" if shift == 0 else f"(({expr}) << {shift})"


def fixed_loop_kernel_source(key):
    """Python source of one specialised integer loop.

    Parameters
    ----------
    key : tuple
        ``(order, resonators, m, f_last, shifts, rules)``: the number of states, per state
        whether it has a resonator term, the quantizer's ``m`` (0: two levels), the last
        state's fractional bits, and the ``shifts`` (5 x order) and ``rules`` (3 x order)
        tables of ``fixed_feedback_loop`` as nested tuples.
    """
    order, resonators, m, f_last, shifts, rules = key
    n = order
    lines = []
    add = lines.append
    add(f"def {fixed_loop_kernel_name(key)}(")
    add("    u, out, coef, shifts, rules, state, peaks, counts, quantizer,")
    add("):")
    for i in range(n):
        add(f"    d{i} = coef[0, {i}]")
        add(f"    k{i} = coef[1, {i}]" if i > 0 else "    k0 = coef[4, 0]")
        add(f"    a{i} = coef[3, {i}]")
        if resonators[i]:
            add(f"    g{i} = coef[2, {i}]")
        add(f"    x{i} = state[{i}]")
        add(f"    p{i} = peaks[{i}]")
        add(f"    o{i} = counts[{i}]")
    add("    for t in range(u.shape[0]):")
    ind = "        "
    if m == 0:
        add(f"{ind}q = 1 + (x{n - 1} >> 63)")  # 1 when the state is >= 0, else 0
        add(f"{ind}v = 2 * q - 1")
    else:
        add(f"{ind}q = ((x{n - 1} << {m}) + {(1 << (m + f_last)) + (1 << f_last)}) >> {f_last + 1}")
        add(f"{ind}if q < 0:")
        add(f"{ind}    q = 0")
        add(f"{ind}elif q > {1 << m}:")
        add(f"{ind}    q = {1 << m}")
        add(f"{ind}v = q - {1 << (m - 1)}")
    add(f"{ind}out[t] = q")
    for i in range(n - 1, -1, -1):
        prev = f"x{i - 1}" if i > 0 else "u[t]"
        acc = (
            _shifted(f"d{i} * x{i}", shifts[0][i])
            + " + "
            + _shifted(f"k{i} * {prev}", shifts[1][i])
            + " - "
            + _shifted(f"a{i} * v", shifts[2][i])
        )
        if resonators[i]:
            acc += " - " + _shifted(f"g{i} * n{i + 1}", shifts[3][i])
        add(f"{ind}acc = {acc}")
        r, rule = shifts[4][i], rules[0][i]
        if r == 0:
            add(f"{ind}val = acc")
        elif rule == 0:
            add(f"{ind}val = acc >> {r}")
        elif rule == 1:
            add(f"{ind}val = (acc + {1 << (r - 1)}) >> {r}")
        else:
            # ties to even without a branch: adding half a step less one, plus the kept
            # part's lowest bit, carries into the kept part exactly when the rule rounds up
            add(f"{ind}val = (acc + {(1 << (r - 1)) - 1} + ((acc >> {r}) & 1)) >> {r}")
        hi = (1 << (rules[2][i] - 1)) - 1
        lo = -hi - 1
        add(f"{ind}if val > {hi} or val < {lo}:")
        add(f"{ind}    o{i} += 1")
        if rules[1][i] == 1:
            add(f"{ind}    val = ((val - ({lo})) & {2 * hi + 1}) + ({lo})")
        else:
            add(f"{ind}    val = {hi} if val > {hi} else {lo}")
        add(f"{ind}n{i} = val")
        add(f"{ind}p{i} = max(p{i}, abs(val))")
    add(ind + ", ".join(f"x{i}" for i in range(n)) + " = " + ", ".join(f"n{i}" for i in range(n)))
    for i in range(n):
        add(f"    state[{i}] = x{i}")
        add(f"    peaks[{i}] = p{i}")
        add(f"    counts[{i}] = o{i}")
    return "\n".join(lines) + "\n"


_FIXED_KERNELS = {}


def fixed_loop_kernel(key):
    """Compiled specialised integer loop for a format key (built on first use).

    Arguments of the returned function are those of ``fixed_feedback_loop`` (``shifts``,
    ``rules`` and ``quantizer`` are accepted and ignored: the key has written them in).
    """
    kernel = _FIXED_KERNELS.get(key)
    if kernel is None:
        source = fixed_loop_kernel_source(key)
        name = fixed_loop_kernel_name(key)
        namespace = {}
        # compiled under this file's name so numba's cache can find (and invalidate) it
        exec(compile(source, __file__, "exec"), globals(), namespace)
        function = namespace[name]
        function.__module__ = __name__
        function.__qualname__ = name
        kernel = njit(cache=True, nogil=True)(function)
        _FIXED_KERNELS[key] = kernel
    return kernel
