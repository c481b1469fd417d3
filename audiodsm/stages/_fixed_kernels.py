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

import numpy as np
from numba import njit

from audiodsm.stages._kernels import _GOLDEN, _unit_from_counter

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
def fixed_feedback_loop(u, out, coef, shifts, rules, state, peaks, counts, quantizer, dither):
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
    dither : int64 (n,) or (0,)
        Dither words added to the last state at the quantizer (its fractional bits), or
        none.
    """
    order = state.shape[0]
    last = order - 1
    m = quantizer[0]
    f_last = quantizer[1]
    top = (1 << m) if m > 0 else 1
    x = state.copy()
    dithered = dither.shape[0] > 0
    for t in range(u.shape[0]):
        y = x[last]
        if dithered:
            y += dither[t]
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
            r = np.rint(s)  # to nearest, ties to even: IEEE 754 roundToIntegralTiesToEven
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
# (its coefficients, shifts, rounding and overflow rules, word bounds and quantizer). Every
# state lives in a local variable and every coefficient is a constant in the source, so the
# compiler turns the products by powers of two into shifts, drops the zero terms, and for a
# two-level quantizer replaces the feedback product by a choice between two constants (with
# the rounding offset folded in). The overflow rules leave the per-sample work: a block of
# FIXED_BLOCK samples first runs without them, keeping each state's largest and smallest word;
# when those fit their words the rules would not have acted on any sample and the block stands,
# else it is run again from its saved start with the rules on every sample (the output is the
# same either way, bit for bit). One kernel per loop is written from the template below on
# first use and compiled with numba's on-disk cache (keyed to this file; the name carries a
# digest of the loop). A second variant takes the float input and writes the float output,
# fitting each input sample to its word inside the loop (``float_to_words``'s arithmetic) and
# writing ``q * step - 1``, so ``FixedPointModulator.run`` needs no word arrays. The generic
# loop above is what the tests check both against.

#: samples per block of a specialised loop: a block run again with the overflow rules costs
#: little, and the per-block checks do not show
FIXED_BLOCK = 1024


def fixed_loop_kernel_name(key, float_io=False):
    """Name of the specialised kernel for a loop key (see fixed_loop_kernel)."""
    import hashlib

    digest = hashlib.sha256(repr((key, bool(float_io))).encode()).hexdigest()[:16]
    return f"fixed_feedback_order{key[0]}_{'float_' if float_io else ''}{digest}"


def _term(coefficient, shift, operand):
    """Source of ``(coefficient * operand) << shift`` with the constant folded, or None."""
    c = int(coefficient) << int(shift)
    if c == 0:
        return None
    if c == 1:
        return operand
    return f"{c} * {operand}"


def _input_fit_lines(ind, input_node):
    """Source fitting ``x[t]`` (a float) to the input word ``w`` (float_to_words' steps)."""
    fraction_bits, rule, word_bits, wrap = input_node
    hi = (1 << (word_bits - 1)) - 1
    lo = -hi - 1
    out = [f"{ind}s = xb[j] * {float(2.0**fraction_bits)!r}"]
    if rule == 0:
        out.append(f"{ind}r = math.floor(s)")
    elif rule == 1:
        out.append(f"{ind}r = math.floor(s + 0.5)")
    else:
        out.append(f"{ind}r = np.rint(s)")  # ties to even (the default IEEE 754 mode)
    if wrap:
        out += [f"{ind}w = int(r)", f"{ind}w = ((w - ({lo})) & {2 * hi + 1}) + ({lo})"]
    else:
        out += [
            f"{ind}if r > {float(hi)!r}:",
            f"{ind}    r = {float(hi)!r}",
            f"{ind}elif r < {float(lo)!r}:",
            f"{ind}    r = {float(lo)!r}",
            f"{ind}w = int(r)",
        ]
    return out


def fixed_loop_kernel_source(key, float_io=False):
    """Python source of one specialised integer loop.

    Parameters
    ----------
    key : tuple
        ``(order, m, f_last, coef, shifts, rules, input_node, step, dithered)``: the number
        of states,
        the quantizer's ``m`` (0: two levels), the last state's fractional bits, the ``coef``
        (5 x order), ``shifts`` (5 x order) and ``rules`` (3 x order) tables of
        ``fixed_feedback_loop`` as nested tuples of ints, the input word
        ``(fraction_bits, rounding code, word_bits, wrap)`` and the quantizer step in
        full-scale units (those two for the float variant), and whether a dither word per
        sample (``dither``, int64, in the last state's fractional bits) is added to the last
        state at the quantizer (else ``dither`` is ignored).
    float_io : bool
        False: ``f(u, out, dither, state, peaks, counts)`` on input words ``u`` (int64),
        writing level indices into ``out`` (int64); it returns -1, or the start of the first
        block holding a word outside the input word (it stops there; state and output are
        then partial). True: ``f(x, y, dither, state, peaks, counts)`` on full-scale floats
        ``x``, writing the output levels ``q * step - 1`` into ``y`` (float64); it returns -1.
    """
    order, m, f_last, coef, shifts, rules, input_node, step, dithered = key
    n = order
    lines = []
    add = lines.append
    xs = ", ".join(f"x{i}" for i in range(n))
    ns = ", ".join(f"n{i}" for i in range(n))
    add(f"def {fixed_loop_kernel_name(key, float_io)}({'x, y' if float_io else 'u, out'}, ")
    add("        dither, state, peaks, counts):")
    for i in range(n):
        add(f"    x{i} = state[{i}]")
        add(f"    p{i} = peaks[{i}]")
        add(f"    o{i} = counts[{i}]")
    add(f"    total = {'x' if float_io else 'u'}.shape[0]")

    # the dither word of the sample joins the last state at the quantizer only
    quantizer_input = f"(x{n - 1} + db[j])" if dithered else f"x{n - 1}"

    def sample(ind, checked):
        out = []
        if float_io:
            out += _input_fit_lines(ind, input_node)
            u = "w"
        else:
            u = "ub[j]"
        if m == 0:
            out.append(f"{ind}pos = {quantizer_input} >= 0")
            if float_io:
                out.append(f"{ind}yb[j] = 1.0 if pos else -1.0")
            else:
                out.append(f"{ind}outb[j] = 1 if pos else 0")
        else:
            offset = (1 << (m + f_last)) + (1 << f_last)
            out += [
                f"{ind}q = (({quantizer_input} << {m}) + {offset}) >> {f_last + 1}",
                f"{ind}if q < 0:",
                f"{ind}    q = 0",
                f"{ind}elif q > {1 << m}:",
                f"{ind}    q = {1 << m}",
                f"{ind}v = q - {1 << (m - 1)}",
            ]
            out.append(
                f"{ind}yb[j] = float(q) * {float(step)!r} - 1.0"
                if float_io
                else f"{ind}outb[j] = q"
            )
        for i in range(n - 1, -1, -1):
            prev = f"x{i - 1}" if i > 0 else u
            terms = [
                _term(coef[0][i], shifts[0][i], f"x{i}"),
                _term(coef[1][i] if i > 0 else coef[4][0], shifts[1][i], prev),
            ]
            if i < n - 1:
                g = _term(coef[2][i], shifts[3][i], f"n{i + 1}")
                terms.append(None if g is None else f"-({g})")
            expr = " + ".join(t for t in terms if t is not None) or "0"
            r, rule = shifts[4][i], rules[0][i]
            a = int(coef[3][i]) << int(shifts[2][i])
            # the constant added before the right shift (0 for truncation and no shift)
            bias = 0 if r == 0 or rule == 0 else (1 << (r - 1)) - (1 if rule == 2 else 0)
            if m == 0:
                # v = +1 when pos, else -1: the feedback term is a choice of two constants
                if rule == 2 and r > 0:
                    out.append(f"{ind}acc = {expr} + ({-a} if pos else {a})")
                    add_bias = f" + {bias}"
                else:
                    out.append(f"{ind}acc = {expr} + ({bias - a} if pos else {bias + a})")
                    add_bias = ""
            else:
                fb = _term(a, 0, "v")
                out.append(f"{ind}acc = {expr}" + ("" if fb is None else f" - {fb}"))
                add_bias = f" + {bias}" if bias else ""
            if r == 0:
                out.append(f"{ind}val = acc")
            elif rule == 2:
                # ties to even without a branch: half a step less one, plus the kept part's
                # lowest bit, carries into the kept part exactly when the rule rounds up
                out.append(f"{ind}val = (acc{add_bias} + ((acc >> {r}) & 1)) >> {r}")
            else:
                out.append(f"{ind}val = (acc{add_bias}) >> {r}")
            hi = (1 << (rules[2][i] - 1)) - 1
            lo = -hi - 1
            if checked:
                out += [
                    f"{ind}if val > {hi} or val < {lo}:",
                    f"{ind}    o{i} += 1",
                ]
                if rules[1][i] == 1:
                    out.append(f"{ind}    val = ((val - ({lo})) & {2 * hi + 1}) + ({lo})")
                else:
                    out.append(f"{ind}    val = {hi} if val > {hi} else {lo}")
                out.append(f"{ind}p{i} = max(p{i}, abs(val))")
            else:
                out.append(f"{ind}sc[{i * FIXED_BLOCK} + j] = val")
            out.append(f"{ind}n{i} = val")
        out.append(f"{ind}{xs} = {ns}")
        return out

    src, dst = ("x", "y") if float_io else ("u", "out")
    add(f"    sc = np.empty({n * FIXED_BLOCK}, dtype=np.int64)")
    add("    start = 0")
    add("    while start < total:")
    add(f"        stop = min(start + {FIXED_BLOCK}, total)")
    add(f"        {src}b = {src}[start:stop]")
    if dithered:
        add("        db = dither[start:stop]")
    add(f"        {dst}b = {dst}[start:stop]")
    add("        size = stop - start")
    if not float_io:
        # the input words must fit the input word: checked here, a block at a time, so the
        # wrapper needs no pass of its own over them (the caller discards everything else)
        ihi = (1 << (input_node[2] - 1)) - 1
        add("        h = 0")
        add("        lo = 0")
        add("        for j in range(size):")
        add("            h = max(h, ub[j])")
        add("            lo = min(lo, ub[j])")
        add(f"        if h > {ihi} or lo < {-ihi - 1}:")
        add("            return start")
    add(f"        {', '.join(f's{i}' for i in range(n))} = {xs}")
    add(
        f"        {', '.join(f'pk{i}' for i in range(n))} = " + ", ".join(f"p{i}" for i in range(n))
    )
    add("        for j in range(size):")
    lines.extend(sample("            ", False))
    add("        fits = True")
    for i in range(n):
        hi = (1 << (rules[2][i] - 1)) - 1
        add("        h = 0")
        add("        lo = 0")
        add("        for j in range(size):")
        add(f"            h = max(h, sc[{i * FIXED_BLOCK} + j])")
        add(f"            lo = min(lo, sc[{i * FIXED_BLOCK} + j])")
        add(f"        fits = fits and h <= {hi} and lo >= {-hi - 1}")
        add(f"        p{i} = max(p{i}, h, -lo)")
    add("        if not fits:")
    add(f"            {xs} = {', '.join(f's{i}' for i in range(n))}")
    add(
        f"            {', '.join(f'p{i}' for i in range(n))} = "
        + ", ".join(f"pk{i}" for i in range(n))
    )
    add("            for j in range(size):")
    lines.extend(sample("                ", True))
    add("        start = stop")
    for i in range(n):
        add(f"    state[{i}] = x{i}")
        add(f"    peaks[{i}] = p{i}")
        add(f"    counts[{i}] = o{i}")
    add("    return -1")
    return "\n".join(lines) + "\n"


_FIXED_KERNELS = {}


def fixed_loop_kernel(key, float_io=False):
    """Compiled specialised integer loop for a loop key (built on first use).

    See :func:`fixed_loop_kernel_source` for the key and the two argument lists.
    """
    kernel = _FIXED_KERNELS.get((key, float_io))
    if kernel is None:
        source = fixed_loop_kernel_source(key, float_io)
        name = fixed_loop_kernel_name(key, float_io)
        namespace = {}
        # compiled under this file's name so numba's cache can find (and invalidate) it
        exec(compile(source, __file__, "exec"), globals(), namespace)
        function = namespace[name]
        function.__module__ = __name__
        function.__qualname__ = name
        kernel = njit(cache=True, nogil=True)(function)
        _FIXED_KERNELS[(key, float_io)] = kernel
    return kernel


@njit(cache=True, nogil=True)
def fixed_interpolate_row(row, phases, ratio, taps, lengths, out, shift, rule, word_bits, wrap):
    """Interpolate one channel by R = ``ratio`` in integers (the fixed-point interpolator).

    ``phases`` is (R, M) int64 with M = ``taps``: ``phases[p, m]`` is the integer of tap
    ``p + m R`` of the interpolation filter (gain R), ``lengths[p]`` of them used. ``row`` is
    the last M - 1 input words of the previous block, then the n new ones; ``out`` (R n)
    receives ``out[R i + p] = fit(round(sum_m phases[p, m] * row[i + M - 1 - m], shift))``:
    the exact sum, its ``shift`` low bits dropped by the rounding rule (0 truncate, 1 round
    half up, 2 convergent), then fitted to ``word_bits`` (``wrap`` or saturate). Returns the
    number of outputs the overflow rule acted on.
    """
    hi = (1 << (word_bits - 1)) - 1
    lo = -hi - 1
    n = out.shape[0] // ratio
    overflows = 0
    for i in range(n):
        for p in range(ratio):
            acc = 0
            for m in range(lengths[p]):
                acc += phases[p, m] * row[i + taps - 1 - m]
            val = _round_shift(acc, shift, rule)
            if val > hi or val < lo:
                overflows += 1
                if wrap:
                    val = ((val - lo) & (2 * hi + 1)) + lo
                else:
                    val = hi if val > hi else lo
            out[ratio * i + p] = val
    return overflows


@njit(cache=True, nogil=True)
def dither_words(counter, scale, out):
    """The float loop's TPDF dither sequence as words of the last state; returns the counter.

    Per sample the counter advances twice by the golden-ratio increment and each value goes
    through the SplitMix64 output function, exactly as in the float loop's kernels
    (:func:`audiodsm.stages._kernels._unit_from_counter`); the dither ``scale * (r1 - r2)``
    (``scale`` already multiplied by ``2**F`` of the last state, a power of two, so the
    product is the float loop's dither times ``2**F`` exactly) is rounded down to a word.
    """
    c = counter
    for t in range(out.shape[0]):
        c += _GOLDEN
        r1 = _unit_from_counter(c)
        c += _GOLDEN
        r2 = _unit_from_counter(c)
        out[t] = int(math.floor(scale * (r1 - r2)))
    return c
