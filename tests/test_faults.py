"""Faults and hostile input (issue 11): kills, full disks, damaged caches, odd names and files.

Each test here failed before the fix it guards. The subprocess tests send real signals and
wait for a "started" marker file instead of sleeping a fixed time.
"""

import errno
import io
import json
import os
import signal
import stat
import struct
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from click.testing import CliRunner
from fault_batteries import quick_battery
from subprocess_helpers import interruptible

from audiodsm.cli import main
from audiodsm.errors import (
    EXIT_STORAGE,
    EXIT_USAGE,
    AudioFileError,
    OutputError,
    ProfileError,
    StopSignal,
    StorageError,
    exit_code_for_signal,
)
from audiodsm.evaluate.grade import GradeCache, collect_profiles, grade_batch
from audiodsm.io import open_audio_writer, read_audio, write_audio_atomic
from audiodsm.io_files import (
    MAX_NAME_BYTES,
    MAX_OUTPUT_NAME_BYTES,
    create_temp_file,
    fit_file_name,
    refuse_dangling_symlink,
    remove_stale_temp_files,
    replace_text_atomically,
    same_file,
    temp_file_owner,
)
from audiodsm.profile import parse_profile
from audiodsm.spec import parse_spec

ROOT = Path(__file__).resolve().parents[1]
TESTS = Path(__file__).resolve().parent

SPEC = '[[target]]\nmetric = "dynamic_range_db_a"\nat_least = 112.0\n'


def profile_text(name, order):
    return f'name = "{name}"\n[modulator]\norder = {order}\n'


@pytest.fixture
def calls(tmp_path, monkeypatch):
    folder = tmp_path / "calls"
    folder.mkdir()
    monkeypatch.setenv("AUDIODSM_TEST_CALLS", str(folder))
    return folder


@pytest.fixture
def use_quick_battery(monkeypatch):
    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: quick_battery)


@pytest.fixture
def two_profiles(tmp_path):
    pdir = tmp_path / "profiles"
    pdir.mkdir()
    (pdir / "a.toml").write_text(profile_text("a", 3))
    (pdir / "b.toml").write_text(profile_text("b", 4))
    spec = tmp_path / "sheet.toml"
    spec.write_text(SPEC)
    return pdir, spec


@pytest.fixture
def umask_022():
    old = os.umask(0o022)
    yield
    os.umask(old)


def dead_pid() -> int:
    """The id of a process that has ended (and been reaped)."""
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def hidden(folder):
    return sorted(p.name for p in Path(folder).iterdir() if p.name.startswith("."))


def mode(path):
    return stat.S_IMODE(os.stat(path).st_mode)


# --------------------------------------------------------------------------------------------
# exit codes and one-line errors
# --------------------------------------------------------------------------------------------


def test_exit_codes_are_distinct_and_follow_the_shell_convention():
    assert len({0, 1, EXIT_USAGE, EXIT_STORAGE}) == 4
    # 128 + signal number: the convention of POSIX shells (bash manual, "Exit Status")
    assert exit_code_for_signal(signal.SIGINT) == 130
    assert exit_code_for_signal(signal.SIGTERM) == 143
    assert exit_code_for_signal(signal.SIGHUP) == 129
    err = StorageError("/x/y.wav", OSError(errno.ENOSPC, os.strerror(errno.ENOSPC)))
    assert isinstance(err, OSError) and isinstance(err, OutputError)
    assert str(err) == f"/x/y.wav: cannot write ({os.strerror(errno.ENOSPC)})"
    assert isinstance(StopSignal(15), KeyboardInterrupt)


@pytest.mark.parametrize(
    "args",
    [
        ["grade"],
        ["grade", "x.toml"],
        ["grade", "x.toml", "--spec", "s.toml", "--jobs", "many"],
        ["grade", "x.toml", "--spec", "s.toml", "--no-such-option"],
        ["no-such-command"],
        ["analyze"],
        ["measure", "--seed", "-1", "p.toml"],
    ],
)
def test_usage_errors_are_one_line_on_stderr(args):
    r = CliRunner().invoke(main, args)
    assert r.exit_code == EXIT_USAGE
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("audiodsm: error: "), r.stderr
    assert "--help" in lines[0] and r.stdout == ""


# --------------------------------------------------------------------------------------------
# temporary files: owner, stale clean-up, umask
# --------------------------------------------------------------------------------------------


def test_temp_files_record_their_owner_and_stale_ones_are_removed(tmp_path):
    fd, tmp = create_temp_file(tmp_path / "out.wav")
    os.close(fd)
    assert tmp.parent == tmp_path and tmp.name.startswith(".out.wav.")
    assert tmp.name.endswith(".partial") and temp_file_owner(tmp.name) == os.getpid()
    gone = dead_pid()
    stale = tmp_path / f".out.wav.{gone}-abcd1234.partial"
    stale_part = tmp_path / f".bits.raw.{gone}-zzzz_999.part"
    stale_dir = tmp_path / f".report.{gone}-qwertyui.partial"
    live = tmp_path / f".other.wav.{os.getppid()}-abcd1234.partial"  # our parent runs
    stale.write_bytes(b"x")
    stale_part.write_bytes(b"x")
    stale_dir.mkdir()
    (stale_dir / "grades.html").write_text("half")
    live.write_bytes(b"x")
    keep = tmp_path / "a.partial"  # not hidden: not ours
    keep.write_bytes(b"x")
    # only the named output's stale files
    assert remove_stale_temp_files(tmp_path, name="out.wav") == [stale]
    removed = remove_stale_temp_files(tmp_path)
    assert sorted(removed) == sorted([stale_part, stale_dir])
    assert tmp.exists() and live.exists() and keep.exists()


def test_a_later_write_removes_the_stale_temp_of_the_same_output(tmp_path):
    stale = tmp_path / f".notes.txt.{dead_pid()}-abcd1234.partial"
    stale.write_text("left by a killed run")
    replace_text_atomically(tmp_path / "notes.txt", "new")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


def test_outputs_follow_the_umask(tmp_path, umask_022):
    # under umask 0022 a new file is 0644 and a new folder 0755 (POSIX open(2)/mkdir(2) with
    # modes 0666 and 0777), not mkstemp's 0600
    wav = write_audio_atomic(tmp_path / "a.wav", np.zeros(100), 48000)
    txt = replace_text_atomically(tmp_path / "a.txt", "x")
    with open_audio_writer(tmp_path / "b.flac", rate_hz=48000, channels=1) as w:
        w.write(np.zeros(100))
    cache = GradeCache(tmp_path / "cache")
    entry = cache.store("k" * 64, {"metrics": {"m": 1.0}, "curves": {}, "notes": (), "seconds": 1})
    for path in (wav, txt, tmp_path / "b.flac", entry):
        assert mode(path) == 0o644, path
    from audiodsm.stages.stream_export import write_packed_bits

    write_packed_bits(tmp_path / "bits.raw", np.ones(64), rate_hz=3072000.0)
    assert mode(tmp_path / "bits.raw") == 0o644
    os.umask(0o077)
    assert mode(replace_text_atomically(tmp_path / "private.txt", "x")) == 0o600


def test_report_files_and_folder_follow_the_umask(tmp_path, umask_022, two_profiles, calls):
    from audiodsm.evaluate.report import write_report

    pdir, spec = two_profiles
    batch = grade_batch(collect_profiles([pdir]), parse_spec(SPEC), battery=quick_battery, jobs=1)
    out = tmp_path / "new" / "report"
    written = write_report(batch, out)
    assert mode(out) == 0o755
    assert all(mode(p) == 0o644 for p in written.values())
    write_report(batch, out)  # into the existing folder
    assert all(mode(p) == 0o644 for p in written.values())


# --------------------------------------------------------------------------------------------
# names that fit, same file, dangling symlinks
# --------------------------------------------------------------------------------------------


def test_long_names_are_shortened_with_a_digest():
    short = "take 1.wav"
    assert fit_file_name(short) == short
    long_a = "é" * 150 + "a.wav"  # 305 bytes
    long_b = "é" * 150 + "b.wav"
    fa, fb = fit_file_name(long_a), fit_file_name(long_b)
    assert fa != fb and fa.endswith(".wav") and fa.startswith("é" * 10)
    assert len(fa.encode()) <= MAX_OUTPUT_NAME_BYTES and fa == fit_file_name(long_a)
    fa.encode("utf-8")  # no split character
    # the temporary name wrapped around the shortest allowed output name still fits
    assert len(f".{fa}.{2**31}-abcdefgh.partial".encode()) <= MAX_NAME_BYTES


def test_a_long_output_name_is_a_storage_error_not_a_traceback(tmp_path):
    with pytest.raises(StorageError, match="too long"):
        replace_text_atomically(tmp_path / ("n" * 300 + ".txt"), "x")
    with pytest.raises(StorageError, match="too long"):
        write_audio_atomic(tmp_path / ("n" * 300 + ".wav"), np.zeros(10), 48000)
    # a 240-byte name fits: its temporary twin is shortened, the final name is kept
    name = "n" * 236 + ".txt"
    assert replace_text_atomically(tmp_path / name, "x").name == name
    assert os.listdir(tmp_path) == [name]


def test_same_file_sees_through_links_and_other_paths(tmp_path):
    a = tmp_path / "a.wav"
    a.write_bytes(b"x")
    (tmp_path / "sub").mkdir()
    other_path = tmp_path / "sub" / ".." / "a.wav"
    link = tmp_path / "link.wav"
    link.symlink_to(a)
    hard = tmp_path / "hard.wav"
    os.link(a, hard)
    assert same_file(a, other_path) and same_file(a, link) and same_file(a, hard)
    assert same_file(tmp_path, tmp_path / "sub" / "..")
    assert not same_file(a, tmp_path / "missing.wav")
    assert not same_file(a, tmp_path / "sub")


def test_a_dangling_symlink_is_not_replaced_without_permission(tmp_path):
    link = tmp_path / "out.wav"
    link.symlink_to(tmp_path / "gone.wav")
    with pytest.raises(OutputError, match="symlink to a missing file"):
        refuse_dangling_symlink(link, replace=False)
    refuse_dangling_symlink(link, replace=True)
    with pytest.raises(OutputError, match="symlink"):
        write_audio_atomic(link, np.zeros(10), 48000)
    assert link.is_symlink()
    write_audio_atomic(link, np.zeros(10), 48000, overwrite=True)
    assert not link.is_symlink() and link.is_file()


def test_design_refuses_a_dangling_symlink(tmp_path):
    link = tmp_path / "p.toml"
    link.symlink_to(tmp_path / "gone.toml")
    r = CliRunner().invoke(main, ["design", str(link), "--order", "3"])
    assert r.exit_code == EXIT_USAGE and "symlink" in r.stderr and link.is_symlink()


# --------------------------------------------------------------------------------------------
# storage faults
# --------------------------------------------------------------------------------------------


def full_disk(monkeypatch, module, *, when=lambda dst: True):
    """Make ``module.os.replace`` fail as a full disk does (ENOSPC)."""
    real = module.os.replace

    def failing(src, dst):
        if when(str(dst)):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(dst))
        return real(src, dst)

    monkeypatch.setattr(module.os, "replace", failing)


def test_text_write_on_a_full_disk_names_path_and_cause(tmp_path, monkeypatch):
    import audiodsm.io_files as aio

    full_disk(monkeypatch, aio)
    target = tmp_path / "notes.txt"
    with pytest.raises(StorageError) as exc:
        replace_text_atomically(target, "x")
    assert str(exc.value) == f"{target}: cannot write ({os.strerror(errno.ENOSPC)})"
    assert os.listdir(tmp_path) == []


def test_audio_write_on_a_full_disk_is_a_storage_error(tmp_path, monkeypatch):
    out = tmp_path / "a.wav"

    def short_write(self, data):  # what libsndfile reports when the disk fills up
        raise sf.LibsndfileError(0, prefix="Error writing: ")

    monkeypatch.setattr(sf.SoundFile, "write", short_write)
    with pytest.raises(StorageError, match=str(out)):
        write_audio_atomic(out, np.zeros(100), 48000)
    assert os.listdir(tmp_path) == []


def run_grade(args):
    return CliRunner().invoke(main, ["grade", *args, "--no-progress"])


def test_grade_report_on_a_full_disk(tmp_path, two_profiles, calls, use_quick_battery, monkeypatch):
    import audiodsm.evaluate.report as report

    pdir, spec = two_profiles
    out = tmp_path / "report"
    # the HTML file, written after the CSV and JSON, hits the full disk
    real_open = open

    def failing_open(path, *a, **k):
        if str(path).endswith(".html"):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))
        return real_open(path, *a, **k)

    monkeypatch.setattr(report, "open", failing_open, raising=False)
    r = run_grade([str(pdir), "--spec", str(spec), "--jobs", "1", "--report", str(out),
                   "--cache", str(tmp_path / "c")])  # fmt: skip
    assert r.exit_code == EXIT_STORAGE
    (line,) = r.stderr.strip().splitlines()
    assert str(out) in line and os.strerror(errno.ENOSPC) in line and "report" in line
    assert "PASS" in r.stdout and "FAIL" in r.stdout  # the grades were still printed
    assert not out.exists() and hidden(tmp_path) == []  # complete or absent
    # an existing report folder keeps its old report when the new one cannot be written
    monkeypatch.undo()
    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: quick_battery)
    r = run_grade([str(pdir), "--spec", str(spec), "--report", str(out), "--cache",
                   str(tmp_path / "c")])  # fmt: skip
    assert r.exit_code == 1 and out.is_dir()
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    full_disk(monkeypatch, report, when=lambda dst: "grades." in dst)
    r = run_grade([str(pdir), "--spec", str(spec), "--report", str(out), "--recompute",
                   "--cache", str(tmp_path / "c")])  # fmt: skip
    assert r.exit_code == EXIT_STORAGE and "Traceback" not in r.output
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_grade_cache_that_cannot_be_written_keeps_the_results(
    tmp_path, two_profiles, calls, use_quick_battery, monkeypatch
):
    import audiodsm.evaluate.grade as grade_mod

    pdir, spec = two_profiles
    cache = tmp_path / "cache"
    full_disk(monkeypatch, grade_mod, when=lambda dst: dst.endswith(".npz"))
    out = tmp_path / "report"
    r = run_grade([str(pdir), "--spec", str(spec), "--jobs", "1", "--cache", str(cache),
                   "--report", str(out)])  # fmt: skip
    assert r.exit_code == 1, r.output  # a fails its target: the grades, not the cache, decide
    assert "PASS" in r.stdout and "FAIL" in r.stdout
    (warning,) = r.stderr.strip().splitlines()
    assert warning.startswith("audiodsm: warning: the cache was not saved")
    assert os.strerror(errno.ENOSPC) in warning and "2 result(s)" in warning
    assert sorted(p.name for p in out.iterdir()) == ["grades.csv", "grades.html", "grades.json"]
    assert list(cache.iterdir()) == []  # no entry, no temporary file


def test_grade_cache_folder_that_cannot_be_created(tmp_path, two_profiles):
    pdir, spec = two_profiles
    blocker = tmp_path / "file"
    blocker.write_text("x")
    r = run_grade([str(pdir), "--spec", str(spec), "--cache", str(blocker / "cache")])
    assert r.exit_code == EXIT_STORAGE
    (line,) = r.stderr.strip().splitlines()
    assert str(blocker / "cache") in line and "cannot write" in line


# --------------------------------------------------------------------------------------------
# damaged cache entries
# --------------------------------------------------------------------------------------------


def _entry_bytes(meta=None, checksum=True, **arrays):
    """A cache entry built by hand, with a correct checksum unless told otherwise."""
    from audiodsm.evaluate.grade import _entry_checksum

    meta_text = json.dumps(
        meta if meta is not None else {"metrics": {"m": 1.0}, "notes": [], "seconds": 1.0}
    )
    fields = {"meta": np.array(meta_text), **arrays}
    if checksum:
        curves = {k: v for k, v in arrays.items() if k.startswith("curve/")}
        fields["checksum"] = np.array(_entry_checksum(meta_text, curves))
    buf = io.BytesIO()
    np.savez(buf, **fields)
    return buf.getvalue()


def _good_entry(tmp_path):
    cache = GradeCache(tmp_path / "scratch")
    p = cache.store(
        "g" * 64,
        {
            "metrics": {"dynamic_range_db_a": 110.0},
            "curves": {"c": {"x": np.linspace(0, 1, 4000)}},
            "notes": ("n",),
            "seconds": 1.0,
        },
    )
    return p.read_bytes()


def _damaged_kinds(good):
    def flipped(at):
        b = bytearray(good)
        b[at] ^= 0x10
        return bytes(b)

    meta_word = "dynamic_range".encode("utf-32-le")  # numpy keeps text as UTF-32
    return {
        "truncated": ("file", good[: len(good) // 2]),
        "bit flip in the data": ("file", flipped(len(good) // 2)),
        "bit flip in the meta": ("file", flipped(max(0, good.find(meta_word)) + 8)),
        "bit flip near the end": ("file", flipped(len(good) - 30)),
        "empty file": ("file", b""),
        "not a zip": ("file", b"PK\x03\x04 nothing more"),
        "missing checksum": ("file", _entry_bytes(checksum=False)),
        "missing meta": ("file", _no_meta()),
        "meta not text": ("file", _meta_as_numbers()),
        "metrics not a table": (
            "file",
            _entry_bytes(meta={"metrics": [1, 2], "notes": [], "seconds": 1.0}),
        ),
        "empty metrics": ("file", _entry_bytes(meta={"metrics": {}, "notes": [], "seconds": 1})),
        "seconds a text": (
            "file",
            _entry_bytes(meta={"metrics": {"m": 1.0}, "notes": [], "seconds": "1"}),
        ),
        "notes not texts": (
            "file",
            _entry_bytes(meta={"metrics": {"m": 1.0}, "notes": [1], "seconds": 1.0}),
        ),
        "metric a table": (
            "file",
            _entry_bytes(meta={"metrics": {"m": {"x": 1}}, "notes": [], "seconds": 1.0}),
        ),
        # texts are allowed (reasons of invalid points); complex numbers are not a curve
        "curve of complex": ("file", _entry_bytes(**{"curve/c/x": np.array([1j, 2.0])})),
        "a folder": ("folder", b""),
    }


def _no_meta():
    buf = io.BytesIO()
    np.savez(buf, checksum=np.array("0" * 64))
    return buf.getvalue()


def _meta_as_numbers():
    buf = io.BytesIO()
    np.savez(buf, meta=np.arange(3), checksum=np.array("0" * 64))
    return buf.getvalue()


def _plant(path, kind, data):
    if kind == "folder":
        path.mkdir()
        (path / "inside").write_text("x")
    else:
        path.write_bytes(data)


def test_every_kind_of_damaged_entry_is_detected(tmp_path):
    good = _good_entry(tmp_path)
    cache = GradeCache(tmp_path / "cache")
    assert cache.load_checked("h" * 64) == (None, "")  # missing is not damaged
    for n, (label, (kind, data)) in enumerate(_damaged_kinds(good).items()):
        key = f"{n:064d}"
        _plant(cache.path(key), kind, data)
        entry, problem = cache.load_checked(key)
        assert entry is None and problem, label
        assert "\n" not in problem
    cache.path("f" * 64).write_bytes(good)
    entry, problem = cache.load_checked("f" * 64)
    assert problem == "" and entry["metrics"] == {"dynamic_range_db_a": 110.0}


@pytest.mark.parametrize("label", list(_damaged_kinds(b"PK" * 200)))
def test_a_damaged_entry_is_reported_and_recomputed(
    tmp_path, two_profiles, calls, use_quick_battery, label
):
    pdir, spec = two_profiles
    cache = tmp_path / "cache"
    args = [str(pdir / "a.toml"), "--spec", str(spec), "--jobs", "1", "--cache", str(cache)]
    first = run_grade(args)
    assert first.exit_code == 1 and first.stderr == ""
    (entry,) = cache.glob("*.npz")
    clean = entry.read_bytes()
    kind, data = _damaged_kinds(clean)[label]
    entry.unlink()
    _plant(entry, kind, data)
    r = run_grade(args)
    assert r.exit_code == 1 and "Traceback" not in r.output and "Aborted" not in r.output
    assert r.stdout == first.stdout  # same grades, "run" again rather than "cache"
    warnings = r.stderr.strip().splitlines()
    assert warnings[0].startswith("audiodsm: warning: cache entry ") and str(entry) in warnings[0]
    assert "recomputing" in warnings[0]
    assert len(list(calls.iterdir())) == 2  # computed again, not graded "from cache"
    if kind == "folder":
        assert "the cache was not saved" in warnings[1]
    else:
        assert len(warnings) == 1
        again = run_grade(args)
        assert again.stderr == "" and len(list(calls.iterdir())) == 2  # now a good entry


# --------------------------------------------------------------------------------------------
# odd files and profiles
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("container", ["RF64", "W64"])
def test_truncated_rf64_and_w64_are_reported(tmp_path, container):
    x = np.random.default_rng(3).uniform(-0.5, 0.5, (4800, 2))
    path = tmp_path / f"take.{container.lower()}"
    sf.write(str(path), x, 48000, format=container, subtype="PCM_24")
    good, _ = read_audio(path)
    np.testing.assert_allclose(good, x, atol=2.0**-22)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 6000])
    with pytest.raises(AudioFileError) as exc:
        read_audio(path)
    msg = str(exc.value)
    # 4800 frames x 2 channels x 3 bytes declared; 6000 bytes cut off the end
    assert f"header declares {4800 * 6} bytes of samples, {4800 * 6 - 6000} present" in msg
    assert str(path) in msg and "\n" not in msg


def test_rf64_header_check_reads_the_ds64_sizes(tmp_path):
    # EBU Tech 3306: RF64 keeps the real data size in ds64 and 0xFFFFFFFF in the data chunk
    x = np.zeros((1000, 1))
    path = tmp_path / "t.rf64"
    sf.write(str(path), x, 48000, format="RF64", subtype="PCM_16")
    data = path.read_bytes()
    assert data[:4] == b"RF64" and data[12:16] == b"ds64"
    (declared,) = struct.unpack("<Q", data[28:36])
    assert declared == 2000


@pytest.mark.parametrize(
    "text, key",
    [
        ("[modulator]\nzeros = [1e308]\npoles = [0.5]", "modulator.zeros"),
        (
            "[modulator]\nzeros = [[1e308, 1e308], [1e308, -1e308]]\npoles = [0.5, 0.4]",
            "modulator.zeros",
        ),  # fmt: skip
        ("[modulator]\nzeros = [11.0]\npoles = [0.5]", "modulator.zeros"),
        ("[reconstruction]\nfir_taps = [1e308, 1e308]", "reconstruction.fir_taps"),
        ("[reconstruction]\nfir_taps = [1e301]", "reconstruction.fir_taps"),
        ("[reconstruction]\nfir_taps = [1.0, -0.9999999999999999]", "reconstruction.fir_taps"),
    ],
)
def test_numbers_that_overflow_are_refused_at_load(text, key):
    with pytest.raises(ProfileError) as exc:
        with np.errstate(all="raise"):  # refused before any arithmetic overflows
            parse_profile(text, source="p.toml")
    assert exc.value.key == key and "\n" not in str(exc.value)


def test_large_but_sound_numbers_still_load():
    parse_profile("[reconstruction]\nfir_taps = [1e200, 1e-200]")
    parse_profile("[modulator]\nzeros = [1.0, 1.0]\npoles = [0.5, 0.5]")


@pytest.mark.parametrize(
    "output, key, limit",
    [
        # 8 counter steps x 1 tick x 2 (double-edge): 16 ticks per frame, half of it 8
        ('kind = "pwm"\ndead_time_ticks = 9', "output.dead_time_ticks", 8),
        # trailing carrier: 8 ticks per frame, half of it 4
        (
            'kind = "pwm"\npwm_carrier = "trailing"\ndead_time_ticks = 5',
            "output.dead_time_ticks",
            4,
        ),
        ('kind = "pwm"\nmin_pulse_ticks = 9', "output.min_pulse_ticks", 8),
        # 16 steps x 4 ticks x 2: 128 ticks per frame, half of it 64
        (
            'kind = "pwm"\ntick_subdivision = 4\ncounter_steps = 16\ndead_time_ticks = 65',
            "output.dead_time_ticks",
            64,
        ),
    ],
)
def test_dead_time_range_is_checked_at_load_with_the_file_named(tmp_path, output, key, limit):
    path = tmp_path / "amp.toml"
    # dead time needs an LC filter (the leg follows the inductor current)
    tail = '\n[reconstruction]\nkind = "lc"\n' if "dead_time" in output else "\n"
    path.write_text(f"[modulator]\nlevels = 9\n[output]\n{output}{tail}")
    r = CliRunner().invoke(main, ["measure", "--short", str(path)])
    assert r.exit_code == EXIT_USAGE
    (line,) = r.stderr.strip().splitlines()
    assert str(path) in line and key in line and f"at most {limit}" in line
    # the limit itself is accepted
    path.write_text(
        f"[modulator]\nlevels = 9\n[output]\n{output[: output.rindex('=')]}= {limit}{tail}"
    )
    from audiodsm.profile import load_profile
    from audiodsm.stages.chain import run_chain

    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a sound output: no 0/0 in the gain calibration
        run_chain(load_profile(path), 0.5 * np.sin(np.arange(4800) / 10.0), rate_hz=48000)


def test_dead_time_docs_and_check_agree():
    import dataclasses

    from audiodsm.profile import OutputStageSettings

    text = (ROOT / "docs" / "profiles.md").read_text(encoding="utf-8")
    row = next(ln for ln in text.splitlines() if "`output.dead_time_ticks`" in ln)
    field = {f.name: f for f in dataclasses.fields(OutputStageSettings)}["dead_time_ticks"]
    assert f"| {field.metadata['expect']} |" in row
    assert "at most half a frame's ticks" in row


# --------------------------------------------------------------------------------------------
# signals: SIGTERM and SIGHUP clean up as Ctrl-C does
# --------------------------------------------------------------------------------------------

_WRITER_SCRIPT = """
import sys, time
from pathlib import Path
import numpy as np
from audiodsm.cli import stop_signals_as_interrupt
from audiodsm.io import open_audio_writer

out = Path(sys.argv[1])
try:
    with stop_signals_as_interrupt():
        with open_audio_writer(out, rate_hz=48000, channels=1) as w:
            w.write(np.zeros(4800))
            Path(sys.argv[2]).touch()
            while True:
                time.sleep(0.05)
except KeyboardInterrupt as exc:
    print("STOPPED", getattr(exc, "signal_number", 2), flush=True)
    sys.exit(128 + getattr(exc, "signal_number", 2))
"""


def _env():
    """The environment for a child Python that imports this checkout's audiodsm."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT), env.get("PYTHONPATH")]))
    return env


def _wait_for(predicate, what, timeout=60.0, proc=None):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return
        if proc is not None and proc.poll() is not None:
            out, err = proc.communicate()
            pytest.fail(f"the process ended before {what}: {out} {err}")
        time.sleep(0.05)
    pytest.fail(f"timed out waiting for {what}")


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP])
def test_a_stop_signal_removes_the_temporary_file(tmp_path, sig):
    script = tmp_path / "w.py"
    script.write_text(_WRITER_SCRIPT)
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    marker = tmp_path / "started"
    proc = subprocess.Popen(
        [sys.executable, str(script), str(out_dir / "a.wav"), str(marker)],
        cwd=ROOT,
        env=_env(),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        preexec_fn=interruptible,
        text=True,
    )
    try:
        _wait_for(marker.exists, "the writer to start", proc=proc)
        assert len(hidden(out_dir)) == 1  # the temporary file is there while writing
        proc.send_signal(sig)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 128 + sig, err
    assert f"STOPPED {int(sig)}" in out
    assert os.listdir(out_dir) == []


_GRADE_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
import audiodsm.evaluate.grade as grade
from fault_batteries import waiting_battery

grade._default_battery = lambda: waiting_battery
from audiodsm.cli import main

if __name__ == "__main__":
    main(["grade", {pdir!r}, "--spec", {spec!r}, "--jobs", "2", "--cache", {cache!r},
          "--no-progress"])
"""


def _process_gone(pid):
    """True when the process has ended (a zombie waiting to be reaped counts as ended)."""
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except FileNotFoundError:
        return True
    except OSError:
        return False
    state = next((ln for ln in status.splitlines() if ln.startswith("State:")), "")
    return state.split()[1:2] == ["Z"]


def _start_grade(tmp_path, calls):
    pdir = tmp_path / "p"
    pdir.mkdir()
    for name, order in (("a", 2), ("b", 3), ("c", 4)):
        (pdir / f"{name}.toml").write_text(profile_text(name, order))
    spec = tmp_path / "sheet.toml"
    spec.write_text(SPEC)
    cache = tmp_path / "cache"
    cache.mkdir()
    stale = cache / f".{'0' * 64}.npz.{dead_pid()}-abcd1234.partial"
    stale.write_bytes(b"left by a killed run")
    script = tmp_path / "run.py"
    script.write_text(
        _GRADE_SCRIPT.format(tests=str(TESTS), pdir=str(pdir), spec=str(spec), cache=str(cache))
    )
    proc = subprocess.Popen(
        [sys.executable, str(script)],
        cwd=ROOT,
        env=_env(),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        preexec_fn=interruptible,
        text=True,
        start_new_session=True,  # signals go to the main process only, as `kill PID` sends
    )

    def started():
        return [p for p in calls.iterdir() if p.name.startswith("started.")]

    try:
        _wait_for(lambda: len(started()) == 2 and len(list(cache.glob("*.npz"))) == 1,
                  "both workers to start", proc=proc)  # fmt: skip
    except BaseException:
        os.killpg(proc.pid, signal.SIGKILL)
        raise
    workers = sorted({int(p.name.split(".")[2]) for p in started()})
    assert not stale.exists()  # the run removed the stale temporary file of a dead run
    return proc, workers, cache


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP])
def test_stop_signal_to_a_parallel_grade_ends_its_workers(tmp_path, calls, sig):
    proc, workers, cache = _start_grade(tmp_path, calls)
    try:
        os.kill(proc.pid, sig)  # the main process only
        out, err = proc.communicate(timeout=60)
        _wait_for(lambda: all(_process_gone(pid) for pid in workers), "the workers to end", 30)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        for pid in workers:
            if not _process_gone(pid):
                os.kill(pid, signal.SIGKILL)
    assert proc.returncode == 128 + sig, err
    assert "Traceback" not in err
    assert "interrupted: 1 of 3 profiles finished and kept" in out
    assert [p.name for p in cache.iterdir() if p.name.startswith(".")] == []
    assert len(list(cache.glob("*.npz"))) == 1


def test_workers_end_when_the_main_process_is_killed_outright(tmp_path, calls):
    proc, workers, _cache = _start_grade(tmp_path, calls)
    try:
        os.kill(proc.pid, signal.SIGKILL)  # no handler can run
        proc.communicate(timeout=60)
        _wait_for(lambda: all(_process_gone(pid) for pid in workers), "the workers to end", 30)
    finally:
        for pid in workers:
            if not _process_gone(pid):
                os.kill(pid, signal.SIGKILL)


def test_report_rewrite_removes_stale_report_temps_only(tmp_path, two_profiles, calls):
    from audiodsm.evaluate.report import write_report

    pdir, spec = two_profiles
    batch = grade_batch(collect_profiles([pdir]), parse_spec(SPEC), battery=quick_battery, jobs=1)
    out = tmp_path / "report"
    out.mkdir()
    gone = dead_pid()
    stale = out / f".grades.html.{gone}-abcd1234.partial"
    stale.write_text("half a page")
    stale_folder = tmp_path / f".report.{gone}-abcd1234.partial"
    stale_folder.mkdir()
    theirs = out / f".notes.txt.{gone}-abcd1234.partial"  # not a report file: not ours to judge
    theirs.write_text("x")
    write_report(batch, out)
    assert not stale.exists() and not stale_folder.exists() and theirs.exists()


def test_a_read_only_cache_folder_warns_and_keeps_the_results(
    tmp_path, two_profiles, calls, use_quick_battery, monkeypatch
):
    pdir, spec = two_profiles
    cache = tmp_path / "cache"
    monkeypatch.setattr(GradeCache, "writable", property(lambda self: False))
    r = run_grade([str(pdir), "--spec", str(spec), "--jobs", "1", "--cache", str(cache)])
    assert r.exit_code == 1 and "PASS" in r.stdout and "FAIL" in r.stdout
    (warning,) = r.stderr.strip().splitlines()
    assert "the cache was not saved" in warning and "not writable" in warning
    assert list(cache.iterdir()) == []


# --------------------------------------------------------------------------------------------
# a set of outputs: all or nothing (for render's listening file and summary)
# --------------------------------------------------------------------------------------------


def test_an_output_set_appears_whole(tmp_path):
    from audiodsm.io_files import OutputSet

    listen, summary = tmp_path / "take.listen.wav", tmp_path / "take.summary.json"
    with OutputSet() as outputs:
        write_audio_atomic(listen, np.zeros(100), 48000, output_set=outputs)
        assert not listen.exists()  # held back until the whole set is written
        outputs.add_text(summary, "{}\n")
    assert listen.is_file() and summary.read_text() == "{}\n"
    assert hidden(tmp_path) == []


def test_an_output_set_that_fails_leaves_nothing(tmp_path, monkeypatch):
    from audiodsm.io_files import OutputSet

    listen, summary = tmp_path / "take.listen.wav", tmp_path / "take.summary.json"

    # the summary cannot be written (full disk) after the listening file was: neither appears
    def full(fd, *a, **k):
        os.close(fd)
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    with pytest.raises(StorageError, match=str(summary)):
        with OutputSet() as outputs:
            write_audio_atomic(listen, np.zeros(100), 48000, output_set=outputs)
            monkeypatch.setattr(os, "fdopen", full)
            outputs.add_text(summary, "{}\n")
    monkeypatch.undo()
    assert os.listdir(tmp_path) == []
    # a rename that fails inside the commit takes back what it had placed, and restores a
    # file it replaced
    listen.write_bytes(b"old take")
    outputs = OutputSet()
    write_audio_atomic(listen, np.zeros(100), 48000, output_set=outputs, overwrite=True)
    outputs.add_text(summary, "{}\n")
    real_replace = os.replace

    def failing(src, dst):
        if str(dst) == str(summary):
            raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(dst))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", failing)
    with pytest.raises(StorageError, match=os.strerror(errno.EROFS)):
        outputs.commit()
    monkeypatch.undo()
    assert os.listdir(tmp_path) == [listen.name] and listen.read_bytes() == b"old take"


def test_an_output_set_left_by_an_exception_is_discarded(tmp_path):
    from audiodsm.io_files import OutputSet

    with pytest.raises(KeyboardInterrupt):
        with OutputSet() as outputs:
            outputs.add_text(tmp_path / "a.txt", "x")
            raise KeyboardInterrupt
    assert os.listdir(tmp_path) == []


def test_an_output_set_takes_bytes_and_writer_output_whole(tmp_path):
    from audiodsm.io_files import OutputSet

    picture, table = tmp_path / "a.png", tmp_path / "a.csv"
    with OutputSet() as outputs:
        outputs.add_bytes(picture, b"\x89PNG\r\n\x1a\n")
        outputs.add_from_writer(table, lambda fh: fh.write(b"x,y\r\n"))
        assert not picture.exists() and not table.exists()  # held back until the commit
    assert picture.read_bytes() == b"\x89PNG\r\n\x1a\n" and table.read_bytes() == b"x,y\r\n"
    # a writer that fails half-way leaves no temporary file and no final name; the file
    # staged before it is discarded with it
    with pytest.raises(RuntimeError, match="drawing failed"):
        with OutputSet() as outputs:
            outputs.add_bytes(tmp_path / "b.png", b"ok")

            def broken(fh):
                fh.write(b"half")
                raise RuntimeError("drawing failed")

            outputs.add_from_writer(tmp_path / "b.csv", broken)
    assert sorted(os.listdir(tmp_path)) == ["a.csv", "a.png"]
    with pytest.raises(OutputError, match="already exists"):
        OutputSet().add_bytes(picture, b"new")
    assert picture.read_bytes() == b"\x89PNG\r\n\x1a\n"
