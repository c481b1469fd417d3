import json
import math

import numpy as np
import pytest
from click.testing import CliRunner

from audiodsm.cli import main
from audiodsm.design.ntf import NoiseTransfer
from audiodsm.errors import OutputError, ParameterError
from audiodsm.evaluate.design_job import write_text_atomic
from audiodsm.evaluate.search import (
    impulse_l1_norm,
    loop_cost,
    predicted_dynamic_range_db,
    search_designs,
)
from audiodsm.profile import load_profile

RATE = 48000


@pytest.mark.parametrize("order", [1, 2, 3])
def test_prediction_matches_the_textbook_peak_sqnr(order):
    # Schreier & Temes, "Understanding Delta-Sigma Data Converters", 2005, eq. for an ideal
    # L-th order loop NTF = (1 - z^-1)^L with M = levels - 1 steps:
    #   SQNR = 10log10(1.5 M^2) - 10log10(pi^(2L) / (2L + 1)) + (2L + 1) 10log10(OSR).
    # The band here is 20 Hz..20 kHz at fm = 128 x 48 kHz, so OSR = fm / 40 kHz = 153.6. The
    # textbook formula takes |1 - e^-jw| ~ w; at this OSR that small-angle error and the
    # missing 0..20 Hz are below 0.01 dB, hence the 0.02 dB tolerance.
    ntf = NoiseTransfer.from_roots(zeros=[1.0] * order, poles=[0.0] * order)
    levels = 17
    fm = 128 * RATE
    osr = fm / 40000.0
    m = levels - 1
    L = order
    expected = (
        10 * math.log10(1.5 * m**2)
        - 10 * math.log10(math.pi ** (2 * L) / (2 * L + 1))
        + (2 * L + 1) * 10 * math.log10(osr)
    )
    got = predicted_dynamic_range_db(ntf, levels, modulator_rate_hz=fm)
    assert got == pytest.approx(expected, abs=0.02)
    # and it is the same number NoiseTransfer.linear_sqnr_db gives for that band
    assert got == pytest.approx(ntf.linear_sqnr_db(levels=levels, osr=osr), abs=0.01)


def test_prediction_weighting_and_headroom():
    ntf = NoiseTransfer.designed(5, osr=64)
    fm = 64 * RATE
    base = predicted_dynamic_range_db(ntf, 2, modulator_rate_hz=fm)
    # headroom: noise referred to the input grows by 1/input_scale^2
    half = predicted_dynamic_range_db(ntf, 2, modulator_rate_hz=fm, input_scale=0.5)
    assert half == pytest.approx(base + 20 * math.log10(0.5), abs=1e-9)
    # TPDF dither of 2 LSB peak-to-peak adds Delta^2/6 to Delta^2/12 (Lipshitz, Wannamaker &
    # Vanderkooy, JAES 40(5) 1992): a 17-level loop with it is predicted 10 log10(3) = 4.77 dB
    # worse, in the search's prediction as in NoiseTransfer.linear_sqnr_db
    plain17 = predicted_dynamic_range_db(ntf, 17, modulator_rate_hz=fm)
    dithered17 = predicted_dynamic_range_db(ntf, 17, modulator_rate_hz=fm, dither_lsb=1.0)
    assert plain17 - dithered17 == pytest.approx(10 * math.log10(3.0), abs=1e-9)
    # A-weighting (IEC 61672-1, via librosa as the outside reference curve): integrate the
    # shaped noise times the weighting on a fine grid and compare
    import librosa

    f = np.linspace(20.0, 20000.0, 400001)
    shaped = np.abs(ntf.response(f / fm)) ** 2
    w = 10 ** (librosa.A_weighting(f) / 10)
    noise = (2.0**2 / 12) * np.trapezoid(shaped * w, f) * 2 / fm
    expected = 10 * math.log10(0.5 / noise)
    got = predicted_dynamic_range_db(ntf, 2, modulator_rate_hz=fm, weighting="a")
    assert got == pytest.approx(expected, abs=0.02)
    with pytest.raises(ParameterError, match="levels"):
        predicted_dynamic_range_db(ntf, 1, modulator_rate_hz=fm)


def test_impulse_norm_of_a_pure_difference():
    # (1 - z^-1)^L has binomial impulse response, so ||h||_1 = 2^L (the binomial theorem)
    for order in (1, 2, 4):
        ntf = NoiseTransfer.from_roots(zeros=[1.0] * order, poles=[0.0] * order)
        assert impulse_l1_norm(ntf) == pytest.approx(2.0**order, rel=1e-12)


def test_search_returns_the_cheapest_passing_loops_in_cost_order():
    target = 110.0
    found = search_designs(
        target, rate_hz=RATE, weighting="unweighted", orders=(2, 3, 4, 5), osrs=(32, 64, 128),
        levels=(2, 5, 17), limit=50,
    )  # fmt: skip
    assert found
    costs = [c.cost for c in found]
    assert costs == sorted(costs)
    for c in found:
        assert c.predicted_dynamic_range_db >= target
        assert c.cost == pytest.approx(loop_cost(c.order, c.levels, modulator_rate_hz=c.osr * RATE))
        if c.levels == 2:
            assert c.out_of_band_gain == 1.5
        else:  # Schreier & Temes no-overload bound, with half of full scale to spare
            ntf = NoiseTransfer.designed(c.order, osr=c.osr, out_of_band_gain=c.out_of_band_gain)
            m = c.levels - 1
            assert (m + 2 - impulse_l1_norm(ntf)) / m >= 0.5
    # brute force over the same grid: no loop cheaper than the first passes the same rules
    from audiodsm.stages.chain_build import auto_input_scale

    first = found[0]
    for order in (2, 3, 4, 5):
        for osr in (32, 64, 128):
            for levels in (2, 5, 17):
                fm = osr * RATE
                if loop_cost(order, levels, modulator_rate_hz=fm) >= first.cost:
                    continue
                for gain in (1.5,) if levels == 2 else (1.5, 2.0, 3.0):
                    try:
                        ntf = NoiseTransfer.designed(order, osr=osr, out_of_band_gain=gain)
                    except ParameterError:
                        continue
                    m = levels - 1
                    if levels > 2 and (m + 2 - impulse_l1_norm(ntf)) / m < 0.5:
                        continue
                    dr = predicted_dynamic_range_db(
                        ntf, levels, modulator_rate_hz=fm, input_scale=auto_input_scale(ntf, levels)
                    )
                    assert dr < target, (order, osr, levels, gain)


def test_design_writes_a_profile_and_a_summary(tmp_path):
    out = tmp_path / "dac.toml"
    runner = CliRunner()
    result = runner.invoke(
        main,
        [
            "design",
            str(out),
            "--order",
            "4",
            "--levels",
            "9",
            "--out-of-band-gain",
            "2.5",
            "--json",
        ],
    )
    assert result.exit_code == 0, result.output
    record = json.loads(result.stdout.strip().splitlines()[-1])
    prof = load_profile(out)
    assert prof.name == "dac"
    assert (prof.modulator.order, prof.modulator.levels, prof.modulator.out_of_band_gain) == (
        4,
        9,
        2.5,
    )
    assert prof.output.kind == "nrz"
    # the chain places the spread zeros for 20 kHz (modulator.zero_band_edge_hz)
    ntf = NoiseTransfer.designed(
        4, osr=64, out_of_band_gain=2.5, zero_band_edge=20000.0 / (64 * RATE)
    )
    assert record["ntf_out_of_band_gain"] == pytest.approx(ntf.out_of_band_gain(), rel=1e-9)
    assert record["linear_sqnr_db"] == pytest.approx(
        ntf.linear_sqnr_db(levels=9, osr=64 * RATE / 40000.0), abs=1e-9
    )
    assert 0.0 < record["loop_stable_amplitude"] <= 1.0
    # a second run refuses to replace the file; --overwrite replaces it
    again = runner.invoke(main, ["design", str(out), "--order", "3"])
    assert again.exit_code == 2
    assert "already exists" in again.output
    assert load_profile(out).modulator.order == 4
    again = runner.invoke(main, ["design", str(out), "--order", "3", "--overwrite"])
    assert again.exit_code == 0, again.output
    assert load_profile(out).modulator.order == 3
    assert "NTF out-of-band gain" in again.output
    assert [p.name for p in tmp_path.iterdir()] == ["dac.toml"]  # no temporary left over


def test_design_refuses_pdm_with_many_levels(tmp_path):
    result = CliRunner().invoke(
        main, ["design", str(tmp_path / "x.toml"), "--levels", "5", "--output-stage", "pdm"]
    )
    assert result.exit_code == 2
    assert "--output-stage" in result.output
    assert not (tmp_path / "x.toml").exists()


def test_target_search_confirms_by_simulation(tmp_path):
    out = tmp_path / "found.toml"
    result = CliRunner().invoke(
        main,
        [
            "design", str(out), "--target-dynamic-range", "80", "--weighting", "unweighted",
            "--order", "2", "--levels", "2", "--confirm", "1", "--json",
        ],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    record = json.loads(result.stdout.strip().splitlines()[-1])
    best = record["candidates"][0]
    assert best["meets_target"]
    assert best["measured_dynamic_range_db"] >= 80.0
    prof = load_profile(out)
    assert prof.name == "found"
    assert (prof.modulator.order, prof.modulator.levels, prof.upsampler.osr) == (
        2,
        2,
        best["osr"],
    )


def test_unreachable_target_exits_1(tmp_path):
    result = CliRunner().invoke(
        main,
        [
            "design", str(tmp_path / "x.toml"), "--target-dynamic-range", "240", "--order", "1",
            "--level-choices", "2,3",
        ],
    )  # fmt: skip
    assert result.exit_code == 1
    assert not (tmp_path / "x.toml").exists()


def test_atomic_text_writer(tmp_path):
    p = write_text_atomic(tmp_path / "a.toml", "x = 1\n")
    assert p.read_text() == "x = 1\n"
    with pytest.raises(OutputError, match="already exists"):
        write_text_atomic(p, "x = 2\n")
    write_text_atomic(p, "x = 2\n", overwrite=True)
    assert p.read_text() == "x = 2\n"
    with pytest.raises(OutputError, match="does not exist"):
        write_text_atomic(tmp_path / "nope" / "a.toml", "")
    assert sorted(q.name for q in tmp_path.iterdir()) == ["a.toml"]


def test_options_and_profile_keys_share_one_set_of_limits():
    # design --levels used to stop at 1024 while modulator.levels allows 2**24: both now read
    # audiodsm.limits, so the command accepts exactly what the profile schema accepts
    from audiodsm.cli.design import design
    from audiodsm.errors import ProfileError
    from audiodsm.limits import LEVELS_RANGE, ORDER_RANGE, OUT_OF_BAND_GAIN_RANGE
    from audiodsm.profile import profile_from_dict

    params = {p.name: p for p in design.params}
    assert (params["levels"].type.min, params["levels"].type.max) == LEVELS_RANGE
    assert (params["order"].type.min, params["order"].type.max) == ORDER_RANGE
    gain = params["out_of_band_gain"].type
    assert (gain.min, gain.max, gain.min_open) == (*OUT_OF_BAND_GAIN_RANGE, True)
    top = LEVELS_RANGE[1]
    prof = profile_from_dict({"modulator": {"levels": top}, "output": {"kind": "nrz"}})
    assert prof.modulator.levels == top
    with pytest.raises(ProfileError, match="modulator.levels"):
        profile_from_dict({"modulator": {"levels": top + 1}, "output": {"kind": "nrz"}})
    with pytest.raises(ProfileError, match="modulator.out_of_band_gain"):
        profile_from_dict({"modulator": {"out_of_band_gain": OUT_OF_BAND_GAIN_RANGE[0]}})
    result = CliRunner().invoke(main, ["design", "x.toml", "--levels", str(top + 1)])
    assert result.exit_code == 2 and "--levels" in result.output


def test_design_job_refuses_pdm_with_many_levels_by_name(tmp_path):
    from audiodsm.evaluate.design_job import DesignRequest, run_design_job

    request = DesignRequest(tmp_path / "x.toml", levels=5, output_stage="pdm")
    with pytest.raises(ParameterError) as err:
        run_design_job(request)
    assert err.value.name == "output_stage"
    assert not (tmp_path / "x.toml").exists()
