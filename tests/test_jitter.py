"""Clock jitter on the output edges (stages/jitter.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.signal import welch

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.errors import ParameterError
from audiodsm.stages._element_kernels import _ZIGGURAT_R, normal_draws
from audiodsm.stages.jitter import EdgeJitter, jitter_in_band_power
from audiodsm.stages.modulator import Modulator

RATE = 3_072_000.0


def _stream(levels, n, *, amplitude=0.5, cycles=None, osr=64):
    order = 2 if levels == 2 else 3
    ntf = NoiseTransfer.designed(order, osr=osr, out_of_band_gain=1.5)
    cycles = cycles if cycles is not None else 211
    x = amplitude * np.sin(2 * np.pi * np.arange(n) * cycles / n)
    y, _ = Modulator(ntf, levels=levels, seed=2).run(x)
    return y


def _twin(levels, shifts, rest):
    """Frame means by integrating the waveform segment by segment (edges at n + shift[n])."""
    n = len(levels)
    edges = [k + shifts[k] for k in range(n)] + [float(n)]
    values = list(levels)
    means = []
    for frame in range(-1, n - 1):
        area = 0.0
        # the value before edge 0 is the rest level
        for k in range(-1, n):
            start = -1.0 if k < 0 else edges[k]
            stop = edges[k + 1] if k + 1 <= n else float(n)
            value = rest if k < 0 else values[k]
            lo, hi = max(start, frame), min(stop, frame + 1)
            if hi > lo:
                area += value * (hi - lo)
        means.append(area)
    return np.array(means)  # one frame behind: frames -1 .. n-2


def test_kernel_matches_segment_integration():
    rng = np.random.default_rng(5)
    levels = rng.integers(-4, 5, 200) / 4.0
    jit = EdgeJitter(RATE, rms_s=15e-9, seed=9, rest_level=0.25)
    shifts = jit.shifts(0, 200)
    out, _ = jit.process(levels)
    # the twin works on absolute edge times (n + shift): rounding near 1e-14 of a frame
    np.testing.assert_allclose(out, _twin(levels, shifts, 0.25), rtol=0, atol=1e-12)


def test_blocks_equal_one_call():
    y = _stream(17, 10000)
    jit = EdgeJitter(RATE, rms_s=2e-9, sine_peak_s=3e-9, sine_hz=5000.0, seed=1)
    whole, _ = jit.process(y)
    parts, st = [], None
    for a, b in ((0, 1), (1, 4097), (4097, 4100), (4100, 10000)):
        part, st = jit.process(y[a:b], st)
        parts.append(part)
    assert np.array_equal(np.concatenate(parts), whole)


def test_no_jitter_is_a_one_frame_delay():
    y = _stream(17, 1000)
    out, _ = EdgeJitter(RATE).process(y)
    assert out[0] == 0.0 and np.array_equal(out[1:], y[:-1])


def test_sinusoidal_jitter_sidebands_follow_phase_modulation():
    # Small-angle phase modulation: a tone A sin(w t) sampled at t + J sin(w_j t) gains
    # sidebands at f +- f_j of amplitude A w J / 2 each, 20 log10(pi f J) re the tone
    # (e.g. Schreier & Temes 2005, clock jitter section; any communications text on PM).
    n = 1 << 20
    cycles, jcycles = 3413, 1201  # coherent bins: f ~ 10 kHz, f_j ~ 3.5 kHz at RATE
    f, f_j, peak = cycles * RATE / n, jcycles * RATE / n, 5e-9
    y = _stream(17, n, amplitude=0.7, cycles=cycles)
    out, _ = EdgeJitter(RATE, sine_peak_s=peak, sine_hz=f_j).process(y)
    spectrum = np.abs(np.fft.rfft(out * np.hanning(n)))
    tone = spectrum[cycles]
    want = 20 * np.log10(np.pi * f * peak)
    for side in (cycles - jcycles, cycles + jcycles):
        got = 20 * np.log10(spectrum[side] / tone)
        assert abs(got - want) <= 0.5, (side, got, want)


@pytest.mark.parametrize("levels", [2, 17])
def test_white_jitter_in_band_noise_matches_the_textbook_estimate(levels):
    # (sigma/T)^2 E[(y[n]-y[n-1])^2] / OSR (Schreier & Temes 2005; Cherry & Snelgrove 1999):
    # the error of each edge is step * delta / T in its frame, white because the delta are.
    n, osr, sigma = 1 << 20, 64, 1e-9
    y = _stream(levels, n)
    jitter = EdgeJitter(RATE, rms_s=sigma, seed=4)
    out, _ = jitter.process(y)
    error = out[1:] - y[:-1]  # the output runs one frame behind
    freqs, psd = welch(error, fs=1.0, nperseg=1 << 14)
    band = freqs <= 0.5 / osr
    got = np.sum(psd[band]) * (freqs[1] - freqs[0])  # welch's density is one-sided
    want = jitter_in_band_power(y, rms_s=sigma, frame_rate_hz=RATE, osr=osr)
    assert abs(10 * np.log10(got / want)) <= 1.0, (got, want)


def test_single_bit_stream_is_more_jitter_sensitive_by_its_mean_squared_step():
    n = 1 << 16
    ratio = jitter_in_band_power(
        _stream(2, n), rms_s=1e-12, frame_rate_hz=RATE, osr=64
    ) / jitter_in_band_power(_stream(17, n), rms_s=1e-12, frame_rate_hz=RATE, osr=64)
    # steps of a single-bit stream are 0 or 2 full scale; of a 17-level loop a few LSB of 1/8
    assert ratio > 30.0


def test_jitter_beyond_half_a_period_refused():
    with pytest.raises(ParameterError, match="half the output period"):
        EdgeJitter(RATE, rms_s=20e-9)


# -- the normal draws of the white jitter and the analog noise ----------------------------------


def test_normal_draws_follow_the_standard_normal_distribution():
    # The ziggurat (Marsaglia & Tsang 2000) against scipy's normal distribution: the
    # Kolmogorov-Smirnov distance of a million draws (a wrong layer table or a lost wedge
    # moves it by far more than the 0.0016 allowed at p = 0.01, Kolmogorov's distribution),
    # the variance and kurtosis within 5 standard errors, and the tail beyond the base
    # strip's edge r, drawn by its own method, with the probability 2 Q(r) within 5 binomial
    # standard deviations.
    n = 1_000_000
    z = np.empty(n)
    normal_draws(np.array([2024], dtype=np.uint64), 1.0, z)
    assert stats.kstest(z, "norm").pvalue > 0.01
    assert abs(np.var(z) - 1.0) < 5 * np.sqrt(2.0 / n)
    assert abs(stats.kurtosis(z)) < 5 * np.sqrt(24.0 / n)
    p_tail = 2 * stats.norm.sf(_ZIGGURAT_R)
    tail = np.count_nonzero(np.abs(z) > _ZIGGURAT_R)
    assert abs(tail - n * p_tail) < 5 * np.sqrt(n * p_tail)
    beyond = np.abs(z[np.abs(z) > 4.0])  # the tail's own shape: P(|z| > 4.5 given > 4)
    want = stats.norm.sf(4.5) / stats.norm.sf(4.0)
    assert abs(np.mean(beyond > 4.5) - want) < 5 * np.sqrt(want / beyond.size)


def test_normal_draws_split_into_calls_are_the_same_numbers():
    whole, parts = np.empty(5000), []
    normal_draws(np.array([7], dtype=np.uint64), 3.0, whole)
    rng = np.array([7], dtype=np.uint64)
    for size in (1, 2499, 2500):
        part = np.empty(size)
        normal_draws(rng, 3.0, part)
        parts.append(part)
    assert np.array_equal(np.concatenate(parts), whole)
