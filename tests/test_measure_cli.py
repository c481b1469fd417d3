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
    result = runner.invoke(main, ["measure", str(folder), "--json", "--short", "--jobs", "2"])
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
    assert record["rate_hz"] == 48000
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
