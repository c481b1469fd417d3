"""Tests for ``audiodsm analyze`` (CliRunner) and the streamed channel analysis behind it.

Expected values are computed here from outside sources:
* AES17 (dBFS: a sine of peak A reads 20*log10(A) dBFS; THD+N ratio = band-limited residual
  over band-limited total; dynamic range from a -60 dBFS 997 Hz tone);
* trigonometric identities for y = x + a2 x^2 + a3 x^3 with x = A cos(wt):
  x^2 = A^2/2 (1 + cos 2wt), x^3 = A^3/4 (3 cos wt + cos 3wt);
* Lipshitz, Wannamaker & Vanderkooy, JAES 40(5) 1992: TPDF dither of 2 LSB peak to peak
  gives a total error power of Delta^2/4, white;
* the A-weighting curve of IEC 61672-1 as implemented by ``librosa.A_weighting`` (an outside
  implementation), integrated over the band.
"""

from __future__ import annotations

import json
import re

import librosa
import numpy as np
import pytest
import soundfile as sf
from click.testing import CliRunner

from audiodsm.cli import main
from audiodsm.measure.channel_analysis import analyze_blocks

RATE = 48000
KEYS = {
    "channel",
    "signal",
    "fundamental_hz",
    "level_dbfs",
    "thd_n_db",
    "thd_n_db_a",
    "thd_db",
    "noise_dbfs",
    "noise_dbfs_a",
    "noise_dbfs_ccir",
    "dynamic_range_db",
    "dynamic_range_db_a",
    "tones",
    "peak_dbfs",
    "over_full_scale",
    "span_s",
    "span_source",
    "notes",
}


def _tpdf(n, lsb, seed):
    g = np.random.default_rng(seed)
    return (g.uniform(-0.5, 0.5, n) + g.uniform(-0.5, 0.5, n)) * lsb


def _band_fraction(rate, lo=20.0, hi=20000.0):
    """Share of white noise power inside the band (flat one-sided density over 0..rate/2)."""
    return (hi - lo) / (rate / 2)


def _a_fraction(rate, lo=20.0, hi=20000.0):
    """Share of white noise power passed by band limit plus A-weighting (IEC 61672-1 curve as
    librosa implements it, integrated on a 0.5 Hz grid: the curve is smooth, so the trapezoid
    error is far below 0.01 dB)."""
    f = np.arange(lo, hi + 0.25, 0.5)
    gain = 10 ** (librosa.A_weighting(f, min_db=None) / 10)
    return np.trapezoid(gain, f) / (rate / 2)


def _bs468_gain(f):
    """ITU-R BS.468-4 analytic response R(f) (the recommendation's closed form; coefficients
    from memory, checked here: 468 weighting 18.2 + 20 log10 R(f) gives 0.0 dB at 1 kHz and
    +12.2 dB at 6.3 kHz as the recommendation's table does)."""
    h1 = -4.737338981378384e-24 * f**6 + 2.043828333606125e-15 * f**4
    h1 = h1 - 1.363894795463638e-7 * f**2 + 1
    h2 = 1.306612257412824e-19 * f**5 - 2.118150887518656e-11 * f**3
    h2 = h2 + 5.559488023498642e-4 * f
    return 1.246332637532143e-4 * f / np.hypot(h1, h2)


def _ccir_fraction(rate, lo=20.0, hi=20000.0):
    """Share of white noise power passed by band limit plus CCIR-RMS weighting (AES17: the
    468 curve normalised to 0 dB at 2 kHz, rms detector), integrated on a 0.5 Hz grid."""
    f = np.arange(lo, hi + 0.25, 0.5)
    gain = (_bs468_gain(f) / _bs468_gain(np.array(2000.0))) ** 2
    return np.trapezoid(gain, f) / (rate / 2)


def test_bs468_formula_matches_its_table():
    # ITU-R BS.468-4 table (from memory): 0.0 dB at 1 kHz, +12.2 dB at 6.3 kHz, -29.9 dB at
    # 31.5 Hz; tolerance 0.1 dB (the table's rounding plus its stated tolerance at the peak).
    db = 18.2 + 20 * np.log10(_bs468_gain(np.array([1000.0, 6300.0, 31.5])))
    np.testing.assert_allclose(db, [0.0, 12.2, -29.9], atol=0.1)


def _run(*args):
    runner = CliRunner()
    return runner.invoke(main, ["analyze", *map(str, args)])


def _json_lines(output):
    lines = [line for line in output.splitlines() if line.strip()]
    return [json.loads(line) for line in lines]


def test_known_distorted_tone_json(tmp_path):
    # x = A cos(wt) through y = x + a2 x^2 + a3 x^3, plus white Gaussian noise, in a float
    # file (no quantization): every number follows from the identities above.
    n, amp, a2, a3, sigma = 2 * RATE, 10 ** (-1 / 20), 1e-3, 2e-3, 1e-6
    t = np.arange(n) / RATE
    x = amp * np.cos(2 * np.pi * 997.0 * t + 0.4)
    y = x + a2 * x**2 + a3 * x**3 + np.random.default_rng(9).normal(0, sigma, n)
    path = tmp_path / "tone.wav"
    sf.write(str(path), y, RATE, subtype="DOUBLE")
    result = _run("--json", path)
    assert result.exit_code == 0, result.output
    (obj,) = _json_lines(result.stdout)
    assert set(obj) == {"file", "sample_rate_hz", "channels", "measurement_s"}
    assert obj["file"] == str(path) and obj["sample_rate_hz"] == RATE
    assert obj["measurement_s"] > 0
    (ch,) = obj["channels"]
    assert set(ch) == KEYS
    assert ch["signal"] == "tone" and ch["channel"] == 1

    fund = amp + 0.75 * a3 * amp**3
    h2, h3 = a2 * amp**2 / 2, a3 * amp**3 / 4
    # frequency: a 4-parameter fit at 120 dB SNR is accurate to micro-hertz; JSON keeps 1e-6
    assert ch["fundamental_hz"] == pytest.approx(997.0, abs=1e-5)
    # AES17 dBFS of the fitted fundamental; only noise limits it (1e-3 dB is generous)
    assert ch["level_dbfs"] == pytest.approx(20 * np.log10(fund), abs=1e-3)
    # THD within 0.05 dB (issue 3), harmonics 2 and 3 from the identities
    thd = 20 * np.log10(np.hypot(h2, h3) / fund)
    assert ch["thd_db"] == pytest.approx(thd, abs=0.05)
    # residual = harmonics + band-limited noise; total = fundamental + residual (AES17)
    noise_ms = sigma**2 * _band_fraction(RATE)
    resid_ms = (h2**2 + h3**2) / 2 + noise_ms
    total_ms = fund**2 / 2 + resid_ms
    assert ch["noise_dbfs"] == pytest.approx(10 * np.log10(resid_ms / 0.5), abs=0.05)
    assert ch["thd_n_db"] == pytest.approx(10 * np.log10(resid_ms / total_ms), abs=0.05)
    # A-weighted: each harmonic scaled by the A curve at its frequency (librosa), plus the
    # A-weighted noise; the digital A filter is class-1 accurate, so 0.1 dB
    ga = 10 ** (librosa.A_weighting(np.array([1994.0, 2991.0]), min_db=None) / 10)
    resid_a = (ga[0] * h2**2 + ga[1] * h3**2) / 2 + sigma**2 * _a_fraction(RATE)
    assert ch["noise_dbfs_a"] == pytest.approx(10 * np.log10(resid_a / 0.5), abs=0.1)
    assert ch["thd_n_db_a"] == pytest.approx(10 * np.log10(resid_a / total_ms), abs=0.1)
    assert ch["dynamic_range_db"] is None and ch["dynamic_range_db_a"] is None
    # the harmonics stand out of the residual as lines, at their frequencies and levels
    lines = {round(tone["frequency_hz"]): tone["level_dbfs"] for tone in ch["tones"]}
    assert set(lines) == {1994, 2991}
    assert lines[1994] == pytest.approx(20 * np.log10(h2), abs=0.1)
    assert lines[2991] == pytest.approx(20 * np.log10(h3), abs=0.1)


def test_dynamic_range_of_ideal_16_bit_channel(tmp_path):
    # A 16-bit TPDF-dithered -60 dBFS 997 Hz tone (issue 3): the noise is Delta^2/4 (LWV 1992)
    # with Delta = 2^-15, white over 0..24 kHz; DR = minus the band-limited (weighted) noise
    # in dBFS, within 0.3 dB (issue 3; the extra is for the fundamental removal).
    n, lsb = 3 * RATE, 2.0**-15
    t = np.arange(n) / RATE
    tone = 10 ** (-60 / 20) * np.sin(2 * np.pi * 997.0 * t)
    x = np.round((tone + _tpdf(n, lsb, 3)) / lsb) * lsb
    path = tmp_path / "dr.flac"
    sf.write(str(path), x, RATE, subtype="PCM_16")
    result = _run("--json", path)
    assert result.exit_code == 0, result.output
    (ch,) = _json_lines(result.stdout)[0]["channels"]
    ms = lsb**2 / 4
    dr = -10 * np.log10(ms * _band_fraction(RATE) / 0.5)
    dr_a = -10 * np.log10(ms * _a_fraction(RATE) / 0.5)
    assert ch["signal"] == "tone"
    assert ch["level_dbfs"] == pytest.approx(-60.0, abs=0.05)
    assert ch["dynamic_range_db"] == pytest.approx(dr, abs=0.3)
    assert ch["dynamic_range_db_a"] == pytest.approx(dr_a, abs=0.3)
    # the same channel's CCIR-RMS noise against the 468 curve integrated over the band
    ccir = 10 * np.log10(ms * _ccir_fraction(RATE) / 0.5)
    assert ch["noise_dbfs_ccir"] == pytest.approx(ccir, abs=0.3)
    assert ch["dynamic_range_db"] == -ch["noise_dbfs"]
    assert ch["tones"] == []  # dithered: no spurious lines


def test_silence_with_idle_tone_and_twin_tone(tmp_path):
    # Channel 1: 24-bit TPDF-dithered silence with a -125 dBFS line at 1500 Hz (an idle tone).
    # Channel 2: SMPTE RP120 twin tone, 60 Hz + 7 kHz at 4:1, 16-bit dithered.
    n = 2 * RATE
    t = np.arange(n) / RATE
    lsb24, lsb16 = 2.0**-23, 2.0**-15
    line_amp = 10 ** (-125 / 20)
    idle = np.round((line_amp * np.sin(2 * np.pi * 1500.0 * t) + _tpdf(n, lsb24, 4)) / lsb24)
    twin = 0.4 * np.sin(2 * np.pi * 60.0 * t) + 0.1 * np.sin(2 * np.pi * 7000.0 * t)
    twin = np.round((twin + _tpdf(n, lsb16, 5)) / lsb16) * lsb16
    path = tmp_path / "mixed.aiff"
    sf.write(str(path), np.stack([idle * lsb24, twin], axis=1), RATE, subtype="PCM_24")
    result = _run("--json", path)
    assert result.exit_code == 0, result.output
    silent, pair = _json_lines(result.stdout)[0]["channels"]

    assert silent["signal"] == "silence"
    assert silent["level_dbfs"] is None and silent["thd_n_db"] is None
    assert silent["dynamic_range_db"] is None
    # noise: 24-bit TPDF (LWV 1992) plus the line itself, band-limited
    noise_ms = lsb24**2 / 4 * _band_fraction(RATE) + line_amp**2 / 2
    assert silent["noise_dbfs"] == pytest.approx(10 * np.log10(noise_ms / 0.5), abs=0.3)
    (line,) = silent["tones"]
    assert line["frequency_hz"] == pytest.approx(1500.0, abs=0.5)
    assert line["level_dbfs"] == pytest.approx(-125.0, abs=0.3)

    assert pair["signal"] == "twin-tone"
    assert pair["fundamental_hz"] is None and pair["thd_db"] is None
    # combined level (AES17 rms convention): (0.4^2 + 0.1^2)/2 relative to 0.5
    assert pair["level_dbfs"] == pytest.approx(10 * np.log10(0.4**2 + 0.1**2), abs=0.02)
    # both tones removed: the residual is the 16-bit dither noise
    expected = 10 * np.log10(lsb16**2 / 4 * _band_fraction(RATE) / 0.5)
    assert pair["noise_dbfs"] == pytest.approx(expected, abs=0.3)
    assert pair["tones"] == []


def test_table_is_aligned_with_units(tmp_path):
    n = RATE
    t = np.arange(n) / RATE
    x = np.stack([0.5 * np.sin(2 * np.pi * 997.0 * t), np.zeros(n)], axis=1)
    path = tmp_path / "two.wav"
    sf.write(str(path), x + _tpdf(n, 2.0**-23, 6)[:, None], RATE, subtype="FLOAT")
    result = _run(path)
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert str(path) in lines[0] and "measured in" in lines[0] and "48000 Hz" in lines[0]
    assert lines[1].split() == ["ch", "1", "ch", "2"]
    rows = {re.split(r"\s{2,}", line)[0]: line for line in lines[2:]}
    assert rows["signal"].split()[-2:] == ["tone", "silence"]
    assert "Hz" in rows["fundamental"] and "dBFS" in rows["level"]
    assert "dB" in rows["THD+N"] and "dBFS" in rows["noise, CCIR-RMS"]
    # every value column ends at the same place in every row (right-aligned)
    ends = {len(line.rstrip()) for line in lines[1:13]}
    assert len(ends) == 1
    level = float(rows["level"].split()[-2])
    assert level == pytest.approx(20 * np.log10(0.5), abs=0.01)


def test_bad_files_exit_code_and_others_still_measured(tmp_path):
    n = RATE
    t = np.arange(n) / RATE
    good = tmp_path / "good.wav"
    sf.write(str(good), 0.25 * np.sin(2 * np.pi * 997.0 * t), RATE, subtype="PCM_24")
    missing = tmp_path / "missing.wav"
    truncated = tmp_path / "cut.wav"
    truncated.write_bytes(good.read_bytes()[:5000])
    nan = tmp_path / "nan.wav"
    z = np.zeros(n)
    z[100] = np.nan
    sf.write(str(nan), z, RATE, subtype="FLOAT")
    low = tmp_path / "low.wav"
    sf.write(str(low), np.zeros(n), 22050, subtype="PCM_16")
    short = tmp_path / "short.wav"
    sf.write(str(short), np.zeros(RATE // 10), RATE, subtype="PCM_16")
    result = _run("--json", missing, truncated, good, nan, low, short)
    assert result.exit_code == 2
    (obj,) = _json_lines(result.stdout)  # stdout holds only the good file's JSON
    assert obj["file"] == str(good) and obj["channels"][0]["signal"] == "tone"
    errors = result.stderr.strip().splitlines()
    assert len(errors) == 5
    for path, words in [
        (missing, "no such file"),
        (truncated, "truncated"),
        (nan, "NaN"),
        (low, "22050 Hz"),
        (short, "too short"),
    ]:
        (line,) = [e for e in errors if str(path) in e]
        assert words in line
    assert _run(good).exit_code == 0


def test_progress_bar_goes_to_stderr_only(tmp_path, monkeypatch):
    import audiodsm.cli.analyze as cli_analyze

    monkeypatch.setattr(cli_analyze, "PROGRESS_MIN_S", 0.5)
    path = tmp_path / "p.wav"
    sf.write(str(path), _tpdf(RATE, 2.0**-15, 7), RATE, subtype="PCM_16")
    result = _run("--json", path)
    assert result.exit_code == 0
    assert "analyzing" in result.stderr
    assert len(_json_lines(result.stdout)) == 1
    quiet = _run("--json", "--no-progress", path)
    assert quiet.stderr == ""


def test_streamed_analysis_does_not_depend_on_block_size():
    # The same signal cut into different blocks gives the same numbers (the meters and
    # spectra carry their state between blocks).
    n = 3 * RATE
    t = np.arange(n) / RATE
    x = np.stack(
        [0.1 * np.sin(2 * np.pi * 997.0 * t), np.zeros(n)], axis=1
    ) + np.random.default_rng(8).normal(0, 1e-5, (n, 2))

    def run(block):
        return analyze_blocks(
            lambda: (x[i : i + block] for i in range(0, n, block)),
            rate_hz=RATE,
            channels=2,
            n_frames=n,
        )

    a, b = run(RATE), run(50000)
    for ca, cb in zip(a, b, strict=True):
        da, db = ca.to_dict(), cb.to_dict()
        assert da["signal"] == db["signal"]
        for key in ("noise_dbfs", "noise_dbfs_a", "noise_dbfs_ccir", "level_dbfs"):
            if da[key] is not None:  # same segments and pieces: equal up to rounding
                assert da[key] == pytest.approx(db[key], abs=1e-9)


def test_spectral_noise_agrees_with_time_domain_meter():
    # analyze reads noise from the residual's averaged spectrum; the time-domain path
    # (audiodsm.measure.tone.thd_plus_noise: fitted fundamental removed, AES17 band-limit
    # filter, digital weighting filters) must agree on the same signal. Tolerance 0.1 dB:
    # the filter's transition band above 20 kHz and the class-1 weighting filters against
    # the ideal band and exact curves (bands.band_mask notes 0.1 dB on white noise).
    from audiodsm.measure.tone import thd_plus_noise

    n = 3 * RATE
    t = np.arange(n) / RATE
    x = 0.7 * np.sin(2 * np.pi * 997.0 * t + 1.0) + np.random.default_rng(12).normal(0, 3e-6, n)
    (ch,) = analyze_blocks(lambda: iter([x[:, None]]), rate_hz=RATE, channels=1, n_frames=n)
    for weighting, ours in (("unweighted", ch.thd_n_db), ("a", ch.thd_n_db_a)):
        ref = thd_plus_noise(x, rate_hz=RATE, weighting=weighting)
        assert ours == pytest.approx(ref.ratio_db, abs=0.1)
    assert ch.level_dbfs == pytest.approx(20 * np.log10(0.7), abs=1e-4)


def test_tone_after_leading_silence(tmp_path):
    # Captured files often start silent. 1.5 s of digital zero, then 3 s of a -20 dBFS tone
    # with 24-bit-level noise: the frequency fit must use a stretch where the tone plays, and
    # the level (median of the piecewise fits, AES17 dBFS) must not be pulled down.
    n0, n1 = int(1.5 * RATE), 3 * RATE
    t = np.arange(n1) / RATE
    amp = 10 ** (-20 / 20)
    tone = amp * np.sin(2 * np.pi * 1234.5 * t) + np.random.default_rng(13).normal(0, 1e-7, n1)
    x = np.concatenate([np.zeros(n0), tone])
    path = tmp_path / "late.wav"
    sf.write(str(path), x, RATE, subtype="FLOAT")
    (ch,) = _json_lines(_run("--json", path).stdout)[0]["channels"]
    assert ch["signal"] == "tone"
    assert ch["fundamental_hz"] == pytest.approx(1234.5, abs=1e-4)
    assert ch["level_dbfs"] == pytest.approx(-20.0, abs=0.01)
    # the same through the block stream (no seeking)
    (same,) = analyze_blocks(
        lambda: (x[i : i + 40000, None] for i in range(0, x.size, 40000)),
        rate_hz=RATE,
        channels=1,
        n_frames=x.size,
    )
    assert same.fundamental_hz == pytest.approx(ch["fundamental_hz"], abs=1e-6)
    assert same.level_dbfs == pytest.approx(ch["level_dbfs"], abs=1e-4)


def test_twin_tone_intermodulation_products_are_listed(tmp_path):
    # SMPTE twin tone (60 Hz + 7 kHz, 4:1) through y = x + a2 x^2. Trigonometric identities:
    # x^2 of A1 cos(w1 t) + A2 cos(w2 t) holds A1 A2 at w2 - w1 and w2 + w1, A1^2/2 at 2 w1 and
    # A2^2/2 at 2 w2 (and DC). So lines at 6940 and 7060 Hz of amplitude a2 A1 A2, at 120 Hz
    # of a2 A1^2 / 2 and at 14 kHz of a2 A2^2 / 2; levels in dBFS are 20 log10(amplitude)
    # (AES17). The line levels are read above the noise floor: 0.1 dB.
    n, a1, a2_amp, a2 = 2 * RATE, 0.4, 0.1, 1e-3
    t = np.arange(n) / RATE
    x = a1 * np.cos(2 * np.pi * 60.0 * t) + a2_amp * np.cos(2 * np.pi * 7000.0 * t + 0.3)
    y = x + a2 * x**2 + np.random.default_rng(14).normal(0, 1e-7, n)
    path = tmp_path / "smpte.wav"
    sf.write(str(path), y, RATE, subtype="DOUBLE")
    (ch,) = _json_lines(_run("--json", path).stdout)[0]["channels"]
    assert ch["signal"] == "twin-tone"
    lines = {round(tone["frequency_hz"]): tone["level_dbfs"] for tone in ch["tones"]}
    expected = {
        6940: a2 * a1 * a2_amp,
        7060: a2 * a1 * a2_amp,
        120: a2 * a1**2 / 2,
        14000: a2 * a2_amp**2 / 2,
    }
    assert set(lines) == set(expected)
    for f, amp in expected.items():
        assert lines[f] == pytest.approx(20 * np.log10(amp), abs=0.1)


def test_noise_of_steeply_shaped_noise_against_ntf_integral():
    # Noise shaped like an ideal 4th-order delta-sigma loop, NTF = (1 - z^-1)^4, at 384 kHz:
    # the in-band power is sigma^2 / (rate/2) * integral over 20 Hz..20 kHz of
    # |2 sin(pi f / rate)|^8 df (Schreier & Temes 2005, the white-noise model of the NTF;
    # the exact curve is integrated here, not the small-angle closed form). The band holds
    # 77 dB less than the whole signal, so window leakage would show (a rectangular window
    # misreads it by several dB). Tolerance 0.2 dB: most of the band power sits in its top
    # few kHz, so 2 s of noise gives a spread of about 0.05 dB; over seeds the reading sits
    # about 0.05 dB low on average.
    from scipy import signal as sig

    rate, order, sigma = 384000, 4, 0.05
    n = 2 * rate
    x = sig.lfilter(np.poly([1.0] * order), [1.0], np.random.default_rng(15).normal(0, sigma, n))
    (ch,) = analyze_blocks(lambda: iter([x[:, None]]), rate_hz=rate, channels=1, n_frames=n)
    f = np.linspace(20.0, 20000.0, 400001)
    band_ms = sigma**2 * np.trapezoid((2 * np.sin(np.pi * f / rate)) ** (2 * order), f) / (rate / 2)
    assert ch.noise_dbfs == pytest.approx(10 * np.log10(band_ms / 0.5), abs=0.2)
    total_dbfs = 10 * np.log10(np.mean(x**2) / 0.5)
    assert total_dbfs - ch.noise_dbfs > 70


def test_pure_float_sine_has_no_lines_and_digital_zero_reads_floor():
    # A synthesized float64 sine leaves only rounding residue (near -250 dBFS) after the fit:
    # no lines are reported, and the noise reads far below any converter. Digital zero and a
    # pure DC offset (outside the 20 Hz band) are silence at the documented -400 dBFS floor.
    n = 2 * RATE
    t = np.arange(n) / RATE
    x = np.stack([0.5 * np.sin(2 * np.pi * 997.0 * t), np.zeros(n), np.full(n, 0.25)], axis=1)
    chans = analyze_blocks(lambda: iter([x]), rate_hz=RATE, channels=3, n_frames=n)
    tone, zero, dc = (c.to_dict() for c in chans)
    assert tone["signal"] == "tone" and tone["tones"] == []
    assert tone["noise_dbfs"] < -200
    assert zero["signal"] == dc["signal"] == "silence"
    assert zero["noise_dbfs"] == dc["noise_dbfs"] == -400.0
    assert json.loads(json.dumps(zero)) == zero  # finite numbers only: valid JSON


# ---------------------------------------------------------------------------------------------
# The settled span, full scale, overflow, warnings
# ---------------------------------------------------------------------------------------------


def _gated_tone(seed, rate=RATE, seconds=3.0, on_s=0.2, off_s=2.8):
    """A -1 dBFS 997 Hz tone switched on and off abruptly inside a file, through a 20 kHz
    low-pass (8th-order elliptic, like a DAC's reconstruction filter: it rings at the
    switching points), then 24-bit TPDF noise: two uniform variates of +-LSB/2 added without
    requantizing, white with power LSB^2/6 (Lipshitz, Wannamaker & Vanderkooy 1992)."""
    from scipy import signal as sig

    n = int(seconds * rate)
    t = np.arange(n) / rate
    gate = (t >= on_s) & (t < off_s)
    x = np.where(gate, 10 ** (-1 / 20) * np.sin(2 * np.pi * 997.0 * (t - on_s)), 0.0)
    sos = sig.ellip(8, 0.01, 100, 20000.0, fs=rate, output="sos")
    return sig.sosfilt(sos, x) + _tpdf(n, 2.0**-23, seed)


def test_settled_span_skips_start_and_end_transients(tmp_path):
    # The gated tone rings where it starts and stops, with silence before and after. By
    # default analyze measures its settled part and reads the THD+N of the clean middle
    # (the same signal cut to 0.5-2.5 s); measured over the whole file the transients and
    # the silence change the figure by several dB (the test would see a wrong span).
    x = _gated_tone(31)
    whole, middle = tmp_path / "gated.wav", tmp_path / "middle.wav"
    sf.write(str(whole), x, RATE, subtype="DOUBLE")
    sf.write(str(middle), x[RATE // 2 : 5 * RATE // 2], RATE, subtype="DOUBLE")
    (settled,) = _json_lines(_run("--json", whole).stdout)[0]["channels"]
    (clean,) = _json_lines(_run("--json", middle).stdout)[0]["channels"]
    (everything,) = _json_lines(_run("--json", "--span", "all", whole).stdout)[0]["channels"]
    assert settled["span_source"] == "settled" and everything["span_source"] == "given"
    start, stop = settled["span_s"]
    assert 0.2 < start < 0.25 and 2.75 < stop < 2.8  # after the onset, before the stop
    assert everything["span_s"] == [0.0, 3.0]
    assert settled["thd_n_db"] == pytest.approx(clean["thd_n_db"], abs=0.1)
    assert settled["thd_db"] == pytest.approx(clean["thd_db"], abs=1.0)
    assert settled["level_dbfs"] == pytest.approx(clean["level_dbfs"], abs=1e-3)
    assert everything["thd_n_db"] > clean["thd_n_db"] + 3.0
    # and both agree with the dither's own level: THD+N = noise / (tone + noise), the
    # noise LSB^2/6 over the band (LWV 1992), the tone as read (the filter's pass-band
    # ripple is 0.01 dB)
    noise_ms = 2.0**-46 / 6 * _band_fraction(RATE)
    tone_ms = 10 ** (clean["level_dbfs"] / 10) / 2
    expected = 10 * np.log10(noise_ms / (tone_ms + noise_ms))
    assert settled["thd_n_db"] == pytest.approx(expected, abs=0.3)


def test_given_span_measures_that_stretch_only(tmp_path):
    x = _gated_tone(32)
    path, middle = tmp_path / "gated.wav", tmp_path / "middle.wav"
    sf.write(str(path), x, RATE, subtype="DOUBLE")
    sf.write(str(middle), x[RATE // 2 : 5 * RATE // 2], RATE, subtype="DOUBLE")
    (given,) = _json_lines(_run("--json", "--span", "0.5:-0.5", path).stdout)[0]["channels"]
    (clean,) = _json_lines(_run("--json", "--span", "all", middle).stdout)[0]["channels"]
    assert given["span_s"] == [0.5, 2.5] and given["span_source"] == "given"
    # the same frames, measured the same way: the same numbers
    for key in ("level_dbfs", "thd_n_db", "thd_n_db_a", "noise_dbfs", "thd_db"):
        assert given[key] == pytest.approx(clean[key], abs=1e-6)
    table = _run("--span", "0.5:2.5", path).stdout
    assert "0.500-2.500 given" in table
    for bad, words in (("2:1", "start before the end"), ("x", "START:END"), ("1:9", "inside")):
        result = _run("--span", bad, path)
        assert result.exit_code == 2
        (line,) = result.stderr.strip().splitlines()
        assert words in line


def test_settled_span_found_when_the_survey_samples_a_long_file():
    # Longer than 64 s, the survey reads 32 spans; the tone's start and end lie between
    # them and are found by scanning the unread stretch next to them. 20 s of dither, then
    # the gated tone from 20 s to 68 s, then 2 s of dither.
    rate, n = RATE, 70 * RATE
    x = _tpdf(n, 2.0**-23, 33)
    t = np.arange(48 * rate) / rate
    x[20 * rate : 68 * rate] += 0.5 * np.sin(2 * np.pi * 1000.0 * t)
    reads = []

    def read_span(start, frames):
        reads.append(frames)
        return x[start : start + frames, None]

    (ch,) = analyze_blocks(
        lambda: (x[i : i + 262144, None] for i in range(0, n, 262144)),
        rate_hz=rate,
        channels=1,
        n_frames=n,
        read_span=read_span,
    )
    assert ch.content.kind == "tone" and ch.span_source == "settled"
    # the abrupt switch is the transient: the span starts within 20 ms of it
    assert 20.0 <= ch.span_s[0] < 20.02 and 67.98 < ch.span_s[1] <= 68.0
    assert max(reads) <= 262144  # the scans read in bounded pieces
    # noise: the 24-bit TPDF noise alone, LSB^2/6 (LWV 1992), over the band
    expected = 10 * np.log10(2.0**-46 / 6 * _band_fraction(rate) / 0.5)
    assert ch.noise_dbfs == pytest.approx(expected, abs=0.3)


def test_channel_beyond_full_scale_is_flagged(tmp_path):
    # A float file can hold any number; a tone at +194 dBFS (amplitude 5e9) is not a
    # signal a converter plays. Its distortion figures are withheld and the reason given;
    # the channel next to it, at -6.02 dBFS, is measured as usual.
    n = 2 * RATE
    t = np.arange(n) / RATE
    big = 10 ** (194 / 20) * np.sin(2 * np.pi * 997.0 * t)
    fine = 0.5 * np.sin(2 * np.pi * 997.0 * t) + _tpdf(n, 2.0**-23, 34)
    path = tmp_path / "huge.wav"
    sf.write(str(path), np.stack([big, fine], axis=1), RATE, subtype="DOUBLE")
    result = _run("--json", path)
    assert result.exit_code == 0
    over, ok = _json_lines(result.stdout)[0]["channels"]
    assert over["over_full_scale"] is True and ok["over_full_scale"] is False
    assert over["peak_dbfs"] == pytest.approx(194.0, abs=0.01)
    assert over["level_dbfs"] == pytest.approx(194.0, abs=0.01)
    for key in ("thd_n_db", "thd_n_db_a", "thd_db", "dynamic_range_db"):
        assert over[key] is None
    assert any("beyond full scale" in note for note in over["notes"])
    # the sampled peak of a 997 Hz sine over 2 s comes within 1e-4 dB of its amplitude
    assert ok["peak_dbfs"] == pytest.approx(20 * np.log10(0.5), abs=1e-3)
    assert ok["thd_n_db"] is not None and ok["notes"] == []
    table = _run(path).stdout
    assert "over FS" in table and "ch 1 note: samples reach +194.00 dBFS" in table


@pytest.mark.parametrize("value", [1e300, -1e300, np.inf, np.nan])
def test_overflowing_float_samples_are_refused_not_silence(tmp_path, value):
    n = RATE
    x = 0.5 * np.sin(2 * np.pi * 997.0 * np.arange(n) / RATE)
    x[1000] = value
    path = tmp_path / "broken.wav"
    sf.write(str(path), np.stack([np.zeros(n), x], axis=1), RATE, subtype="DOUBLE")
    result = _run("--json", path)
    assert result.exit_code == 2
    assert result.stdout == ""  # no figures at all, least of all "silence"
    (line,) = result.stderr.strip().splitlines()
    assert str(path) in line
    assert ("overflow" in line and "channel 2" in line) or "NaN or Inf" in line


def test_python_warnings_become_notes(tmp_path, monkeypatch):
    # A fit that does not converge warns (RuntimeWarning); the warning belongs in the
    # channel's notes, and nothing reaches stderr (no source paths).
    import warnings

    import audiodsm.measure.channel_analysis as channel_analysis

    real = channel_analysis.fit_sine

    def fit_that_warns(*args, **kwargs):
        message = "fit_sine: the 4-parameter fit did not converge"
        warnings.warn(message, RuntimeWarning, stacklevel=2)
        return real(*args, **kwargs)

    monkeypatch.setattr(channel_analysis, "fit_sine", fit_that_warns)
    n = 2 * RATE
    path = tmp_path / "tone.wav"
    x = 0.5 * np.sin(2 * np.pi * 997.0 * np.arange(n) / RATE)
    sf.write(str(path), np.stack([x, np.zeros(n)], axis=1), RATE, subtype="PCM_24")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a warning escaping analyze would fail the test
        result = _run("--json", "--no-progress", path)
    assert result.exit_code == 0, result.output
    assert result.stderr == ""
    tone, zero = _json_lines(result.stdout)[0]["channels"]
    assert tone["notes"] == ["fit_sine: the 4-parameter fit did not converge"]
    assert zero["notes"] == []
    table = _run(path).stdout
    assert "ch 1 note: fit_sine: the 4-parameter fit did not converge" in table


def test_half_second_tone_then_silence_is_measured_where_it_plays(tmp_path):
    # 0.5 s of a -6.02 dBFS tone, then 2.5 s of digital zero, 24-bit. The frequency fit and
    # the span stay inside the tone (the fit used to run over tone and silence and warn
    # that it did not converge); nothing is written to stderr, and no warning escapes.
    import warnings

    n, on = 3 * RATE, RATE // 2
    t = np.arange(n) / RATE
    x = np.where(t < 0.5, 0.5 * np.sin(2 * np.pi * 997.0 * t), 0.0)
    path = tmp_path / "short_tone.wav"
    sf.write(str(path), x, RATE, subtype="PCM_24")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = _run("--json", path)
    assert result.exit_code == 0 and result.stderr == ""
    (ch,) = _json_lines(result.stdout)[0]["channels"]
    assert ch["signal"] == "tone" and ch["notes"] == []
    assert ch["span_s"][0] == 0.0 and 0.45 < ch["span_s"][1] <= on / RATE
    assert ch["fundamental_hz"] == pytest.approx(997.0, abs=1e-4)
    assert ch["level_dbfs"] == pytest.approx(20 * np.log10(0.5), abs=1e-3)
    # 24-bit rounding of a sine of millions of LSBs: close to uniform white quantization
    # error of LSB^2/12 (Widrow's model; common practice for such a sine), -146.9 dBFS over
    # the band. Averaged over the silence as well, it would read about 7.8 dB lower.
    expected = 10 * np.log10(2.0**-46 / 12 * _band_fraction(RATE) / 0.5)
    assert ch["noise_dbfs"] == pytest.approx(expected, abs=0.5)


def test_steady_tone_with_hum_and_drift_keeps_its_whole_span():
    # No transient: a tone with 50 Hz hum at -100 dBFS, a slow random-walk drift and white
    # noise. Neither the hum (its 10 ms block levels swing) nor the drift (below the band)
    # may be taken for a transient: the settled span is the whole signal.
    n = 4 * RATE
    t = np.arange(n) / RATE
    g = np.random.default_rng(35)
    x = 0.5 * np.sin(2 * np.pi * 997.0 * t) + 1e-5 * np.sin(2 * np.pi * 50.0 * t)
    x = x + np.cumsum(g.normal(0, 1e-8, n)) + g.normal(0, 1e-7, n)
    (ch,) = analyze_blocks(lambda: iter([x[:, None]]), rate_hz=RATE, channels=1, n_frames=n)
    assert ch.content.kind == "tone" and ch.span_source == "settled"
    assert ch.span_s == (0.0, 4.0)
