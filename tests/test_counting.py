"""Tests of the counting decimator (audiodsm.stages.counting, audiodsm.stages._counting_kernels)."""

import math

import numpy as np
import pytest

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.errors import ParameterError, ProfileError
from audiodsm.measure.sine_fit import fit_sine
from audiodsm.profile import profile_from_dict
from audiodsm.stages import _counting_kernels
from audiodsm.stages.chain import Chain, run_chain
from audiodsm.stages.counting import (
    CountingDecimator,
    CountingDownsampler,
    counting_response,
    counting_taps,
    design_counting_downsampler,
)
from audiodsm.stages.downsample import DownsamplerDesign, design_downsampler
from audiodsm.stages.modulator import Modulator

# ---------------------------------------------------------------------------------------------
# slow twins of the kernels
# ---------------------------------------------------------------------------------------------


def slow_count_integrate_comb(codes, stages, ratio, bits, phase, integrators, combs):
    """Integrators, keep every ratio-th sample, combs; Python integers modulo 2**bits."""
    modulus = 1 << bits
    integ = [[int(v) for v in row] for row in integrators]
    comb = [[int(v) for v in row] for row in combs]
    outs = []
    for c in range(codes.shape[0]):
        p = phase
        row = []
        for i in range(codes.shape[1]):
            v = int(codes[c, i])
            for s in range(stages):
                v = (integ[c][s] + v) % modulus
                integ[c][s] = v
            p += 1
            if p == ratio:
                p = 0
                for s in range(stages):
                    d = (v - comb[c][s]) % modulus
                    comb[c][s] = v
                    v = d
                row.append(v)
        outs.append(row)
    return np.array(outs, dtype=np.int64), np.array(integ), np.array(comb)


def slow_sum_windows(buf, taps, ratio, first, scale, n_out):
    out = np.empty((buf.shape[0], n_out))
    for c in range(buf.shape[0]):
        for j in range(n_out):
            end = first + j * ratio
            acc = 0.0
            for m in range(taps.size):
                acc += taps[m] * buf[c, end - m]
            out[c, j] = acc * scale
    return out


@pytest.mark.parametrize(
    ("ratio", "stages", "bits", "phase"), [(4, 1, 3, 3), (5, 3, 8, 0), (8, 2, 7, 5)]
)
def test_count_kernel_matches_slow_twin(rng, ratio, stages, bits, phase):
    codes = rng.integers(0, 4, size=(2, 203)).astype(np.int64)
    integ0 = rng.integers(0, 1 << bits, size=(2, stages)).astype(np.int64)
    comb0 = rng.integers(0, 1 << bits, size=(2, stages)).astype(np.int64)
    want, want_i, want_c = slow_count_integrate_comb(
        codes, stages, ratio, bits, phase, integ0, comb0
    )
    integ, comb = integ0.copy(), comb0.copy()
    out = np.empty((2, (phase + codes.shape[1]) // ratio), dtype=np.int64)
    _counting_kernels.count_integrate_comb(
        codes, stages, ratio, (1 << bits) - 1, phase, integ, comb, out
    )
    np.testing.assert_array_equal(out, want)
    np.testing.assert_array_equal(integ, want_i)
    np.testing.assert_array_equal(comb, want_c)


@pytest.mark.parametrize(("ratio", "stages"), [(4, 1), (6, 3)])
def test_window_kernel_matches_slow_twin(rng, ratio, stages):
    taps = counting_taps(ratio, stages).astype(float)
    buf = rng.standard_normal((2, 300))
    first = taps.size - 1 + 2
    n_out = (buf.shape[1] - 1 - first) // ratio + 1
    out = np.empty((2, n_out))
    _counting_kernels.sum_windows(buf, taps, ratio, first, 1.0 / ratio**stages, out)
    want = slow_sum_windows(buf, taps, ratio, first, 1.0 / ratio**stages, n_out)
    np.testing.assert_array_equal(out, want)  # same summation order: same bits


# ---------------------------------------------------------------------------------------------
# against Hogenauer's closed form
# ---------------------------------------------------------------------------------------------


def measured_impulse_response(dec):
    """The implemented filter's impulse response, read through the decimator one phase at a time.

    Output j's window ends on input sample j N, so an impulse at input sample q shows up in
    output j as h[j N - q]; the N phases q = 0 .. N-1 together give every tap.
    """
    n, length = dec.length, dec.taps.size
    h = np.zeros(length)
    for q in range(n):
        x = np.zeros(length + 2 * n)
        x[q] = 1.0
        y, _ = dec.process(x)
        for j, v in enumerate(y):
            t = j * n - q
            if 0 <= t < length:
                h[t] = v
            else:
                assert v == 0.0
    return h


@pytest.mark.parametrize(("length", "stages"), [(64, 1), (64, 3), (16, 5), (10, 2), (128, 4)])
def test_response_is_hogenauers_closed_form(length, stages):
    # Hogenauer 1981 (IEEE Trans. ASSP 29(2)), eq. (3) with differential delay 1:
    # |H(f)| = |sin(pi f N / fs) / (N sin(pi f / fs))|^K. The DTFT of the measured impulse
    # response must equal it to 1e-9 (linear): only float64 rounding separates the two.
    fs = 3_072_000.0
    dec = CountingDecimator(length, stages)
    h = measured_impulse_response(dec)
    assert h.sum() == pytest.approx(1.0, abs=1e-12)  # unity DC gain
    f = np.concatenate([np.linspace(1.0, fs / 2, 2001), [fs / length, 2 * fs / length, 20000.0]])
    n_idx = np.arange(h.size)
    dtft = np.exp(-2j * np.pi * np.outer(f / fs, n_idx)) @ h
    closed = np.abs(np.sin(np.pi * f * length / fs) / (length * np.sin(np.pi * f / fs))) ** stages
    np.testing.assert_allclose(np.abs(dtft), closed, rtol=0, atol=1e-9)
    # and the library's own response (with its linear phase) is the same filter
    lib = counting_response(f, rate_hz=fs, length=length, stages=stages)
    np.testing.assert_allclose(lib, dtft, rtol=0, atol=1e-9)
    # the taps are the coefficients of (1 + z^-1 + ... + z^-(N-1))^K
    assert dec.taps.sum() == length**stages
    np.testing.assert_array_equal(np.round(h * length**stages), dec.taps)


@pytest.mark.parametrize("x_dc", [0.0, 0.3, -0.47, 0.8125, -0.9, 1 / math.pi])
def test_first_order_stream_counts_its_dc_level(x_dc):
    # A first-order loop (NTF 1 - z^-1) keeps its integrator within one quantizer step, so over
    # any N clocks the sum of its +-1 output differs from N x by at most 2 (one step), and the
    # number of ones, (N + sum) / 2, from N (1 + x) / 2 by at most one count. (Textbook
    # first-order analysis: J. C. Candy 1981; R. M. Gray, IEEE Trans. Commun. 37(6), 1989,
    # both in REFERENCES.md.)
    n = 64
    mod = Modulator(NoiseTransfer.from_roots(zeros=[1.0], poles=[0.0]), levels=2)
    bits, _ = mod.run(np.full(64 * 200, x_dc))
    codes = ((bits + 1.0) / 2.0).astype(np.int64)
    dec = CountingDecimator(n, 1)
    counts, _ = dec.count(codes)
    counts = counts[1:]  # output 0 holds only the first sample (the window before is silence)
    assert np.all(np.abs(counts - n * (1.0 + x_dc) / 2.0) <= 1.0)
    assert counts.max() <= n  # a 64-clock window holds at most 64 ones
    # the float path on the +-1 stream is the same count in full-scale units: 2 c / N - 1
    y, _ = dec.process(bits)
    np.testing.assert_array_equal(y[1:], 2.0 * counts / n - 1.0)


@pytest.mark.parametrize(("length", "stages"), [(64, 1), (64, 3), (16, 4), (8, 6), (1024, 2)])
def test_register_width_is_hogenauers_bit_growth(rng, length, stages):
    # Hogenauer 1981, sec. III: the output grows by K log2(N) bits over the input
    # (B_max = ceil(K log2(R M) + B_in - 1) is the MSB index). A single-bit input needs
    # 1 + K log2 N bits and the largest count is N^K.
    dec = CountingDecimator(length, stages)
    assert dec.bit_growth == stages * int(math.log2(length))
    assert dec.register_bits == 1 + stages * int(math.log2(length))
    assert dec.max_count == length**stages
    assert dec.max_count < 2**dec.register_bits <= 2 * dec.max_count
    # all ones: the integrators wrap around many times, and the combs still give N^K
    ones = np.ones(length * 40, dtype=np.int64)
    counts, regs = dec.count(ones)
    assert np.all(counts[stages:] == dec.max_count)
    assert (length * 40) ** stages / math.factorial(stages) >= 2**dec.register_bits  # wrapped
    assert regs.integrators.max() < 2**dec.register_bits
    # one bit fewer cannot hold N^K: the count wraps to 0
    short, _ = dec.count(ones, register_bits=dec.register_bits - 1)
    assert np.all(short[stages:] == 0)
    # a random stream: the wrapping registers give the exact window sums
    codes = rng.integers(0, 2, size=length * 50).astype(np.int64)
    counts, _ = dec.count(codes)
    exact = np.convolve(codes, dec.taps)[: codes.size : length]
    np.testing.assert_array_equal(counts, exact)


def test_multibit_codes_grow_by_the_same_bits(rng):
    # Hogenauer's growth does not depend on the input width: B_out = B_in + K log2 N
    dec = CountingDecimator(32, 3, input_bits=4)
    assert dec.register_bits == 4 + 15
    assert dec.max_count == 15 * 32**3
    codes = rng.integers(0, 16, size=(3200, 2)).astype(np.int64)
    counts, _ = dec.count(codes)
    for c in range(2):
        exact = np.convolve(codes[:, c], dec.taps)[: codes.shape[0] : 32]
        np.testing.assert_array_equal(counts[:, c], exact)
    full, _ = dec.count(np.full(3200, 15, dtype=np.int64))
    assert np.all(full[3:] == dec.max_count)


# ---------------------------------------------------------------------------------------------
# streaming
# ---------------------------------------------------------------------------------------------


def _split(rng, n):
    cuts = np.sort(rng.integers(0, n, size=12))
    return np.split(np.arange(n), np.concatenate([[0, 0, 1], cuts]))


def test_blockwise_equals_one_shot(rng):
    dec = CountingDecimator(16, 3)
    x = rng.standard_normal((5000, 2))
    whole, _ = dec.process(x)
    parts, state = [], None
    for idx in _split(rng, x.shape[0]):
        y, state = dec.process(x[idx], state)
        parts.append(y)
    np.testing.assert_array_equal(np.concatenate(parts), whole)
    assert whole.shape[0] == math.ceil(5000 / 16)

    codes = rng.integers(0, 2, size=5000).astype(np.int64)
    whole_c, _ = dec.count(codes)
    parts, regs = [], None
    for idx in _split(rng, codes.size):
        c, regs = dec.count(codes[idx], regs)
        parts.append(c)
    np.testing.assert_array_equal(np.concatenate(parts), whole_c)


def test_counting_downsampler_blockwise_equals_one_shot(rng):
    design = design_counting_downsampler(3_072_000, 44100, length=32, stages=3)
    down = CountingDownsampler(design)
    x = rng.standard_normal(64 * 300)
    whole, _ = down.process(x)
    parts, state = [], None
    for idx in _split(rng, x.size):
        y, state = down.process(x[idx], state)
        parts.append(y)
    np.testing.assert_array_equal(np.concatenate(parts), whole)


def test_counting_downsampler_is_counter_then_clean_decimator(rng):
    fs = 6_144_000
    design = design_counting_downsampler(fs, 48000, length=32, stages=2, passband_hz=20000.0)
    assert design.counted_rate_hz == 192000
    assert design.rest.rate_in_hz == 192000 and design.rest.rate_out_hz == 48000
    f = np.array([0.0, 997.0, 15000.0, 20000.0])
    clean = design_downsampler(192000, 48000, passband_hz=20000.0)
    np.testing.assert_allclose(
        design.response(f),
        counting_response(f, rate_hz=fs, length=32, stages=2) * clean.response(f),
        rtol=1e-12,
    )
    assert design.droop_db == pytest.approx(
        20 * np.log10(abs(counting_response([20000.0], rate_hz=fs, length=32, stages=2)[0]))
    )
    assert design.delay_seconds == pytest.approx(2 * 31 / 2 / fs + clean.delay_seconds)
    x = rng.standard_normal(32 * 400)
    y, _ = CountingDownsampler(design).process(x)
    counted, _ = CountingDecimator(32, 2).process(x)
    from audiodsm.stages.downsample import Downsampler

    np.testing.assert_array_equal(y, Downsampler(clean).process(counted)[0])


def test_bad_parameters_are_refused():
    with pytest.raises(ParameterError, match="length"):
        CountingDecimator(1)
    with pytest.raises(ParameterError, match="stages"):
        CountingDecimator(64, 7)
    with pytest.raises(ParameterError, match="codes"):
        CountingDecimator(4).count(np.array([0, 2]))
    with pytest.raises(ParameterError, match="codes"):
        CountingDecimator(4).count(np.array([0.0, 1.0]))
    with pytest.raises(ParameterError, match="x"):
        CountingDecimator(4).process(np.array([0.0, np.nan]))
    with pytest.raises(ParameterError, match="length"):
        design_counting_downsampler(3_072_000, 48000, length=128)  # 24 kHz < 48 kHz
    with pytest.raises(ParameterError, match="length"):
        design_counting_downsampler(2_822_400, 44100, length=3 * 512)


# ---------------------------------------------------------------------------------------------
# in the chain
# ---------------------------------------------------------------------------------------------


def _counting_profile(**listening):
    table = {"decimator": "counting", **listening}
    return profile_from_dict(
        {"output": {"kind": "pdm"}, "reconstruction": {"kind": "none"}, "listening": table}
    )


def test_profile_keys():
    p = _counting_profile(counting_stages=3, counting_length=32)
    assert (p.listening.decimator, p.listening.counting_stages) == ("counting", 3)
    with pytest.raises(ProfileError, match="listening.counting_stages.*decimator"):
        profile_from_dict({"listening": {"counting_stages": 2}})
    with pytest.raises(ProfileError, match="listening.counting_length"):
        _counting_profile(counting_length=48)
    with pytest.raises(ProfileError, match="listening.decimator"):
        profile_from_dict({"listening": {"decimator": "sinc"}})
    with pytest.raises(ProfileError, match="listening"):
        Chain.from_profile(_counting_profile(counting_length=128), 48000, 1)


def test_chain_listening_output_is_the_calibrated_count():
    # PDM with no analog filter: what reaches the decimator is the stream itself, so the
    # listening output is the count of each window in full-scale units, calibrated.
    prof = _counting_profile(counting_stages=2, counting_length=64)
    chain = Chain.from_profile(prof, 48000, 1)
    t = np.arange(4800) / 48000
    x = 0.5 * np.sin(2 * np.pi * 997 * t)
    block, _ = chain.process(x, keep=("listening", "modulator"))
    bits = block.modulator[:, 0]
    codes = ((bits + 1) / 2).astype(np.int64)
    dec = CountingDecimator(64, 2)
    counts, _ = dec.count(codes)
    volts = prof.output.full_scale_volts
    counted = volts * (2.0 * counts / 64**2 - 1.0)
    # from output K on (before that the float path's history is silence, level 0, while the
    # cleared registers hold code 0)
    want = (counted - chain._listening_offset) / chain.gain
    np.testing.assert_allclose(block.listening[2:, 0], want[2:], rtol=0, atol=1e-12)


@pytest.mark.parametrize("freq_hz", [997.0, 15000.0])
def test_chain_level_shows_the_droop(freq_hz):
    # calibrated at 997 Hz; a 15 kHz tone comes out lower by the sinc^K droop between them
    # (Hogenauer's closed form, as above), within 0.02 dB (the loop's STF and the noise)
    prof = _counting_profile(counting_stages=3, counting_length=64)
    rate = 48000
    t = np.arange(rate // 2) / rate
    x = 10 ** (-6 / 20) * np.sin(2 * np.pi * freq_hz * t)
    res = run_chain(prof, x, rate_hz=rate)
    fit = fit_sine(
        res.listening[2400:, 0], rate_hz=rate, frequency_hz=freq_hz, four_parameter=False
    )
    fs = rate * prof.upsampler.osr

    def closed(f):
        return abs(math.sin(math.pi * f * 64 / fs) / (64 * math.sin(math.pi * f / fs))) ** 3

    want_db = -6.0 + 20 * math.log10(closed(freq_hz) / closed(997.0))
    got_db = 20 * math.log10(fit.amplitude)
    assert got_db == pytest.approx(want_db, abs=0.02)
    # the counting stage's delay, K (N - 1) / 2 = 94.5 modulator clocks (1.5 listening
    # samples), is in the chain's latency: the output lines up with the input within the
    # chain's rounding to a whole listening sample
    lag = (2 * np.pi * freq_hz * 2400 / rate - np.pi / 2) - fit.phase_rad
    lag = (lag + np.pi) % (2 * np.pi) - np.pi
    assert abs(lag / (2 * np.pi * freq_hz) * rate) <= 0.6


def test_half_band_profile_is_unchanged():
    base = profile_from_dict({})
    assert base.listening.decimator == "half-band"
    chain = Chain.from_profile(base, 48000, 1)
    assert isinstance(chain.downsampler_design, DownsamplerDesign)
    assert len(chain.downsampler_design.halfband_taps) == 6  # 3.072 MHz -> 48 kHz
