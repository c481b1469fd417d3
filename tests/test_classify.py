"""Tests for audiodsm.measure.classify.classify_channel (what a channel holds).

The stimuli follow their defining documents: the AES17 997 Hz test tone, the SMPTE RP120
twin tone (60 Hz + 7 kHz, 4:1 amplitude) and the IEC 60268-3 difference-frequency twin tone
(19 kHz + 20 kHz, 1:1) (from memory, as in REFERENCES.md); TPDF dither of 2 LSB peak to peak
(Lipshitz, Wannamaker & Vanderkooy 1992).
"""

from __future__ import annotations

import numpy as np
import pytest

from audiodsm.errors import ParameterError
from audiodsm.measure.classify import classify_channel
from audiodsm.measure.idle_tones import line_spectrum

RATE = 48000
N = 2 * RATE
T = np.arange(N) / RATE
LSB = 2.0**-15


def _tpdf(seed, n=N):
    g = np.random.default_rng(seed)
    return (g.uniform(-0.5, 0.5, n) + g.uniform(-0.5, 0.5, n)) * LSB


def _levels(x, frames=RATE // 4):
    p = x[: x.size // frames * frames].reshape(-1, frames)
    ms = np.mean((p - p.mean(axis=1, keepdims=True)) ** 2, axis=1)
    with np.errstate(divide="ignore"):
        return 10 * np.log10(ms / 0.5)


def _classify(x):
    return classify_channel(line_spectrum(x, rate_hz=RATE), block_levels_dbfs=_levels(x))


@pytest.mark.parametrize("level_dbfs", [-1.0, -60.0])
def test_aes17_tone(level_dbfs):
    x = 10 ** (level_dbfs / 20) * np.sin(2 * np.pi * 997 * T) + _tpdf(1)
    got = _classify(x)
    assert got.kind == "tone"
    # the lobe centroid of a symmetric window: well within one 5.9 Hz bin
    assert got.frequencies_hz[0] == pytest.approx(997.0, abs=0.5)
    # The added TPDF dither (two uniform variates of +-LSB/2, no requantization) has power
    # LSB^2/6 (Lipshitz, Wannamaker & Vanderkooy 1992), white, so the band 20 Hz .. 20 kHz of
    # the 24 kHz Nyquist band holds 19980/24000 of it: -95.9 dBFS. The tone stands that far
    # above it; at -1 dBFS the analysis window's own leakage (about -92 dB) takes over.
    noise_dbfs = 10 * np.log10(LSB**2 / 6 / 0.5 * (20000.0 - 20.0) / (RATE / 2))
    if level_dbfs < -20:
        assert got.dominance_db == pytest.approx(level_dbfs - noise_dbfs, abs=0.5)
    else:
        assert level_dbfs - noise_dbfs - 6 < got.dominance_db <= level_dbfs - noise_dbfs + 0.5


def test_tone_with_strong_harmonics_is_still_a_tone():
    x = np.sin(2 * np.pi * 997 * T)
    x = 0.5 * x + 0.05 * x**2 + 0.02 * x**3  # 2nd harmonic about -26 dB, 3rd about -40 dB
    assert _classify(x).kind == "tone"


@pytest.mark.parametrize(
    "f1,a1,f2,a2",
    [(60.0, 0.4, 7000.0, 0.1), (19000.0, 0.25, 20000.0, 0.25)],  # SMPTE 4:1, IEC 1:1
)
def test_twin_tones(f1, a1, f2, a2):
    x = a1 * np.sin(2 * np.pi * f1 * T) + a2 * np.sin(2 * np.pi * f2 * T) + _tpdf(2)
    got = _classify(x)
    assert got.kind == "twin-tone"
    assert sorted(got.frequencies_hz) == pytest.approx(sorted((f1, f2)), abs=0.5)
    # the stronger tone comes first
    assert got.frequencies_hz[0] == pytest.approx(f1 if a1 >= a2 else f2, abs=0.5)


def test_silence_and_digital_zero():
    assert _classify(_tpdf(3)).kind == "silence"
    zero = _classify(np.zeros(N))
    assert zero.kind == "silence" and zero.band_dbfs == -np.inf
    # a small idle tone in dither does not make a "tone": it carries little of the band
    x = _tpdf(4) + 3e-6 * np.sin(2 * np.pi * 1234.0 * T)
    assert _classify(x).kind == "silence"


def test_program_material():
    g = np.random.default_rng(5)
    loud_noise = 0.1 * g.normal(size=N)
    assert _classify(loud_noise).kind == "program"
    # quiet but unsteady: noise bursts switching 20 dB every quarter second
    env = np.repeat(np.where(np.arange(8) % 2, 1.0, 0.1), RATE // 4)
    bursts = 1e-3 * g.normal(size=N) * env
    got = _classify(bursts)
    assert got.kind == "program" and "spread" in got.reason
    # without block levels the same signal would pass as steady (not program): the block
    # levels are what reveal it. (It is not plain "silence" any more: burst-modulated noise
    # is not the stationary Gaussian noise the tone-in-noise false-alarm rate is stated for;
    # its bins spread more than chi-square with 2K degrees of freedom, and a bin near the
    # threshold can be taken for a weak tone. The steadiness test is what rules that out.)
    alone = classify_channel(line_spectrum(bursts, rate_hz=RATE))
    assert alone.kind != "program" and "spread" not in alone.reason


def test_bad_spectrum():
    with pytest.raises(ParameterError, match="band_hz"):
        classify_channel(line_spectrum(_tpdf(6), rate_hz=RATE), band_hz=(30.0, 10.0))


# ---------------------------------------------------------------------------------------------
# A tone in strong noise: the detection threshold comes from the false-alarm rate
# ---------------------------------------------------------------------------------------------

# 4-term Blackman-Harris window: equivalent noise bandwidth 2.0044 bins (Harris, Proc. IEEE
# 66(1), 1978, table 1). The spectrum is scaled so that a sine's main lobe sums to its mean
# square A^2/2, of which a sine centred on a bin puts the share 1/ENBW into that bin (peak
# power gain over noise power gain, Harris 1978), while white noise of variance s^2 puts its
# density times the bin width, s^2 df/(rate/2) = 2 s^2/seg, into every bin. So the peak
# bin over the noise floor is 1 + A^2 seg / (4 s^2 ENBW).
_ENBW_BINS = 2.0044
_SIGMA = 10 ** (-45 / 20) / np.sqrt(2)  # white noise at -45 dBFS over the whole band
_SEG = 8192  # what segment_frames_for picks for 2 s at 48 kHz (5.86 Hz bins)


def _amplitude_for(ratio):
    """Amplitude of a bin-centred sine whose peak bin stands `ratio` over the floor."""
    return np.sqrt((ratio - 1.0) * 4.0 * _SIGMA**2 * _ENBW_BINS / _SEG)


def _noisy(seed, amp=0.0, f_hz=200 * RATE / _SEG):
    g = np.random.default_rng(seed)
    return _SIGMA * g.normal(size=N) + amp * np.sin(2 * np.pi * f_hz * T + g.uniform(0, 6.3))


def test_minus_60_dbfs_tone_in_noisy_pwm_output_is_a_tone():
    # The noise of a PWM stage's output, here white at -45 dBFS (band level -45.8 dBFS),
    # hides a -60 dBFS tone 15 dB under it: the tone does not dominate the band, but it stands
    # about 23 dB above the noise in its 5.9 Hz bin. It is a tone, not silence.
    x = 10 ** (-60 / 20) * np.sin(2 * np.pi * 997.0 * T) + _SIGMA * np.random.default_rng(
        21
    ).normal(size=N)
    got = _classify(x)
    assert got.kind == "tone", got.reason
    assert got.frequencies_hz[0] == pytest.approx(997.0, abs=0.5)
    assert "false-alarm rate of 0.001" in got.reason


def test_tone_detection_at_the_edge_of_the_threshold():
    # The threshold T (power ratio over the local floor) for this spectrum, as the detector
    # derives it from the false-alarm rate.
    from audiodsm.measure.idle_tones import find_idle_tones

    spec = line_spectrum(_noisy(0), rate_hz=RATE)
    assert spec.freq_hz.size == _SEG // 2 + 1  # the resolution the amplitudes assume
    t = 10 ** (find_idle_tones(spec, false_alarm=1e-3).threshold_db / 10)
    # the formula above, checked where the bin's own noise hardly matters: 20 dB over
    heights = [
        find_idle_tones(line_spectrum(_noisy(s, _amplitude_for(100.0)), rate_hz=RATE))
        .tones[0]
        .above_floor_db
        for s in range(10)
    ]
    assert np.mean(heights) == pytest.approx(20.0, abs=0.3)
    above = at = below = 0
    for seed in range(40):
        # 3 dB above the threshold: found (the bin's own noise spreads it by about 1 dB)
        above += _classify(_noisy(100 + seed, _amplitude_for(2.0 * t))).kind == "tone"
        # at the threshold: found about half the time
        at += _classify(_noisy(300 + seed, _amplitude_for(t))).kind == "tone"
        # 3 dB below: a bin must rise 3 dB by chance, which it rarely does
        below += _classify(_noisy(200 + seed, _amplitude_for(0.5 * t))).kind == "tone"
    assert above >= 38
    assert 8 <= at <= 32  # binomial(40, 1/2): 3.2 standard deviations either side
    assert below <= 4


def test_noise_alone_is_called_a_tone_at_the_stated_false_alarm_rate():
    # Steady white Gaussian noise at -45 dBFS, 150 seeds. At a stated rate of 10 % per
    # spectrum the count is binomial with p <= 0.1 (the Sidak bound over bins is
    # conservative, so p is somewhat lower); 0.1 * 150 + 3 sd = 26. At the default 0.1 %,
    # 150 trials expect 0.15 false tones; 2 or more has probability 1 %.
    loose = strict = 0
    for seed in range(150):
        x = _noisy(1000 + seed)
        spec, levels = line_spectrum(x, rate_hz=RATE), _levels(x)
        loose += classify_channel(spec, block_levels_dbfs=levels, false_alarm=0.1).kind == "tone"
        strict += classify_channel(spec, block_levels_dbfs=levels).kind == "tone"
    assert 3 <= loose <= 26
    assert strict <= 1
