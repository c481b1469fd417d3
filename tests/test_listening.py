import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from audiodsm.cli import main
from audiodsm.errors import AudioFileError, OutputError, ParameterError
from audiodsm.evaluate.listening import (
    LOUDNESS_TOLERANCE_LU,
    PAGE_NAME,
    key_path_for,
    make_listening_set,
    spectrogram_dbfs,
)
from audiodsm.io import read_audio, write_audio_atomic
from audiodsm.measure.loudness import integrated_loudness_lufs

RATE = 48000


def programme(seconds=1.5, seed=1, rate=RATE):
    """Invented test material: a few partials under a slow swell, with a little noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(round(seconds * rate)) / rate
    x = sum(a * np.sin(2 * np.pi * f * t) for a, f in ((0.2, 220.0), (0.1, 663.0), (0.05, 2300.0)))
    x = x * (0.6 + 0.4 * np.sin(2 * np.pi * 1.3 * t)) + 0.01 * rng.standard_normal(t.size)
    return np.column_stack([x, 0.8 * x])


def delayed(x, frames):
    if frames >= 0:
        return np.concatenate([np.zeros((frames, x.shape[1])), x])
    return x[-frames:]


@pytest.fixture
def material(tmp_path):
    """An input and two 'listening files': delayed, louder or quieter, with their own noise."""
    src = tmp_path / "src"
    src.mkdir()
    x = programme()
    rng = np.random.default_rng(7)
    a = 10 ** (1.5 / 20) * delayed(x, 23) + 1e-4 * rng.standard_normal((x.shape[0] + 23, 2))
    b = 10 ** (-2.0 / 20) * delayed(x, -5) + 3e-4 * rng.standard_normal((x.shape[0] - 5, 2))
    paths = {
        "input": write_audio_atomic(src / "tune.wav", x, RATE, subtype="FLOAT"),
        "a": write_audio_atomic(src / "tune.alpha.listen.wav", a, RATE, subtype="FLOAT"),
        "b": write_audio_atomic(src / "tune.beta.listen.wav", b, RATE, subtype="FLOAT"),
    }
    # an error file beside alpha, found by its name
    write_audio_atomic(src / "tune.alpha.error+40dB.wav", 0.01 * a, RATE, subtype="FLOAT")
    return paths


def build(material, folder, **kw):
    kw.setdefault("trials_per_pair", 6)
    return make_listening_set([material["a"], material["b"]], [material["input"]], folder, **kw)


def test_clips_are_aligned_and_loudness_matched_downwards(tmp_path, material):
    folder = tmp_path / "set"
    summary = build(material, folder)
    clips = {c["label"]: c for c in summary["inputs"][0]["clips"]}
    assert set(clips) == {"input", "tune.alpha", "tune.alpha error", "tune.beta"}
    # delays found exactly (the files were made with known shifts)
    assert clips["tune.alpha"]["delay_frames"] == 23
    assert clips["tune.beta"]["delay_frames"] == -5
    # the common span: beta starts 5 frames late and is 5 frames short
    frames = summary["inputs"][0]["frames"]
    assert frames == programme().shape[0] - 5
    x_in, _ = read_audio(folder / "clips" / "tune" / "input.wav")
    a, _ = read_audio(folder / "clips" / "tune" / "tune-alpha.wav")
    b, rate = read_audio(folder / "clips" / "tune" / "tune-beta.wav")
    assert rate == RATE and x_in.shape == a.shape == b.shape == (frames, 2)
    # aligned to the sample: each clip is the input times a gain plus its own small noise
    for y in (a, b):
        g = float(np.dot(y[:, 0], x_in[:, 0]) / np.dot(x_in[:, 0], x_in[:, 0]))
        resid = y - g * x_in
        assert np.sqrt(np.mean(resid**2)) < 0.01 * np.sqrt(np.mean(y**2))
    # loudness measured independently (pyloudnorm directly, BS.1770-4) is matched within 0.1 LU
    import pyloudnorm

    meter = pyloudnorm.Meter(RATE)
    loud = [meter.integrated_loudness(s) for s in (x_in, a, b)]
    assert max(loud) - min(loud) <= LOUDNESS_TOLERANCE_LU
    # downwards only: beta (the quietest, 2 dB under the input) keeps its level
    assert clips["tune.beta"]["gain_db"] == pytest.approx(0.0, abs=0.01)
    assert all(c["gain_db"] <= 0.0 for c in clips.values())
    original_input = integrated_loudness_lufs(programme(), rate_hz=RATE)
    assert max(loud) <= original_input + LOUDNESS_TOLERANCE_LU
    # the error file takes its candidate's gain
    assert clips["tune.alpha error"]["gain_db"] == clips["tune.alpha"]["gain_db"]
    assert all(c["clipped_samples"] == 0 for c in clips.values())


def test_folder_layout_and_key_beside_it(tmp_path, material):
    folder = tmp_path / "set"
    summary = build(material, folder)
    key_path = key_path_for(folder)
    assert Path(summary["key"]) == key_path == tmp_path / "set.key.json"
    assert key_path.is_file() and not list(folder.rglob("*key*"))
    assert (folder / PAGE_NAME).is_file()
    assert (folder / "page" / "listening.js").is_file()
    assert (folder / "page" / "listening.css").is_file()
    assert sorted(p.name for p in (folder / "page" / "trials").iterdir()) == [
        f"t{i:02d}.js" for i in range(1, 7)
    ]
    pictures = sorted((folder / "page" / "pictures").iterdir())
    assert len(pictures) == 4 and all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in pictures)
    key = json.loads(key_path.read_text())
    assert key["set_id"] == summary["set_id"] and len(key["trials"]) == 6
    assert {t["x_is"] for t in key["trials"]} <= {"A", "B"}
    # no network: the page names no http(s) resource
    html = (folder / PAGE_NAME).read_text()
    js = (folder / "page" / "listening.js").read_text()
    assert "http://" not in html + js and "https://" not in html + js
    assert "autoplay" not in html


def _samples(data: bytes, p: Path, tmp_path: Path):
    import base64
    import re

    if p.suffix == ".js":
        data = base64.b64decode(re.search(rb'= "([A-Za-z0-9+/=]+)"', data).group(1))
    f = tmp_path / "decoded.wav"
    f.write_bytes(data)
    return read_audio(f)[0]


def _tree(folder):
    return {p.relative_to(folder): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_nothing_in_the_folder_depends_on_the_key(tmp_path, material):
    # two sets of the same material and id whose keys differ: every file but the trial clips'
    # data is byte-identical, so neither the page nor any file can tell which clip X is
    sets = []
    for seed in range(1, 40):
        folder = tmp_path / f"set{seed}"
        build(material, folder, seed=seed, set_id="fixed")
        sets.append((folder, json.loads(key_path_for(folder).read_text())))
        xs = {tuple(t["x_is"] for t in k["trials"]) for _, k in sets}
        if len(xs) > 1:
            break
    (f1, k1), (f2, k2) = sets[0], sets[-1]
    assert [t["x_is"] for t in k1["trials"]] != [t["x_is"] for t in k2["trials"]]
    t1, t2 = _tree(f1), _tree(f2)
    assert t1.keys() == t2.keys()
    differ = {p for p in t1 if t1[p] != t2[p]}
    trial_data = {p for p in differ if p.parts[:2] == ("page", "trials")}
    assert trial_data
    # libsndfile stamps float WAV files with the time of writing (PEAK chunk); the clips
    # outside the trials hold the same samples
    for p in differ - trial_data:
        assert p.suffix in (".wav", ".js") and p.parts[0] in ("clips", "page")
        assert np.array_equal(_samples(t1[p], p, tmp_path), _samples(t2[p], p, tmp_path))
    for tree in (t1, t2):
        for p, data in tree.items():
            if p.suffix in (".html", ".json", ".css") or p.name == "listening.js":
                assert b"x_is" not in data


def test_trial_clip_is_the_one_the_key_names(tmp_path, material):
    import base64
    import re

    folder = tmp_path / "set"
    build(material, folder, seed=5)
    key = json.loads(key_path_for(folder).read_text())
    for t in key["trials"]:
        want = t["a"] if t["x_is"] == "A" else t["b"]
        x = (folder / "page" / "trials" / f"{t['trial']}.js").read_text()
        ref = (folder / "page" / "data" / f"{want}.js").read_text()
        b64 = re.compile(r'= "([A-Za-z0-9+/=]+)"')
        assert base64.b64decode(b64.search(x).group(1)) == base64.b64decode(
            b64.search(ref).group(1)
        )


def test_key_is_never_overwritten(tmp_path, material):
    folder = tmp_path / "set"
    build(material, folder)
    key_path = key_path_for(folder)
    before = key_path.read_bytes()
    for kw in ({}, {"replace": True}):
        with pytest.raises(OutputError, match="never replaced"):
            build(material, folder, **kw)
    assert key_path.read_bytes() == before
    # with the key gone, --replace rebuilds the old set; without it the folder is refused
    key_path.unlink()
    with pytest.raises(OutputError, match="not empty"):
        build(material, folder)
    build(material, folder, replace=True)
    assert key_path.read_bytes() != before
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".partial")]


def test_different_rates_are_refused_in_one_line(tmp_path, material):
    x, _ = read_audio(material["b"])
    odd = write_audio_atomic(tmp_path / "odd.listen.wav", x, 44100, subtype="FLOAT")
    with pytest.raises(AudioFileError, match="sample rate 44100 Hz differs") as info:
        make_listening_set([material["a"], odd], [material["input"]], tmp_path / "set")
    assert "\n" not in str(info.value)
    assert not (tmp_path / "set").exists() and not key_path_for(tmp_path / "set").exists()


def test_bad_requests_are_refused(tmp_path, material):
    with pytest.raises(ParameterError, match="two or more"):
        make_listening_set([material["a"]], [material["input"]], tmp_path / "s1")
    with pytest.raises(ParameterError, match="distinct"):
        make_listening_set([material["a"], material["a"]], [material["input"]], tmp_path / "s2")
    with pytest.raises(ParameterError, match="exactly one input"):
        make_listening_set(
            [material["a"], material["b"]], [material["input"], material["a"]], tmp_path / "s3"
        )
    renamed = material["a"].with_name("input.wav")
    renamed.write_bytes(material["a"].read_bytes())
    with pytest.raises(ParameterError, match="distinct as file names"):
        make_listening_set([renamed, material["b"]], [material["input"]], tmp_path / "s4")
    with pytest.raises(OutputError, match="holds an input"):
        build(material, material["input"].parent)


def test_excerpt_and_cli(tmp_path, material):
    out = tmp_path / "cli-set"
    args = ["listening-set", str(material["a"]), str(material["b"]), "-i", str(material["input"])]
    r = CliRunner().invoke(main, [*args, "--out-dir", str(out), "--trials", "2", "--length", "0.8"])
    assert r.exit_code == 0, r.output
    assert "Caution" in r.output and "tweeters" in r.output
    assert f"page: {out / PAGE_NAME}" in r.output
    summary = json.loads((out / "summary.json").read_text())
    assert summary["inputs"][0]["frames"] == round(0.8 * RATE)
    r = CliRunner().invoke(main, [*args, "--out-dir", str(out)])
    assert r.exit_code == 2 and "never replaced" in r.output
    r = CliRunner().invoke(
        main, [*args, "--out-dir", str(tmp_path / "json-set"), "--trials", "0", "--json"]
    )
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["trials"] == 0 and doc["key"].endswith("json-set.key.json")


def test_profiles_are_rendered_then_reused(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    inp = write_audio_atomic(src / "bit.wav", programme(seconds=0.6), RATE, subtype="FLOAT")
    profiles = []
    for name in ("dc", "spread"):
        p = src / f"{name}.toml"
        p.write_text(
            f'name = "{name}"\n[upsampler]\nosr = 32\n[modulator]\norder = 3\n'
            f'zero_layout = "{name}"\nlevels = 2\n[output]\nkind = "pdm"\n'
        )
        profiles.append(p)
    lines = []
    summary = make_listening_set(
        profiles, [inp], tmp_path / "set", trials_per_pair=2, say=lines.append
    )
    assert sum("rendered" in line for line in lines) == 2
    assert {c["kind"] for c in summary["inputs"][0]["clips"]} == {"input", "candidate", "error"}
    lines.clear()
    key_path_for(tmp_path / "set").unlink()
    make_listening_set(profiles, [inp], tmp_path / "set", replace=True, say=lines.append)
    assert sum("reused" in line for line in lines) == 2


def test_spectrogram_reads_a_full_scale_sine_at_0_dbfs():
    # AES17 full scale: a sine of amplitude 1.0 is 0 dBFS; centred on a bin with a Hann window
    # and spectrum scaling (window sum normalized) its bin reads 0 dBFS (Harris 1978, coherent
    # gain of the Hann window 0.5, compensated by the normalization)
    n = 2048
    f0 = 48 * RATE / n
    t = np.arange(RATE) / RATE
    times, freqs, level = spectrogram_dbfs(np.sin(2 * np.pi * f0 * t), rate_hz=RATE)
    k = int(np.argmin(np.abs(freqs - f0)))
    assert level.shape == (freqs.size, times.size)
    assert np.allclose(level[k], 0.0, atol=0.01)


def test_spectrogram_plot_draws_and_refuses_bad_shapes():
    from audiodsm.evaluate.plotting import plot_spectrogram

    fig = plot_spectrogram(np.arange(3.0), np.arange(4.0), np.zeros((4, 3)), title="t")
    assert fig.axes and fig.axes[0].get_title(loc="left") == "t"
    with pytest.raises(ParameterError):
        plot_spectrogram(np.arange(3.0), np.arange(4.0), np.zeros((3, 4)))


def test_importing_the_listening_modules_loads_neither_matplotlib_nor_pyloudnorm():
    import subprocess
    import sys

    code = (
        "import sys, audiodsm.evaluate.listening, audiodsm.evaluate.trial_scores, "
        "audiodsm.measure.loudness, audiodsm.measure.alignment, audiodsm.cli.listening_set, "
        "audiodsm.cli.score_answers; "
        "print('matplotlib' in sys.modules, 'pyloudnorm' in sys.modules)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False False"
