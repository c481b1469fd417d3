"""Compiled inner loops of the counting decimator (stages/counting.py), and nothing else.

Kept apart from ``_kernels.py`` so the counting decimator can change without touching the
other stages' loops. Same rules: ``@njit(cache=True, nogil=True)``, no fastmath, contiguous
arrays in, caller-allocated outputs and state arrays, no validation (the wrappers in
``stages/counting.py`` validate, convert, allocate and call). Each kernel has a slow
pure-Python twin in ``tests/test_counting.py``.
"""

from __future__ import annotations

from numba import njit


@njit(cache=True, nogil=True)
def count_integrate_comb(codes, stages, ratio, mask, phase, integrators, combs, out):
    """The counter cascade as hardware builds it: integrators, decimation, combs.

    Hogenauer's structure (IEEE Trans. ASSP 29(2), 1981, fig. 1 with differential delay 1):
    ``stages`` integrators run at the input rate, every ``ratio``-th sample is kept, and
    ``stages`` combs (first differences) run at the output rate. Every register is
    ``mask + 1`` wide and wraps around (arithmetic modulo ``mask + 1``): the wraps cancel in
    the combs, so the output is exact whenever the true result fits the register
    (Hogenauer, sec. III).

    Parameters
    ----------
    codes : int64 array (channels, n)
        Input codes (0/1 for a single-bit stream).
    stages, ratio : int
        K and N.
    mask : int
        ``2**register_bits - 1``.
    phase : int
        Input samples taken since the last output (0 .. ratio-1).
    integrators, combs : int64 arrays (channels, stages)
        Integrator registers and the combs' delayed values; updated in place.
    out : int64 array (channels, (phase + n) // ratio)
        The counts.
    """
    channels, n = codes.shape
    for c in range(channels):
        p = phase
        j = 0
        for i in range(n):
            v = codes[c, i]
            for s in range(stages):
                v = (integrators[c, s] + v) & mask
                integrators[c, s] = v
            p += 1
            if p == ratio:
                p = 0
                for s in range(stages):
                    d = (v - combs[c, s]) & mask
                    combs[c, s] = v
                    v = d
                out[c, j] = v
                j += 1


@njit(cache=True, nogil=True)
def sum_windows(buf, taps, ratio, first, scale, out):
    """Weighted window sums at every ``ratio``-th sample (the cascade's impulse response).

    ``out[c, j] = scale * sum_m taps[m] * buf[c, first + j * ratio - m]`` for
    ``m = 0 .. len(taps) - 1``, summed in that order, so an output never depends on where a
    block starts.

    Parameters
    ----------
    buf : float64 array (channels, h + n)
        History then the new block; ``first - len(taps) + 1 >= 0``.
    taps : float64 array
        The cascade's integer impulse response.
    ratio : int
        N.
    first : int
        Index in ``buf`` of the newest sample of the first output's window.
    scale : float
        ``1 / N**K`` (count to full-scale units).
    out : float64 array (channels, n_out)
    """
    channels = buf.shape[0]
    n_out = out.shape[1]
    n_taps = taps.size
    for c in range(channels):
        for j in range(n_out):
            end = first + j * ratio
            acc = 0.0
            for m in range(n_taps):
                acc += taps[m] * buf[c, end - m]
            out[c, j] = acc * scale
