import importlib.util
import shutil
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from audiodsm.evaluate.grade import collect_profiles
from audiodsm.io import read_audio
from audiodsm.spec import load_spec

ROOT = Path(__file__).resolve().parents[1]


def _audio_script():
    spec = importlib.util.spec_from_file_location(
        "make_demo_audio", ROOT / "audio_demo" / "make_demo_audio.py"
    )
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


audio = _audio_script()


def test_karplus_strong_pitch():
    # Karplus & Strong (1983): a delay of P samples plus the two-point average (half a sample
    # of delay) sounds at rate / (P + 1/2). Check the spectral peak against it; the tolerance
    # is one FFT bin plus the rounding of P.
    rng = np.random.default_rng(1)
    rate = audio.RATE_HZ
    x = audio.pluck(220.0, 1.0, rng)
    period = round(rate / 220.0)
    expect = rate / (period + 0.5)
    n = 1 << 16
    spec = np.abs(np.fft.rfft(x * np.hanning(x.size), n))
    freqs = np.fft.rfftfreq(n, 1 / rate)
    peak = freqs[np.argmax(spec[freqs < 400])]
    assert abs(peak - expect) <= rate / n + 1.0


def test_clips_are_seeded_and_shaped_as_described():
    a = audio.make_clips()
    b = audio.make_clips()
    assert list(a) == list(audio.CLIP_NAMES)
    for name in a:
        np.testing.assert_array_equal(a[name], b[name])
    peak_db = {k: 20 * np.log10(np.max(np.abs(v))) for k, v in a.items()}
    assert peak_db["quiet_passage.wav"] == pytest.approx(-60.0, abs=1e-9)
    assert peak_db["plucked_and_sustained.wav"] == pytest.approx(-3.0, abs=1e-9)
    fade = a["fade_to_silence.wav"]
    tail = int(0.5 * audio.RATE_HZ)
    assert not fade[-tail:].any()  # ends in digital silence
    # the fade falls by about 60 dB: rms of the last sounding 0.25 s vs the first 0.25 s
    q = int(0.25 * audio.RATE_HZ)
    head = np.sqrt(np.mean(fade[q : 2 * q] ** 2))
    end = np.sqrt(np.mean(fade[-tail - 2 * q : -tail - q] ** 2))
    assert 40.0 < 20 * np.log10(head / end) < 70.0


def test_shipped_clips_are_what_the_script_makes():
    clips = audio.make_clips()
    total = 0
    for name, x in clips.items():
        path = ROOT / "audio_demo" / name
        total += path.stat().st_size
        y, rate = read_audio(path)
        assert rate == audio.RATE_HZ
        # 24-bit PCM: within one LSB (2**-23 of full scale) of the float samples
        np.testing.assert_allclose(y.reshape(-1), x, rtol=0, atol=2.0**-23)
    assert total < 4_000_000  # "a few MB at most"


def test_shipped_products():
    dac = collect_profiles([ROOT / "profiles" / "dac_chip"])
    amp = collect_profiles([ROOT / "profiles" / "pocket_amp"])
    assert len(dac) + len(amp) >= 5
    kinds = {
        (p.output.kind, p.modulator.levels, p.modulator.order, p.upsampler.osr) for _, p in dac
    }
    assert ("pdm", 2, 2, 64) in kinds and ("pdm", 2, 5, 64) in kinds
    assert any(k[0] == "nrz" and k[1] == 17 for k in kinds)
    for _, p in amp:
        assert p.output.kind == "pwm" and p.modulator.levels > 2
        assert p.reconstruction.kind == "lc"
    for name in ("dac_chip", "pocket_amp"):
        assert load_spec(ROOT / "profiles" / "specs" / f"{name}.toml").targets


def tiny_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    levels = np.array([0.0, -1.0, -20.0, -40.0])
    return SimpleNamespace(
        metrics={
            "dynamic_range_db_a": 100.0 + profile.modulator.order,
            "switching_rate_hz": 1e6,
        },
        curves={
            "thd_n_vs_level": {"level_dbfs": levels, "thd_n_db": -80.0 + 0.0 * levels},
            "frequency_response": {"frequency_hz": np.array([20.0, 997.0]), "gain_db": np.zeros(2)},
        },
        notes=(),
    )


def test_demo_end_to_end_on_a_small_copy(tmp_path):
    # a copy of the checkout's demo layout, cut to one profile per product and short clips
    root = tmp_path / "checkout"
    # (the listening set's pair: pdm5_64x and its zeros-at-DC variant)
    for product, keep in (("dac_chip", "pdm5_64x.toml"), ("pocket_amp", "pwm9_bridge_16x.toml")):
        (root / "profiles" / product).mkdir(parents=True)
        shutil.copy(ROOT / "profiles" / product / keep, root / "profiles" / product / keep)
    fixed = "pdm5_fixed_64x.toml"  # the candidate with a [fixed_point] section
    shutil.copy(ROOT / "profiles" / "dac_chip" / fixed, root / "profiles" / "dac_chip" / fixed)
    shutil.copytree(ROOT / "profiles" / "specs", root / "profiles" / "specs")
    shutil.copytree(ROOT / "profiles" / "variants", root / "profiles" / "variants")
    (root / "audio_demo").mkdir()
    from audiodsm.io import write_audio_atomic

    # 0.5 s: long enough for a BS.1770 loudness reading (0.4 s gating blocks)
    clip = audio.make_clips()["plucked_and_sustained.wav"][: audio.RATE_HZ // 2]
    write_audio_atomic(root / "audio_demo" / "short.wav", clip, audio.RATE_HZ)
    from audiodsm.demo import run_demo

    lines = []
    out = run_demo(root, jobs=1, full_battery=True, battery=tiny_battery, say=lines.append)
    text = "\n".join(lines)
    assert "Caution" in text  # the hearing caution is printed
    for product in ("dac_chip", "pocket_amp"):
        page = root / "demo_out" / "report" / product / "grades.html"
        assert page.is_file() and str(page) in text
        assert "data:image/png;base64," in page.read_text()
    assert len(out["listening"]) == 3
    # the fixed-point candidate's hardware handoff folder is written and named in the output
    (folder,) = out["handoffs"]
    assert folder == root / "demo_out" / "handoff" / "dac_chip" / "pdm5_fixed_64x"
    assert (folder / "README.md").is_file() and (folder / "rtl" / "noise_shaper_loop.v").is_file()
    assert str(folder) in text
    for path in out["listening"]:
        y, rate = read_audio(path)
        assert rate == audio.RATE_HZ and y.shape[0] == clip.size
    # the listening set of the demo DAC: its page is printed, its key lies beside the folder
    page = out["listening_page"]
    assert page.is_file() and str(page) in text and "blind A/B/X trials" in text
    key = page.parent.parent / "dac_chip.key.json"
    assert key.is_file() and str(key) in text
    key_bytes = key.read_bytes()
    # the second run takes every battery from the cache and keeps the set and its key
    lines.clear()
    again = run_demo(root, jobs=1, full_battery=True, battery=tiny_battery, say=lines.append)
    assert all(g.cached for b in again["batches"].values() for g in b.grades)
    assert any("listening set kept" in line for line in lines)
    assert key.read_bytes() == key_bytes
