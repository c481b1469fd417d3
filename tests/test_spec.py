import hashlib
import json
import tomllib
from pathlib import Path

import pytest

from audiodsm.errors import ProfileError
from audiodsm.spec import (
    CONDITIONAL_METRICS,
    METRIC_CATALOGUE,
    SpecSheet,
    Target,
    load_spec,
    parse_spec,
    spec_digest,
)

SHIPPED = Path(__file__).resolve().parents[1] / "profiles" / "specs"

GOOD = """
name = "bench sheet"
description = "made up for a test"

[[target]]
metric = "dynamic_range_db_a"
at_least = 118

[[target]]
metric = "thd_n_db"
at_level_dbfs = -10
at_most = -100.5
note = "mid level"

[[target]]
metric = "overload_count"
at_most = 0
"""


def test_parse_good_sheet():
    spec = parse_spec(GOOD, path="s.toml")
    assert spec.name == "bench sheet"
    assert len(spec.targets) == 3
    dr, thd, over = spec.targets
    assert dr == Target("dynamic_range_db_a", "at_least", 118.0)
    assert isinstance(dr.limit, float)
    assert thd.at_level_dbfs == -10.0 and thd.note == "mid level"
    assert thd.label == "thd_n_db @ -10 dBFS"
    assert thd.requirement == "<= -100.5 dB"
    assert Target("switching_rate_hz", "at_most", 2e6).requirement == "<= 2,000,000 Hz"
    assert over.unit == "count"
    # the frozen data cannot change
    with pytest.raises(AttributeError):
        dr.limit = 0.0


def test_margin_sign_follows_the_bound():
    # positive = better than the limit, in the metric's own unit
    assert Target("dynamic_range_db_a", "at_least", 118.0).margin(120.5) == pytest.approx(2.5)
    assert Target("dynamic_range_db_a", "at_least", 118.0).margin(117.0) == pytest.approx(-1.0)
    assert Target("idle_tone_max_dbfs", "at_most", -140.0).margin(-150.0) == pytest.approx(10.0)
    assert Target("idle_tone_max_dbfs", "at_most", -140.0).margin(-135.0) == pytest.approx(-5.0)


def _err(text):
    with pytest.raises(ProfileError) as info:
        parse_spec(text, path="bad.toml")
    return info.value


@pytest.mark.parametrize(
    "text, key, words",
    [
        ('[[target]]\nmetric = "dynamic_range_db_a"\nat_least = 1\nbogus = 2\n', "target[1].bogus",
         "unknown key"),
        ('[[target]]\nmetric = "loudness"\nat_least = 1\n', "target[1].metric", "unknown metric"),
        ('[[target]]\nat_least = 1\n', "target[1].metric", "missing"),
        ('[[target]]\nmetric = "dynamic_range_db"\n', "target[1]", "exactly one"),
        ('[[target]]\nmetric = "dynamic_range_db"\nat_least = 1\nat_most = 2\n', "target[1]",
         "exactly one"),
        ('[[target]]\nmetric = "dynamic_range_db"\nat_least = "a lot"\n', "target[1].at_least",
         "a number"),
        ('[[target]]\nmetric = "dynamic_range_db"\nat_least = nan\n', "target[1].at_least",
         "finite"),
        ('[[target]]\nmetric = "thd_n_db"\nat_most = -90\n', "target[1].at_level_dbfs", "needs"),
        ('[[target]]\nmetric = "thd_n_db"\nat_most = -90\nat_level_dbfs = 3\n',
         "target[1].at_level_dbfs", "from -160 to 0"),
        ('[[target]]\nmetric = "idle_noise_dbfs"\nat_most = -90\nat_level_dbfs = -3\n',
         "target[1].at_level_dbfs", "no condition"),
        ('colour = "red"\n[[target]]\nmetric = "idle_noise_dbfs"\nat_most = -90\n', "colour",
         "unknown key"),
        ('name = "x"\n', "target", "at least one"),
        ('[[target]]\nmetric = "idle_noise_dbfs"\nat_most = -90\n'
         '[[target]]\nmetric = "idle_noise_dbfs"\nat_most = -95\n', "target[2]", "repeats"),
        ("[[target]\n", "", "not valid TOML"),
    ],
)  # fmt: skip
def test_bad_sheets_name_file_and_key(text, key, words):
    err = _err(text)
    assert err.path == "bad.toml"
    assert err.key == key
    assert words in str(err)
    assert "\n" not in str(err)


def test_load_spec_missing_file(tmp_path):
    with pytest.raises(ProfileError) as info:
        load_spec(tmp_path / "nope.toml")
    assert "nope.toml" in str(info.value)


def test_load_spec_reads_file_and_defaults_name(tmp_path):
    p = tmp_path / "amp_sheet.toml"
    p.write_text('[[target]]\nmetric = "switching_rate_hz"\nat_most = 1e6\n')
    spec = load_spec(p)
    assert spec.name == "amp_sheet"
    assert spec.path == str(p)
    assert spec.targets[0].unit == "Hz"


def test_digest_ignores_labels_and_order_but_not_limits():
    a = parse_spec(GOOD)
    b = SpecSheet("other name", "other words", tuple(reversed(a.targets)))
    assert spec_digest(a) == spec_digest(b)
    changed = SpecSheet(a.name, a.description, (Target("dynamic_range_db_a", "at_least", 119.0),)
                        + a.targets[1:])  # fmt: skip
    assert spec_digest(changed) != spec_digest(a)
    # the recipe: SHA-256 (FIPS 180-4, via hashlib) of the sorted target rows as compact JSON
    rows = sorted((t.metric, t.bound, repr(t.limit), repr(t.at_level_dbfs)) for t in a.targets)
    expect = hashlib.sha256(json.dumps(rows, separators=(",", ":")).encode()).hexdigest()
    assert spec_digest(a) == expect


def test_conditional_metrics_are_in_the_catalogue():
    assert set(CONDITIONAL_METRICS) <= set(METRIC_CATALOGUE)


def test_catalogue_matches_the_battery_names():
    from audiodsm.evaluate import battery

    plain = set(METRIC_CATALOGUE) - set(CONDITIONAL_METRICS)
    assert plain <= set(battery.METRIC_UNITS)
    for name in plain:
        unit = battery.METRIC_UNITS[name][1]
        if unit:  # the battery leaves counts and state magnitudes without a unit
            assert METRIC_CATALOGUE[name][0] == unit, name


def test_shipped_spec_sheets_parse_and_say_they_are_invented():
    files = sorted(SHIPPED.glob("*.toml"))
    assert len(files) >= 2
    for f in files:
        spec = load_spec(f)
        assert "invented" in spec.description.lower()
        # plain TOML, readable by the standard library alone
        assert tomllib.loads(f.read_text())["target"]
