"""Design-space exploration: space files, pruning, cost, the front, the written outputs."""

import math
from pathlib import Path

import pytest
from click.testing import CliRunner
from fault_batteries import quick_battery

from audiodsm.cli import main
from audiodsm.errors import ParameterError, ProfileError
from audiodsm.evaluate.explore import (
    cost_proxy,
    enumerate_candidates,
    explore_space,
    load_space,
    pareto_front,
    predicted_range_with_dither_db,
    write_exploration,
)
from audiodsm.profile import load_profile, parse_profile
from audiodsm.spec import parse_spec

ROOT = Path(__file__).resolve().parents[1]
# quick_battery reads 95 + 5 x order dB; the target sits between orders 3 and 4
SHEET = '[[target]]\nmetric = "dynamic_range_db_a"\nat_least = 112.0\n'


def write_space(folder, body, head='name = "t"\ncandidate_limit = 50\n'):
    path = folder / "space.toml"
    path.write_text(head + body)
    return path


def test_the_demo_space_has_at_least_40_candidates():
    space = load_space(ROOT / "profiles" / "spaces" / "dac_chip.toml")
    candidates = enumerate_candidates(space)
    assert len(candidates) >= 40
    # PDM is single-bit only: the schema refuses the other combinations, they are no candidates
    assert all(p.modulator.levels == 2 for _, p in candidates if p.output.kind == "pdm")
    assert len({p.name for _, p in candidates}) == len(candidates)


def test_element_selection_is_an_axis_and_applies_only_to_multi_level_nrz(tmp_path):
    body = (
        'base = "base.toml"\n[vary]\nlevels = [2, 9]\noutput_kind = ["pdm", "nrz"]\n'
        'element_selection = ["thermometer", "data-weighted"]\n'
    )
    (tmp_path / "base.toml").write_text('name = "b"\n[impairments]\npart_seed = 3\n')
    candidates = enumerate_candidates(load_space(write_space(tmp_path, body)))
    picked = {(p.modulator.levels, p.output.kind, p.impairments.element_selection)
              for _, p in candidates}  # fmt: skip
    # element selection needs a multi-level NRZ output: the schema refuses it elsewhere, and
    # PDM is single-bit only, so PDM keeps the (ideal) thermometer only
    assert (9, "nrz", "data-weighted") in picked and (9, "nrz", "thermometer") in picked
    assert not any(kind == "pdm" and sel != "thermometer" for _, kind, sel in picked)
    names = {p.name for _, p in candidates}
    assert "9lev-nrz-data-weighted" in names and len(names) == len(candidates)


@pytest.mark.parametrize(
    ("body", "message"),
    [
        ("[vary]\norder = [3]\nwobble = [1]\n", "vary.wobble"),
        ("colour = 1\n[vary]\norder = [3]\n", "colour"),
        ("[vary]\norder = []\n", "empty list"),
        ("[vary]\nout_of_band_gain = { from = 1.7, to = 1.3, step = 0.1 }\n", "empty range"),
    ],
)
def test_bad_space_files_are_refused(tmp_path, body, message):
    with pytest.raises(ProfileError, match=message):
        load_space(write_space(tmp_path, body))


def test_more_candidates_than_the_limit_is_refused_before_any_work(tmp_path):
    path = write_space(tmp_path, "[vary]\norder = [2, 3, 4]\nosr = [32, 64]\n",
                       head='name = "t"\ncandidate_limit = 5\n')  # fmt: skip
    with pytest.raises(ParameterError, match="6 candidates"):
        enumerate_candidates(load_space(path))
    sheet = tmp_path / "s.toml"
    sheet.write_text(SHEET)
    r = CliRunner().invoke(main, ["explore", str(path), str(sheet), "--out", str(tmp_path / "o")])
    assert r.exit_code == 2 and "candidate_limit = 5" in r.output
    assert not (tmp_path / "o").exists()


def test_dither_lowers_the_prediction_by_the_tpdf_variance():
    # TPDF dither of peak d LSB has variance d^2/6 LSB^2 against 1/12 for the quantizer
    # (Lipshitz, Wannamaker, Vanderkooy, JAES 1992): 10 log10(1 + 2 d^2) dB less range
    plain = parse_profile(
        'name = "a"\n[modulator]\norder = 4\nlevels = 5\n[output]\nkind = "nrz"\n'
    )
    dithered = parse_profile(
        'name = "b"\n[modulator]\norder = 4\nlevels = 5\ndither_lsb = 1.0\n[output]\nkind = "nrz"\n'
    )
    drop = predicted_range_with_dither_db(plain) - predicted_range_with_dither_db(dithered)
    # the dither also takes headroom: the chain's input scale follows the no-overload bound
    # with the dither subtracted (Schreier & Temes 2005, ch. 4), here from 0.549 to 0.5
    from audiodsm.stages.chain import Chain

    scales = [Chain.from_profile(p, 48000, 1).input_scale for p in (plain, dithered)]
    assert scales[1] == 0.5 and 0.52 < scales[0] < 0.6
    headroom_db = 20 * math.log10(scales[0] / scales[1])
    assert drop == pytest.approx(10 * math.log10(3.0) + headroom_db, abs=1e-9)


def test_cost_is_clock_times_levels_times_order():
    p = load_profile(ROOT / "profiles" / "dac_chip" / "pdm5_64x.toml")
    # 48 kHz x 64 = 3.072 MHz; x 2 levels x order 5
    assert cost_proxy(p) == pytest.approx(3.072 * 2 * 5)


def test_pareto_front_matches_the_definition():
    pts = [(1, 0.0), (2, 1.0), (2, 0.5), (3, 1.0), (4, 3.0), (0.5, -math.inf), (5, 2.0)]
    front = pareto_front(pts)

    def dominated(i):
        return any(
            pts[j][0] <= pts[i][0] and pts[j][1] >= pts[i][1] and pts[j] != pts[i]
            for j in range(len(pts))
        )

    expected = [i for i in range(len(pts)) if not dominated(i) and math.isfinite(pts[i][1])]
    assert sorted(front) == sorted(expected) == [0, 1, 4]


def test_explore_prunes_grades_writes_the_front_and_resumes(tmp_path, monkeypatch):
    calls = tmp_path / "calls"
    calls.mkdir()
    monkeypatch.setenv("AUDIODSM_TEST_CALLS", str(calls))
    path = write_space(
        tmp_path,
        '[vary]\norder = [2, 3, 4, 5]\nlevels = [2, 9]\n[fixed]\n"output.kind" = "nrz"\n',
        head='name = "t"\ncandidate_limit = 50\nprune_slack_db = 0.0\n',
    )
    space, spec = load_space(path), parse_spec(SHEET)
    out = explore_space(space, spec, battery=quick_battery, jobs=1, cache_dir=tmp_path / "c")
    graded = [c for c in out.candidates if c.grade is not None]
    pruned = [c for c in out.candidates if c.grade is None]
    assert len(out.candidates) == 8 and pruned  # the low-order 2-level loops fall short
    assert all(c.predicted_db < 112.0 for c in pruned)
    assert all(c.predicted_db >= 112.0 for c in graded)
    front = [out.candidates[i] for i in out.front]
    assert front and all(c.grade.passed for c in front if c.grade.ranking_margin >= 0)
    written = write_exploration(out, tmp_path / "o")
    assert len(written["profiles"]) == len(front)
    for p, c in zip(written["profiles"], front, strict=True):
        assert load_profile(p).modulator == c.profile.modulator
    page = written["report"].read_text()
    assert "front.png" in page and all(c.profile.name in page for c in front)
    assert written["plot"].read_bytes()[:4] == b"\x89PNG"
    ran = len(list(calls.iterdir()))
    again = explore_space(space, spec, battery=quick_battery, jobs=1, cache_dir=tmp_path / "c")
    assert len(list(calls.iterdir())) == ran  # every battery came from the cache
    assert again.front == out.front


def test_cli_writes_the_front_and_the_report(tmp_path, monkeypatch):
    monkeypatch.setattr("audiodsm.evaluate.grade._default_battery", lambda: quick_battery)
    path = write_space(tmp_path, "[vary]\norder = [3, 4, 5]\nlevels = [2]\n")
    sheet = tmp_path / "s.toml"
    sheet.write_text(SHEET)
    out = tmp_path / "o"
    r = CliRunner().invoke(
        main,
        ["explore", str(path), str(sheet), "--out", str(out), "--jobs", "1",
         "--cache", str(tmp_path / "c"), "--no-progress"],
    )  # fmt: skip
    assert r.exit_code == 0, r.output
    assert "3 candidates" in r.output and "on the front" in r.output
    assert (out / "exploration.html").is_file() and list((out / "front").glob("*.toml"))
