"""Tests of the interpolation chain (audiodsm.stages.upsample: design_upsampler, Upsampler)."""

import librosa
import numpy as np
import pytest
from scipy import signal

from audiodsm.errors import ParameterError
from audiodsm.stages.upsample import (
    AUDIO_RATES_HZ,
    OVERSAMPLING_RATIOS,
    Upsampler,
    UpsamplerState,
    design_upsampler,
)

# Common-practice interpolation spec of audio DAC datasheets (the shared REFERENCES.md,
# "Interpolation filters"): passband to 0.4535 fs within +/-0.005 dB, stopband from 0.5465 fs.
PASS_EDGE = 0.4535
STOP_EDGE = 0.5465
RIPPLE_DB = 0.005
ATTEN_DB = 100.0


# ---------------------------------------------------------------------------------------------
# streaming
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("final_stage, halfbands", [("sinc", None), ("hold", 3), ("linear", 2)])
def test_blocks_equal_one_shot_bit_for_bit(rng, final_stage, halfbands):
    design = design_upsampler(44100, 32, final_stage=final_stage, halfband_stages=halfbands)
    up = Upsampler(design)
    x = rng.uniform(-1, 1, size=(3000, 2))
    whole, _ = up.process(x)
    pieces, state, i = [], None, 0
    sizes = rng.integers(0, 700, size=40)
    for size in [0, 1, 1, *sizes]:
        y, state = up.process(x[i : i + size], state)
        pieces.append(y)
        i += size
        if i >= x.shape[0]:
            break
    y, state = up.process(x[i:], state)
    pieces.append(y)
    assert isinstance(state, UpsamplerState)
    assert np.array_equal(np.concatenate(pieces), whole)


def test_mono_shape_and_stereo_channels_independent(rng):
    up = Upsampler(design_upsampler(48000, 16))
    x = rng.uniform(-1, 1, size=500)
    y, _ = up.process(x)
    assert y.shape == (500 * 16,)
    y2, _ = up.process(np.stack([x, -x], axis=1))
    assert y2.shape == (500 * 16, 2)
    assert np.array_equal(y2[:, 0], y)
    assert np.array_equal(y2[:, 1], -y)


# ---------------------------------------------------------------------------------------------
# the spec, measured by FFT
# ---------------------------------------------------------------------------------------------


def _steady_periodic_output(up, x_period, periods=3):
    """Output for the last of several periods of a periodic input (past the transient)."""
    y, _ = up.process(np.tile(x_period, periods))
    n_out = x_period.size * up.design.osr
    return y[-n_out:]


@pytest.mark.parametrize("rate", [44100, 96000])
def test_tones_meet_ripple_and_image_spec(rate):
    # Coherent tones (whole number of periods in the FFT window, rectangular window): the FFT
    # bin gives the exact amplitude of a periodic steady state. Tolerance: the spec itself
    # (+/-0.005 dB, >= 100 dB) - the design has margin, rounding noise is near -300 dB.
    osr = 32
    up = Upsampler(design_upsampler(rate, osr))
    n_in = 1024
    bins = [1, 37, 151, 300, 401, 440, int(PASS_EDGE * n_in)]
    for k in bins:
        x = 0.9 * np.cos(2 * np.pi * k * np.arange(n_in) / n_in)
        y = _steady_periodic_output(up, x)
        spec = np.abs(np.fft.rfft(y)) / (y.size / 2)
        gain_db = 20 * np.log10(spec[k] / 0.9)
        assert abs(gain_db) <= RIPPLE_DB, (k, gain_db)
        others = np.delete(spec, k)
        freqs = np.delete(np.arange(spec.size), k) / n_in  # in units of the input rate
        images = others[freqs >= STOP_EDGE]
        assert 20 * np.log10(images.max() / 0.9) <= -ATTEN_DB, k


def test_white_noise_response_meets_spec_and_matches_design(rng):
    # A periodic white-noise input makes the output's DFT the exact product of the chain's
    # response with the zero-stuffed input's DFT (circular convolution theorem, Oppenheim &
    # Schafer, "Discrete-Time Signal Processing", 3rd ed., sec. 8.6.5), so every bin gives
    # H(f) = Y[k] / U[k] without estimator variance.
    osr = 64
    design = design_upsampler(48000, osr)
    up = Upsampler(design)
    n_in = 2048
    x = rng.standard_normal(n_in)
    y = _steady_periodic_output(up, x)
    big_y = np.fft.rfft(y)
    # DFT of the zero-stuffed input repeats X with period n_in; the chain's gain of 1 means
    # unity relative to the input, i.e. osr relative to the zero-stuffed signal
    big_u = osr * np.fft.fft(x)
    k = np.arange(big_y.size)
    h = big_y / big_u[k % n_in]
    f = k / n_in  # in units of the input rate
    mag_db = 20 * np.log10(np.maximum(np.abs(h), 1e-300))
    assert np.max(np.abs(mag_db[f <= PASS_EDGE])) <= RIPPLE_DB
    assert np.max(mag_db[f >= STOP_EDGE]) <= -ATTEN_DB
    # the reported composite response is what the streaming object does; tolerance covers
    # rounding of the division by |U| in bins where |U| is small
    expected = design.response(f * 48000)
    keep = np.abs(big_u[k % n_in]) > 1e-3 * np.abs(big_u).max()
    rel = np.abs(h[keep] - expected[keep]) / np.maximum(np.abs(expected[keep]), 1e-6)
    assert np.max(rel[np.abs(expected[keep]) > 1e-3]) < 1e-9


def test_passband_agrees_with_scipy_resample_poly(rng):
    # Reference: scipy.signal.resample_poly with a long Kaiser-window filter (beta 14,
    # about 140 dB, half-length 80 input samples), flat to about 1e-6 dB below 0.4 fs.
    # resample_poly removes its own delay; ours has delay_output_samples, so the complex tone
    # amplitudes must agree after multiplying by exp(2j pi f delay). Tolerance: our ripple
    # spec (0.005 dB, 5.8e-4 relative) plus the reference's own ripple.
    rate, osr = 48000, 16
    design = design_upsampler(rate, osr)
    up = Upsampler(design)
    n_in = 4096
    bins = np.array([3, 100, 517, 1021, 1500, 1637])  # band-limited multitone below 0.4 fs
    phases = rng.uniform(0, 2 * np.pi, bins.size)
    t = np.arange(n_in)
    x = sum(0.15 * np.cos(2 * np.pi * b * t / n_in + p) for b, p in zip(bins, phases, strict=True))
    ours = _steady_periodic_output(up, x)
    # the same design resample_poly makes by default (firwin, cutoff at the input Nyquist
    # frequency), only longer: 80 zero crossings a side instead of 10
    half_len = 80 * osr
    fir = signal.firwin(2 * half_len + 1, 1.0 / osr, window=("kaiser", 14.0))
    ref = signal.resample_poly(np.tile(x, 3), osr, 1, window=fir)
    ref = ref[n_in * osr : 2 * n_in * osr]  # middle period: no edge effects
    a_ours = np.fft.rfft(ours)[bins]
    a_ref = np.fft.rfft(ref)[bins]
    delay = design.delay_output_samples
    a_ours = a_ours * np.exp(2j * np.pi * bins * delay / (n_in * osr))
    ratio = a_ours / a_ref
    assert np.max(np.abs(20 * np.log10(np.abs(ratio)))) < 0.006
    assert np.max(np.abs(np.angle(ratio))) < 1e-3


def test_passband_agrees_with_soxr_through_librosa(rng):
    # Second reference: librosa.resample with the soxr "very high quality" resampler, which
    # is linear phase and removes its own delay. Its passband ripple is far below ours (from
    # memory: well under 0.001 dB to about 0.45 fs), so the tolerance is our +/-0.005 dB spec
    # plus a little; tones up to 0.44 fs.
    rate, osr = 48000, 16
    design = design_upsampler(rate, osr)
    up = Upsampler(design)
    n_in = 4096
    bins = np.array([3, 100, 517, 1021, 1500, 1637, 1800])
    phases = rng.uniform(0, 2 * np.pi, bins.size)
    t = np.arange(n_in)
    x = sum(0.15 * np.cos(2 * np.pi * b * t / n_in + p) for b, p in zip(bins, phases, strict=True))
    ours = _steady_periodic_output(up, x)
    ref = librosa.resample(np.tile(x, 3), orig_sr=rate, target_sr=rate * osr, res_type="soxr_vhq")
    ref = ref[n_in * osr : 2 * n_in * osr]  # middle period: no edge effects
    shift = np.exp(2j * np.pi * bins * design.delay_output_samples / (n_in * osr))
    ratio = np.fft.rfft(ours)[bins] * shift / np.fft.rfft(ref)[bins]
    assert np.max(np.abs(20 * np.log10(np.abs(ratio)))) < 0.006
    assert np.max(np.abs(np.angle(ratio))) < 1e-3


def test_group_delay_is_the_impulse_response_centre():
    # Every stage is a symmetric (linear-phase) FIR, so the chain's impulse response is
    # symmetric about its group delay (Oppenheim & Schafer, sec. 5.7.3).
    design = design_upsampler(48000, 32)
    up = Upsampler(design)
    x = np.zeros(200)
    x[0] = 1.0
    h, _ = up.process(x)
    nz = np.nonzero(np.abs(h) > 0)[0]
    first, last = nz[0], nz[-1]
    assert (first + last) / 2 == pytest.approx(design.delay_output_samples, abs=1e-9)
    assert np.allclose(h[first : last + 1], h[first : last + 1][::-1], atol=1e-15)
    assert design.delay_input_samples == pytest.approx(design.delay_output_samples / 32)


@pytest.mark.parametrize("osr", OVERSAMPLING_RATIOS)
def test_every_osr_meets_the_spec(osr):
    design = design_upsampler(48000, osr)
    assert design.meets_spec
    assert design.passband_deviation_db <= RIPPLE_DB
    assert design.image_rejection_db >= ATTEN_DB
    assert design.output_rate_hz == 48000 * osr
    assert design.final_ratio >= 2 and 2 ** len(design.halfband_taps) * design.final_ratio == osr


@pytest.mark.parametrize("kind, order", [("hold", 1), ("linear", 2)])
def test_final_stage_droop_and_images_follow_the_sinc_law(kind, order):
    # A hold of R samples is a length-R moving average: |H(f)| = |sin(pi f R / Fo) /
    # (R sin(pi f / Fo))| (Crochiere & Rabiner 1983, sec. 2.3; Hogenauer 1981, eq. 8);
    # linear interpolation is its square.
    rate, osr, h = 48000, 64, 3
    design = design_upsampler(rate, osr, final_stage=kind, halfband_stages=h)
    ratio = osr // 2**h
    fo = osr * rate

    def law(f):
        return np.abs(np.sin(np.pi * f * ratio / fo) / (ratio * np.sin(np.pi * f / fo))) ** order

    assert design.final_droop_db == pytest.approx(20 * np.log10(law(PASS_EDGE * rate)), abs=1e-9)
    # worst image of the passband around m * 8 * rate is at its inner edge (nearest f)
    for m, level in enumerate(design.final_image_levels_db, start=1):
        f = np.linspace(m * 8 * rate - PASS_EDGE * rate, m * 8 * rate + PASS_EDGE * rate, 4001)
        f = f[f <= fo / 2]
        assert level == pytest.approx(20 * np.log10(law(f).max()), abs=0.01)
    # an explicit stage count accepts the hold's images; the design says so
    assert not design.meets_spec
    assert design.image_rejection_db < ATTEN_DB


@pytest.mark.parametrize("kind", ["hold", "linear"])
def test_final_stage_short_of_the_spec_warns_and_does_its_best(kind):
    # a hold cannot reach 100 dB image rejection at any stage count (sinc law above: about
    # -25 dB at the nearest image for 8 fs); the design warns and keeps the best count
    with pytest.warns(RuntimeWarning, match="image rejection"):
        d = design_upsampler(48000, 64, final_stage=kind)
    assert not d.meets_spec
    options = [
        design_upsampler(48000, 64, final_stage=kind, halfband_stages=h) for h in range(1, 6)
    ]
    assert d.image_rejection_db == max(o.image_rejection_db for o in options)


def test_all_audio_rates_share_the_normalised_design():
    base = design_upsampler(48000, 64)
    for rate in AUDIO_RATES_HZ:
        d = design_upsampler(rate, 64)
        assert d.output_rate_hz == rate * 64
        assert all(
            np.array_equal(a, b) for a, b in zip(d.halfband_taps, base.halfband_taps, strict=True)
        )


def test_multiplies_per_sample_counts_the_kernels_work():
    # first principles: a half-band with K pairs costs K multiplies per input sample of its
    # stage, the compensator its length at 2 fs, the final polyphase stage its nonzero taps
    # once per final-stage input sample.
    d = design_upsampler(48000, 64)
    expect = 0
    for j, h in enumerate(d.halfband_taps, start=1):
        expect += (h.size + 1) // 4 * 2 ** (j - 1)
    expect += d.compensator_taps.size * 2 if d.compensator_taps.size > 1 else 0
    expect += np.count_nonzero(d.final_taps) * 2 ** len(d.halfband_taps)
    assert d.multiplies_per_input_sample == expect


# ---------------------------------------------------------------------------------------------
# bad input
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("rate", [32000, 8000, 48000.5, "48k", None])
def test_bad_rate(rate):
    with pytest.raises(ParameterError, match="rate_hz"):
        design_upsampler(rate, 64)


@pytest.mark.parametrize("osr", [8, 48, 1024, 64.0, True, 0])
def test_bad_osr(osr):
    with pytest.raises(ParameterError, match=r"osr=.*16, 32, 64, 128, 256, 512"):
        design_upsampler(48000, osr)


@pytest.mark.parametrize(
    "kwargs, name",
    [
        ({"final_stage": "cubic"}, "final_stage"),
        ({"final_stage": "linear", "sinc_order": 3}, "sinc_order"),
        ({"sinc_order": 12}, "sinc_order"),
        ({"halfband_stages": 6}, "halfband_stages"),
        ({"halfband_stages": 0}, "halfband_stages"),
        ({"passband_edge": 0.5}, "passband_edge"),
        ({"stopband_edge": 0.45}, "stopband_edge"),
        ({"passband_ripple_db": 0.0}, "passband_ripple_db"),
        ({"stopband_atten_db": 400.0}, "stopband_atten_db"),
    ],
)
def test_bad_design_options(kwargs, name):
    with pytest.raises(ParameterError, match=name):
        design_upsampler(48000, 64, **kwargs)


def test_bad_signals_and_state(rng):
    up = Upsampler(design_upsampler(48000, 16))
    with pytest.raises(ParameterError, match="finite"):
        up.process(np.array([0.0, np.nan]))
    with pytest.raises(ParameterError, match=r"shape \(n,\) or \(n, channels\)"):
        up.process(np.zeros((4, 2, 2)))
    _, state = up.process(np.zeros((10, 2)))
    with pytest.raises(ParameterError, match="state"):
        up.process(np.zeros((10, 3)), state)
    with pytest.raises(ParameterError, match="design"):
        Upsampler("not a design")
