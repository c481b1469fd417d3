import json

import pytest
from click.testing import CliRunner

from audiodsm.cli import main
from audiodsm.errors import ProfileError
from audiodsm.evaluate.battery import METRIC_UNITS, BatteryPlan, run_battery
from audiodsm.evaluate.grade import collect_profiles
from audiodsm.evaluate.tables import metrics_table
from audiodsm.profile import load_profile

PROFILE = """name = "tiny"
[modulator]
order = 3
[upsampler]
osr = 32
"""


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    folder = tmp_path_factory.mktemp("profiles")
    (folder / "tiny.toml").write_text(PROFILE)
    runner = CliRunner()
    plots = folder / "plots" / "tiny"  # created with its parents
    result = runner.invoke(
        main,
        ["measure", str(folder), "--json", "--short", "--jobs", "2", "--save-plots", str(plots)],
    )
    return folder, result


def test_json_lines_carry_every_metric(measured):
    folder, result = measured
    assert result.exit_code == 0, result.output
    lines = [ln for ln in result.stdout.splitlines() if ln.strip()]
    assert len(lines) == 1
    record = json.loads(lines[0])
    assert record["profile"] == "tiny"
    assert record["file"] == str(folder / "tiny.toml")
    assert set(record["metrics"]) == set(METRIC_UNITS)
    # every reading carries its validity; an invalid one is null with the reason
    assert set(record["validity"]) == set(METRIC_UNITS)
    for k, v in record["validity"].items():
        assert set(v) == {"valid", "reason"}
        assert v["valid"] is (v["reason"] == "")
        if not v["valid"]:
            assert record["metrics"][k] is None
    assert record["rate_hz"] == 48000
    assert record["modulator_samples"] > 0
    # the command reports what the library measures for the same profile and plan
    lib = run_battery(
        load_profile(folder / "tiny.toml"), plan=BatteryPlan.quick(), tests=("dynamic_range",)
    )
    for k in ("dynamic_range_db", "dynamic_range_db_a", "out_of_band_noise_dbfs"):
        assert record["metrics"][k] == lib.metrics[k]


def test_table_lists_metrics_with_units():
    text = metrics_table(
        ["a", "bb"],
        [
            {"dynamic_range_db": 120.123, "idle_tone_count": 3, "overload_onset_dbfs": None},
            {"dynamic_range_db": 99.0, "image_rejection_noise_limited": True},
        ],
    )
    lines = text.splitlines()
    assert lines[0].split() == ["metric", "unit", "a", "bb"]
    row = next(ln for ln in lines if ln.startswith("dynamic_range_db "))
    assert row.split() == ["dynamic_range_db", "dB", "120.12", "99.00"]
    assert next(ln for ln in lines if ln.startswith("overload_onset_dbfs")).split()[-2:] == [
        "-",
        "-",
    ]
    assert "yes" in next(ln for ln in lines if ln.startswith("image_rejection_noise_limited"))
    # columns line up: every row as wide as the rule under the header (right-aligned numbers)
    widths = {len(ln) for ln in lines[2:]}
    assert max(widths) <= len(lines[1])


def test_bad_profile_is_one_line_and_exit_2(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[modulator]\norder = 9\n")
    result = CliRunner().invoke(main, ["measure", str(bad)])
    assert result.exit_code == 2
    assert "modulator.order" in result.output
    assert "Traceback" not in result.output
    result = CliRunner().invoke(main, ["measure", str(tmp_path / "missing.toml")])
    assert result.exit_code == 2


def test_profile_folders_expand_to_their_toml_files(tmp_path):
    (tmp_path / "b.toml").write_text(PROFILE)
    (tmp_path / "a.toml").write_text(PROFILE)
    (tmp_path / "notes.txt").write_text("x")
    assert [p.name for p, _ in collect_profiles([tmp_path])] == ["a.toml", "b.toml"]
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(ProfileError, match="no \\*.toml"):
        collect_profiles([empty])


def test_table_shows_invalid_readings_and_notes():
    text = metrics_table(
        ["a", "b"],
        [{"dynamic_range_db": None, "idle_noise_dbfs": -120.0}, {"dynamic_range_db": 99.0}],
        [{"dynamic_range_db": "loop overloaded (5 guard actions)"}, {}],
        [["tone came out too low"], []],
    )
    lines = text.splitlines()
    row = next(ln for ln in lines if ln.startswith("dynamic_range_db "))
    assert row.split() == ["dynamic_range_db", "dB", "invalid", "[1]", "99.00"]
    assert "  [1] loop overloaded (5 guard actions)" in lines
    assert "notes on a:" in lines and "  - tone came out too low" in lines
    assert "notes on b:" not in lines


def test_measure_table_of_an_unstable_profile():
    # the broken loop: its table shows invalid readings with reasons and the battery's
    # notes (which say the tone left no trace instead of printing -309 dBFS)
    from pathlib import Path

    unstable = Path(__file__).parent / "profiles" / "unstable_order8.toml"
    result = CliRunner().invoke(main, ["measure", str(unstable), "--short", "--no-progress"])
    assert result.exit_code == 0, result.output
    out = result.stdout
    row = next(ln for ln in out.splitlines() if ln.startswith("thd_n_db_at_minus1_dbfs"))
    assert "invalid [" in row
    assert "loop overloaded from" in out
    assert "notes on unstable order 8:" in out
    assert "no trace of it at the output" in out


def test_plots_are_saved_as_png_and_svg(measured):
    import xml.etree.ElementTree as ET

    from audiodsm.evaluate import plotting

    folder, result = measured
    assert result.exit_code == 0, result.output
    plots = folder / "plots" / "tiny"
    names = sorted(p.name for p in plots.iterdir())
    # every report plot in both formats, nothing else (no temporary files left)
    expected = sorted(
        f"tiny-{name}.{fmt}" for name, _, _ in plotting.PLOTS for fmt in ("png", "svg")
    )
    assert names == expected
    for name, _, _ in plotting.PLOTS:
        # PNG signature (ISO/IEC 15948:2004 sec. 5.2); SVG is XML with an <svg> root (W3C SVG 1.1)
        assert (plots / f"tiny-{name}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        root = ET.parse(plots / f"tiny-{name}.svg").getroot()
        assert root.tag == "{http://www.w3.org/2000/svg}svg"
    # stdout stays JSON only: the plot message goes to stderr
    assert all(ln.startswith("{") for ln in result.stdout.splitlines() if ln.strip())
