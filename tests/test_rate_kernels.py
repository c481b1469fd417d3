"""Tests of the rate converters' compiled loops (audiodsm.stages._rate_kernels).

Each kernel against a slow pure-Python twin with the same summation order (bit for bit), and
the one-pass cascades against scipy.signal.upfirdn run stage by stage with the same taps.
"""

import numpy as np
import pytest
from scipy import signal

from audiodsm.stages import _rate_kernels
from audiodsm.stages.downsample import design_downsampler
from audiodsm.stages.upsample import design_upsampler

# ---------------------------------------------------------------------------------------------
# slow twins of the kernels' stages: plain Python, one output at a time, same summation order
# ---------------------------------------------------------------------------------------------


def slow_interpolate_halfband(buf, dense):
    two_k = dense.size
    k = two_k // 2
    n = buf.shape[1] - (two_k - 1)
    out = np.empty((buf.shape[0], 2 * n))
    for c in range(buf.shape[0]):
        for i in range(n):
            acc = 0.0
            for m in range(k):
                acc += dense[m] * (buf[c, i + two_k - 1 - m] + buf[c, i + m])
            out[c, 2 * i] = acc
            out[c, 2 * i + 1] = buf[c, i + k]
    return out


def slow_interpolate_polyphase(buf, phases, lengths):
    ratio, taps = phases.shape
    n = buf.shape[1] - (taps - 1)
    out = np.empty((buf.shape[0], ratio * n))
    for c in range(buf.shape[0]):
        for i in range(n):
            for p in range(ratio):
                acc = 0.0
                for m in range(lengths[p]):
                    acc += phases[p, m] * buf[c, i + taps - 1 - m]
                out[c, ratio * i + p] = acc
    return out


def slow_decimate_halfband(buf, half):
    k = half.size
    n_taps = 4 * k - 1
    n = (buf.shape[1] - n_taps) // 2 + 1
    out = np.empty((buf.shape[0], n))
    for c in range(buf.shape[0]):
        for i in range(n):
            t = n_taps - 1 + 2 * i
            acc = 0.0
            for m in range(k):
                acc += half[m] * (buf[c, t - 2 * m] + buf[c, t - 2 * (2 * k - 1 - m)])
            out[c, i] = acc + 0.5 * buf[c, t - 2 * k + 1]
    return out


def slow_resample_rational(buf, phases, lengths, first_time, step, n_out):
    up, taps = phases.shape
    out = np.empty((buf.shape[0], n_out))
    for c in range(buf.shape[0]):
        t = first_time
        for j in range(n_out):
            q, p = divmod(t, up)
            acc = 0.0
            for i in range(lengths[p]):
                acc += phases[p, i] * buf[c, q + taps - 1 - i]
            out[c, j] = acc
            t += step
    return out


# ---------------------------------------------------------------------------------------------
# interpolation cascade
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("pratio", [3, 2])  # ratio 2 has its own interleaved store
def test_interpolate_cascade_matches_slow_twins_stage_by_stage(rng, pratio):
    # half-band (x2), polyphase FIR (x pratio), hold (x2): the fused one-pass kernel must give
    # the bits of the slow twins run stage after stage, with histories carried in and out,
    # and across several internal chunks (the output is longer than _INTERP_CHUNK_OUT)
    dense = rng.standard_normal(6)
    dense = dense + dense[::-1]
    phases = rng.standard_normal((pratio, 4))
    plens = np.array([4, 4, 3][:pratio])
    phases[-1, 3:] = 0.0
    plens[-1] = 3
    kinds = np.array([0, 1, 2])
    ratios = np.array([2, pratio, 2])
    taps = np.array([6, 4, 0])
    tables = np.zeros((3, 3, 6))
    tables[0, 0, :6] = dense
    tables[1, :pratio, :4] = phases
    lengths = np.zeros((3, 3), dtype=np.int64)
    lengths[1, :pratio] = plens
    total = 4 * pratio
    n = _rate_kernels._INTERP_CHUNK_OUT // total * 2 + 37
    x = rng.standard_normal((2, n))
    hist0 = rng.standard_normal((2, 5))
    hist1 = rng.standard_normal((2, 3))
    held = np.zeros((3, 2, 5))
    held[0] = hist0
    held[1, :, :3] = hist1
    buf0 = np.concatenate([hist0, x], axis=1)
    y0 = slow_interpolate_halfband(buf0, dense)
    buf1 = np.concatenate([hist1, y0], axis=1)
    y1 = slow_interpolate_polyphase(buf1, phases, plens)
    expected = np.repeat(y1, 2, axis=1)  # a hold repeats each sample
    out = np.empty((n * total, 2)).T  # written through a transpose, as the Upsampler does
    rest = np.full((3, 2, 5), np.nan)
    _rate_kernels.interpolate_cascade(x, kinds, ratios, taps, tables, lengths, held, out, rest)
    assert np.array_equal(out, expected)
    assert np.array_equal(rest[0], buf0[:, -5:])
    assert np.array_equal(rest[1, :, :3], buf1[:, -3:])


def test_cascade_is_the_textbook_interpolator_stage_by_stage(rng):
    # Crochiere & Rabiner (1983) sec. 3.3: interpolation by R = zero insertion, then the FIR
    # at the high rate (gain R). Reference: scipy.signal.upfirdn(h, x, up=R), which does
    # exactly that, run stage after stage (a hold is np.repeat). The one-pass cascade - a
    # half-band x2 with the designed taps, a 4-phase FIR whose phases have 5, 5, 4, 4 taps, a
    # hold x2 - started from zero histories must agree up to rounding (its half-band sums pair
    # the symmetric taps), over several channels and internal chunks.
    h = design_upsampler(48000, 16).halfband_taps[0]
    g = 2.0 * h[0::2]
    fir = rng.standard_normal(18)
    kinds = np.array([0, 1, 2])
    ratios = np.array([2, 4, 2])
    taps = np.array([g.size, 5, 0])
    tables = np.zeros((3, 4, max(g.size, 5)))
    tables[0, 0, : g.size] = g
    lengths = np.zeros((3, 4), dtype=np.int64)
    for p in range(4):
        phase = fir[p::4]
        tables[1, p, : phase.size] = phase
        lengths[1, p] = phase.size
    assert list(lengths[1]) == [5, 5, 4, 4]
    n = 3 * _rate_kernels._INTERP_CHUNK_OUT // 16 + 29
    x = rng.standard_normal((3, n))
    held = np.zeros((3, 3, g.size - 1))
    out = np.empty((3, 16 * n))
    rest = np.empty_like(held)
    _rate_kernels.interpolate_cascade(x, kinds, ratios, taps, tables, lengths, held, out, rest)
    for c in range(3):
        y = signal.upfirdn(2.0 * h, x[c], up=2)[: 2 * n]
        y = signal.upfirdn(fir, y, up=4)[: 8 * n]
        ref = np.repeat(y, 2)
        assert np.max(np.abs(out[c] - ref)) < 1e-12


# ---------------------------------------------------------------------------------------------
# decimation cascade and rational resampler
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("held_lens", [(6, 6, 10), (0, 3, 0), (5, 6, 9)])
def test_decimate_cascade_matches_slow_twin_stage_by_stage(rng, held_lens):
    # the fused cascade must give the very bits of the slow twin run stage after stage,
    # across several internal chunks (the input is longer than _CASCADE_CHUNK)
    ks = np.array([2, 3, 4])  # the kernel spells out k = 2 and 3; 4 takes the general loop
    halves = np.zeros((3, 4))
    for s, k in enumerate(ks):
        halves[s, :k] = rng.standard_normal(k)
    n = 3 * _rate_kernels._CASCADE_CHUNK + 123
    x = rng.standard_normal((2, n))
    held = np.zeros((3, 2, max(held_lens)))
    expected_rest = []
    cur = x
    for s, k in enumerate(ks):
        prev = rng.standard_normal((2, held_lens[s]))
        held[s, :, : held_lens[s]] = prev
        buf = np.concatenate([prev, cur], axis=1)
        cur = slow_decimate_halfband(buf, halves[s, :k])
        expected_rest.append(buf[:, 2 * cur.shape[1] :])
    out = np.empty_like(cur)
    rest = np.full((3, 2, 16), np.nan)
    _rate_kernels.decimate_halfband_cascade(x, halves, ks, held, np.array(held_lens), out, rest)
    assert np.array_equal(out, cur)
    for s, r in enumerate(expected_rest):
        assert np.array_equal(rest[s, :, : r.shape[1]], r)
    # a (frames, channels) block read through its transpose gives the same bits
    out_t = np.empty_like(cur)
    xt = np.ascontiguousarray(x.T).T
    _rate_kernels.decimate_halfband_cascade(xt, halves, ks, held, np.array(held_lens), out_t, rest)
    assert np.array_equal(out_t, cur)


def test_cascade_is_the_textbook_decimator_stage_by_stage(rng):
    # Crochiere & Rabiner (1981): decimation by 2 = the FIR at the high rate, then every
    # other sample. Reference: scipy.signal.upfirdn(h, x, down=2), run stage after stage with
    # each designed full half-band h. Started from N - 1 zeros of history per stage (as
    # Downsampler.initial_state does), output i of a stage is upfirdn's output i; the
    # cascade must agree up to rounding (it pairs the symmetric taps), over two channels and
    # several internal chunks. The 3.072 MHz design has the short stages the kernel spells
    # out (2 and 3 outer taps) and longer ones.
    hs = design_downsampler(3072000, 48000).halfband_taps
    ks = np.array([(h.size + 1) // 4 for h in hs])
    assert {2, 3} <= set(ks.tolist()) and ks.max() > 3
    halves = np.zeros((len(hs), ks.max()))
    for s, h in enumerate(hs):
        halves[s, : ks[s]] = h[0 : (h.size + 1) // 2 : 2]
    held_lens = np.array([h.size - 1 for h in hs])
    held = np.zeros((len(hs), 2, held_lens.max()))
    n = 3 * _rate_kernels._CASCADE_CHUNK + 123
    x = rng.standard_normal((2, n))
    refs = []
    for c in range(2):
        cur = x[c]
        for h in hs:
            cur = signal.upfirdn(h, cur, down=2)[: -(-cur.size // 2)]
        refs.append(cur)
    out = np.empty((2, refs[0].size))
    rest = np.empty((len(hs), 2, 4 * ks.max()))
    _rate_kernels.decimate_halfband_cascade(x, halves, ks, held, held_lens, out, rest)
    assert np.max(np.abs(out - np.array(refs))) < 1e-12


def test_rational_kernel_matches_slow_twin(rng):
    up, down, taps = 5, 7, 6
    phases = rng.standard_normal((up, taps))
    lengths = np.array([6, 6, 5, 5, 5])
    for p in range(up):
        phases[p, lengths[p] :] = 0.0
    buf = rng.standard_normal((2, taps - 1 + 300))
    first = 3
    n_out = -(-(300 * up - first) // down)
    out = np.empty((2, n_out))
    _rate_kernels.resample_rational(buf, phases, lengths, first, down, out)
    assert np.array_equal(out, slow_resample_rational(buf, phases, lengths, first, down, n_out))
