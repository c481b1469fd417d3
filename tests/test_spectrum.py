"""Tests for audiodsm.measure.spectrum: dBFS levels and the averaged spectrum."""

import math

import librosa
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from audiodsm.errors import ParameterError
from audiodsm.measure.spectrum import (
    accumulate_spectrum,
    averaged_spectrum,
    level_dbfs,
    power_to_dbfs,
)

RATE = 48000.0


def _sine(freq, n, amp=1.0, rate=RATE, phase=0.0):
    return amp * np.sin(2 * np.pi * freq * np.arange(n) / rate + phase)


# --- levels ----------------------------------------------------------------------------------


def test_full_scale_sine_reads_0_dbfs():
    # AES17-2015 (definition of dBFS): a sine whose peak reaches full scale is 0 dBFS.
    # 997 whole cycles in 48000 samples, so the mean square is exactly 1/2 up to rounding.
    x = _sine(997.0, 48000)
    assert level_dbfs(x) == pytest.approx(0.0, abs=1e-9)


def test_full_scale_square_reads_plus_3_01_dbfs():
    # AES17-2015: a full-scale square wave reads +3.01 dBFS, i.e. 10*log10(2) (rms 1 vs 1/sqrt 2).
    x = np.where(np.arange(48000) % 96 < 48, 1.0, -1.0)
    assert level_dbfs(x) == pytest.approx(10 * math.log10(2.0), abs=1e-12)
    assert round(level_dbfs(x), 2) == 3.01


def test_level_per_channel_and_silence():
    x = np.column_stack([_sine(997.0, 48000, amp=0.1), np.zeros(48000)])
    out = level_dbfs(x)
    assert out.shape == (2,)
    assert out[0] == pytest.approx(-20.0, abs=1e-9)  # 20*log10(0.1)
    assert out[1] == -math.inf


def test_level_rejects_bad_input():
    with pytest.raises(ParameterError, match="x="):
        level_dbfs(np.array([0.0, np.nan]))
    with pytest.raises(ParameterError):
        level_dbfs(np.zeros((2, 2, 2)))


# --- spectrum scaling ----------------------------------------------------------------------------


@pytest.mark.parametrize("window", ["blackmanharris", "hann", "flattop", ("kaiser", 20.0)])
def test_spectrum_matches_scipy_welch(rng, window):
    # scipy.signal.welch (density scaling, same window, 50 % overlap, constant detrend) times
    # the bin spacing is our per-bin power; only rounding may differ.
    x = rng.standard_normal(20000) * 0.01 + _sine(1234.5, 20000, 0.3)
    spec = averaged_spectrum(x, rate_hz=RATE, resolution_hz=RATE / 2048, window=window)
    f, p = signal.welch(x, RATE, window=window, nperseg=2048, noverlap=1024)
    assert spec.segment_frames == 2048
    assert spec.n_averages == 1 + (20000 - 2048) // 1024
    np.testing.assert_allclose(spec.freq_hz, f, rtol=0, atol=1e-9)
    np.testing.assert_allclose(spec.power, p * RATE / 2048, rtol=1e-9, atol=1e-25)


def test_enbw_matches_harris_formula():
    # Harris (Proc. IEEE 1978), ENBW = N sum(w^2) / (sum w)^2 bins; 2.00 bins for the 4-term
    # -92 dB Blackman-Harris window and 1.50 bins for Hann (both from the paper's table 1).
    spec = averaged_spectrum(np.zeros(8192), rate_hz=RATE, resolution_hz=RATE / 4096)
    assert spec.enbw_hz / spec.resolution_hz == pytest.approx(2.00, abs=0.01)
    spec = averaged_spectrum(np.zeros(8192), rate_hz=RATE, resolution_hz=RATE / 4096, window="hann")
    assert spec.enbw_hz / spec.resolution_hz == pytest.approx(1.50, abs=1e-9)


def test_parseval_single_segment():
    # Parseval's theorem: summed over all one-sided bins, one segment's power equals
    # sum((x w)^2) / sum(w^2) exactly (no detrend), whatever x is.
    x = np.random.default_rng(5).standard_normal(4096)
    spec = averaged_spectrum(x, rate_hz=RATE, resolution_hz=RATE / 4096, detrend=False)
    w = signal.get_window("blackmanharris", 4096)
    assert spec.n_averages == 1
    assert spec.power.sum() == pytest.approx(np.sum((x * w) ** 2) / np.sum(w * w), rel=1e-12)


@pytest.mark.parametrize("freq", [997.0, 1000.0 + 0.37 * RATE / 8192, 15111.1])
@pytest.mark.parametrize("level", [0.0, -20.0, -60.0])
def test_tone_reads_its_level(freq, level):
    # AES17 dBFS: a sine of peak 10^(L/20) is L dBFS. The main lobe of the 4-term
    # Blackman-Harris window holds all but ~1e-9 of the power (side lobes below -92 dB),
    # so 0.001 dB is ample, on or off a bin centre.
    x = _sine(freq, 65536, amp=10 ** (level / 20), phase=0.4)
    spec = averaged_spectrum(x, rate_hz=RATE, resolution_hz=RATE / 8192)
    assert spec.tone_dbfs(freq) == pytest.approx(level, abs=1e-3)


def test_bin_centred_tone_peak_scaling():
    # Harris (Proc. IEEE 1978), ENBW: for a tone exactly on a bin, the peak bin of a
    # density-scaled periodogram is the tone power divided by the ENBW in bins, so the
    # ENBW-scaled peak reads the tone level (to rounding).
    f = 96 * RATE / 4096
    x = _sine(f, 4096 * 8, amp=0.5)
    spec = averaged_spectrum(x, rate_hz=RATE, resolution_hz=RATE / 4096)
    assert spec.tone_scaled_dbfs()[96] == pytest.approx(20 * math.log10(0.5), abs=1e-9)


def test_band_noise_of_white_noise(rng):
    # White noise of variance s^2 has a flat one-sided density 2 s^2 / rate, so the band
    # [lo, hi] holds s^2 (hi - lo) / (rate / 2). With 2048-point segments and ~190
    # averages, each 10 kHz band sums ~430 bins x 190 averages: the estimate's standard
    # deviation is well under 0.05 dB, so 0.1 dB is a safe bound that still catches a
    # scaling slip (ENBW = 3 dB, one-sided factor = 3 dB).
    s = 0.01
    x = rng.standard_normal(200_000) * s
    spec = averaged_spectrum(x, rate_hz=RATE, resolution_hz=RATE / 2048)
    for lo, hi in [(20.0, 20000.0), (1000.0, 11000.0), (21000.0, 24000.0)]:
        expected = power_to_dbfs(s * s * (hi - lo) / (RATE / 2))
        assert spec.band_noise_dbfs(lo, hi) == pytest.approx(expected, abs=0.1)
    # the whole band is the signal's mean square (Parseval), to the same tolerance
    assert spec.band_power(0.0, RATE / 2) == pytest.approx(np.mean(x * x), rel=0.03)


def test_a_weighted_band_noise_matches_integral_of_librosa_curve(rng):
    # The A-weighted noise of white noise is s^2/(rate/2) * integral of |A(f)|^2 over the
    # band; the curve is taken from librosa.A_weighting (an outside implementation of the
    # IEC 61672-1 formula) and integrated by the trapezoid rule on a 1 Hz grid.
    s = 0.01
    x = rng.standard_normal(200_000) * s
    spec = averaged_spectrum(x, rate_hz=RATE, resolution_hz=RATE / 2048)
    f = np.arange(20.0, 20000.0 + 1.0, 1.0)
    gain = 10 ** (librosa.A_weighting(f, min_db=None) / 10)
    expected = power_to_dbfs(s * s * np.trapezoid(gain, f) / (RATE / 2))
    assert spec.band_noise_dbfs(20.0, 20000.0, weighting="a") == pytest.approx(expected, abs=0.1)


def test_partial_bins_at_band_edges():
    # A band covering exactly half of one bin counts half its power.
    spec = averaged_spectrum(np.random.default_rng(1).standard_normal(8192), rate_hz=RATE)
    df = spec.resolution_hz
    k = 100
    half = spec.band_power(spec.freq_hz[k] - df / 2, spec.freq_hz[k])
    assert half == pytest.approx(spec.power[k] / 2, rel=1e-12)


# --- streaming -------------------------------------------------------------------------------


def test_blockwise_accumulation_equals_one_shot_bit_for_bit(rng):
    x = rng.standard_normal(50_000)
    whole = averaged_spectrum(x, rate_hz=RATE, resolution_hz=RATE / 4096)
    state = None
    cuts = [0, 1, 4095, 4097, 13_000, 30_001, 50_000]
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        state = accumulate_spectrum(x[a:b], rate_hz=RATE, state=state, resolution_hz=RATE / 4096)
    part = state.spectrum()
    assert part.n_averages == whole.n_averages
    assert np.array_equal(part.power, whole.power)


def test_spectrum_errors():
    with pytest.raises(ParameterError, match="x="):
        averaged_spectrum(np.zeros(100), rate_hz=RATE, resolution_hz=1.0)
    with pytest.raises(ParameterError, match="window="):
        averaged_spectrum(np.zeros(10000), rate_hz=RATE, window="no-such-window")
    with pytest.raises(ParameterError, match="rate_hz="):
        averaged_spectrum(np.zeros(10000), rate_hz=-1)
    with pytest.raises(ParameterError, match="x="):
        averaged_spectrum(np.zeros((100, 2)), rate_hz=RATE)
    spec = averaged_spectrum(np.zeros(10000), rate_hz=RATE)
    with pytest.raises(ParameterError):
        spec.band_power(5000.0, 100.0)
    with pytest.raises(ParameterError):
        accumulate_spectrum(np.zeros(10), rate_hz=RATE)  # no resolution for streaming
    with pytest.raises(ParameterError, match="x="):
        accumulate_spectrum(np.zeros(10), rate_hz=RATE, segment_frames=1024).spectrum()


def test_any_block_split_gives_the_same_spectrum():
    # property: for random cut points the streamed average is bit-identical to one call
    x = np.random.default_rng(11).standard_normal(9000)
    whole = averaged_spectrum(x, rate_hz=RATE, resolution_hz=RATE / 1024)

    @settings(max_examples=30, deadline=None)
    @given(st.lists(st.integers(0, 9000), max_size=6))
    def check(cuts):
        edges = [0, *sorted(cuts), 9000]
        state = None
        for a, b in zip(edges[:-1], edges[1:], strict=True):
            state = accumulate_spectrum(x[a:b], rate_hz=RATE, state=state, segment_frames=1024)
        assert np.array_equal(state.spectrum().power, whole.power)

    check()
