"""Compiled inner loops of the rate converters (stages/upsample.py, stages/downsample.py).

The same rules as :mod:`audiodsm.stages._kernels`: every function here is
``@njit(cache=True, nogil=True)`` without fastmath, takes float64/int arrays and scalars,
writes into caller-allocated output and state arrays, and validates nothing; the
``Upsampler`` and ``Downsampler`` validate, convert, allocate and call. Each kernel has a slow
pure-Python twin in the tests (tests/test_rate_kernels.py).
"""

from __future__ import annotations

import numpy as np
from numba import njit

# Layout: every signal here is (channels, samples) float64. The cascades take the new block
# (any strides) and each stage's history apart; resample_rational takes a C-contiguous buffer
# with the history already prepended by the wrapper. Every output is summed tap by tap in a
# fixed order that does not depend on where a block starts, so block-wise and one-shot runs
# agree bit for bit. The loops over output samples are innermost, over slices (which spares
# the negative-index checks), so that they vectorise without reordering any sum.

_RATE_CHUNK = 512


@njit(cache=True, nogil=True)
def _interpolate_halfband_row(row, dense, out, acc):
    """Interpolate one channel by 2 with a half-band FIR (zeros are never multiplied).

    ``dense`` holds the 2K taps of the dense phase (symmetric, ``dense[m] == dense[2K-1-m]``),
    scaled for an interpolation gain of 2; the other phase is the centre tap, a pure delay of
    K - 1 input samples. ``row`` is the last 2K - 1 input samples of the previous chunk, then
    the n new ones; ``out`` is 2n long: ``out[2i] = sum_m dense[m] * (row[i+2K-1-m] +
    row[i+m])`` for m < K, summed in increasing m, and ``out[2i+1] = row[i+K]``.
    """
    two_k = dense.shape[0]
    k = two_k // 2
    n = out.shape[0] // 2
    for start in range(0, n, _RATE_CHUNK):
        length = min(start + _RATE_CHUNK, n) - start
        acc[:length] = 0.0
        for m in range(k):
            coef = dense[m]
            a = row[start + two_k - 1 - m : start + two_k - 1 - m + length]
            b = row[start + m : start + m + length]
            for i in range(length):
                acc[i] += coef * (a[i] + b[i])
        # a contiguous destination written with a fixed stride of 2 vectorizes
        dst = out[2 * start : 2 * (start + length)]
        centre = row[start + k : start + k + length]
        for i in range(length):
            dst[2 * i] = acc[i]
            dst[2 * i + 1] = centre[i]


@njit(cache=True, nogil=True)
def _interpolate_polyphase_row(row, phases, ratio, taps, lengths, out, acc):
    """Interpolate one channel by R = ``ratio`` with an FIR split into R phases.

    ``phases`` is (R, M) with M = ``taps``: ``phases[p, m]`` is tap ``p + m R`` of the
    interpolation filter (gain R); only the first ``lengths[p]`` taps of phase p are used, so
    zeros are never multiplied. ``row`` is the last M - 1 input samples of the previous chunk,
    then the n new ones; ``out`` is R n long with ``out[R i + p] = sum_m phases[p, m] *
    row[i + M - 1 - m]``, summed in increasing m.
    """
    n = out.shape[0] // ratio
    if ratio == 2:  # both phases, then one interleaved store with a fixed stride of 2
        acc0 = acc[:_RATE_CHUNK]
        acc1 = acc[_RATE_CHUNK : 2 * _RATE_CHUNK]
        for start in range(0, n, _RATE_CHUNK):
            length = min(start + _RATE_CHUNK, n) - start
            for p in range(2):
                a = acc0 if p == 0 else acc1
                a[:length] = 0.0
                for m in range(lengths[p]):
                    coef = phases[p, m]
                    seg = row[start + taps - 1 - m : start + taps - 1 - m + length]
                    for i in range(length):
                        a[i] += coef * seg[i]
            dst = out[2 * start : 2 * (start + length)]
            for i in range(length):
                dst[2 * i] = acc0[i]
                dst[2 * i + 1] = acc1[i]
        return
    for start in range(0, n, _RATE_CHUNK):
        length = min(start + _RATE_CHUNK, n) - start
        for p in range(ratio):
            acc[:length] = 0.0
            for m in range(lengths[p]):
                coef = phases[p, m]
                seg = row[start + taps - 1 - m : start + taps - 1 - m + length]
                for i in range(length):
                    acc[i] += coef * seg[i]
            dst = out[ratio * start + p : ratio * (start + length) : ratio]
            for i in range(length):
                dst[i] = acc[i]


_INTERP_CHUNK_OUT = 16384


@njit(cache=True, nogil=True)
def interpolate_cascade(x, kinds, ratios, taps, tables, lengths, held, out, rest):
    """Run a whole interpolation chain in one pass, a few thousand output samples at a time.

    Stage s is of kind ``kinds[s]``: 0 a half-band interpolator as in
    :func:`_interpolate_halfband_row` (dense taps ``tables[s, 0, :taps[s]]``, history
    ``taps[s] - 1``); 1 a polyphase FIR as in :func:`_interpolate_polyphase_row` (ratio
    ``ratios[s]``, phases ``tables[s, :ratios[s], :taps[s]]`` with ``lengths[s, p]`` taps used,
    history ``taps[s] - 1``); 2 a hold that repeats each sample ``ratios[s]`` times (no
    history). Every output is a fixed sum in a fixed order, so the cascade gives the bits of
    the same stages run one after the other over whole signals.

    ``x`` is (channels, n), any strides. ``held`` is (S, channels, H): each stage's history,
    its first ``history`` samples used. ``out`` is (channels, n R) with R the product of the
    ratios. ``rest`` is (S, channels, H) and receives the histories afterwards. The input is
    fed in chunks that make about ``_INTERP_CHUNK_OUT`` output samples, each carried through
    every stage before the next, so the intermediate signals stay in the first-level cache.
    """
    n_ch = x.shape[0]
    n = x.shape[1]
    n_st = kinds.shape[0]
    total = 1
    for s in range(n_st):
        total *= ratios[s]
    chunk = max(1, _INTERP_CHUNK_OUT // total)
    hist = np.empty(n_st, dtype=np.int64)
    offset = np.empty(n_st + 1, dtype=np.int64)
    offset[0] = 0
    size = chunk
    for s in range(n_st):
        hist[s] = taps[s] - 1 if kinds[s] != 2 else 0
        offset[s + 1] = offset[s] + hist[s] + size
        size *= ratios[s]
    work = np.empty(offset[n_st])
    acc = np.empty(2 * _RATE_CHUNK)
    for c in range(n_ch):
        for s in range(n_st):
            base = offset[s]
            for j in range(hist[s]):
                work[base + j] = held[s, c, j]
        pos = 0
        for start in range(0, n, chunk):
            length = min(start + chunk, n) - start
            first = work[offset[0] + hist[0] : offset[0] + hist[0] + length]
            src = x[c, start : start + length]
            for j in range(length):
                first[j] = src[j]
            for s in range(n_st):
                ratio = ratios[s]
                row = work[offset[s] : offset[s] + hist[s] + length]
                if s == n_st - 1:
                    dst = out[c, pos : pos + ratio * length]
                    pos += ratio * length
                else:
                    nxt = offset[s + 1] + hist[s + 1]
                    dst = work[nxt : nxt + ratio * length]
                if kinds[s] == 0:
                    _interpolate_halfband_row(row, tables[s, 0, : taps[s]], dst, acc)
                elif kinds[s] == 1:
                    _interpolate_polyphase_row(row, tables[s], ratio, taps[s], lengths[s], dst, acc)
                else:
                    for i in range(length):
                        v = row[i]
                        for r in range(ratio):
                            dst[i * ratio + r] = v
                # keep the newest hist[s] samples as the history of the next chunk
                for j in range(hist[s]):
                    row[j] = row[length + j]
                length *= ratio
        for s in range(n_st):
            base = offset[s]
            for j in range(hist[s]):
                rest[s, c, j] = work[base + j]


_CASCADE_CHUNK = 4096


@njit(cache=True, nogil=True)
def _deinterleave_into(src, even, odd, fill):
    """Append ``src`` to a stage buffer kept as its even and odd samples (``fill`` held)."""
    n = src.shape[0]
    pairs = n >> 1
    half = fill >> 1
    if fill & 1 == 0:  # src[2j] lands on an even position, src[2j + 1] on an odd one
        dst_a = even[half : half + pairs + (n & 1)]
        dst_b = odd[half : half + pairs]
    else:
        dst_a = odd[half : half + pairs + (n & 1)]
        dst_b = even[half + 1 : half + 1 + pairs]
    for j in range(pairs):
        dst_a[j] = src[2 * j]
        dst_b[j] = src[2 * j + 1]
    if n & 1:
        dst_a[pairs] = src[n - 1]
    return fill + n


@njit(cache=True, nogil=True)
def decimate_halfband_cascade(x, halves, ks, held, held_len, out, rest):
    """Run a cascade of S half-band decimate-by-2 stages in one pass, chunk by chunk.

    Stage s is the half-band FIR of length N = 4K - 1, K = ``ks[s]``, whose outer taps are
    ``halves[s, :K]`` (``h[2m]`` for m < K, the filter having unit DC gain) and whose centre
    tap is 1/2; zeros are never multiplied. With ``buf`` the stage's input, output i uses the
    newest sample ``t = N - 1 + 2 i``: ``out[i] = sum_m half[m] * (buf[t-2m] +
    buf[t-2(2K-1-m)]) + 0.5 * buf[t-2K+1]``, summed in increasing m, the centre term last.
    Every output is that sum in that order, so the cascade gives the same bits as running
    the stages one after the other over whole signals.

    ``x`` is the new input (channels, n), any strides. ``held`` is (S, channels, H): stage s's
    input samples not yet consumed, the first ``held_len[s]`` of each row. ``out`` is
    (channels, m) and receives every output of the last stage this input completes (the
    caller computes m). ``rest`` is (S, channels, R) and receives each stage's unconsumed
    samples afterwards (the caller computes their counts: the fill left after taking as
    many outputs as possible). The input is fed in chunks of a few thousand samples, and
    each chunk is carried through all stages before the next, so the intermediate signals
    stay in the core's first-level cache; each stage keeps its buffer split into even and
    odd samples, so the inner loops run over contiguous memory.
    """
    n_ch = x.shape[0]
    n = x.shape[1]
    n_st = ks.shape[0]
    # a stage never holds more than its history (< 4k - 1, or what the caller held) plus
    # one chunk's worth of new samples
    width = 4 * np.max(ks) + held.shape[2] + _CASCADE_CHUNK + 8
    even = np.empty((n_st, width // 2 + 2))
    odd = np.empty((n_st, width // 2 + 2))
    acc = np.empty(width // 2 + 2)
    fill = np.empty(n_st, dtype=np.int64)
    for c in range(n_ch):
        for s in range(n_st):
            fill[s] = _deinterleave_into(held[s, c, : held_len[s]], even[s], odd[s], 0)
        pos = 0
        for start in range(0, n, _CASCADE_CHUNK):
            stop = min(start + _CASCADE_CHUNK, n)
            fill[0] = _deinterleave_into(x[c, start:stop], even[0], odd[0], fill[0])
            for s in range(n_st):
                k = ks[s]
                n_taps = 4 * k - 1
                if fill[s] < n_taps:
                    break
                m_out = (fill[s] - n_taps) // 2 + 1
                ev = even[s]
                od = odd[s]
                # output i uses newest sample t = 4k - 2 + 2i (even): t - 2m -> ev[2k-1+i-m],
                # t - 2(2k-1-m) -> ev[i+m], the centre t - (2k-1) -> od[k-1+i]
                centre = od[k - 1 : k - 1 + m_out]
                if k == 2:  # the short first stages: one pass, the same sum in the same order
                    h0 = halves[s, 0]
                    h1 = halves[s, 1]
                    a0 = ev[3 : 3 + m_out]
                    b0 = ev[0:m_out]
                    a1 = ev[2 : 2 + m_out]
                    b1 = ev[1 : 1 + m_out]
                    for i in range(m_out):
                        acc[i] = ((0.0 + h0 * (a0[i] + b0[i])) + h1 * (a1[i] + b1[i])) + (
                            0.5 * centre[i]
                        )
                elif k == 3:
                    h0 = halves[s, 0]
                    h1 = halves[s, 1]
                    h2 = halves[s, 2]
                    a0 = ev[5 : 5 + m_out]
                    b0 = ev[0:m_out]
                    a1 = ev[4 : 4 + m_out]
                    b1 = ev[1 : 1 + m_out]
                    a2 = ev[3 : 3 + m_out]
                    b2 = ev[2 : 2 + m_out]
                    for i in range(m_out):
                        acc[i] = (
                            ((0.0 + h0 * (a0[i] + b0[i])) + h1 * (a1[i] + b1[i]))
                            + h2 * (a2[i] + b2[i])
                        ) + 0.5 * centre[i]
                else:
                    acc[:m_out] = 0.0
                    for m in range(k):
                        coef = halves[s, m]
                        a = ev[2 * k - 1 - m : 2 * k - 1 - m + m_out]
                        b = ev[m : m + m_out]
                        for i in range(m_out):
                            acc[i] += coef * (a[i] + b[i])
                    for i in range(m_out):
                        acc[i] = acc[i] + 0.5 * centre[i]
                if s == n_st - 1:
                    dst = out[c, pos : pos + m_out]
                    for i in range(m_out):
                        dst[i] = acc[i]
                    pos += m_out
                else:
                    fill[s + 1] = _deinterleave_into(
                        acc[:m_out], even[s + 1], odd[s + 1], fill[s + 1]
                    )
                # drop the 2 m_out samples no later output needs (an even count: the parity
                # of the buffer start never changes)
                left = fill[s] - 2 * m_out
                for j in range((left + 1) // 2):
                    ev[j] = ev[m_out + j]
                for j in range(left // 2):
                    od[j] = od[m_out + j]
                fill[s] = left
        for s in range(n_st):
            row = rest[s, c]
            for j in range(fill[s]):
                row[j] = even[s, j >> 1] if j % 2 == 0 else odd[s, j >> 1]


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
