import dataclasses
import json
import math
import os
import signal
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from click.testing import CliRunner
from subprocess_helpers import start_batch_and_wait

from audiodsm.cli import main
from audiodsm.errors import ParameterError, ProfileError
from audiodsm.evaluate.grade import (
    GradeCache,
    ProfileGrade,
    TargetGrade,
    collect_profiles,
    grade_batch,
    grade_metrics,
    normalized_margin,
    plan_for_spec,
    rank_grades,
)
from audiodsm.spec import Target, parse_spec

SPEC = """
name = "test sheet"

[[target]]
metric = "dynamic_range_db_a"
at_least = 110.0

[[target]]
metric = "idle_tone_max_dbfs"
at_most = -130.0

[[target]]
metric = "thd_n_db"
at_level_dbfs = -20.0
at_most = -90.0
"""


def profile_text(name, order, levels=2):
    return f'name = "{name}"\n[modulator]\norder = {order}\nlevels = {levels}\n'


def fake_metrics(profile):
    """Readings that follow the loop order, so the grades are known in advance."""
    order = profile.modulator.order
    return {
        "dynamic_range_db_a": 95.0 + 5.0 * order,  # order 3: 110 (margin 0), 5: 120
        "idle_tone_max_dbfs": -120.0 - 5.0 * order,  # order 3: -135, 5: -145
        "max_stable_amplitude_dbfs": -1.0,
    }


def fake_curves(profile):
    levels = np.array([0.0, -1.0, -20.0, -60.0])
    return {
        "thd_n_vs_level": {
            "level_dbfs": levels,
            "thd_n_db": -80.0 - profile.modulator.order * 2.0 + 0.0 * levels,
            "thd_n_db_a": -82.0 + 0.0 * levels,
        },
        "frequency_response": {"frequency_hz": np.array([20.0, 1000.0]), "gain_db": np.zeros(2)},
    }


def fake_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    """A stand-in battery; counts its calls in files when AUDIODSM_TEST_CALLS names a folder."""
    folder = os.environ.get("AUDIODSM_TEST_CALLS")
    if folder:
        Path(folder, f"{profile.name}.{os.getpid()}.{len(os.listdir(folder))}").touch()
    if profile.modulator.order == 7:
        raise RuntimeError("loop blew up\nsecond line")
    if progress is not None:
        progress(1, 2, "half")
        progress(2, 2, "all")
    return SimpleNamespace(
        metrics=fake_metrics(profile), curves=fake_curves(profile), notes=("fake",), seconds=0.01
    )


def interrupting_battery(profile, **kwargs):
    if profile.modulator.order == 4:
        raise KeyboardInterrupt
    return fake_battery(profile, **kwargs)


@pytest.fixture
def calls(tmp_path, monkeypatch):
    folder = tmp_path / "calls"
    folder.mkdir()
    monkeypatch.setenv("AUDIODSM_TEST_CALLS", str(folder))
    return folder


def call_names(folder):
    return sorted(p.name.split(".")[0] for p in folder.iterdir())


@pytest.fixture
def batch_files(tmp_path):
    pdir = tmp_path / "profiles"
    pdir.mkdir()
    for name, order in (("o3", 3), ("o4", 4), ("o5", 5)):
        (pdir / f"{name}.toml").write_text(profile_text(name, order))
    spec = tmp_path / "sheet.toml"
    spec.write_text(SPEC)
    return pdir, spec


# --------------------------------------------------------------------------------------------
# grading one profile
# --------------------------------------------------------------------------------------------


def test_margins_and_passes():
    spec = parse_spec(SPEC)
    prof = SimpleNamespace(modulator=SimpleNamespace(order=3))
    lines = grade_metrics(fake_metrics(prof), fake_curves(prof), spec)
    # by the definition in the spec sheet: at_least -> value - limit, at_most -> limit - value
    dr, tone, thd = lines
    assert dr.value == 110.0 and dr.margin == 0.0 and dr.passed  # exactly at the limit passes
    assert tone.margin == pytest.approx(-130.0 - (-135.0)) and tone.passed
    assert thd.value == pytest.approx(-86.0)  # read off the sweep at -20 dBFS
    assert thd.margin == pytest.approx(-90.0 - (-86.0)) and not thd.passed


def test_missing_readings_fail_with_a_reason():
    spec = parse_spec(SPEC.replace("-20.0", "-30.0"))
    lines = grade_metrics({"dynamic_range_db_a": None, "idle_tone_max_dbfs": math.nan}, {}, spec)
    assert [ln.passed for ln in lines] == [False, False, False]
    assert all(ln.margin is None for ln in lines)
    assert "unstable" in lines[0].reason
    assert "nan" in lines[1].reason
    assert "sweep" in lines[2].reason
    curves = {"thd_n_vs_level": {"level_dbfs": np.array([0.0, -20.0]), "thd_n_db": np.zeros(2)}}
    lines = grade_metrics({}, curves, spec)
    assert "not measured" in lines[0].reason
    assert "-30 dBFS not in the sweep (0, -20)" in lines[2].reason


def _grade(name, margins):
    lines = tuple(
        TargetGrade(Target("dynamic_range_db", "at_least", 0.0), m, m, m is not None and m >= 0)
        for m in margins
    )
    return ProfileGrade(name=name, source="", digest="", lines=lines)


def test_ranking_by_worst_margin():
    a = _grade("a", [3.0, 1.0])  # worst 1
    b = _grade("b", [5.0, -2.0])  # worst -2
    c = _grade("c", [0.5, 9.0])  # worst 0.5
    d = _grade("d", [None, 9.0])  # no reading: last
    e = ProfileGrade(name="e", source="", digest="", lines=(), failure="crashed")
    ranked = rank_grades([d, b, e, c, a])
    assert [g.name for g in ranked[:3]] == ["a", "c", "b"]
    assert {g.name for g in ranked[3:]} == {"d", "e"}
    assert a.worst_margin == 1.0 and a.passed and not b.passed and not e.passed


# --------------------------------------------------------------------------------------------
# the batch: cache, resume, crash, interrupt, parallel
# --------------------------------------------------------------------------------------------


def test_batch_ranks_and_caches_then_resumes_without_recomputing(tmp_path, batch_files, calls):
    pdir, spec_path = batch_files
    spec = parse_spec(spec_path.read_text())
    profiles = collect_profiles([pdir])
    cache = tmp_path / "cache"
    seen = []
    first = grade_batch(
        profiles,
        spec,
        battery=fake_battery,
        jobs=1,
        cache_dir=cache,
        progress=lambda f, label: seen.append(f),
    )
    assert call_names(calls) == ["o3", "o4", "o5"]
    assert [g.name for g in first.grades] == ["o5", "o4", "o3"]
    assert not any(g.cached for g in first.grades)
    assert seen and seen[-1] == pytest.approx(1.0) and seen == sorted(seen)
    assert len(list(cache.glob("*.npz"))) == 3
    assert not list(cache.glob(".partial-*"))

    again = grade_batch(profiles, spec, battery=fake_battery, jobs=1, cache_dir=cache)
    assert call_names(calls) == ["o3", "o4", "o5"]  # no new battery call
    assert all(g.cached for g in again.grades)
    for g1, g2 in zip(first.grades, again.grades, strict=True):
        assert g1.lines == g2.lines
        np.testing.assert_array_equal(
            g1.curves["thd_n_vs_level"]["thd_n_db"], g2.curves["thd_n_vs_level"]["thd_n_db"]
        )

    # the cache is keyed by what the battery computed from, not by the spec sheet: a changed
    # limit re-grades every profile from the cache, with no battery call, and the grades
    # follow the new limit (o3's dynamic range of 110 dB now misses 111 dB)
    spec2 = parse_spec(SPEC.replace("110.0", "111.0"))
    regraded = grade_batch(profiles, spec2, battery=fake_battery, jobs=1, cache_dir=cache)
    assert call_names(calls) == ["o3", "o4", "o5"]
    assert all(g.cached for g in regraded.grades)
    o3 = next(g for g in regraded.grades if g.name == "o3")
    assert o3.lines[0].target.limit == 111.0 and o3.lines[0].margin == -1.0
    assert not o3.lines[0].passed
    # a changed profile (content, not name) is a new key: it runs again
    (pdir / "o3.toml").write_text(profile_text("o3", 3) + "seed = 9\n")
    grade_batch(collect_profiles([pdir]), spec2, battery=fake_battery, jobs=1, cache_dir=cache)
    assert call_names(calls).count("o3") == 2 and len(call_names(calls)) == 4


def test_interrupted_batch_keeps_finished_results(tmp_path, batch_files, calls):
    pdir, spec_path = batch_files
    spec = parse_spec(spec_path.read_text())
    profiles = collect_profiles([pdir])  # o3, o4 (interrupts), o5
    cache = tmp_path / "cache"
    out = grade_batch(profiles, spec, battery=interrupting_battery, jobs=1, cache_dir=cache)
    assert out.interrupted and not out.passed
    assert [g.name for g in out.grades] == ["o3"]
    assert [Path(u).stem for u in out.unfinished] == ["o4", "o5"]
    assert call_names(calls) == ["o3"]
    resumed = grade_batch(profiles, spec, battery=fake_battery, jobs=1, cache_dir=cache)
    assert call_names(calls) == ["o3", "o4", "o5"]  # o3 not run again
    assert {g.name: g.cached for g in resumed.grades} == {"o3": True, "o4": False, "o5": False}


def test_crashing_profile_fails_and_the_batch_goes_on(tmp_path, batch_files, calls):
    pdir, spec_path = batch_files
    (pdir / "o7.toml").write_text(profile_text("o7", 7))
    out = grade_batch(
        collect_profiles([pdir]),
        parse_spec(spec_path.read_text()),
        battery=fake_battery,
        jobs=1,
        cache_dir=tmp_path / "cache",
    )
    assert len(out.grades) == 4
    bad = out.grades[-1]
    assert bad.name == "o7" and not bad.passed
    assert bad.failure == "battery crashed: RuntimeError: loop blew up"
    assert all(not ln.passed and ln.reason == bad.failure for ln in bad.lines)
    # failures are not cached: the next batch tries again
    assert len(list((tmp_path / "cache").glob("*.npz"))) == 3


def test_parallel_batch_uses_worker_processes(tmp_path, batch_files, calls):
    pdir, spec_path = batch_files
    (pdir / "o7.toml").write_text(profile_text("o7", 7))
    spec = parse_spec(spec_path.read_text())
    one = grade_batch(collect_profiles([pdir]), spec, battery=fake_battery, jobs=1)
    serial_calls = set(call_names(calls))
    for p in calls.iterdir():
        p.unlink()
    fractions = []
    two = grade_batch(
        collect_profiles([pdir]),
        spec,
        battery=fake_battery,
        jobs=2,
        progress=lambda f, label: fractions.append(f),
    )
    assert set(call_names(calls)) == serial_calls
    pids = {p.name.split(".")[1] for p in calls.iterdir()}
    assert str(os.getpid()) not in pids and 1 <= len(pids) <= 2
    assert [g.name for g in two.grades] == [g.name for g in one.grades]
    assert [g.lines for g in two.grades] == [g.lines for g in one.grades]
    assert two.grades[-1].failure.startswith("battery crashed")
    assert fractions[-1] == pytest.approx(1.0)


def test_bad_arguments(batch_files):
    pdir, spec_path = batch_files
    spec = parse_spec(spec_path.read_text())
    with pytest.raises(ParameterError, match="jobs=0"):
        grade_batch([], spec, battery=fake_battery, jobs=0)
    with pytest.raises(ProfileError, match="no such file"):
        collect_profiles([pdir / "missing.toml"])
    empty = pdir / "empty"
    empty.mkdir()
    with pytest.raises(ProfileError, match="no \\*.toml"):
        collect_profiles([empty])


def test_same_names_are_told_apart(tmp_path, calls):
    for stem in ("a", "b"):
        (tmp_path / f"{stem}.toml").write_text(profile_text("twin", 3))
    out = grade_batch(collect_profiles([tmp_path]), parse_spec(SPEC), battery=fake_battery, jobs=1)
    assert sorted(g.name for g in out.grades) == ["twin (a)", "twin (b)"]


def test_cache_ignores_a_damaged_entry(tmp_path):
    cache = GradeCache(tmp_path)
    key = GradeCache.key("p", "1", "")
    assert len(key) == 64
    cache.path(key).write_bytes(b"not a zip file")
    assert cache.load(key) is None
    entry = {
        "metrics": {"x": np.float64(1.5), "y": None, "z": math.inf},
        "curves": {"c": {"a": np.arange(3)}},
        "notes": ("n",),
        "seconds": 2,
    }
    cache.store(key, entry)
    entry = cache.load(key)
    assert entry["metrics"] == {"x": 1.5, "y": None, "z": None}
    np.testing.assert_array_equal(entry["curves"]["c"]["a"], np.arange(3))


# --------------------------------------------------------------------------------------------
# the command
# --------------------------------------------------------------------------------------------


@pytest.fixture
def use_fake_battery(monkeypatch):
    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: fake_battery)


def run_cli(args):
    return CliRunner().invoke(main, ["grade", *args], catch_exceptions=False)


def test_cli_exit_codes_and_table(tmp_path, batch_files, calls, use_fake_battery):
    pdir, spec_path = batch_files
    cache = tmp_path / "cache"
    # o3 fails the -20 dBFS THD+N target: exit 1
    r = run_cli([str(pdir), "--spec", str(spec_path), "--jobs", "1", "--cache", str(cache)])
    assert r.exit_code == 1, r.output
    lines = r.output.splitlines()
    header = next(ln for ln in lines if ln.startswith("rank") and "target" in ln)
    assert "margin" in header and "unit" in header
    # the table is aligned: in every row the unit column starts under its heading
    start = header.index("unit")
    rows = lines[lines.index(header) + 1 : lines.index(header) + 10]
    assert [ln[start:].split()[0] for ln in rows] == ["dB", "dBFS", "dB"] * 3
    assert any("o5" in ln and "PASS" in ln for ln in lines)
    assert any("o3" in ln and "FAIL" in ln for ln in lines)
    # only passing profiles: exit 0
    r = run_cli([str(pdir / "o5.toml"), "--spec", str(spec_path), "--jobs", "1",
                 "--cache", str(cache)])  # fmt: skip
    assert r.exit_code == 0, r.output
    # bad input: exit 2 and one line
    bad = tmp_path / "bad.toml"
    bad.write_text('[[target]]\nmetric = "loudness"\nat_least = 1\n')
    r = CliRunner().invoke(main, ["grade", str(pdir), "--spec", str(bad)])
    assert r.exit_code == 2
    assert "loudness" in r.output and len(r.output.strip().splitlines()) == 1
    r = CliRunner().invoke(main, ["grade", str(tmp_path / "nope"), "--spec", str(spec_path)])
    assert r.exit_code == 2


def test_cli_json(tmp_path, batch_files, calls, use_fake_battery):
    pdir, spec_path = batch_files
    r = run_cli([str(pdir), "--spec", str(spec_path), "--jobs", "1", "--json",
                 "--cache", str(tmp_path / "c")])  # fmt: skip
    assert r.exit_code == 1
    data = json.loads(r.output)
    assert [p["name"] for p in data["profiles"]] == ["o5", "o4", "o3"]
    o3 = data["profiles"][2]
    assert o3["passed"] is False
    thd = next(t for t in o3["targets"] if t["metric"] == "thd_n_db")
    assert thd["at_level_dbfs"] == -20.0 and thd["margin"] == pytest.approx(-4.0)


def test_cli_interrupt_exit_code(tmp_path, batch_files, calls, monkeypatch):
    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: interrupting_battery)
    pdir, spec_path = batch_files
    r = run_cli([str(pdir), "--spec", str(spec_path), "--jobs", "1",
                 "--cache", str(tmp_path / "c")])  # fmt: skip
    assert r.exit_code == 130
    assert "interrupted" in r.output and "o3" in r.output


def test_dataclass_is_frozen():
    g = _grade("a", [1.0])
    with pytest.raises(dataclasses.FrozenInstanceError):
        g.name = "b"


def blocking_battery(profile, *, jobs=None, progress=None, seed=0, **options):
    """Finishes at once for loop order 2; otherwise marks that it started and waits forever."""
    if profile.modulator.order != 2:
        Path(os.environ["AUDIODSM_TEST_CALLS"], f"started.{profile.name}").touch()
        while True:
            time.sleep(0.05)
    return fake_battery(profile)


_CTRL_C_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
sys.path.insert(0, {root!r})  # the package of this checkout, not whichever one is installed
from test_grade import blocking_battery
from audiodsm.evaluate.grade import collect_profiles, grade_batch
from audiodsm.spec import parse_spec

if __name__ == "__main__":
    spec = parse_spec('[[target]]\\nmetric = "dynamic_range_db_a"\\nat_least = 90\\n')
    b = grade_batch(collect_profiles([{pdir!r}]), spec, battery=blocking_battery, jobs=2,
                    cache_dir={cache!r})
    print("RESULT", b.interrupted, [g.name for g in b.grades], len(b.unfinished), flush=True)
"""


def test_ctrl_c_on_a_parallel_batch_keeps_finished_results(tmp_path, calls):
    # a real SIGINT to the whole process group, as a terminal's Ctrl-C sends it
    pdir = tmp_path / "p"
    pdir.mkdir()
    for name, order in (("a", 2), ("b", 3), ("c", 4)):
        (pdir / f"{name}.toml").write_text(profile_text(name, order))
    cache = tmp_path / "cache"
    script = tmp_path / "run.py"
    script.write_text(
        _CTRL_C_SCRIPT.format(
            tests=str(Path(__file__).parent),
            root=str(Path(__file__).parent.parent),
            pdir=str(pdir),
            cache=str(cache),
        )
    )
    proc, _ = start_batch_and_wait(script, cache, calls)
    try:
        os.killpg(proc.pid, signal.SIGINT)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert "RESULT True ['a'] 2" in out, err
    assert len(list(cache.glob("*.npz"))) == 1


def test_real_battery_on_a_shipped_profile(tmp_path):
    # the real battery, cut to two of its tests and its short plan, on the shipped 17-level loop
    from audiodsm.evaluate.battery import BatteryPlan
    from audiodsm.evaluate.report import write_report

    root = Path(__file__).resolve().parents[1]
    sheet = parse_spec(
        '[[target]]\nmetric = "dynamic_range_db_a"\nat_least = 100.0\n'
        '[[target]]\nmetric = "thd_n_db"\nat_level_dbfs = -20.0\nat_most = -90.0\n'
        '[[target]]\nmetric = "max_stable_amplitude_dbfs"\nat_least = -6.0\n'
    )
    options = {"plan": BatteryPlan.quick(), "tests": ("dynamic_range", "level_sweep")}
    batch = grade_batch(
        collect_profiles([root / "profiles" / "dac_chip" / "nrz17_64x.toml"]),
        sheet,
        jobs=1,
        cache_dir=tmp_path / "cache",
        battery_options=options,
    )
    (g,) = batch.grades
    dr, thd, msa = g.lines
    assert dr.margin == pytest.approx(g.metrics["dynamic_range_db_a"] - 100.0)
    # the sweep point at -20 dBFS is the battery's own -20 dBFS THD+N reading
    assert thd.value == pytest.approx(g.metrics["thd_n_db_at_minus20_dbfs"])
    assert thd.margin == pytest.approx(-90.0 - thd.value)
    assert msa.reason == "not measured by the battery" and not g.passed
    # the options are part of the cache key: the same run is read back, a fuller one is not
    again = grade_batch(
        collect_profiles([root / "profiles" / "dac_chip"]),
        sheet,
        jobs=1,
        cache_dir=tmp_path / "cache",
        battery_options=options,
        battery=fake_battery,
    )
    by_name = {x.name: x for x in again.grades}
    assert by_name[g.name].cached and by_name[g.name].lines == g.lines
    assert not any(x.cached for x in again.grades if x.name != g.name)
    page = write_report(batch, tmp_path / "r")["html"].read_text()
    # overview, the two noise-density views (whole band, audio band), THD+N sweep
    assert page.count("data:image/png;base64,") == 1 + 3


def test_cli_report_and_no_cache(tmp_path, batch_files, calls, use_fake_battery, monkeypatch):
    pdir, spec_path = batch_files
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    report = tmp_path / "out" / "report"
    r = run_cli([str(pdir / "o5.toml"), "--spec", str(spec_path), "--jobs", "1",
                 "--report", str(report), "--no-progress"])  # fmt: skip
    assert r.exit_code == 0, r.output
    assert sorted(p.name for p in report.iterdir()) == ["grades.csv", "grades.html", "grades.json"]
    assert str(report / "grades.html") in r.output
    # the default cache folder follows XDG_CACHE_HOME
    assert len(list((tmp_path / "xdg" / "audiodsm" / "grades").glob("*.npz"))) == 1
    r = run_cli([str(pdir / "o5.toml"), "--spec", str(spec_path), "--jobs", "1", "--no-cache"])
    assert r.exit_code == 0 and "cache:" not in r.output
    assert call_names(calls) == ["o5", "o5"]  # --no-cache ran it again
    # a report folder that is a file is bad input
    r = CliRunner().invoke(
        main, ["grade", str(pdir), "--spec", str(spec_path), "--report", str(spec_path)]
    )
    assert r.exit_code == 2 and "is a file" in r.output


def test_cli_help_names_the_options():
    r = CliRunner().invoke(main, ["grade", "--help"])
    assert r.exit_code == 0
    for option in ("--spec", "--jobs", "--report", "--json", "--cache", "--recompute"):
        assert option in r.output


def dying_battery(profile, **kwargs):
    """Ends its whole process (as a crash in compiled code would) for loop order 7."""
    if profile.modulator.order == 7:
        os._exit(3)
    return fake_battery(profile, **kwargs)


def test_a_profile_that_kills_its_worker_fails_alone(tmp_path, batch_files, calls):
    pdir, spec_path = batch_files
    (pdir / "o7.toml").write_text(profile_text("o7", 7))
    out = grade_batch(
        collect_profiles([pdir]),
        parse_spec(spec_path.read_text()),
        battery=dying_battery,
        jobs=2,
        cache_dir=tmp_path / "cache",
    )
    by_name = {g.name: g for g in out.grades}
    assert set(by_name) == {"o3", "o4", "o5", "o7"} and not out.interrupted
    assert by_name["o7"].failure.startswith("worker process ended unexpectedly")
    assert not any(by_name[n].failure for n in ("o3", "o4", "o5"))
    assert len(list((tmp_path / "cache").glob("*.npz"))) == 3


def test_cli_interrupted_json_stays_one_document(tmp_path, batch_files, calls, monkeypatch):
    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: interrupting_battery)
    pdir, spec_path = batch_files
    r = run_cli([str(pdir), "--spec", str(spec_path), "--jobs", "1", "--json",
                 "--cache", str(tmp_path / "c")])  # fmt: skip
    assert r.exit_code == 130
    data = json.loads(r.stdout)
    assert data["interrupted"] is True and [p["name"] for p in data["profiles"]] == ["o3"]
    assert "interrupted" in r.stderr


def test_cli_short_runs_the_short_plan_as_measure_does(tmp_path, batch_files, monkeypatch):
    # `grade --short` and `measure --short` share one option: the battery's short plan.
    from audiodsm.evaluate.battery import BatteryPlan

    plans = []

    def plan_battery(profile, **kwargs):
        plans.append(kwargs.get("plan"))
        return fake_battery(profile, **kwargs)

    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: plan_battery)
    pdir, spec_path = batch_files
    args = [str(pdir / "o5.toml"), "--spec", str(spec_path), "--jobs", "1", "--no-cache"]
    assert run_cli(args).exit_code == 0
    assert run_cli([*args, "--short"]).exit_code == 0
    # the plan is always explicit now (the default one unless --short); the spec's -20 dBFS
    # target is a level both sweeps have, so neither plan gains a level
    assert plans == [BatteryPlan(), BatteryPlan.quick()]
    for command in ("grade", "measure"):
        help_text = CliRunner().invoke(main, [command, "--help"]).output
        assert "--short" in help_text and "Shorter captures and fewer points" in help_text


# --------------------------------------------------------------------------------------------
# validity, normalized ranking, levels a spec asks for
# --------------------------------------------------------------------------------------------


def test_invalid_readings_fail_with_the_reason():
    spec = parse_spec(SPEC)
    metrics = {"dynamic_range_db_a": None, "idle_tone_max_dbfs": None}
    invalid = {
        "dynamic_range_db_a": "loop overloaded (12 guard actions)",
        "idle_tone_max_dbfs": "3 of 12 captures searched were not valid",
    }
    curves = {
        "thd_n_vs_level": {
            "level_dbfs": np.array([0.0, -20.0]),
            # a number the battery still keeps in an array must not be graded when the point
            # is invalid: -274 dB would pass any THD+N limit
            "thd_n_db": np.array([-274.0, -274.0]),
            "invalid_reason": np.array(["", "loop overloaded from -12 dBFS"]),
        }
    }
    dr, tone, thd = grade_metrics(metrics, curves, spec, invalid)
    assert not dr.passed and not dr.valid and dr.value is None and dr.margin is None
    assert dr.reason == "invalid: loop overloaded (12 guard actions)"
    assert tone.reason.startswith("invalid: 3 of 12") and not tone.passed
    assert thd.reason == "invalid: loop overloaded from -12 dBFS" and not thd.passed
    assert not thd.valid


def test_ranking_uses_normalized_margins_so_count_targets_do_not_pin_it():
    # Two passing profiles with an overload-count target (limit 0, margin always 0 when it
    # passes) and a dynamic-range target: the plain worst margin is 0.00 for both, a false
    # tie; the normalized margin leaves the count out and ranks by the dynamic range.
    count = Target("overload_count", "at_most", 0.0)
    dr = Target("dynamic_range_db_a", "at_least", 110.0)

    def profile(name, dr_value):
        lines = (
            TargetGrade(count, 0.0, 0.0, True),
            TargetGrade(dr, dr_value, dr_value - 110.0, True),
        )
        return ProfileGrade(name=name, source="", digest="", lines=lines)

    a, b = profile("a", 112.0), profile("b", 117.0)
    assert a.worst_margin == b.worst_margin == 0.0
    assert a.ranking_margin == 2.0 and b.ranking_margin == 7.0
    assert [g.name for g in rank_grades([a, b])] == ["b", "a"]
    # Hz and FS margins become the limit-to-reading ratio in dB: 2 MHz allowed, 1 MHz read
    # is a factor 2 below the limit, 20 log10(2) = 6.02 dB
    rate = Target("switching_rate_hz", "at_most", 2.0e6)
    assert normalized_margin(rate, 1.0e6) == pytest.approx(20 * math.log10(2.0))
    assert normalized_margin(rate, 4.0e6) == pytest.approx(-20 * math.log10(2.0))
    peak = Target("state_peak_max", "at_least", 0.5)
    assert normalized_margin(peak, 1.0) == pytest.approx(20 * math.log10(2.0))
    assert normalized_margin(count, 0.0) is None and normalized_margin(dr, None) is None
    # a passing profile ranks above a failing one whatever their margins
    c = ProfileGrade(name="c", source="", digest="", lines=(TargetGrade(dr, 109.0, -1.0, False),))
    assert [g.name for g in rank_grades([c, a])] == ["a", "c"]


def test_spec_levels_missing_from_the_sweep_are_measured():
    from audiodsm.evaluate.battery import BatteryPlan

    spec = parse_spec(
        SPEC
        + '\n[[target]]\nmetric = "thd_n_db_a"\nat_level_dbfs = -37.5\nat_most = -80.0\n'
        + '\n[[target]]\nmetric = "thd_n_db"\nat_level_dbfs = -45.0\nat_most = -80.0\n'
    )
    plan = plan_for_spec(None, spec)
    assert -37.5 in plan.sweep_levels_dbfs and -45.0 in plan.sweep_levels_dbfs
    assert plan.sweep_levels_dbfs == tuple(sorted(plan.sweep_levels_dbfs, reverse=True))
    assert plan.check() == plan
    # -20 dBFS is in the default sweep already: a spec reading only it leaves the plan as it is
    assert plan_for_spec(None, parse_spec(SPEC)) == BatteryPlan()
    quick = BatteryPlan.quick()
    assert plan_for_spec(quick, spec).sweep_levels_dbfs == tuple(
        sorted({*quick.sweep_levels_dbfs, -37.5, -45.0}, reverse=True)
    )


def test_grade_passes_the_spec_levels_to_the_battery(tmp_path, monkeypatch):
    plans = []

    def plan_battery(profile, **kwargs):
        plans.append(kwargs.get("plan"))
        out = fake_battery(profile, **kwargs)
        levels = np.array(kwargs["plan"].sweep_levels_dbfs)
        out.curves["thd_n_vs_level"] = {"level_dbfs": levels, "thd_n_db": -100.0 + 0 * levels}
        return out

    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: plan_battery)
    (tmp_path / "p.toml").write_text(profile_text("p", 5))
    spec = parse_spec('[[target]]\nmetric = "thd_n_db"\nat_level_dbfs = -37.5\nat_most = -90.0\n')
    out = grade_batch(collect_profiles([tmp_path]), spec, jobs=1)
    assert -37.5 in plans[0].sweep_levels_dbfs
    assert out.passed and out.grades[0].lines[0].value == -100.0


def test_cache_keeps_the_invalid_readings(tmp_path):
    cache = GradeCache(tmp_path)
    key = GradeCache.key("p", "1", "")
    entry = {
        "metrics": {"dynamic_range_db": None},
        "curves": {
            "thd_n_vs_level": {
                "level_dbfs": np.array([0.0, -1.0]),
                "invalid_reason": np.array(["", "tone lost at -1 dBFS"]),
            }
        },
        "notes": (),
        "seconds": 1.0,
        "invalid": {"dynamic_range_db": "loop overloaded (3 guard actions)"},
    }
    cache.store(key, entry)
    back = cache.load(key)
    assert back["invalid"] == entry["invalid"]
    assert list(back["curves"]["thd_n_vs_level"]["invalid_reason"]) == ["", "tone lost at -1 dBFS"]


UNSTABLE = Path(__file__).parent / "profiles" / "unstable_order8.toml"

UNSTABLE_SPEC = """
name = "what the unstable loop must fail"

[[target]]
metric = "thd_n_db_at_minus1_dbfs"
at_most = -90.0

[[target]]
metric = "thd_n_db_a_at_minus20_dbfs"
at_most = -90.0

[[target]]
metric = "thd_n_db"
at_level_dbfs = -37.5
at_most = -80.0

[[target]]
metric = "dynamic_range_db_a"
at_least = 100.0

[[target]]
metric = "dynamic_range_db"
at_least = 100.0

[[target]]
metric = "idle_tone_max_dbfs"
at_most = -120.0
"""


def test_unstable_profile_fails_every_target_with_the_reason(tmp_path):
    # The broken loop (order 8, out-of-band gain 6, single-bit) read THD+N -274 dB at
    # -1 dBFS and passed. Through the real battery (short plan) and the command, every THD+N,
    # dynamic-range and idle-tone target now fails, each with the reason shown.
    spec = tmp_path / "sheet.toml"
    spec.write_text(UNSTABLE_SPEC)
    r = run_cli([str(UNSTABLE), "--spec", str(spec), "--short", "--no-cache", "--jobs", "1",
                 "--json", "--no-progress"])  # fmt: skip
    assert r.exit_code == 1, r.output
    data = json.loads(r.stdout)
    (prof,) = data["profiles"]
    assert prof["passed"] is False and prof["failed_targets"] == 6
    for t in prof["targets"]:
        assert t["passed"] is False and t["valid"] is False and t["value"] is None
        assert t["reason"].startswith("invalid: ")
    by = {(t["metric"], t["at_level_dbfs"]): t["reason"] for t in prof["targets"]}
    assert "loop overloaded from" in by[("thd_n_db_at_minus1_dbfs", None)]
    assert "tone lost at -37.5 dBFS" in by[("thd_n_db", -37.5)]  # measured at the level asked
    assert "-60 dBFS tone was lost" in by[("dynamic_range_db_a", None)]
    assert "captures searched were not valid" in by[("idle_tone_max_dbfs", None)]
    # the battery printed no good-looking number for them either
    for k in ("thd_n_db_at_minus1_dbfs", "dynamic_range_db_a", "idle_tone_max_dbfs"):
        assert prof["metrics"][k] is None
        assert prof["validity"][k]["valid"] is False
    # and the table says so
    r = run_cli([str(UNSTABLE), "--spec", str(spec), "--short", "--no-cache", "--jobs", "1",
                 "--no-progress"])  # fmt: skip
    assert "FAIL: invalid: loop overloaded from" in r.output


def test_known_answer_grade_of_a_16_bit_source(tmp_path):
    # A 16-bit source with TPDF dither through a chain far cleaner than 16 bits: its dynamic
    # range is the dither's, 10 log10((1/2) / (LSB^2/4 * (20 kHz - 20 Hz) / (rate/2))) with
    # LSB = 2^-15 (TPDF of 2 LSB peak to peak adds LSB^2/6 to the rounding's LSB^2/12:
    # Lipshitz, Wannamaker & Vanderkooy 1992, JAES 40(5)). The real battery graded against
    # limits 0.2 dB either side of it must pass the lower and fail the upper.
    from audiodsm.evaluate.battery import DEFAULT_RATE_HZ, BatteryPlan

    pdir = tmp_path / "profiles"
    pdir.mkdir()
    (pdir / "source16.toml").write_text(
        '[input]\nsource_bits = 16\nrequantize = "tpdf"\n'
        "[modulator]\norder = 5\nlevels = 65\nout_of_band_gain = 3.0\n"
        '[output]\nkind = "nrz"\n[reconstruction]\nkind = "none"\n'
    )
    rate = DEFAULT_RATE_HZ
    lsb = 2.0**-15
    theory = 10 * math.log10(0.5 / (lsb**2 / 4 * (20000.0 - 20.0) / (rate / 2)))
    assert theory == pytest.approx(94.12, abs=0.01)  # at 48 kHz; 93.75 dB at 44.1 kHz
    options = {"plan": dataclasses.replace(BatteryPlan.quick(), tone_s=2.0)}
    options["tests"] = ("dynamic_range",)
    grades = {}
    for name, limit in (("below", theory - 0.2), ("above", theory + 0.2)):
        sheet = parse_spec(f'[[target]]\nmetric = "dynamic_range_db"\nat_least = {limit!r}\n')
        batch = grade_batch(
            collect_profiles([pdir]),
            sheet,
            jobs=1,
            cache_dir=tmp_path / "cache",
            battery_options=options,
        )
        (grades[name],) = batch.grades
    measured = grades["below"].metrics["dynamic_range_db"]
    assert measured == pytest.approx(theory, abs=0.2)
    assert grades["below"].passed and not grades["above"].passed
    assert grades["above"].cached  # the spec is applied to the cached battery
