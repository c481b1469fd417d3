"""A fuzz corpus that stays (issue 11): damaged audio headers, profiles, spec sheets and cache
entries through the command line, in-process.

Two halves: a fixed corpus of hand-picked hostile inputs, and Hypothesis-generated damage to
good inputs (derandomized, so every run tries the same cases; well over 250 in all). For every
case the command must end with a documented exit code and:

- on an error, exactly one line on stderr (``audiodsm: error: ...``); otherwise only
  ``audiodsm: warning: ...`` lines;
- no traceback and no exception escaping the command;
- no input changed, nothing written outside the output folder;
- no temporary file left behind and no partial file under a final name (every cache entry
  written reads back whole, checksum and all).

The commands run with click's ``CliRunner`` in this process; grading uses a stand-in battery
so a profile that survives the damage grades in milliseconds. Profiles that fail to load go
through ``measure --short``, which stops at loading.
"""

import contextlib
import dataclasses
import functools
import hashlib
import io
import json
import os
import shutil
import struct
import tempfile
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from click.testing import CliRunner
from fault_batteries import quick_battery
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from audiodsm.cli import main
from audiodsm.errors import EXIT_FAILED, EXIT_OK, EXIT_STORAGE, EXIT_USAGE, ProfileError
from audiodsm.evaluate.grade import GradeCache
from audiodsm.io_files import TEMP_SUFFIXES
from audiodsm.profile import _SECTIONS, load_profile

ROOT = Path(__file__).resolve().parents[1]
SHIPPED_PROFILES = sorted(
    p for p in (ROOT / "profiles").rglob("*.toml") if not {"specs", "spaces"} & set(p.parts)
)
SHIPPED_SPECS = sorted((ROOT / "profiles" / "specs").glob("*.toml"))

GOOD_PROFILE = 'name = "fuzz"\n[modulator]\norder = 4\n'
GOOD_SPEC = (
    'name = "fuzz sheet"\n[[target]]\nmetric = "dynamic_range_db_a"\nat_least = 112.0\n'
    '[[target]]\nmetric = "thd_n_db"\nat_level_dbfs = -20.0\nat_most = -90.0\n'
)


def fuzz_settings(examples: int):
    """Derandomized: the same cases on every run and machine; no example database."""
    return settings(
        derandomize=True,
        database=None,
        deadline=None,
        max_examples=examples,
        suppress_health_check=list(HealthCheck),
    )


# --------------------------------------------------------------------------------------------
# the sandbox and the checks every case must pass
# --------------------------------------------------------------------------------------------


class Sandbox:
    """A folder with ``in/`` (inputs) and ``out/`` (the only place a command may write)."""

    def __init__(self):
        self._tmp = tempfile.TemporaryDirectory(prefix="audiodsm-fuzz-")
        self.root = Path(self._tmp.name)
        self.inputs = self.root / "in"
        self.out = self.root / "out"
        self.inputs.mkdir()
        self.out.mkdir()
        self._before = None

    def put(self, name, data) -> Path:
        p = self.inputs / name
        if isinstance(data, str):
            p.write_text(data, encoding="utf-8")
        else:
            p.write_bytes(data)
        return p

    def _snapshot(self):
        seen = {}
        for dirpath, dirnames, filenames in os.walk(self.root, followlinks=False):
            rel = Path(dirpath).relative_to(self.root)
            if rel.parts[:1] == ("out",):
                continue
            for name in dirnames + filenames:
                p = Path(dirpath) / name
                if p.is_symlink():
                    seen[str(p)] = ("link", os.readlink(p))
                elif p.is_file():
                    seen[str(p)] = ("file", hashlib.sha256(p.read_bytes()).hexdigest())
                else:
                    seen[str(p)] = ("other", p.is_dir())
        return seen

    def freeze(self):
        self._before = self._snapshot()

    def run(self, args, battery=None):
        self.freeze()
        runner = CliRunner()
        if battery is None:
            return runner.invoke(main, args, env={"XDG_CACHE_HOME": str(self.out / "xdg")})
        import audiodsm.evaluate.grade as grade_mod

        saved = grade_mod._default_battery
        grade_mod._default_battery = lambda: battery
        try:
            return runner.invoke(main, args, env={"XDG_CACHE_HOME": str(self.out / "xdg")})
        finally:
            grade_mod._default_battery = saved

    def check(self, result, allowed):
        """Every rule of the fuzz corpus, for one finished command."""
        text = f"exit {result.exit_code}\nstdout: {result.stdout}\nstderr: {result.stderr}"
        # no exception escaped (click reports a normal exit as SystemExit)
        assert result.exception is None or isinstance(result.exception, SystemExit), (
            f"{type(result.exception).__name__}: {result.exception}\n{text}"
        )
        assert "Traceback" not in result.output, text
        assert result.exit_code in allowed, text
        lines = result.stderr.splitlines()
        if result.exit_code in (EXIT_USAGE, EXIT_STORAGE):
            errors = [ln for ln in lines if ln.startswith("audiodsm: error: ")]
            assert len(errors) == 1 and len(lines) == 1, text
        else:
            assert all(ln.startswith("audiodsm: warning: ") for ln in lines), text
        # inputs untouched, nothing new outside out/
        assert self._snapshot() == self._before, text
        # no temporary file left, nothing partial under a final name
        for dirpath, dirnames, filenames in os.walk(self.out):
            for name in dirnames + filenames:
                assert not (name.startswith(".") and name.endswith(TEMP_SUFFIXES)), name
                if name.startswith(".partial-"):
                    pytest.fail(name)
            for name in filenames:
                p = Path(dirpath) / name
                if p.suffix == ".npz":
                    entry, problem = GradeCache(dirpath).load_checked(p.stem)
                    assert entry is not None and problem == "", (p, problem)
                elif p.suffix == ".json":
                    json.loads(p.read_text(encoding="utf-8"))

    def close(self):
        self._tmp.cleanup()


@pytest.fixture
def sandbox():
    box = Sandbox()
    yield box
    box.close()


@contextlib.contextmanager
def fresh_sandbox():
    """A new sandbox for one Hypothesis example (examples cannot use pytest fixtures)."""
    box = Sandbox()
    try:
        yield box
    finally:
        box.close()


def _event(text):
    """Label a Hypothesis example (``--hypothesis-show-statistics``); no-op in the corpus."""
    try:
        event(text)
    except Exception:  # outside a Hypothesis test
        pass


def grade_args(box, profile, spec, *extra):
    return [
        "grade",
        str(profile),
        "--spec",
        str(spec),
        "--jobs",
        "1",
        "--cache",
        str(box.out / "cache"),
        "--no-progress",
        *extra,
    ]


def try_profile(box, name, data):
    """A profile that loads goes through grade (stand-in battery); one that does not, through
    ``measure --short``, which must refuse it at loading."""
    path = box.put(name, data)
    spec = box.put("sheet.toml", GOOD_SPEC)
    try:
        load_profile(path)
    except ProfileError:
        r = box.run(["measure", "--short", "--no-progress", str(path)])
        box.check(r, {EXIT_USAGE})
        assert str(path) in r.stderr
        _event("profile refused at loading")
        return
    r = box.run(grade_args(box, path, spec), battery=quick_battery)
    box.check(r, {EXIT_OK, EXIT_FAILED})
    _event("profile loaded and graded")


def try_spec(box, data):
    profile = box.put("p.toml", GOOD_PROFILE)
    spec = box.put("sheet.toml", data)
    r = box.run(grade_args(box, profile, spec), battery=quick_battery)
    box.check(r, {EXIT_OK, EXIT_FAILED, EXIT_USAGE})
    _event(f"spec sheet: exit {r.exit_code}")


def try_audio(box, name, data):
    path = box.put(name, data)
    r = box.run(["analyze", "--no-progress", str(path)])
    box.check(r, {EXIT_OK, EXIT_USAGE})
    _event(f"analyze: exit {r.exit_code}")


# --------------------------------------------------------------------------------------------
# good inputs to damage
# --------------------------------------------------------------------------------------------


def _riff_wav(frames: int, channels: int, bits: int, *, extensible=False, rate=48000) -> bytes:
    """A WAV file built by hand (RIFF layout: Microsoft/IBM Multimedia Programming Interface
    and Data Specifications 1.0, 1991; WAVE_FORMAT_EXTENSIBLE from Microsoft's WAVEFORMATEX
    documentation)."""
    rng = np.random.default_rng(frames + channels + bits)
    block = channels * bits // 8
    payload = rng.integers(0, 256, frames * block, dtype=np.uint8).tobytes()
    if extensible:
        guid = struct.pack("<H", 1) + b"\x00\x00\x00\x00\x10\x00\x80\x00\x00\xaa\x00\x38\x9b\x71"
        fmt = struct.pack("<HHIIHH", 0xFFFE, channels, rate, rate * block, block, bits)
        fmt += struct.pack("<HHI", 22, bits, (1 << channels) - 1) + guid
    else:
        fmt = struct.pack("<HHIIHH", 1, channels, rate, rate * block, block, bits)
    body = b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt
    body += b"data" + struct.pack("<I", len(payload)) + payload
    return b"RIFF" + struct.pack("<I", len(body)) + body


def _sf_bytes(fmt: str, subtype: str, frames: int, channels: int, suffix: str) -> bytes:
    x = np.random.default_rng(frames).uniform(-0.5, 0.5, (frames, channels))
    buf = io.BytesIO()
    sf.write(buf, x, 48000, format=fmt, subtype=subtype)
    return buf.getvalue()


@functools.lru_cache(maxsize=1)
def audio_bases():
    """(file name, bytes) of small good files in every container the reader takes."""
    return (
        ("mono16.wav", _riff_wav(600, 1, 16)),
        ("stereo24x.wav", _riff_wav(400, 2, 24, extensible=True)),
        ("float.wav", _sf_bytes("WAV", "FLOAT", 500, 2, ".wav")),
        ("long.rf64", _sf_bytes("RF64", "PCM_24", 500, 1, ".rf64")),
        ("take.w64", _sf_bytes("W64", "PCM_16", 500, 2, ".w64")),
        ("take.aiff", _sf_bytes("AIFF", "PCM_24", 500, 1, ".aiff")),
        ("take.flac", _sf_bytes("FLAC", "PCM_16", 500, 1, ".flac")),
    )


HOSTILE_VALUES = (
    "1e308",
    "-1e308",
    "1.7976931348623157e308",
    "5e-324",
    "inf",
    "-inf",
    "nan",
    "-0.0",
    "0",
    "-1",
    "1",
    "3",
    "4096",
    "65537",
    "9223372036854775807",
    "-9223372036854775808",
    '"text"',
    '""',
    '"\\u0000"',
    '"' + "x" * 300 + '"',
    "true",
    "false",
    "[]",
    "[1e308, 1e308]",
    "[1.0, -1.0]",
    "[[1e308, 1e308], [1e308, -1e308]]",
    "[[0.5, 0.5]]",
    '["a", 1]',
    "{}",
    "{ a = 1 }",
    "1979-05-27T07:32:00Z",
    "07:32:00",
    "0x7fffffff",
    "0o777",
    "[" * 40 + "]" * 40,
)


def _schema_keys():
    out = []
    for section, cls in _SECTIONS.items():
        out.extend((section, f.name) for f in dataclasses.fields(cls))
    return tuple(out)


SCHEMA_KEYS = _schema_keys()
SPEC_KEYS = ("metric", "at_least", "at_most", "at_level_dbfs", "note", "unknown")


# --------------------------------------------------------------------------------------------
# damage
# --------------------------------------------------------------------------------------------


@st.composite
def damaged_bytes(draw, data: bytes, head: int = 96):
    """One to three byte-level injuries, mostly in the header region."""
    b = bytearray(data)
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(["cut", "flip", "poke32", "poke64", "insert", "zero"]))
        n = len(b)
        if kind == "cut":
            del b[draw(st.integers(0, n)) :]
        elif kind == "flip" and n:
            at = draw(st.integers(0, min(n, head) - 1))
            b[at] ^= 1 << draw(st.integers(0, 7))
        elif kind in ("poke32", "poke64") and n >= 8:
            width = 4 if kind == "poke32" else 8
            at = draw(st.integers(0, max(0, min(n, head) - width)))
            big = (1 << (8 * width)) - 1
            value = draw(st.sampled_from([0, 1, 2, 0x7FFFFFFF, 0xFFFFFFFF, big, big - 1]))
            b[at : at + width] = (value & big).to_bytes(width, "little")
        elif kind == "insert":
            at = draw(st.integers(0, n))
            b[at:at] = draw(st.binary(min_size=1, max_size=16))
        elif kind == "zero" and n:
            at = draw(st.integers(0, n - 1))
            end = min(n, at + draw(st.integers(1, 32)))
            b[at:end] = bytes(end - at)
    return bytes(b)


@st.composite
def damaged_profile(draw):
    """A shipped or minimal profile with hostile values, broken syntax or foreign keys."""
    base = draw(st.sampled_from([GOOD_PROFILE, *(p.read_text() for p in SHIPPED_PROFILES)]))
    lines = base.splitlines()
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(
            st.sampled_from(["set", "set", "set", "drop", "dup", "char", "unknown", "accent"])
        )
        if kind == "set":
            section, key = draw(st.sampled_from(SCHEMA_KEYS))
            value = draw(st.sampled_from(HOSTILE_VALUES))
            lines.append(f"[{section}]\n{key} = {value}")
        elif kind == "drop" and lines:
            del lines[draw(st.integers(0, len(lines) - 1))]
        elif kind == "dup" and lines:
            lines.append(lines[draw(st.integers(0, len(lines) - 1))])
        elif kind == "char":
            text = "\n".join(lines)
            at = draw(st.integers(0, len(text)))
            ch = draw(st.sampled_from(list("=[]{}\"'#\\\n,.\x00\ufeff") + ["\u00e9"]))
            lines = (text[:at] + ch + text[at:]).splitlines()
        elif kind == "unknown":
            lines.append(f"{draw(st.sampled_from(['frobnicate', 'modulator.x', 'x.y.z']))} = 1")
        elif kind == "accent":
            lines.append('description = "caf\u00e9 \u00ff"')
    text = "\n".join(lines) + "\n"
    if draw(st.booleans()) and draw(st.integers(0, 9)) == 0:
        return text.encode("utf-8")[:-3] + b"\xff\xfe\n"  # not UTF-8
    return text


@st.composite
def damaged_spec(draw):
    base = draw(st.sampled_from([GOOD_SPEC, *(p.read_text() for p in SHIPPED_SPECS)]))
    lines = base.splitlines()
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(["set", "set", "target", "drop", "char", "top"]))
        if kind == "set":
            key = draw(st.sampled_from(SPEC_KEYS))
            value = draw(
                st.sampled_from(
                    [*HOSTILE_VALUES, '"thd_n_db"', '"dynamic_range_db_a"', '"no_such_metric"']
                )
            )
            lines.append(f"{key} = {value}")
        elif kind == "target":
            lines.append("[[target]]")
        elif kind == "drop" and lines:
            del lines[draw(st.integers(0, len(lines) - 1))]
        elif kind == "char":
            text = "\n".join(lines)
            at = draw(st.integers(0, len(text)))
            lines = (text[:at] + draw(st.sampled_from(list('=[]"\n#\x00'))) + text[at:]).split("\n")
        elif kind == "top":
            lines.insert(0, f"{draw(st.sampled_from(['target', 'name', 'x']))} = 1")
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------------------------
# the fixed corpus
# --------------------------------------------------------------------------------------------

AUDIO_CORPUS = {
    "empty": b"",
    "riff only": b"RIFF",
    "riff header only": b"RIFF\x04\x00\x00\x00WAVE",
    "riff max sizes": b"RIFF\xff\xff\xff\xffWAVEfmt \xff\xff\xff\xff",
    "rf64 without ds64": b"RF64\xff\xff\xff\xffWAVEdata\xff\xff\xff\xff" + bytes(64),
    "w64 guid only": b"riff\x2e\x91\xcf\x11\xa5\xd6\x28\xdb\x04\xc1\x00\x00" + bytes(8),
    "aiff header only": b"FORM\x00\x00\x00\x04AIFF",
    "flac magic only": b"fLaC",
    "text": b"this is not audio\n" * 20,
    "zip": b"PK\x03\x04" + bytes(100),
    "nul bytes": bytes(4096),
}


@pytest.mark.parametrize("label", list(AUDIO_CORPUS))
def test_audio_corpus(sandbox, label):
    try_audio(sandbox, "case.wav", AUDIO_CORPUS[label])


@pytest.mark.parametrize("label", ["folder", "dangling symlink", "fifo", "missing"])
def test_odd_things_where_an_audio_file_belongs(sandbox, label):
    path = sandbox.inputs / "odd.wav"
    if label == "folder":
        path.mkdir()
    elif label == "dangling symlink":
        path.symlink_to(sandbox.inputs / "gone.wav")
    elif label == "fifo":
        os.mkfifo(path)  # must not block: a FIFO is not read
    r = sandbox.run(["analyze", str(path)])
    sandbox.check(r, {EXIT_USAGE})


PROFILE_CORPUS = {
    "empty name": 'name = ""',
    "nul": "\x00",
    "lone bracket": "[",
    "array of tables": "[[modulator]]\norder = 3",
    "section as value": "modulator = 3",
    "duplicate key": "[modulator]\norder = 3\norder = 4",
    "order huge": "[modulator]\norder = 1e308",
    "zeros far out": "[modulator]\nzeros = [1e308]\npoles = [0.5]",
    "complex zeros far out": "[modulator]\nzeros = [[1e308, 1e308], [1e308, -1e308]]\n"
    "poles = [0.5, 0.5]",
    "taps overflow": "[reconstruction]\nfir_taps = [1e308, 1e308]",
    "taps cancel": "[reconstruction]\nfir_taps = [1.0, -1.0]",
    "taps too many": "[reconstruction]\nfir_taps = [" + ", ".join(["1.0"] * 300) + "]",
    "dead time": '[modulator]\nlevels = 9\n[output]\nkind = "pwm"\ndead_time_ticks = 4096',
    "min pulse": '[modulator]\nlevels = 9\n[output]\nkind = "pwm"\nmin_pulse_ticks = 4096',
    "deep nesting": "x = " + "[" * 200 + "]" * 200,
    "long name": 'name = "' + "n" * 5000 + '"',
    "bom": "\ufeff[modulator]\norder = 3",
    "latin-1": b'name = "caf\xe9"\n',
    "unstable pole": "[modulator]\nzeros = [1.0]\npoles = [1.0]",
}


@pytest.mark.parametrize("label", list(PROFILE_CORPUS))
def test_profile_corpus(sandbox, label):
    try_profile(sandbox, "case.toml", PROFILE_CORPUS[label])


SPEC_CORPUS = {
    "empty": "",
    "target not a table": "target = 1",
    "target without metric": "[[target]]\nat_least = 1.0",
    "two bounds": '[[target]]\nmetric = "dynamic_range_db_a"\nat_least = 1\nat_most = 2',
    "huge limit": '[[target]]\nmetric = "dynamic_range_db_a"\nat_least = 1e308',
    "tiny limit": '[[target]]\nmetric = "dynamic_range_db_a"\nat_most = -1e308',
    "level out of range": '[[target]]\nmetric = "thd_n_db"\nat_level_dbfs = 1e308\nat_most = 1',
    "nan": '[[target]]\nmetric = "dynamic_range_db_a"\nat_least = nan',
    "not toml": "[[target]\n",
    "binary": "\x00\x01\x02",
}


@pytest.mark.parametrize("label", list(SPEC_CORPUS))
def test_spec_corpus(sandbox, label):
    try_spec(sandbox, SPEC_CORPUS[label])


# --------------------------------------------------------------------------------------------
# generated damage
# --------------------------------------------------------------------------------------------


@fuzz_settings(90)
@given(data=st.data())
def test_damaged_audio_headers(data):
    name, good = data.draw(st.sampled_from(audio_bases()))
    with fresh_sandbox() as box:
        try_audio(box, name, data.draw(damaged_bytes(good)))


@fuzz_settings(90)
@given(text=damaged_profile())
def test_damaged_profiles(text):
    with fresh_sandbox() as box:
        try_profile(box, "fuzzed.toml", text)


@fuzz_settings(50)
@given(text=damaged_spec())
def test_damaged_spec_sheets(text):
    with fresh_sandbox() as box:
        try_spec(box, text)


@functools.lru_cache(maxsize=1)
def clean_cache_entry():
    """The clean run's grades (JSON) and its one cache entry (name, bytes)."""
    box = Sandbox()
    try:
        profile = box.put("p.toml", GOOD_PROFILE)
        spec = box.put("sheet.toml", GOOD_SPEC)
        r = box.run(grade_args(box, profile, spec, "--json"), battery=quick_battery)
        assert r.exit_code == EXIT_OK, r.output
        (entry,) = (box.out / "cache").glob("*.npz")
        return json.loads(r.stdout), entry.name, entry.read_bytes()
    finally:
        box.close()


def _targets(doc):
    return [
        [(t["metric"], t["value"], t["margin"], t["passed"]) for t in p["targets"]]
        for p in doc["profiles"]
    ]


@fuzz_settings(60)
@given(data=st.data())
def test_damaged_cache_entries(data):
    with fresh_sandbox() as box:
        _damaged_cache_case(box, data)


def _damaged_cache_case(box, data):
    clean, name, good = clean_cache_entry()
    kind = data.draw(st.sampled_from(["bytes", "bytes", "bytes", "empty", "folder", "link"]))
    cache = box.out / "cache"
    cache.mkdir()
    entry = cache / name
    if kind == "bytes":
        entry.write_bytes(data.draw(damaged_bytes(good, head=len(good))))
    elif kind == "empty":
        entry.write_bytes(b"")
    elif kind == "folder":
        entry.mkdir()
    else:
        entry.symlink_to(box.root / "nowhere.npz")
    profile = box.put("p.toml", GOOD_PROFILE)
    spec = box.put("sheet.toml", GOOD_SPEC)
    r = box.run(grade_args(box, profile, spec, "--json"), battery=quick_battery)
    if kind == "folder":  # the folder stays in the way: the result is kept, not cached
        shutil.rmtree(entry)
    box.check(r, {EXIT_OK})
    got = json.loads(r.stdout)
    assert _targets(got) == _targets(clean)  # the same grades, damaged entry or not
    if r.stderr:
        assert "cache entry" in r.stderr.splitlines()[0]
    _event(f"cache entry {kind}: {'recomputed' if r.stderr else 'read back'}")


def test_a_clean_entry_is_read_back_from_the_cache(sandbox):
    # the damaged-entry cases plant their bytes under the clean run's key; this shows the key
    # does not depend on the sandbox's paths (otherwise those cases would test nothing)
    clean, name, good = clean_cache_entry()
    (sandbox.out / "cache").mkdir()
    (sandbox.out / "cache" / name).write_bytes(good)
    profile = sandbox.put("p.toml", GOOD_PROFILE)
    spec = sandbox.put("sheet.toml", GOOD_SPEC)
    r = sandbox.run(grade_args(sandbox, profile, spec, "--json"), battery=quick_battery)
    sandbox.check(r, {EXIT_OK})
    got = json.loads(r.stdout)
    assert r.stderr == "" and _targets(got) == _targets(clean)
    assert all(p["cached"] for p in got["profiles"])
