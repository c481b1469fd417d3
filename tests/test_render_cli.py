import json
import math
import os
import shlex
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from click.testing import CliRunner
from scipy import signal
from subprocess_helpers import interruptible

from audiodsm.cli import main
from audiodsm.design.ntf import NoiseTransfer
from audiodsm.evaluate.render import HEARING_CAUTION

RATE = 48000

# a light chain so the end-to-end runs stay short: 3rd order, 32x, PDM
PROFILE = """
name = "test-dac"
description = "Invented test chip"
[upsampler]
osr = 32
[modulator]
order = 3
[listening]
error_gain_db = 40
"""


# the chain's NTF: zeros optimized over 0..20 kHz (modulator.zero_band_edge_hz)
PROFILE_NTF = NoiseTransfer.designed(
    3, osr=32, out_of_band_gain=1.5, zero_band_edge=20000.0 / (32 * RATE)
)


def _ntf_power_norm(ntf):
    """||h||_2^2 of the NTF's impulse response (scipy.signal.lfilter), = its white-noise gain."""
    b, a = ntf.polynomials()
    impulse = np.zeros(1 << 14)
    impulse[0] = 1.0
    return float(np.sum(signal.lfilter(b, a, impulse) ** 2))


def _linear_model_silence_dbfs_a(ntf, *, noise_power, input_scale, osr=32):
    """AES17 level (dBFS, A-weighted, 20 Hz-20 kHz) of white loop noise shaped by the NTF.

    Linear model (Schreier & Temes 2005, ch. 2): the quantizer adds white noise of power
    `noise_power` (full-scale units) over 0..fs/2 at the loop rate fs = osr * RATE; the
    output holds it times |NTF|^2. A-weighted with librosa.A_weighting (an outside IEC 61672-1
    implementation) and referred to the input by the chain's calibration (divided by the
    input scale squared); 0 dBFS = a full-scale sine (mean power 1/2).
    """
    import librosa

    fs = osr * RATE
    f = np.linspace(20.0, 20000.0, 200_001)
    shaped = np.abs(ntf.response(f / fs)) ** 2 * 10 ** (librosa.A_weighting(f, min_db=None) / 10)
    power = noise_power * (2.0 / fs) * np.trapezoid(shaped, f) / input_scale**2
    return 10 * math.log10(2 * power)


@pytest.fixture
def setup(tmp_path):
    """A profile, a stereo input (tone on the left, a quiet tone on the right, then silence)."""
    src = tmp_path / "src"
    src.mkdir()
    prof = src / "dac.toml"
    prof.write_text(PROFILE, encoding="utf-8")
    n_tone, n_quiet = int(0.25 * RATE), int(1.0 * RATE)
    t = np.arange(n_tone) / RATE
    x = np.zeros((n_tone + n_quiet, 2))
    fade = np.ones(n_tone)  # 10 ms raised-cosine fades: no onset overshoot in the output
    ramp = int(0.01 * RATE)
    fade[:ramp] = 0.5 - 0.5 * np.cos(np.pi * np.arange(ramp) / ramp)
    fade[-ramp:] = fade[:ramp][::-1]
    x[:n_tone, 0] = 10 ** (-1 / 20) * np.sin(2 * np.pi * 997 * t) * fade
    x[:n_tone, 1] = 10 ** (-20 / 20) * np.sin(2 * np.pi * 997 * t) * fade
    wav = src / "take one.wav"
    sf.write(wav, x, RATE, subtype="PCM_24")
    return tmp_path, prof, wav, x


def invoke(args):
    return CliRunner().invoke(main, ["render", *args])


def final_files(folder):
    return sorted(p.name for p in folder.iterdir()) if folder.exists() else []


def test_render_end_to_end(setup):
    tmp, prof, wav, x = setup
    out = tmp / "out"
    res = invoke(
        [str(prof), str(wav), "--out-dir", str(out), "--json", "--error-file", "--save-stream"]
    )
    assert res.exit_code == 0, res.output + res.stderr
    assert HEARING_CAUTION in res.stderr
    assert "40 dB" in res.stderr
    summary = json.loads(res.stdout.strip().splitlines()[-1])
    names = final_files(out)
    assert names == sorted(
        [
            "take one.test-dac.listen.wav",
            "take one.test-dac.error+40dB.wav",
            "take one.test-dac.bits",
            "take one.test-dac.bits.json",
            "take one.test-dac.summary.json",
        ]
    )
    assert json.loads((out / "take one.test-dac.summary.json").read_text()) == summary
    y, rate = sf.read(out / "take one.test-dac.listen.wav")
    info = sf.info(out / "take one.test-dac.listen.wav")
    assert rate == RATE and info.subtype == "PCM_24"
    assert y.shape == x.shape  # latency removed and flushed: same length, aligned
    # AES17 levels: the -1 dBFS and -20 dBFS tones come out at their levels (rms re a
    # full-scale sine, i.e. 20 log10(sqrt(2) * rms))
    seg = slice(int(0.05 * RATE), int(0.2 * RATE))
    for ch, level in ((0, -1.0), (1, -20.0)):
        rms = np.sqrt(np.mean(y[seg, ch] ** 2))
        assert abs(20 * math.log10(math.sqrt(2) * rms) - level) < 0.06
    # channels are numbered from 1 for people, as `analyze` numbers them (docs/render.md)
    assert [c["channel"] for c in summary["channels"]] == [1, 2]
    ch0 = summary["channels"][0]
    assert set(ch0) >= {
        "rms_dbfs",
        "peak_dbfs",
        "overload_samples",
        "dropped_pulses",
        "silence_noise_dbfs_a",
        "input_clipped_samples",
    }
    # summary rms and peak follow the input's (AES17 dBFS: 10 log10(2 mean(x^2)))
    for ch in (0, 1):
        expected_rms = 10 * math.log10(2 * np.mean(x[:, ch] ** 2))
        assert abs(summary["channels"][ch]["rms_dbfs"] - expected_rms) < 0.05
        # the peak carries the shaped noise this light 3rd-order 32x loop leaves between 20 and
        # 24 kHz (about 1e-3 at its peaks), so it is compared in full-scale units
        peak = 10 ** (summary["channels"][ch]["peak_dbfs"] / 20)
        assert abs(peak - np.abs(x[:, ch]).max()) < 2e-3
    assert ch0["overload_samples"] == 0
    # the quiet passage is long enough: an A-weighted noise level is reported. An undithered
    # single-bit loop fed zeros is not white noise: it settles into patterns whose power sits
    # near half the loop rate (a channel silent from the start reads no in-band noise at all), so
    # the physics sets only an upper bound: the linear model with the single-bit quantizer's
    # effective noise, 1 / ||NTF||^2 (the +-1 output has unit power; S&T 2005 ch. 2 linear
    # model), raised by the chain's 6 dB input headroom (-67.7 dBFS(A) with the zeros spread
    # over 0..20 kHz; -63.7 with them over 0..24 kHz). This loop reads
    # about -79; anything above the bound is a calibration or weighting error.
    assert summary["silent_seconds"] >= 0.5
    bound = _linear_model_silence_dbfs_a(
        PROFILE_NTF, noise_power=1.0 / _ntf_power_norm(PROFILE_NTF), input_scale=0.5
    )
    assert bound == pytest.approx(-67.74, abs=0.05)
    assert ch0["silence_noise_dbfs_a"] is not None and ch0["silence_noise_dbfs_a"] < bound
    # the error file holds the library's error signal (output minus the ideal) raised by
    # 40 dB = a factor of 10^(40/20) = 100, written as 24-bit integers (within one LSB, 2^-23)
    from audiodsm.profile import load_profile
    from audiodsm.stages.chain import run_chain

    x_file, _ = sf.read(wav)  # the 24-bit samples the command read
    lib = run_chain(load_profile(prof), x_file, rate_hz=RATE, keep=("listening", "error"))
    e, _ = sf.read(out / "take one.test-dac.error+40dB.wav")
    np.testing.assert_allclose(e, np.clip(lib.error * 10 ** (40 / 20), -1, 1), rtol=0, atol=2**-23)
    np.testing.assert_allclose(y, np.clip(lib.listening, -1, 1), rtol=0, atol=2**-23)
    assert np.abs(e).max() > 1e-3  # the tone's passage leaves a real error signal to hear
    sidecar = json.loads((out / "take one.test-dac.bits.json").read_text())
    assert sidecar["channels"] == 2
    assert sidecar["samples_per_channel"] >= x.shape[0] * 32


def test_silence_noise_of_a_dithered_multi_bit_chain_follows_the_linear_model(tmp_path):
    # A 9-level loop with 1 LSB (peak) TPDF dither at the quantizer: the total quantizer error
    # is white with power step^2/12 + step^2/6 = step^2/4, step = 2/8 (Lipshitz, Wannamaker &
    # Vanderkooy, JAES 40(5) 1992), shaped by the NTF (S&T 2005 ch. 2). The chain scales its
    # input by its automatic input scale (the no-overload bound of S&T ch. 4 with the dither
    # subtracted, or 0.5 when that bound guarantees less) and calibrates it back out, raising
    # the noise by as much. The reading scatters by ~0.02 dB over the ~1.3 s
    # measured (the shaped noise is mostly 5-20 kHz, many degrees of freedom); the listening
    # chain's filters are flat in band to far less: 0.15 dB.
    from audiodsm.stages.chain_build import auto_input_scale

    prof = tmp_path / "dac.toml"
    prof.write_text(
        PROFILE.replace("order = 3", "order = 3\nlevels = 9\ndither_lsb = 1.0")
        + '[output]\nkind = "nrz"\n',
        encoding="utf-8",
    )
    n_tone, n_quiet = int(0.25 * RATE), int(1.6 * RATE)
    x = np.zeros((n_tone + n_quiet, 1))
    x[:n_tone, 0] = 0.5 * np.sin(2 * np.pi * 997 * np.arange(n_tone) / RATE) * np.hanning(n_tone)
    wav = tmp_path / "quiet.wav"
    sf.write(wav, x, RATE, subtype="PCM_24")
    res = invoke([str(prof), str(wav), "--out-dir", str(tmp_path / "out"), "--json"])
    assert res.exit_code == 0, res.output + res.stderr
    summary = json.loads(res.stdout.strip().splitlines()[-1])
    step = 2.0 / 8
    expected = _linear_model_silence_dbfs_a(
        PROFILE_NTF,
        noise_power=step**2 / 4,
        input_scale=auto_input_scale(PROFILE_NTF, 9, 1.0),
    )
    assert summary["silent_seconds"] >= 1.0
    assert summary["channels"][0]["silence_noise_dbfs_a"] == pytest.approx(expected, abs=0.15)


def test_table_output_and_progress_free_run(setup):
    tmp, prof, wav, _ = setup
    res = invoke([str(prof), str(wav), "--out-dir", str(tmp / "o"), "--no-progress"])
    assert res.exit_code == 0, res.output
    assert "rms dBFS" in res.stdout and "silence dBFS(A)" in res.stdout
    assert HEARING_CAUTION in res.stderr


def test_existing_outputs_are_kept_unless_replace(setup):
    tmp, prof, wav, _ = setup
    out = tmp / "out"
    assert invoke([str(prof), str(wav), "--out-dir", str(out)]).exit_code == 0
    listen = out / "take one.test-dac.listen.wav"
    listen.write_bytes(b"keep me")
    res = invoke([str(prof), str(wav), "--out-dir", str(out)])
    assert res.exit_code == 2
    errors = [line for line in res.stderr.splitlines() if line.startswith("audiodsm: error:")]
    assert len(errors) == 1 and "already exists" in errors[0]
    assert listen.read_bytes() == b"keep me"
    res = invoke([str(prof), str(wav), "--out-dir", str(out), "--replace"])
    assert res.exit_code == 0
    assert listen.read_bytes() != b"keep me"


def test_output_folder_may_not_hold_the_input(setup):
    tmp, prof, wav, _ = setup
    before = final_files(wav.parent)
    res = invoke([str(prof), str(wav), "--out-dir", str(wav.parent)])
    assert res.exit_code == 2
    assert "holds this input" in res.stderr
    assert final_files(wav.parent) == before


@pytest.mark.parametrize(
    ("make", "words"),
    [
        ("rate", "not supported"),
        ("nan", "NaN"),
        ("channels", "channels"),
        ("unreadable", ""),
        ("over", "full scale"),
    ],
)
def test_bad_inputs_leave_nothing(setup, make, words):
    tmp, prof, wav, _ = setup
    bad = tmp / "src" / f"bad-{make}.wav"
    if make == "rate":
        sf.write(bad, np.zeros((4800, 1)), 50000)
    elif make == "nan":
        x = np.zeros((30000, 1))
        x[20000] = np.nan
        sf.write(bad, x, RATE, subtype="FLOAT")
    elif make == "channels":
        sf.write(bad, np.zeros((480, 9)), RATE)
    elif make == "unreadable":
        bad.write_bytes(b"RIFF but not really a wave file")
    else:
        prof.write_text(PROFILE + "\n[input]\nover_full_scale = 'refuse'\n", encoding="utf-8")
        x = np.zeros((30000, 1))
        x[25000] = 1.25
        sf.write(bad, x, RATE, subtype="FLOAT")
    out = tmp / "out"
    res = invoke([str(prof), str(bad), "--out-dir", str(out), "--no-progress"])
    assert res.exit_code == 2
    lines = [line for line in res.stderr.splitlines() if line.startswith("audiodsm: error:")]
    assert len(lines) == 1 and str(bad) in lines[0] and words in lines[0]
    assert "Traceback" not in res.output
    assert final_files(out) == []  # not even a temporary file is left


def test_one_bad_file_does_not_stop_the_others(setup):
    tmp, prof, wav, _ = setup
    bad = tmp / "src" / "broken.wav"
    bad.write_bytes(b"nothing")
    out = tmp / "out"
    res = invoke([str(prof), str(bad), str(wav), "--out-dir", str(out), "--json"])
    assert res.exit_code == 2
    assert len(res.stdout.strip().splitlines()) == 1
    assert "take one.test-dac.listen.wav" in final_files(out)


def test_bad_profile_key_is_one_line(setup):
    tmp, prof, wav, _ = setup
    prof.write_text("[modulator]\nordr = 3\n", encoding="utf-8")
    res = invoke([str(prof), str(wav), "--out-dir", str(tmp / "out")])
    assert res.exit_code == 2
    assert res.stderr.strip() == (
        f"audiodsm: error: {prof}: modulator.ordr: unknown key; expected one of: "
        "order, out_of_band_gain, zero_layout, zero_band_edge_hz, zeros, poles, structure, "
        "input_feed_in, levels, dither_lsb, seed, input_scale, guard, state_bound, "
        "state_scaling, state_peak_bound"
    )
    assert final_files(tmp / "out") == []


def test_output_folder_that_cannot_be_made(setup):
    tmp, prof, wav, _ = setup
    blocker = tmp / "a-file"
    blocker.write_text("not a folder")
    res = invoke([str(prof), str(wav), "--out-dir", str(blocker / "out")])
    assert res.exit_code == 2
    assert res.stderr.strip().startswith("audiodsm: error:")
    assert "cannot create the output folder" in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1


def test_interrupt_mid_file_leaves_nothing(setup, monkeypatch):
    tmp, prof, wav, _ = setup
    from audiodsm.stages import chain as chain_mod

    calls = {"n": 0}
    original = chain_mod.Chain.process

    def interrupted(self, x, state=None, *, keep=("listening",)):
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt
        return original(self, x, state, keep=keep)

    monkeypatch.setattr(chain_mod.Chain, "process", interrupted)
    monkeypatch.setattr(chain_mod, "MAX_BLOCK_MODULATOR_SAMPLES", 1 << 16)
    out = tmp / "out"
    res = invoke([str(prof), str(wav), "--out-dir", str(out), "--error-file", "--save-stream"])
    assert res.exit_code != 0
    assert calls["n"] == 3
    assert final_files(out) == []


def test_pwm_profile_with_code_export_and_another_rate(setup):
    tmp, _, wav, x = setup
    prof = tmp / "src" / "amp.toml"
    prof.write_text(
        """
name = "amp"
[upsampler]
osr = 16
[modulator]
order = 2
levels = 9
out_of_band_gain = 2.0
[output]
kind = "pwm"
pwm_mode = "three-level"
min_pulse_ticks = 1
full_scale_volts = 12.0
[reconstruction]
kind = "lc"
bridged = true
""",
        encoding="utf-8",
    )
    out = tmp / "out"
    res = invoke(
        [str(prof), str(wav), "--out-dir", str(out), "--json", "--save-stream"]
        + ["--listen-rate", "96000", "--float32"]
    )
    assert res.exit_code == 0, res.stderr
    summary = json.loads(res.stdout)
    assert summary["listening_rate_hz"] == 96000
    info = sf.info(out / "take one.amp.listen.wav")
    assert info.samplerate == 96000 and info.subtype == "FLOAT"
    assert info.frames == 2 * x.shape[0]  # same duration as the input
    codes = (out / "take one.amp.codes.txt").read_text().splitlines()
    # one line per modulator clock: input frames x OSR; 9 levels need 4 binary digits per
    # channel, two channels per line
    assert len(codes) == x.shape[0] * 16
    assert {len(line) for line in codes} == {8}
    ch = summary["channels"][0]
    # Common practice: each leg of a double-edge PWM bridge switches at most twice per frame
    assert 0 < ch["switching_rate_hz"] <= 2 * summary["modulator_rate_hz"]
    assert ch["dropped_pulses"] >= 0 and ch["stretched_pulses"] == 0


def test_bad_listen_rate_is_refused_before_anything_is_written(setup):
    tmp, prof, wav, _ = setup
    res = invoke([str(prof), str(wav), "--out-dir", str(tmp / "out"), "--listen-rate", "22050"])
    assert res.exit_code == 2
    assert "--listen-rate=22050" in res.stderr
    assert final_files(tmp / "out") == []


def test_output_beyond_full_scale_is_clipped_and_counted(setup):
    tmp, prof, _, _ = setup
    # a full-scale square wave: the band-limited output overshoots +-1 (Gibbs), which a 24-bit
    # file cannot hold; the summary counts exactly the samples the file had to clip
    n = int(0.1 * RATE)
    x = np.where(np.sin(2 * np.pi * 500 * np.arange(n) / RATE) >= 0, 1.0, -1.0)
    wav = tmp / "src" / "square.wav"
    sf.write(wav, np.column_stack([x, 0.5 * x]), RATE, subtype="FLOAT")
    res = invoke([str(prof), str(wav), "--out-dir", str(tmp / "out"), "--json"])
    assert res.exit_code == 0, res.stderr
    summary = json.loads(res.stdout)
    from audiodsm.profile import load_profile
    from audiodsm.stages.chain import run_chain

    lib = run_chain(load_profile(prof), np.column_stack([x, 0.5 * x]), rate_hz=RATE)
    over = (np.abs(lib.listening) > 1.0).sum(axis=0)
    assert over[0] > 0 and over[1] == 0
    assert [c["output_clipped_samples"] for c in summary["channels"]] == over.tolist()
    y, _ = sf.read(tmp / "out" / "square.test-dac.listen.wav")
    assert np.abs(y).max() <= 1.0


def test_inputs_whose_outputs_would_collide_are_refused(setup):
    tmp, prof, wav, x = setup
    other = tmp / "elsewhere"
    other.mkdir()
    twin = other / "take one.flac"
    sf.write(twin, x[:4800], RATE)
    res = invoke([str(prof), str(wav), str(twin), "--out-dir", str(tmp / "out")])
    assert res.exit_code == 2
    assert "would collide" in res.stderr
    assert final_files(tmp / "out") == []


def test_a_real_ctrl_c_leaves_nothing(setup):
    import signal
    import subprocess
    import sys
    import time

    tmp, prof, _, _ = setup
    # 60 s of input: the render takes several seconds even on a fast machine, so the signal
    # always lands while it is under way (sent as soon as the first temporary file exists)
    n = 60 * RATE
    t = np.arange(n) / RATE
    long_wav = tmp / "src" / "long.wav"
    sf.write(long_wav, 0.5 * np.column_stack([np.sin(2 * np.pi * 440 * t)] * 2), RATE)
    out = tmp / "out"
    proc = subprocess.Popen(
        [sys.executable, "-m", "audiodsm", "render", str(prof), str(long_wav)]
        + ["--out-dir", str(out), "--error-file", "--no-progress"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        preexec_fn=interruptible,
    )
    try:
        deadline = time.monotonic() + 120
        # wait until the temporary files exist (the render is under way)
        while time.monotonic() < deadline and not (out.exists() and any(out.iterdir())):
            time.sleep(0.01)
        assert proc.poll() is None, "the render finished before it could be interrupted"
        before = sorted(p.name for p in out.iterdir())
        proc.send_signal(signal.SIGINT)
        # the handler runs when the main thread is back in Python: after a compile of the
        # loops (cold cache on a loaded machine) that can take a while
        proc.wait(timeout=300)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode != 0
    assert any(name.endswith(".partial") for name in before)  # it was writing
    # no final and no temporary files; the folder the run made for them is gone again
    assert not out.exists()


def test_error_gain_asks_for_the_error_file(setup):
    tmp, prof, wav, _ = setup
    out = tmp / "out"
    res = invoke([str(prof), str(wav), "--out-dir", str(out), "--error-gain", "20", "--json"])
    assert res.exit_code == 0, res.stderr
    assert (out / "take one.test-dac.error+20dB.wav").exists()
    assert "20 dB" in res.stderr  # the caution names the gain
    res = invoke(
        [str(prof), str(wav), "--out-dir", str(tmp / "o2"), "--error-gain", "20"]
        + ["--no-error-file"]
    )
    assert res.exit_code == 0
    assert not any("error" in p.name for p in (tmp / "o2").iterdir())
    res = invoke([str(prof), str(wav), "--out-dir", str(tmp / "o3"), "--error-gain", "90"])
    assert res.exit_code == 2 and "--error-gain=90.0" in res.stderr


# --------------------------------------------------------------------------------------------
# faults and odd inputs (issue 11)
# --------------------------------------------------------------------------------------------


def error_lines(res):
    return [line for line in res.stderr.splitlines() if line.startswith("audiodsm: error:")]


def test_a_summary_that_cannot_be_written_takes_the_whole_set_with_it(setup, monkeypatch):
    import errno

    tmp, prof, wav, _ = setup
    out = tmp / "out"
    summary = out / "take one.test-dac.summary.json"
    real_replace = os.replace

    def full_for_the_summary(src, dst):  # the disk fills up just as the summary goes in
        if str(dst) == str(summary):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(dst))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", full_for_the_summary)
    args = [str(prof), str(wav), "--out-dir", str(out), "--error-file", "--save-stream"]
    res = invoke([*args, "--no-progress"])
    monkeypatch.undo()
    assert res.exit_code == 3, res.output
    assert error_lines(res) == [
        f"audiodsm: error: {summary}: cannot write ({os.strerror(errno.ENOSPC)})"
    ]
    assert "Traceback" not in res.output
    assert final_files(out) == []  # no listening file, no bits, no temporary file
    # so a rerun is not refused with "already exists"
    res = invoke([*args, "--no-progress"])
    assert res.exit_code == 0, res.output
    assert len(final_files(out)) == 5


def in_mount_namespace(script: str, tmp) -> subprocess.CompletedProcess:
    """Run a shell script in a private mount namespace (mounts vanish with it), or skip."""
    import shutil

    if shutil.which("unshare") is None or shutil.which("mount") is None:
        pytest.skip("needs unshare and mount to make a bind mount")
    probe = subprocess.run(
        ["unshare", "-rm", "sh", "-c", f"mount --bind '{tmp}' '{tmp}'"],
        capture_output=True,
        text=True,
    )
    if probe.returncode != 0:
        pytest.skip(f"cannot bind-mount in a private mount namespace: {probe.stderr.strip()}")
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    return subprocess.run(
        ["unshare", "-rm", "sh", "-c", script], capture_output=True, text=True, env=env
    )


def render_command(*args) -> str:
    return " ".join(shlex.quote(a) for a in [sys.executable, "-m", "audiodsm", "render", *args])


def test_a_read_only_output_folder_is_a_storage_error(setup):
    # a read-only bind mount: read-only even for root, where a chmod would not be
    tmp, prof, wav, _ = setup
    out = tmp / "locked"
    out.mkdir()
    q = shlex.quote(str(out))
    res = in_mount_namespace(
        f"mount --bind {q} {q} && mount -o remount,bind,ro {q} && "
        + render_command(str(prof), str(wav), "--out-dir", str(out), "--no-progress"),
        tmp,
    )
    assert res.returncode == 3, res.stderr
    lines = res.stderr.strip().splitlines()
    assert lines == [f"audiodsm: error: {out}: cannot write ({os.strerror(30)})"]  # EROFS
    assert final_files(out) == []


def test_a_full_disk_while_rendering_is_a_storage_error(setup):
    # a real full disk: a 64 KiB file system for the output folder; the 24-bit listening file
    # of the 1.25 s stereo input needs 360 kB
    tmp, prof, wav, _ = setup
    out = tmp / "small"
    out.mkdir()
    q = shlex.quote(str(out))
    res = in_mount_namespace(
        f"mount -t tmpfs -o size=64k tmpfs {q} && "
        + render_command(str(prof), str(wav), "--out-dir", str(out), "--no-progress")
        + f" ; code=$? ; ls -A {q} ; exit $code",
        tmp,
    )
    assert res.returncode == 3, res.stderr
    lines = res.stderr.strip().splitlines()
    listen = out / "take one.test-dac.listen.wav"
    assert lines == [f"audiodsm: error: {listen}: cannot write ({os.strerror(28)})"]  # ENOSPC
    assert "Traceback" not in res.stderr
    assert res.stdout == ""  # the small file system was left empty: no temporary file either


@pytest.mark.skipif(os.geteuid() == 0, reason="root can write into a folder without write bits")
def test_unwritable_output_folder(setup):
    tmp, prof, wav, _ = setup
    out = tmp / "locked"
    out.mkdir()
    out.chmod(0o555)
    try:
        res = invoke([str(prof), str(wav), "--out-dir", str(out)])
    finally:
        out.chmod(0o755)
    assert res.exit_code == 3
    assert error_lines(res) == [f"audiodsm: error: {out}: cannot write ({os.strerror(13)})"]
    assert final_files(out) == []


def test_long_profile_and_input_names_are_shortened_with_a_digest(setup):
    from audiodsm.io_files import MAX_OUTPUT_NAME_BYTES

    tmp, prof, wav, x = setup
    long_name = "p" * 300
    prof.write_text(PROFILE.replace('"test-dac"', f'"{long_name}"'), encoding="utf-8")
    inputs = []
    for last in "ab":  # 244-character names that differ only in their last letter
        name = tmp / "src" / ("t" * 239 + last + ".wav")
        assert len(name.name) == 244
        sf.write(name, x[:4800], RATE, subtype="PCM_24")
        inputs.append(name)
    out = tmp / "out"
    args = [str(prof), *map(str, inputs), "--out-dir", str(out), "--error-file", "--json"]
    res = invoke([*args, "--save-stream", "--no-progress"])
    assert res.exit_code == 0, res.output
    names = final_files(out)
    assert len(names) == 10 and len(set(names)) == 10  # both inputs, nothing collides
    assert all(len(n.encode()) <= MAX_OUTPUT_NAME_BYTES for n in names)
    assert all(n.startswith("t" * 100) for n in names)
    for line in res.stdout.strip().splitlines():
        outputs = json.loads(line)["outputs"]
        assert all(Path(p).is_file() for p in outputs.values())
        assert outputs["listening"].endswith(".listen.wav")
    # the same long names give the same short names: a rerun finds them and keeps them
    res = invoke([*args, "--save-stream", "--no-progress"])
    assert res.exit_code == 2 and "already exists" in res.stderr


def test_the_same_input_given_twice_renders_once(setup):
    tmp, prof, wav, _ = setup
    out = tmp / "out"
    again = tmp / "src" / ".." / "src" / wav.name  # the same file by another path
    res = invoke([str(prof), str(wav), str(again), str(wav), "--out-dir", str(out), "--json"])
    assert res.exit_code == 0, res.output
    assert len(res.stdout.strip().splitlines()) == 1  # one summary
    notes = [line for line in res.stderr.splitlines() if "same file" in line]
    assert notes == [
        f"audiodsm: note: {again} is the same file as {wav}; rendered once",
        f"audiodsm: note: {wav} is the same file as {wav}; rendered once",
    ]
    assert error_lines(res) == []
    assert len(final_files(out)) == 2  # listening file and summary


def test_an_output_folder_that_is_the_input_folder_by_another_path(setup):
    tmp, prof, wav, _ = setup
    link = tmp / "link-to-src"
    link.symlink_to(wav.parent, target_is_directory=True)
    before = final_files(wav.parent)
    res = invoke([str(prof), str(wav), "--out-dir", str(link)])
    assert res.exit_code == 2 and "holds this input" in res.stderr
    res = invoke([str(prof), str(link / wav.name), "--out-dir", str(wav.parent)])
    assert res.exit_code == 2 and "holds this input" in res.stderr
    assert final_files(wav.parent) == before


def test_an_output_folder_that_is_the_input_folder_through_a_bind_mount(setup):
    tmp, prof, wav, _ = setup
    view = tmp / "view"
    view.mkdir()
    before = final_files(wav.parent)
    src, v = shlex.quote(str(wav.parent)), shlex.quote(str(view))
    res = in_mount_namespace(
        f"mount --bind {src} {v} && "
        + render_command(str(prof), str(view / wav.name), "--out-dir", str(wav.parent)),
        tmp,
    )
    assert res.returncode == 2, res.stderr
    assert res.stderr.strip().splitlines() == [
        f"audiodsm: error: {view / wav.name}: the output folder holds this input; "
        "choose another --out-dir"
    ]
    assert final_files(wav.parent) == before


@pytest.mark.parametrize("role", ["summary", "bits_sidecar", "listening"])
def test_a_dangling_symlink_under_an_output_name_is_kept(setup, role):
    from audiodsm.evaluate.render import output_names
    from audiodsm.profile import load_profile

    tmp, prof, wav, _ = setup
    out = tmp / "out"
    out.mkdir()
    target = output_names(wav, load_profile(prof), out, stream=True)[role]
    target.symlink_to(tmp / "nowhere")
    args = [str(prof), str(wav), "--out-dir", str(out), "--save-stream", "--no-progress"]
    res = invoke(args)
    assert res.exit_code == 2
    assert len(error_lines(res)) == 1
    assert str(target) in error_lines(res)[0] and "symlink" in error_lines(res)[0]
    assert final_files(out) == [target.name] and target.is_symlink()
    assert HEARING_CAUTION not in res.stderr
    res = invoke([*args, "--replace"])
    assert res.exit_code == 0, res.output
    assert not target.is_symlink() and target.is_file()


@pytest.mark.parametrize("why", ["unreadable", "exists"])
def test_no_folder_and_no_caution_when_every_input_is_refused(setup, why):
    tmp, prof, wav, _ = setup
    if why == "unreadable":
        bad = tmp / "src" / "broken.wav"
        bad.write_bytes(b"nothing")
        out = tmp / "new" / "deeper"
        res = invoke([str(prof), str(bad), "--out-dir", str(out), "--error-file"])
        assert not (tmp / "new").exists()  # neither folder was left behind
    else:
        out = tmp / "out"
        assert invoke([str(prof), str(wav), "--out-dir", str(out)]).exit_code == 0
        res = invoke([str(prof), str(wav), "--out-dir", str(out), "--error-file"])
    assert res.exit_code == 2
    assert len(error_lines(res)) == 1
    assert HEARING_CAUTION not in res.stderr and "amplified" not in res.stderr


def test_the_caution_follows_the_first_listening_file(setup):
    tmp, prof, wav, _ = setup
    bad = tmp / "src" / "broken.wav"
    bad.write_bytes(b"nothing")
    res = invoke([str(prof), str(bad), str(wav), "--out-dir", str(tmp / "out"), "--no-progress"])
    assert res.exit_code == 2
    assert res.stderr.count(HEARING_CAUTION) == 1
    lines = res.stderr.splitlines()
    assert lines.index(HEARING_CAUTION) > lines.index(error_lines(res)[0])


def test_a_later_render_removes_temporary_files_a_killed_one_left(setup):
    tmp, prof, wav, _ = setup
    out = tmp / "out"
    out.mkdir()
    ended = subprocess.Popen([sys.executable, "-c", "pass"])
    ended.wait()  # its id now belongs to no process
    stale = out / f".other take.test-dac.listen.wav.{ended.pid}-abcd1234.partial"
    live = out / f".other take.test-dac.listen.wav.{os.getpid()}-abcd1234.partial"
    stale.write_bytes(b"half a file")
    live.write_bytes(b"being written")
    res = invoke([str(prof), str(wav), "--out-dir", str(out), "--no-progress"])
    assert res.exit_code == 0, res.output
    assert not stale.exists()
    assert live.exists()  # its writer still runs


def test_blocks_computed_ahead_keep_their_order_errors_and_stop():
    # the render's helper thread: the caller sees the same items in the same order, an error
    # of the producer is raised in the caller's thread, and a caller that stops early leaves
    # no thread running (the producer is closed and joined)
    import threading

    from audiodsm.evaluate.render import _computed_ahead

    assert list(_computed_ahead(iter(range(50)), depth=2)) == list(range(50))

    def failing():
        yield 1
        raise ValueError("broken block")

    got = []
    with pytest.raises(ValueError, match="broken block"):
        for item in _computed_ahead(failing()):
            got.append(item)
    assert got == [1]

    closed = threading.Event()

    def endless():
        try:
            n = 0
            while True:
                yield n
                n += 1
        finally:
            closed.set()

    ahead = _computed_ahead(endless(), depth=2)
    assert [next(ahead) for _ in range(3)] == [0, 1, 2]
    ahead.close()
    assert closed.is_set()
    assert not any(t.name == "audiodsm-render-ahead" for t in threading.enumerate())


def test_a_render_stopped_by_an_error_leaves_no_helper_running(tmp_path):
    # an error in the calling thread (here the progress callback) ends the render with that
    # error, the helper that computes blocks ahead is stopped and joined, and no output is left
    import threading

    from audiodsm.evaluate.render import render_file
    from audiodsm.profile import parse_profile

    wav = tmp_path / "in.wav"
    sf.write(wav, 0.1 * np.ones((3 * RATE, 2)), RATE, subtype="PCM_24")
    out = tmp_path / "out"
    out.mkdir()

    def progress(frames):
        raise RuntimeError("stopped by the caller")

    with pytest.raises(RuntimeError, match="stopped by the caller"):
        render_file(wav, parse_profile(PROFILE), out, progress=progress)
    assert not any(t.name == "audiodsm-render-ahead" for t in threading.enumerate())
    assert list(out.iterdir()) == []
