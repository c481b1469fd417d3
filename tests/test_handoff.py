"""Tests of the fixed-point plan, the [fixed_point] checks and the handoff folder."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from audiodsm.cli import main
from audiodsm.errors import OutputError, ProfileError
from audiodsm.hardware.handoff import (
    check_fixed_point,
    plan_profile,
    profile_with_plan,
    write_handoff,
)
from audiodsm.profile import parse_profile
from audiodsm.profile_text import profile_to_toml
from audiodsm.stages.fixed_loop import (
    FixedPointModulator,
    format_from_settings,
    in_band_noise_power,
)

# zero_band_edge_hz = 24000: the zeros spread over 0..24 kHz at 48 kHz, and the planner
# measures the loop's noise over that band (0..0.5/osr; the default is 0..20 kHz)
BASE = (
    'name = "t3"\n[upsampler]\nosr = 64\n[modulator]\norder = 3\nstructure = "feedback"\n'
    "zero_band_edge_hz = 24000.0\n"
)


def _with_section(extra_modulator="", _structure="feedback", **keys):
    lines = [f"{k} = {json.dumps(v)}" for k, v in keys.items()]
    base = BASE.replace('"feedback"', json.dumps(_structure))
    return parse_profile(base + extra_modulator + "[fixed_point]\n" + "\n".join(lines) + "\n")


@pytest.fixture(scope="module")
def planned():
    profile = parse_profile(BASE)
    plan, facts, stable = plan_profile(profile, budget_db=20.0)
    return profile, plan, facts, stable


def test_plan_keeps_its_noise_budget_in_simulation(planned):
    # The plan promises: all roundings together 20 dB under the loop's own in-band noise, and
    # coefficients that change the NTF's in-band gain by <= 0.1 dB. So the planned
    # fixed-point loop's in-band noise must be the float loop's within a few tenths of a dB.
    # Single runs of the two (chaotic, soon decorrelated) loops scatter by about +-0.25 dB
    # here, so the powers of four tones (2**20 samples each) are summed: 0.3 dB.
    profile, plan, facts, stable = planned
    assert plan.added_noise_dbfs <= plan.loop_noise_dbfs - plan.budget_db + 1e-9
    assert abs(plan.coefficients.in_band_noise_change_db) <= 0.1
    assert stable > 0.9 * facts.stable_amplitude
    from audiodsm.stages.modulator import Modulator

    n = 1 << 20
    fx = FixedPointModulator(facts.loop, plan.format, facts.levels)
    flt = Modulator(facts.loop, levels=facts.levels)
    fixed_sum = float_sum = 0.0
    for fraction in (0.55, 0.6, 0.7, 0.8):  # of the band edge: harmonics fall out of band
        tone_bin = int(n / facts.band_ratio / 2 * fraction) | 1
        x = 0.5 * facts.stable_amplitude * np.sin(2 * np.pi * tone_bin / n * np.arange(n))
        y_fixed, st = fx.run(x)
        assert st.overflow_count.sum() == 0
        fixed_sum += in_band_noise_power(y_fixed, osr=facts.band_ratio, tone_bin=tone_bin)
        float_sum += in_band_noise_power(flt.run(x)[0], osr=facts.band_ratio, tone_bin=tone_bin)
    assert abs(10 * np.log10(fixed_sum / float_sum)) < 0.3
    # range: every state holds its float peak with the margin
    for node, peak in zip(plan.format.states, facts.state_peaks, strict=True):
        assert node.largest >= peak * 10 ** (plan.margin_db / 20) - node.step
    text = plan.table()
    assert "state 3" in text and "added dBFS" in text


def test_plan_round_trips_through_the_profile(planned):
    profile, plan, _, _ = planned
    written = profile_with_plan(profile, plan)
    again = parse_profile(profile_to_toml(written))
    assert again == written
    assert format_from_settings(again.fixed_point) == plan.format


def test_too_few_integer_bits_are_refused_naming_the_state():
    # unscaled, the third state of this loop peaks near 2 at the maximum stable amplitude
    profile = _with_section(
        'state_scaling = "off"\n',
        state_integer_bits=[1, 1, 1],
        state_fraction_bits=[20, 20, 20],
    )
    with pytest.raises(ProfileError, match=r"state 3 needs at least 2 integer bits"):
        check_fixed_point(profile)


def test_unstable_coefficients_are_refused_with_what_works():
    profile = _with_section(
        state_integer_bits=[1, 1, 1], state_fraction_bits=[20, 20, 20], coefficient_fraction_bits=2
    )
    with pytest.raises(ProfileError, match=r"coefficient_fraction_bits.*at least \d+ bits"):
        check_fixed_point(profile)


@pytest.mark.parametrize(
    ("keys", "key"),
    [
        ({"state_integer_bits": [1, 1, 1], "state_fraction_bits": [9, 9, 9],
          "state_rounding": ["nearest", "truncate", "truncate"]}, "fixed_point.state_rounding"),
        ({"state_integer_bits": [1, 1, 1], "state_fraction_bits": [9, 9, 9],
          "state_overflow": ["clip", "wrap", "wrap"]}, "fixed_point.state_overflow"),
        ({"state_integer_bits": [1, 1], "state_fraction_bits": [9, 9]},
         "fixed_point.state_integer_bits"),
        ({"input_fraction_bits": 20}, "fixed_point.input_fraction_bits"),
    ],
)  # fmt: skip
def test_bad_sections_are_refused_by_the_profile_reader(keys, key):
    with pytest.raises(ProfileError, match=key.replace(".", r"\.")):
        _with_section(**keys)


def test_fixed_point_needs_a_plain_feedback_loop():
    keys = {"state_integer_bits": [1, 1, 1], "state_fraction_bits": [9, 9, 9]}
    with pytest.raises(ProfileError, match="modulator.structure"):
        _with_section("", **keys, _structure="feedforward")
    with pytest.raises(ProfileError, match="modulator.levels"):
        _with_section("levels = 16\n", **keys)


def _read_hex(path, bits):
    words = [int(line, 16) for line in path.read_text().split()]
    return np.array([w - (1 << bits) if w >> (bits - 1) else w for w in words], dtype=np.int64)


def test_handoff_folder_holds_consistent_vectors_and_is_replaced_whole(planned, tmp_path):
    profile, plan, facts, _ = planned
    prof = profile_with_plan(profile, plan)
    target = tmp_path / "out"
    summary = write_handoff(prof, target, vector_samples=4096)
    names = sorted(p.name for p in target.rglob("*") if p.is_file())
    assert "README.md" in names and "coefficients.json" in names and "format.json" in names
    assert "noise_shaper_loop.v" in names
    fmt = json.loads((target / "format.json").read_text())
    in_bits = fmt["input"]["word_bits"]
    assert fmt["input"]["binary_point"] == plan.format.input.fraction_bits
    coefs = json.loads((target / "coefficients.json").read_text())
    fx = FixedPointModulator(facts.loop, plan.format, facts.levels)
    for row, entries in coefs["rows"].items():
        assert [e["integer"] for e in entries] == fx.coefficients[row]
    ins = sorted(target.glob("vectors/*_in.hex"))
    assert len(ins) == 5
    for path in ins:
        words = _read_hex(path, in_bits)
        assert len(words) == 4096
        out_path = path.with_name(path.name.replace("_in.hex", "_out.hex"))
        q = np.array([int(v, 16) for v in out_path.read_text().split()])
        np.testing.assert_array_equal(fx.run_words(words)[0], q)
    loud = _read_hex(target / "vectors/tone_997hz_m1dbfs_in.hex", in_bits)
    assert np.abs(loud).max() > 2 ** (in_bits - 3)  # the tone is really there
    readme = (target / "README.md").read_text()
    assert f"{facts.rate_hz * facts.osr} Hz" in readme and "$readmemh" in readme
    assert summary.in_band_noise_dbfs < -80
    # a failing second write leaves the first folder as it was and no temporary behind
    before = sorted(p.name for p in tmp_path.iterdir())

    def broken(fx):
        raise RuntimeError("generator failed")

    from audiodsm.hardware import rtl

    original = rtl.verilog_text
    rtl.verilog_text = broken
    try:
        with pytest.raises(RuntimeError):
            write_handoff(prof, target, vector_samples=2048)
    finally:
        rtl.verilog_text = original
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    assert len(_read_hex(ins[0], in_bits)) == 4096
    # a folder that is not a handoff folder is never replaced
    other = tmp_path / "keep"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    with pytest.raises(OutputError, match="not a handoff folder"):
        write_handoff(prof, other, vector_samples=2048)
    assert (other / "notes.txt").read_text() == "mine"
    other.joinpath("notes.txt").unlink()
    other.rmdir()
    # a successful second write replaces it whole
    write_handoff(prof, target, vector_samples=2048)
    assert len(_read_hex(ins[0], in_bits)) == 2048
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def test_cli_plan_and_handoff(tmp_path):
    src = tmp_path / "p.toml"
    src.write_text(BASE)
    runner = CliRunner()
    res = runner.invoke(main, ["plan", str(src), "--output", str(tmp_path / "q.toml")])
    assert res.exit_code == 0, res.output
    assert "state 3" in res.output and "added dBFS" in res.output
    res = runner.invoke(main, ["handoff", str(tmp_path / "q.toml"), str(tmp_path / "h")])
    assert res.exit_code == 0, res.output
    assert (tmp_path / "h" / "rtl" / "noise_shaper_loop.v").exists()
    # bad input: one line, exit 2
    res = runner.invoke(main, ["handoff", str(src), str(tmp_path / "h2")])
    assert res.exit_code == 2
    assert "fixed_point.state_integer_bits" in res.output
    assert len(res.output.strip().splitlines()) == 1
    assert not (tmp_path / "h2").exists()
    bad = tmp_path / "bad.toml"
    bad.write_text(
        BASE
        + "[fixed_point]\nstate_integer_bits = [1, 1, 1]\nstate_fraction_bits = [9, 9, 9]\n"
        + 'state_rounding = ["nearest", "truncate", "truncate"]\n'
    )
    res = runner.invoke(main, ["handoff", str(bad), str(tmp_path / "h3")])
    assert res.exit_code == 2 and "fixed_point.state_rounding" in res.output
    res = runner.invoke(main, ["plan", str(src), "--rounding", "nearest"])
    assert res.exit_code == 2


def test_chain_runs_the_fixed_point_loop_bit_for_bit(planned):
    # a profile with a [fixed_point] section makes the chain (and so measure and grade) run
    # the integer loop: its modulator output is the fixed-point model's, bit for bit
    from audiodsm.signals import sine
    from audiodsm.stages.chain import Chain, run_chain
    from audiodsm.stages.upsample import Upsampler

    profile, plan, facts, _ = planned
    prof = profile_with_plan(profile, plan)
    x = sine(997.0, -6.0, rate_hz=48000, duration_s=0.05)
    res = run_chain(prof, x, rate_hz=48000, keep=("modulator",))
    chain = Chain.from_profile(prof, 48000, 1)
    xq = chain.requantizer.process(x[:, None])[0][:, 0]  # the source's 24 bits, as the chain
    xu, _ = Upsampler(chain.upsampler_design).process(xq * chain.input_scale)
    expected, _ = chain.fixed_loop.run(np.asarray(xu, dtype=float))
    got = np.asarray(res.modulator, dtype=float).reshape(-1)
    np.testing.assert_array_equal(got, expected)
    float_out, _ = chain.modulator.run(np.asarray(xu, dtype=float))
    assert np.any(float_out != expected)  # and it is not the float loop's


def test_shipped_fixed_point_section_is_the_planners_own():
    # the demo DAC's fixed-point candidate carries exactly what `audiodsm plan --rounding
    # convergent` proposes for its loop
    from pathlib import Path

    from audiodsm.profile import load_profile

    path = Path(__file__).resolve().parents[1] / "profiles" / "dac_chip" / "pdm5_fixed_64x.toml"
    shipped = load_profile(path)
    plan, facts, _ = plan_profile(shipped, rounding="convergent")
    assert profile_with_plan(shipped, plan) == shipped
    # its noise budget is kept in the audio band the battery measures, up to AES17's 20 kHz
    # (measure/bands.py), not up to half the 48 kHz rate: 3.072 MHz / (2 x 20 kHz) = 76.8
    from audiodsm.measure.bands import AES17_UPPER_HZ

    assert facts.band_edge_hz == AES17_UPPER_HZ == shipped.modulator.zero_band_edge_hz
    assert facts.band_ratio == pytest.approx(76.8, rel=1e-12)


def test_planner_band_follows_the_profile(planned):
    # BASE spreads its zeros over 0..24 kHz at 48 kHz: the band is then 0..0.5/osr exactly
    _, _, facts, _ = planned
    assert facts.band_edge_hz == 24000.0
    assert facts.band_ratio == facts.osr


def test_handoff_of_a_dithered_loop_carries_its_dither_words(planned, tmp_path):
    # with modulator.dither_lsb the integer loop adds the float loop's dither sequence at the
    # quantizer; the folder then holds the dither words of each vector, the README names the
    # port, and the generated RTL fed with them gives the expected output words bit for bit
    from dataclasses import replace

    from audiodsm.hardware.rtl import simulate_words

    profile, plan, facts, _ = planned
    prof = profile_with_plan(profile, plan)
    prof = replace(prof, modulator=replace(prof.modulator, dither_lsb=0.25, seed=9))
    target = tmp_path / "dithered"
    write_handoff(prof, target, vector_samples=1024)
    fx, _ = check_fixed_point(prof)  # the loop the handoff built (scaled with the dither on)
    assert fx.dither_lsb == 0.25 and fx.seed == 9
    in_bits = fx.format.input.word_bits
    words = _read_hex(target / "vectors/tone_997hz_m60dbfs_in.hex", in_bits)
    dither = _read_hex(target / "vectors/tone_997hz_m60dbfs_dither.hex", fx.dither_word_bits)
    q = np.array(
        [int(v, 16) for v in (target / "vectors/tone_997hz_m60dbfs_out.hex").read_text().split()]
    )
    np.testing.assert_array_equal(
        dither, fx.dither_words(1024, fx.initial_state().dither_counter)[0]
    )
    assert np.any(dither != 0)
    np.testing.assert_array_equal(fx.run_words(words)[0], q)
    np.testing.assert_array_equal(simulate_words(fx, words, dither), q)
    assert "`dither_in`" in (target / "README.md").read_text()


def test_handoff_with_the_fixed_point_interpolator_carries_its_last_stage(planned, tmp_path):
    # fixed_point.interpolator = "last": the folder adds the last stage's RTL and its vectors;
    # simulated on its input vector the RTL gives its output vector, and that output, fitted
    # to the loop's input word, is the loop's input vector
    from dataclasses import replace

    from audiodsm.hardware.rtl import simulate_interpolator_words

    profile, plan, facts, _ = planned
    prof = profile_with_plan(profile, plan)
    fp = replace(prof.fixed_point, interpolator="last", interpolator_fraction_bits=18)
    prof = replace(prof, fixed_point=fp)
    assert profile_with_plan(prof, plan) == prof  # a re-plan keeps the interpolator keys
    target = tmp_path / "interp"
    write_handoff(prof, target, vector_samples=4096)
    assert (target / "rtl/interpolator_last_stage.v").is_file()
    fx, facts2 = check_fixed_point(prof)
    fu = facts2.signal_upsampler
    bits = 1 + 18 + 1
    w_in = _read_hex(target / "vectors/tone_997hz_m1dbfs_interp_in.hex", bits)
    w_out = _read_hex(target / "vectors/tone_997hz_m1dbfs_interp_out.hex", bits)
    assert len(w_out) == 4096 and len(w_in) == 4096 // fu.fixed_stage_ratios[-1]
    np.testing.assert_array_equal(simulate_interpolator_words(fu, w_in), w_out)
    loop_in = _read_hex(target / "vectors/tone_997hz_m1dbfs_in.hex", fx.format.input.word_bits)
    from audiodsm.stages.fixed_loop import quantize_words

    np.testing.assert_array_equal(loop_in, quantize_words(w_out / 2.0**18, fx.format.input))
    assert np.abs(w_out).max() > 2**14  # the tone is through the filters by the end
    assert "interpolator_last_stage" in (target / "README.md").read_text()
