import dataclasses
import hashlib
import json
import re
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from audiodsm.errors import ProfileError
from audiodsm.profile import ChainProfile, load_profile, parse_profile, profile_from_dict
from audiodsm.profile_text import profile_digest, profile_to_dict, profile_to_toml, schema_rows

DOCS = Path(__file__).resolve().parents[1] / "docs" / "profiles.md"
README = Path(__file__).resolve().parents[1] / "README.md"

CLASS_D = """
name = "speaker-amp-9level"
description = "Invented portable speaker amplifier, 9-level PWM"

[modulator]
order = 4
levels = 9
out_of_band_gain = 2.5

[output]
kind = "pwm"
pwm_mode = "three-level"
pwm_carrier = "trailing"
dead_time_ticks = 1
min_pulse_ticks = 1
short_pulse_action = "stretch"
full_scale_volts = 12.0

[reconstruction]
kind = "lc"
inductance_h = 1.5e-5
capacitance_f = 1e-6
load_ohm = 4.0
bridged = true

[listening]
rate_hz = 96000
sample_format = "float32"
error_file = true
error_gain_db = 30
"""


def write(tmp_path, text, name="p.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_defaults_and_name_from_file(tmp_path):
    profile = load_profile(write(tmp_path, "", "quiet-dac.toml"))
    assert profile == ChainProfile(name="quiet-dac")
    assert profile.modulator.order == 5 and profile.output.kind == "pdm"


def test_full_example_is_parsed(tmp_path):
    profile = load_profile(write(tmp_path, CLASS_D))
    assert profile.name == "speaker-amp-9level"
    assert profile.output.pwm_mode == "three-level"
    assert profile.reconstruction.bridged is True
    assert profile.listening.error_gain_db == 30.0  # an integer is accepted for a float key
    assert isinstance(profile.listening.error_gain_db, float)
    hash(profile)  # frozen and hashable
    with pytest.raises(dataclasses.FrozenInstanceError):
        profile.modulator.order = 3


def test_toml_written_is_read_back_by_the_stdlib_parser(tmp_path):
    # Outside check: the TOML we write is parsed by Python's tomllib (TOML v1.0.0) into exactly
    # the plain dict the profile came from, and that dict rebuilds an equal profile.
    profile = parse_profile(CLASS_D)
    for full in (False, True):
        text = profile_to_toml(profile, full=full)
        data = tomllib.loads(text)
        assert profile_from_dict(data) == profile
    parsed = tomllib.loads(profile_to_toml(profile, full=True))
    plain = profile_to_dict(profile)
    for section, table in parsed.items():
        if isinstance(table, dict):
            assert table == {k: plain[section][k] for k in table}
        else:
            assert table == plain[section]


def test_explicit_roots_round_trip():
    text = """
[modulator]
zeros = [1.0, [0.99, 0.0141], [0.99, -0.0141]]
poles = [0.6, [0.7, 0.3], [0.7, -0.3]]
levels = 17
[output]
kind = "nrz"
"""
    profile = parse_profile(text)
    assert profile.modulator.explicit_ntf
    assert profile.modulator.zeros[1] == complex(0.99, 0.0141)
    assert parse_profile(profile_to_toml(profile)) == profile


SHIPPED = sorted(
    p
    for p in (Path(__file__).resolve().parents[1] / "profiles").glob("*/*.toml")
    if p.parent.name not in ("specs", "spaces")  # spec sheets and design spaces are not profiles
)


@pytest.mark.parametrize("path", SHIPPED, ids=[f"{p.parent.name}/{p.name}" for p in SHIPPED])
def test_shipped_profiles_round_trip_through_the_writer(path):
    # load(write(p)) == p, compact and full; the written text is also read by Python's own
    # TOML v1.0.0 parser (tomllib) into a dict that rebuilds the same profile
    profile = load_profile(path)
    for full in (False, True):
        text = profile_to_toml(profile, full=full)
        assert parse_profile(text) == profile
        assert profile_from_dict(tomllib.loads(text)) == profile


def test_shipped_profiles_are_found():
    assert len(SHIPPED) >= 5


finite = st.floats(allow_nan=False, allow_infinity=False)


@settings(max_examples=60, deadline=None)
@given(
    osr=st.sampled_from([16, 32, 64, 128, 256, 512]),
    order=st.integers(1, 8),
    out_of_band_gain=st.floats(1.0001, 8.0),
    dither=st.floats(0.0, 4.0),
    seed=st.integers(0, 2**63 - 1),
    cutoff=st.floats(20000.0, 1e7),
    taps=st.lists(st.floats(0.001, 10.0), max_size=8),
    name=st.text(min_size=1, max_size=20).filter(lambda s: s.strip()),
    desc=st.text(max_size=40),
)
def test_round_trip_property(osr, order, out_of_band_gain, dither, seed, cutoff, taps, name, desc):
    profile = profile_from_dict(
        {
            "name": name,
            "description": desc,
            "upsampler": {"osr": osr},
            "modulator": {
                "order": order,
                "out_of_band_gain": out_of_band_gain,
                "dither_lsb": dither,
                "seed": seed,
            },
            "reconstruction": {"cutoff_hz": cutoff, "fir_taps": taps},
        }
    )
    assert parse_profile(profile_to_toml(profile)) == profile
    assert parse_profile(profile_to_toml(profile, full=True)) == profile


ERRORS = [
    # (toml text, key named, words that must appear)
    ("colour = 1", "colour", "unknown key"),
    ("[modulator]\nordr = 3", "modulator.ordr", "unknown key"),
    ("[mod]\norder = 3", "mod", "unknown key"),
    ('[modulator]\norder = "five"', "modulator.order", "'five'"),
    ("[modulator]\norder = 5.0", "modulator.order", "5.0"),
    ("[modulator]\norder = true", "modulator.order", "True"),
    ("[modulator]\norder = 9", "modulator.order", "got 9; expected an integer from 1 to 8"),
    ("[modulator]\nout_of_band_gain = 1.0", "modulator.out_of_band_gain", "got 1.0"),
    ("[modulator]\nlevels = 1", "modulator.levels", "got 1"),
    ("[modulator]\nstructure = 'cascade'", "modulator.structure", "'cascade'"),
    ("[modulator]\nzero_layout = 1", "modulator.zero_layout", "one of 'spread', 'dc'"),
    ("[modulator]\nlevels = 4", "modulator.levels", "output.kind = 'pdm'"),
    ("[upsampler]\nosr = 48", "upsampler.osr", "power of two"),
    ("[upsampler]\nosr = 1024", "upsampler.osr", "got 1024"),
    ("[input]\nover_full_scale = 'wrap'", "input.over_full_scale", "'clip', 'refuse'"),
    ("[output]\nkind = 'pdm'\npwm_mode = 'three-level'", "output.pwm_mode", "kind = 'pwm'"),
    ("[reconstruction]\nkind = 'lc'\ncutoff_hz = 5e4", "reconstruction.cutoff_hz", "prototype"),
    ("[reconstruction]\nfilter_order = 7", "reconstruction.filter_order", "got 7"),
    ("[reconstruction]\nfir_taps = [1.0, -1.0]", "reconstruction.fir_taps", "sum"),
    ("[reconstruction]\nfir_taps = [1.0, 'x']", "reconstruction.fir_taps", "list"),
    ("[listening]\nrate_hz = 22050", "listening.rate_hz", "got 22050"),
    ("[listening]\nerror_gain_db = nan", "listening.error_gain_db", "nan"),
    ("[listening]\nsample_format = 'int16'", "listening.sample_format", "'int16'"),
    (
        "[output]\nkind = 'pwm'\npwm_mode = 'three-level'\npwm_bridge = 'half'",
        "output.pwm_bridge",
        "'full'",
    ),
    (
        "[output]\nkind = 'pwm'\n[reconstruction]\nfir_taps = [1.0]",
        "reconstruction.fir_taps",
        "bitstream",
    ),
    (
        "[modulator]\nlevels = 9\n[output]\nkind = 'pwm'\ncounter_steps = 12",
        "output.counter_steps",
        "multiple",
    ),
    ("[modulator]\nzeros = [1.0]", "modulator.poles", "together"),
    ("[modulator]\nzeros = [1.0]\npoles = [0.5, 0.2]", "modulator.poles", "same count"),
    ("[modulator]\nzeros = [[1.0, 0.1]]\npoles = [0.5]", "modulator.zeros", "conjugate"),
    ("[modulator]\nzeros = [1.0]\npoles = [1.2]", "modulator.poles", "unit circle"),
    ("[modulator]\nzeros = [1.0]\npoles = [0.5]\norder = 1", "modulator.order", "designed"),
    ("[modulator]\nzeros = [[1.0, 2.0, 3.0]]\npoles = [0.5]", "modulator.zeros", "[re, im]"),
    ("name = 3", "name", "expected a string"),
    ("name = ''", "name", "non-empty"),
    ("modulator = 3", "modulator", "expected a table"),
    ("[modulator\norder = 3", "", "not valid TOML"),
]


@pytest.mark.parametrize(("text", "key", "words"), ERRORS)
def test_bad_profiles_give_one_line_naming_file_and_key(tmp_path, text, key, words):
    path = write(tmp_path, text, "bad.toml")
    with pytest.raises(ProfileError) as info:
        load_profile(path)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(str(path) + ": ")
    assert info.value.key == key
    if key:
        assert f": {key}: " in message
    assert words in message
    assert isinstance(info.value, ValueError)


def test_missing_and_binary_files(tmp_path):
    with pytest.raises(ProfileError, match="cannot read"):
        load_profile(tmp_path / "absent.toml")
    path = tmp_path / "binary.toml"
    path.write_bytes(b"\xff\xfe\x00name")
    with pytest.raises(ProfileError, match="not UTF-8"):
        load_profile(path)


def test_digest_is_sha256_of_the_effective_settings():
    profile = parse_profile(CLASS_D)
    digest = profile_digest(profile)
    # Outside check: the digest is a SHA-256 (FIPS 180-4) hex string: 64 lowercase hex digits.
    assert re.fullmatch(r"[0-9a-f]{64}", digest)
    # labels do not change it; a compact and a full file of the same chain hash equal
    relabelled = dataclasses.replace(profile, name="other", description="other words")
    assert profile_digest(relabelled) == digest
    assert profile_digest(parse_profile(profile_to_toml(profile, full=True))) == digest
    # every setting does change it
    for section, table in profile_to_dict(profile).items():
        if not isinstance(table, dict):
            continue
        for key, value in table.items():
            if isinstance(value, bool):
                new = not value
            elif isinstance(value, (int, float)) and key != "rate_hz":
                new = value + 1
            else:
                continue
            settings_obj = getattr(profile, section)
            changed = dataclasses.replace(
                profile, **{section: dataclasses.replace(settings_obj, **{key: new})}
            )
            assert profile_digest(changed) != digest, f"{section}.{key}"
    # it does not depend on dict ordering or on the Python session: recompute by hand
    data = profile_to_dict(profile)
    del data["name"], data["description"]
    data["digest_version"] = 2
    text = json.dumps(data, sort_keys=True, separators=(",", ":"))
    assert hashlib.sha256(text.encode()).hexdigest() == digest


@pytest.mark.parametrize("doc", [DOCS, README], ids=["docs/profiles.md", "README.md"])
def test_docs_list_every_key_with_its_default(doc):
    text = doc.read_text(encoding="utf-8")
    for key, _kind, _expect, default, _doc in schema_rows():
        row = next((line for line in text.splitlines() if f"`{key}`" in line), None)
        assert row is not None, f"{key} missing from {doc.name}"
        assert f"`{default}`" in row, f"{key}: default {default} not in its {doc.name} row"
