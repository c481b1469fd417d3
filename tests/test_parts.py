"""Parts: N draws of a profile's random impairments, graded over their distribution."""

import hashlib
import json
import os

import numpy as np
import pytest
from click.testing import CliRunner
from fault_batteries import part_battery

from audiodsm.cli import main
from audiodsm.design.ntf import NoiseTransfer
from audiodsm.errors import ParameterError, ProfileError
from audiodsm.evaluate.grade import collect_profiles, grade_batch
from audiodsm.evaluate.parts import (
    PartReading,
    grade_parts,
    metric_spread,
    part_profile,
    part_seed_of,
    parts_needed,
    parts_to_run,
    random_draws,
)
from audiodsm.profile import parse_profile
from audiodsm.profile_text import profile_digest
from audiodsm.spec import parse_spec
from audiodsm.stages.elements import UnitElements
from audiodsm.stages.modulator import Modulator
from audiodsm.stages.output_stage import level_codes

MISMATCHED = """name = "{name}"
[modulator]
order = 3
levels = 17
[output]
kind = "nrz"
[impairments]
element_mismatch = 0.003
part_seed = {seed}
parts = {parts}
"""

IDEAL = 'name = "{name}"\n[modulator]\norder = 3\nlevels = 17\n[output]\nkind = "nrz"\n'

SPEC = """
name = "parts sheet"
[[target]]
metric = "dynamic_range_db_a"
at_least = 95.0
percentile = 75
[[target]]
metric = "idle_tone_max_dbfs"
at_most = -141.0
"""


def _part(index, metrics, invalid=None):
    return PartReading(index, index, metrics, dict(invalid or {}))


# --------------------------------------------------------------------------------------------
# seeds, counts and the order statistic
# --------------------------------------------------------------------------------------------


def test_part_seeds_are_the_documented_hash():
    assert part_seed_of(7, 0) == 7  # part 0 is the profile as written
    for k in (1, 2, 999):
        # docs/impairments.md: first 4 bytes of SHA-256("audiodsm part <base> <k>"), top bit off
        digest = hashlib.sha256(f"audiodsm part 7 {k}".encode("ascii")).digest()
        assert part_seed_of(7, k) == int.from_bytes(digest[:4], "big") & 0x7FFFFFFF
    seeds = {part_seed_of(7, k) for k in range(200)}
    assert len(seeds) == 200


def test_part_profiles_keep_their_digest_whatever_the_count():
    p5 = parse_profile(MISMATCHED.format(name="a", seed=3, parts=5))
    p9 = parse_profile(MISMATCHED.format(name="a", seed=3, parts=9))
    assert random_draws(p5) == ("element_mismatch",)
    assert parts_to_run(p5) == 5 and parts_to_run(p5, 2) == 2
    assert [profile_digest(part_profile(p5, k)) for k in range(5)] == [
        profile_digest(part_profile(p9, k)) for k in range(5)
    ]
    assert profile_digest(p5) == profile_digest(p9)  # the count is no part of a result
    assert part_profile(p5, 2).impairments.part_seed == part_seed_of(3, 2)
    ideal = parse_profile(IDEAL.format(name="i") + "[impairments]\nparts = 8\n")
    assert random_draws(ideal) == () and parts_to_run(ideal, 50) == 1
    assert profile_digest(ideal) == profile_digest(parse_profile(IDEAL.format(name="i")))


def test_parts_needed_is_the_hand_count():
    assert parts_needed(95, 20) == 19  # 19.0 exactly, not 20 by a rounding error
    assert parts_needed(95, 10) == 10  # 9.5 -> 10
    assert parts_needed(50, 3) == 2
    assert parts_needed(0.1, 3) == 1
    assert parts_needed(None, 7) == 7
    assert parts_needed(100, 7) == 7
    assert parts_needed(33.3, 1000) == 333


def test_known_part_readings_grade_as_the_hand_count():
    readings = [100.0, 101.0, 99.0, 105.0, 98.0, 103.0, 97.0, 110.0, 102.0, 96.0]
    parts = [_part(k, {"dynamic_range_db": v}) for k, v in enumerate(readings)]
    # by hand: 8 of the 10 readings are >= 98
    sheet = """
[[target]]
metric = "dynamic_range_db"
at_least = 98.0
percentile = {p}
"""
    line = grade_parts(parts, parse_spec(sheet.format(p=70)))[0]
    # 70 % of 10 = 7 parts needed; 8 meet it; the 7th largest reading is 99
    assert (line.parts_met, line.parts_needed, line.parts_total) == (8, 7, 10)
    assert line.passed and line.value == 99.0 and line.margin == 1.0
    line = grade_parts(parts, parse_spec(sheet.format(p=90)))[0]
    # 9 needed, 8 meet it: fails; the 9th largest reading is 97
    assert (line.parts_met, line.parts_needed) == (8, 9)
    assert not line.passed and line.value == 97.0 and line.margin == -1.0
    line = grade_parts(parts, parse_spec(sheet.format(p=80)))[0]
    assert line.passed and line.value == 98.0 and line.margin == 0.0  # at the limit passes
    # without a percentile every part must meet it: the worst reading is graded
    line = grade_parts(parts, parse_spec(sheet.replace("percentile = {p}\n", "")))[0]
    assert line.parts_needed == 10 and line.value == 96.0 and not line.passed
    # an upper limit takes the r-th smallest reading (Hyndman & Fan definition 1 at p/100)
    upper = '[[target]]\nmetric = "dynamic_range_db"\nat_most = 101.0\npercentile = 50\n'
    line = grade_parts(parts, parse_spec(upper))[0]
    assert line.value == sorted(readings)[4] == 100.0 and line.passed
    assert line.parts_met == 6


def test_invalid_and_missing_part_readings_never_count():
    parts = [
        _part(0, {"dynamic_range_db": 120.0}),
        _part(1, {"dynamic_range_db": None}, {"dynamic_range_db": "loop overloaded"}),
        _part(2, {"dynamic_range_db": 119.0}),
        _part(3, {}),
    ]
    sheet = '[[target]]\nmetric = "dynamic_range_db"\nat_least = 100.0\npercentile = {p}\n'
    line = grade_parts(parts, parse_spec(sheet.format(p=50)))[0]
    assert line.passed and line.value == 119.0 and line.parts_met == 2
    line = grade_parts(parts, parse_spec(sheet.format(p=75)))[0]
    assert not line.passed and line.value is None
    assert line.reason.startswith("2 of 4 parts have a reading, 3 needed (part 1: invalid:")


def test_spread_is_numpys_linear_percentiles_of_the_valid_readings():
    values = [3.0, 1.0, 4.0, 1.5, 9.0, 2.6]
    parts = [_part(k, {"x": v, "flag": True}) for k, v in enumerate(values)]
    parts.append(_part(6, {"x": None}, {"x": "tone lost"}))
    row = metric_spread(parts)["x"]
    assert row["parts"] == 7 and row["readings"] == 6
    assert row["min"] == 1.0 and row["max"] == 9.0
    # Hyndman & Fan (1996) definition 7: position 1 + (n - 1) q in the sorted readings
    ordered = sorted(values)
    for key, q in (("p5", 0.05), ("median", 0.5), ("p95", 0.95)):
        h = (len(ordered) - 1) * q
        lo = int(np.floor(h))
        want = ordered[lo] + (h - lo) * (ordered[min(lo + 1, 5)] - ordered[lo])
        assert row[key] == pytest.approx(want, rel=0, abs=1e-12)
    assert metric_spread(parts)["flag"]["readings"] == 0  # flags have no spread
    numpy_kinds = [_part(k, {"n": np.int64(k), "f": np.bool_(True)}) for k in range(3)]
    assert metric_spread(numpy_kinds)["n"]["median"] == 1.0  # numpy counts are numbers ...
    assert metric_spread(numpy_kinds)["f"]["readings"] == 0  # ... numpy flags are not


def test_spec_percentile_key_is_checked():
    ok = parse_spec('[[target]]\nmetric = "dynamic_range_db"\nat_least = 1.0\npercentile = 95\n')
    assert ok.targets[0].percentile == 95.0
    assert ok.targets[0].requirement == ">= 1 dB in 95 % of parts"
    for bad in ("0", "100.5", "-3", '"most"'):
        with pytest.raises(ProfileError, match="percentile"):
            parse_spec(
                f'[[target]]\nmetric = "dynamic_range_db"\nat_least = 1.0\npercentile = {bad}\n'
            )


def test_profile_parts_key_is_checked():
    for bad in ("0", "1001", "2.5"):
        with pytest.raises(ProfileError, match="impairments.parts"):
            parse_profile(MISMATCHED.format(name="a", seed=0, parts=bad))


# --------------------------------------------------------------------------------------------
# batches: caching per part, resuming, the CLI
# --------------------------------------------------------------------------------------------


@pytest.fixture
def calls(tmp_path, monkeypatch):
    folder = tmp_path / "calls"
    folder.mkdir()
    monkeypatch.setenv("AUDIODSM_TEST_CALLS", str(folder))
    return folder


def _ran(folder):
    return sorted(int(p.name.split(".")[1]) for p in folder.iterdir() if p.name.startswith("ran."))


def _write(tmp_path, parts=6):
    pdir = tmp_path / "profiles"
    pdir.mkdir(exist_ok=True)
    (pdir / "m.toml").write_text(MISMATCHED.format(name="m", seed=11, parts=parts))
    (pdir / "i.toml").write_text(IDEAL.format(name="i") + "[impairments]\nparts = 6\n")
    return pdir


def test_each_part_is_cached_and_a_larger_count_runs_only_the_new_parts(tmp_path, calls):
    pdir = _write(tmp_path)
    spec = parse_spec(SPEC)
    cache = tmp_path / "cache"
    batch = grade_batch(collect_profiles([pdir]), spec, battery=part_battery, jobs=1,
                        cache_dir=cache)  # fmt: skip
    seeds = [part_seed_of(11, k) for k in range(6)]
    assert _ran(calls) == sorted(seeds + [0])  # 6 parts of m, one run of the ideal profile
    by_name = {g.name: g for g in batch.grades}
    m, ideal = by_name["m"], by_name["i"]
    assert [p.seed for p in m.parts] == seeds and ideal.parts == ()
    # grade by hand from the stand-in's readings: DR = 100 + 5 z, tone = -140 + z
    from audiodsm.stages.elements import draw_element_errors

    z = [draw_element_errors(16, mismatch=0.003, seed=s)[0] / 0.003 for s in seeds]
    dr = sorted((100.0 + 5.0 * v for v in z), reverse=True)
    assert m.lines[0].parts_needed == 5  # ceil(0.75 * 6)
    assert m.lines[0].value == dr[4]
    assert m.lines[0].passed == (sum(v >= 95.0 for v in dr) >= 5)
    assert m.lines[1].value == max(-140.0 + v for v in z)  # every part: the worst one
    assert m.spread["dynamic_range_db_a"]["min"] == min(dr)
    # again: nothing runs
    for f in calls.iterdir():
        f.unlink()
    again = grade_batch(collect_profiles([pdir]), spec, battery=part_battery, jobs=1,
                        cache_dir=cache)  # fmt: skip
    assert _ran(calls) == [] and all(g.cached for g in again.grades)
    assert [line.value for line in again.grades[0].lines] == [
        line.value for line in batch.grades[0].lines
    ]
    # nine parts: only the three new ones run
    batch9 = grade_batch(collect_profiles([pdir]), spec, battery=part_battery, jobs=1,
                         cache_dir=cache, parts=9)  # fmt: skip
    assert _ran(calls) == sorted(part_seed_of(11, k) for k in (6, 7, 8))
    assert len({g.name: g for g in batch9.grades}["m"].parts) == 9


def test_an_interrupted_batch_resumes_without_rerunning_a_finished_part(
    tmp_path, calls, monkeypatch
):
    pdir = _write(tmp_path)
    spec = parse_spec(SPEC)
    cache = tmp_path / "cache"
    stop_at = part_seed_of(11, 3)

    def stopping(profile, **kw):
        if profile.impairments.part_seed == stop_at:
            raise KeyboardInterrupt
        return part_battery(profile, **kw)

    entries = collect_profiles([pdir / "m.toml"])
    batch = grade_batch(entries, spec, battery=stopping, jobs=1, cache_dir=cache)
    assert batch.interrupted and batch.grades == () and batch.unfinished == (str(pdir / "m.toml"),)
    done = _ran(calls)
    assert done == sorted(part_seed_of(11, k) for k in range(3))
    for f in calls.iterdir():
        f.unlink()
    batch = grade_batch(entries, spec, battery=part_battery, jobs=1, cache_dir=cache)
    assert _ran(calls) == sorted(part_seed_of(11, k) for k in range(3, 6))
    assert not batch.interrupted and len(batch.grades[0].parts) == 6


def test_a_crashing_part_fails_its_profile_with_the_part_named(tmp_path, calls):
    pdir = _write(tmp_path)
    bad = part_seed_of(11, 2)

    def crashing(profile, **kw):
        if profile.impairments.part_seed == bad:
            raise RuntimeError("element stage fell over")
        return part_battery(profile, **kw)

    batch = grade_batch(collect_profiles([pdir]), parse_spec(SPEC), battery=crashing, jobs=1)
    m = {g.name: g for g in batch.grades}["m"]
    assert (
        m.failure
        == f"part 2 (part_seed {bad}): battery crashed: RuntimeError: element stage fell over"
    )


def test_bad_part_counts_are_refused_before_any_work(tmp_path, calls, monkeypatch):
    pdir = _write(tmp_path)
    (tmp_path / "sheet.toml").write_text(SPEC)
    with pytest.raises(ParameterError, match="parts"):
        grade_batch(collect_profiles([pdir]), parse_spec(SPEC), battery=part_battery, parts=0)
    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: part_battery)
    for command in (
        ["grade", str(pdir), "--spec", str(tmp_path / "sheet.toml"), "--no-cache"],
        ["measure", str(pdir)],
        ["explore", str(tmp_path / "none.toml"), str(tmp_path / "sheet.toml")],
    ):
        for bad in ("0", "-2", "1001"):
            r = CliRunner().invoke(main, [*command, "--parts", bad])
            assert r.exit_code == 2, r.output
            lines = [ln for ln in r.output.splitlines() if ln.strip()]
            assert len(lines) == 1 and "--parts" in lines[0] and "1 to 1000" in lines[0], lines
    assert _ran(calls) == []


def test_grade_cli_shows_the_spread_and_the_part_counts(tmp_path, calls, monkeypatch):
    pdir = _write(tmp_path)
    (tmp_path / "sheet.toml").write_text(SPEC)
    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: part_battery)
    args = ["grade", str(pdir / "m.toml"), "--spec", str(tmp_path / "sheet.toml"), "--jobs", "1",
            "--no-cache", "--parts", "4"]  # fmt: skip
    r = CliRunner().invoke(main, args)
    assert r.exit_code in (0, 1), r.output
    assert "parts met, 3 needed)" in r.output  # ceil(0.75 * 4)
    assert "spread over 4 parts" in r.output
    header = next(ln for ln in r.output.splitlines() if ln.startswith("metric") and "p95" in ln)
    assert header.split() == ["metric", "unit", "parts", "min", "p5", "median", "p95", "max"]
    r = CliRunner().invoke(main, [*args, "--json"])
    data = json.loads(r.output)
    m = data["profiles"][0]
    assert m["parts"]["count"] == 4 and len(m["parts"]["per_part"]) == 4
    assert set(m["parts"]["spread"]["dynamic_range_db_a"]) >= {"min", "median", "p5", "p95", "max"}
    assert m["targets"][0]["parts_needed"] == 3


# --------------------------------------------------------------------------------------------
# the statistics of parts against theory
# --------------------------------------------------------------------------------------------


def test_thermometer_harmonics_over_parts_follow_the_drawn_weights_and_the_bridge_law():
    # Parts of a 17-level DAC with 1 % element mismatch and fixed (thermometer) selection.
    # Each part's static nonlinearity is the integral nonlinearity (INL) of its drawn weights
    # (INL_k = sum(e[:k]) with the draws' mean removed), and the harmonics of a sine through it
    # are the Fourier coefficients of the INL interpolated between codes (as in
    # tests/test_elements.py). Checks:
    # (1) every part's measured 2nd-4th harmonic power equals the one predicted from its own
    #     drawn weights within 0.5 dB, so the spread over parts (min, 5 %, median, 95 %, max)
    #     matches the predicted spread within 0.5 dB;
    # (2) outside anchor: the INL of mean-removed i.i.d. errors is a discrete Brownian bridge,
    #     Cov(INL_j, INL_k) = sigma^2 (min(j, k) - j k / N) (the partial sums of i.i.d. draws
    #     tied down at both ends; e.g. Billingsley, "Convergence of Probability Measures",
    #     1968, the Brownian bridge as the tied-down random walk). The expected harmonic power
    #     is then the quadratic form B Cov B^H of the harmonic's linear map B from the INL,
    #     and the mean over parts must agree within three standard errors of that mean.
    levels, n_el, sigma, count = 17, 16, 0.01, 32
    profile = parse_profile(
        MISMATCHED.format(name="t", seed=5, parts=count).replace("0.003", str(sigma))
    )
    n, cycles, amplitude = 1 << 17, 37, 0.7
    ntf = NoiseTransfer.designed(3, osr=64, out_of_band_gain=1.5)
    y, _ = Modulator(ntf, levels=levels, seed=1).run(
        amplitude * np.sin(2 * np.pi * np.arange(n) * cycles / n)
    )
    codes = level_codes(y, levels=levels)
    # the harmonics' linear map from the INL (per code) to the complex amplitude
    theta = 2 * np.pi * np.arange(4096) / 4096
    position = (amplitude * np.sin(theta) + 1) * n_el / 2
    eye = np.eye(levels)
    basis = np.array([np.fft.rfft(np.interp(position, np.arange(levels), eye[j])) for j in
                      range(levels)]).T * 2 / 4096  # fmt: skip
    harmonics = (2, 3, 4)
    tone = amplitude * n_el / 2
    measured, predicted = [], []
    for k in range(parts_to_run(profile)):
        seed = part_profile(profile, k).impairments.part_seed
        el = UnitElements(levels, "thermometer", mismatch=sigma, seed=seed)
        out, _ = el.process(codes)
        spectrum = np.abs(np.fft.rfft(out)) * 2 / n
        e = el.errors
        inl = np.array([e[:j].sum() - e.sum() / 2 for j in range(levels)])
        measured.append(sum((spectrum[h * cycles] / spectrum[cycles]) ** 2 for h in harmonics))
        predicted.append(sum(abs(basis[h] @ inl) ** 2 for h in harmonics) / tone**2)
    measured_db, predicted_db = 10 * np.log10(measured), 10 * np.log10(predicted)
    assert np.max(np.abs(measured_db - predicted_db)) <= 0.5
    spread_m = metric_spread([_part(k, {"h": v}) for k, v in enumerate(measured_db)])["h"]
    spread_p = metric_spread([_part(k, {"h": v}) for k, v in enumerate(predicted_db)])["h"]
    for key in ("min", "p5", "median", "p95", "max"):
        assert abs(spread_m[key] - spread_p[key]) <= 0.5, (key, spread_m, spread_p)
    assert spread_m["max"] - spread_m["min"] > 6.0  # the parts really differ
    j = np.arange(levels)
    bridge = sigma**2 * (np.minimum.outer(j, j) - np.outer(j, j) / n_el)
    expected = sum(np.real(basis[h] @ bridge @ basis[h].conj()) for h in harmonics) / tone**2
    mean, standard_error = np.mean(measured), np.std(measured, ddof=1) / np.sqrt(count)
    assert abs(mean - expected) <= 3 * standard_error, (mean, expected, standard_error)


# --------------------------------------------------------------------------------------------
# the cluster
# --------------------------------------------------------------------------------------------


@pytest.mark.skipif(os.cpu_count() is None, reason="needs a core count")
def test_parts_as_cluster_tasks_grade_as_the_serial_run_bit_for_bit(tmp_path, calls):
    pdir = _write(tmp_path)
    spec = parse_spec(SPEC)
    entries = collect_profiles([pdir])
    serial = grade_batch(entries, spec, battery=part_battery, jobs=1, parts=5)
    for f in calls.iterdir():
        f.unlink()
    cluster = grade_batch(entries, spec, battery=part_battery, jobs=2, parts=5)
    assert len(_ran(calls)) == 6  # five parts and the ideal profile, one task each
    pids = {p.name.split(".")[2] for p in calls.iterdir()}
    assert str(os.getpid()) not in pids  # they ran on the workers
    for a, b in zip(serial.grades, cluster.grades, strict=True):
        assert a.name == b.name and a.passed == b.passed
        for la, lb in zip(a.lines, b.lines, strict=True):
            assert (la.value, la.margin, la.parts_met) == (lb.value, lb.margin, lb.parts_met)
        assert [p.metrics for p in a.parts] == [p.metrics for p in b.parts]


def test_report_shows_the_spread_with_its_data(tmp_path, calls):
    import base64
    import csv
    import io
    import re

    from audiodsm.evaluate.report import CSV_COLUMNS, write_report

    pdir = _write(tmp_path)
    batch = grade_batch(collect_profiles([pdir]), parse_spec(SPEC), battery=part_battery,
                        jobs=1, parts=7)  # fmt: skip
    written = write_report(batch, tmp_path / "report")
    page = written["html"].read_text(encoding="utf-8")
    assert page.count("Spread over 7 parts") == 1  # the ideal profile runs once: no spread
    assert 'id="profile-' in page and "-parts.csv" in page
    m = {g.name: g for g in batch.grades}["m"]
    link = re.search(
        r'download="m-parts\.csv" href="data:text/csv;charset=utf-8;base64,([^"]+)"', page
    )
    rows = list(csv.reader(io.StringIO(base64.b64decode(link.group(1)).decode())))
    assert rows[0] == ["part", "part_seed", "metric", "value", "valid", "reason"]
    dr = [float(r[3]) for r in rows[1:] if r[2] == "dynamic_range_db_a"]
    assert dr == [p.metrics["dynamic_range_db_a"] for p in m.parts]
    data = json.loads(written["json"].read_text())
    prof = next(p for p in data["profiles"] if p["name"] == "m")
    assert prof["parts"]["seeds"] == [part_seed_of(11, k) for k in range(7)]
    assert prof["parts"]["spread"]["dynamic_range_db_a"]["median"] == pytest.approx(np.median(dr))
    table = list(csv.reader(io.StringIO(written["csv"].read_text())))
    assert tuple(table[0]) == CSV_COLUMNS
    row = next(r for r in table[1:] if r[1] == "m" and r[3] == "dynamic_range_db_a")
    assert row[-3:] == [str(m.lines[0].parts_met), "6", "7"]  # ceil(0.75 * 7) = 6


def test_spread_plot_draws_one_panel_per_metric_with_the_limit(tmp_path):
    from audiodsm.evaluate.plotting import plot_part_spread

    spec = parse_spec(SPEC)
    parts = [_part(k, {"dynamic_range_db_a": 90.0 + k, "idle_tone_max_dbfs": -140.0,
                       "x": float(k % 2)}) for k in range(8)]  # fmt: skip
    lines = grade_parts(parts, spec)
    fig = plot_part_spread(parts, graded=lines)
    axes = fig.get_axes()
    # the targeted metrics first (the tone reading does not vary but has a target), then x
    assert [a.get_ylabel() for a in axes] == [
        "dynamic_range_db_a (dB)",
        "idle_tone_max_dbfs (dBFS)",
        "x",
    ]
    dr = axes[0]
    limit = [ln for ln in dr.get_lines() if ln.get_linestyle() == "--"]
    assert len(limit) == 1 and limit[0].get_xdata()[0] == 95.0
    misses = [ln for ln in dr.get_lines() if ln.get_marker() == "x"]
    assert sorted(misses[0].get_xdata()) == [90.0, 91.0, 92.0, 93.0, 94.0]
    fig.savefig(tmp_path / "spread.png")
    with pytest.raises(ParameterError):
        plot_part_spread([_part(0, {"y": 1.0})])


def test_measure_runs_every_part_and_prints_the_spread(tmp_path, calls, monkeypatch):
    from types import SimpleNamespace

    from audiodsm.evaluate.battery import validity_table

    def fake_part(profile, threads, seed, plan, part=0, progress=None):
        res = part_battery(part_profile(profile, part))
        return SimpleNamespace(
            digest=profile_digest(part_profile(profile, part)), rate_hz=48000, seconds=0.01,
            metrics=res.metrics, invalid={}, notes=(), curves=res.curves,
            json_metrics=lambda: dict(res.metrics),
            validity=lambda: validity_table(res.metrics, {}),
        )  # fmt: skip

    monkeypatch.setattr("audiodsm.evaluate.measure_batch.measure_part", fake_part)
    pdir = _write(tmp_path)
    r = CliRunner().invoke(main, ["measure", str(pdir), "--jobs", "1", "--parts", "4", "--json"])
    assert r.exit_code == 0, r.output
    records = {d["profile"]: d for d in map(json.loads, r.output.splitlines())}
    assert "parts" not in records["i"]  # no random draw: one run
    parts = records["m"]["parts"]
    seeds = [part_seed_of(11, k) for k in range(4)]
    assert parts["count"] == 4 and parts["seeds"] == seeds and parts["percentiles"] == [5.0, 95.0]
    assert _ran(calls) == sorted(seeds + [0])
    dr = [p["metrics"]["dynamic_range_db_a"] for p in parts["per_part"]]
    assert records["m"]["metrics"]["dynamic_range_db_a"] == dr[0]  # part 0 is the profile
    row = parts["spread"]["dynamic_range_db_a"]
    assert (row["min"], row["max"]) == (min(dr), max(dr))
    assert row["median"] == pytest.approx(float(np.median(dr)), abs=1e-12)
    r = CliRunner().invoke(main, ["measure", str(pdir / "m.toml"), "--jobs", "1", "--parts", "3"])
    assert "m: spread over 3 parts (the column above is part 0)" in r.output


def test_explore_runs_the_parts_of_every_survivor_and_resumes(tmp_path, calls):
    from audiodsm.evaluate.explore import explore_space, load_space

    path = tmp_path / "space.toml"
    path.write_text(
        'name = "t"\ncandidate_limit = 50\nprune_slack_db = 60.0\n'
        "[vary]\norder = [3, 4]\nlevels = [9, 17]\n"
        '[fixed]\n"output.kind" = "nrz"\n"impairments.element_mismatch" = 0.003\n'
        '"impairments.parts" = 3\n'
    )
    space, spec = load_space(path), parse_spec(SPEC)
    out = explore_space(space, spec, battery=part_battery, jobs=1, cache_dir=tmp_path / "c")
    graded = [c for c in out.candidates if c.grade is not None]
    assert len(graded) == 4 and all(len(c.grade.parts) == 3 for c in graded)
    assert len(_ran(calls)) == 12
    for f in calls.iterdir():
        f.unlink()
    more = explore_space(space, spec, battery=part_battery, jobs=1, cache_dir=tmp_path / "c",
                         parts=5)  # fmt: skip
    assert len(_ran(calls)) == 8  # parts 3 and 4 of each survivor only
    assert all(len(c.grade.parts) == 5 for c in more.candidates if c.grade is not None)


def test_real_battery_parts_on_two_workers_equal_the_serial_run_bit_for_bit(tmp_path):
    # The real battery (short plan, dynamic-range test only) on two parts of a mismatched
    # 17-level DAC: the parts differ, and each part's unweighted readings are the same bits
    # on the cluster's workers as in this process (the weighted ones carry the weighting
    # fit's last-bit caveat of docs/scale.md, so the target is unweighted).
    from fault_batteries import short_real_battery

    (tmp_path / "m.toml").write_text(MISMATCHED.format(name="m", seed=2, parts=2))
    spec = parse_spec('[[target]]\nmetric = "dynamic_range_db"\nat_least = 60.0\n')
    entries = collect_profiles([tmp_path / "m.toml"])
    serial = grade_batch(entries, spec, battery=short_real_battery, jobs=1)
    cluster = grade_batch(entries, spec, battery=short_real_battery, jobs=2)
    a, b = serial.grades[0], cluster.grades[0]
    assert not a.failure and not b.failure, (a.failure, b.failure)
    dr = [p.metrics["dynamic_range_db"] for p in a.parts]
    assert len(dr) == 2 and dr[0] != dr[1]  # two different parts
    assert dr == [p.metrics["dynamic_range_db"] for p in b.parts]  # bit for bit
    assert (a.lines[0].value, a.lines[0].margin) == (b.lines[0].value, b.lines[0].margin)


def test_the_exploration_report_says_how_many_parts_ran(tmp_path, calls):
    from audiodsm.evaluate.explore import explore_space, load_space, write_exploration

    path = tmp_path / "space.toml"
    path.write_text(
        'name = "t"\ncandidate_limit = 50\nprune_slack_db = 60.0\n[vary]\norder = [3, 4]\n'
        '[fixed]\n"output.kind" = "nrz"\n"modulator.levels" = 17\n'
        '"impairments.element_mismatch" = 0.003\n'
    )
    out = explore_space(load_space(path), parse_spec(SPEC), battery=part_battery, jobs=1,
                        parts=2)  # fmt: skip
    page = write_exploration(out, tmp_path / "o")["report"].read_text()
    assert "Candidates with random impairments ran 2 parts each" in page
