"""The battery's impairment readings (issue 13 section 7) against outside references.

Element mismatch (INL of the drawn weights), clock jitter (the textbook estimate from the mean
squared step), DC offset (the INL of the idle code), analog noise (density^2 x bandwidth), and
the demo's trade-off: the shipped thermometer DAC fails the demo spec's THD+N target, the
shaped one passes.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest

from audiodsm.evaluate.battery import BatteryPlan, run_battery
from audiodsm.profile import load_profile
from audiodsm.stages.chain import Chain
from audiodsm.stages.elements import draw_element_errors

ROOT = Path(__file__).resolve().parents[1]
DAC = ROOT / "profiles" / "dac_chip"
RATE = 48000
QUICK = BatteryPlan.quick()


def _with(profile, **keys):
    return dataclasses.replace(
        profile, impairments=dataclasses.replace(profile.impairments, **keys)
    )


def _ideal(name):
    """A shipped DAC profile with its impairments set back to the ideal converter."""
    from audiodsm.profile import ImpairmentSettings

    profile = load_profile(DAC / f"{name}.toml")
    return dataclasses.replace(profile, impairments=ImpairmentSettings())


def _inl(errors, codes):
    """End-point integral nonlinearity (LSB) of a thermometer-selected element array."""
    return np.array([errors[:k].sum() - errors.sum() / 2 for k in codes])


# -- element mismatch ----------------------------------------------------------------------


def test_mismatch_cost_follows_the_integral_nonlinearity():
    # Thermometer selection makes the mismatch a static nonlinearity: code k is off by its
    # end-point INL (LSB). A multi-level loop moves between adjacent codes, so the in-band
    # transfer is the INL interpolated between codes, and a sine through it gets the
    # harmonics of its Fourier (Chebyshev) series; computed here from the drawn weights, as in
    # tests/test_elements.py and under its conditions (3rd order, out-of-band gain 1.5, no
    # dither, the tone at 0.7 of the loop's full scale), where the loop's code noise is narrow
    # enough for the interpolation to hold (with 1 LSB of dither and gain 2 it spans several
    # codes and smooths the INL: the harmonics then read about 2 dB lower). The as-built THD+N
    # power at -1 dBFS is the mismatch-free reading's power plus those harmonics (20 Hz..
    # 20 kHz), within 0.5 dB.
    levels, mismatch, seed = 17, 0.005, 7
    base = _ideal("nrz17_64x")
    loop = dataclasses.replace(
        base.modulator, dither_lsb=0.0, out_of_band_gain=1.5, input_scale=0.7 / 10 ** (-1 / 20)
    )
    profile = _with(
        dataclasses.replace(base, modulator=loop),
        element_mismatch=mismatch,
        element_selection="thermometer",
        part_seed=seed,
    )
    res = run_battery(profile, tests=("element_mismatch",), plan=QUICK, jobs=2)
    m = res.metrics
    assert res.invalid == {}
    n_el = levels - 1
    errors = draw_element_errors(n_el, mismatch=mismatch, seed=seed)
    inl = _inl(errors, range(levels))
    scale = Chain.from_profile(profile, RATE, 1).input_scale
    amplitude = 10 ** (-1 / 20) * scale  # at the loop, full scale = the outer levels
    theta = 2 * np.pi * np.arange(4096) / 4096
    position = (amplitude * np.sin(theta) + 1) * n_el / 2
    coeffs = np.abs(np.fft.rfft(np.interp(position, np.arange(levels), inl))) * 2 / 4096
    tone = amplitude * n_el / 2
    orders = [h for h in range(2, 40) if h * 997.0 <= 20000.0]
    harmonics = float(np.sum((coeffs[orders] / tone) ** 2))
    free = m["mismatch_free_thd_n_db_at_minus1_dbfs"]
    predicted = 10 * math.log10(10 ** (free / 10) + harmonics)
    built = free + m["mismatch_thd_n_cost_db"]
    assert 10 * math.log10(harmonics) > free + 20  # the mismatch dominates the reading
    assert built == pytest.approx(predicted, abs=0.5), (built, predicted)
    assert m["mismatch_dynamic_range_cost_db"] > 0.0


def test_ideal_elements_have_no_mismatch_reading():
    # a PDM output has no unit elements, and zero mismatch costs nothing: no reading (None),
    # which is no invalid reading either
    res = run_battery(_ideal("pdm2_64x"), tests=("element_mismatch",), plan=QUICK, jobs=1)
    for name in ("mismatch_free_thd_n_db_at_minus1_dbfs", "mismatch_thd_n_cost_db"):
        assert res.metrics[name] is None and name not in res.invalid


# -- clock jitter --------------------------------------------------------------------------


@pytest.fixture(scope="module")
def jitter_runs():
    out = {}
    for name in ("pdm5_64x", "nrz17_64x"):
        profile = _ideal(name)
        res = run_battery(profile, tests=("dynamic_range", "jitter_sweep"), plan=QUICK, jobs=2)
        out[name] = (profile, res)
    return out


def _step_rms(profile):
    """rms step of the modulator output for the -60 dBFS tone, in chain-input full-scale units.

    The loop sees the input times ``input_scale``, so one loop unit is ``1 / input_scale`` of
    the input's full scale (the chain's calibration divides the same factor out again).
    """
    chain = Chain.from_profile(profile, RATE, 1)
    x = 10 ** (-60 / 20) * np.sin(2 * np.pi * 997.0 * np.arange(RATE // 2) / RATE)
    m = chain.process(x, keep=("modulator",))[0].modulator[:, 0]
    steps = np.diff(m[m.size // 8 :]) / chain.input_scale
    return float(np.sqrt(np.mean(steps**2)))


def test_dynamic_range_against_jitter_follows_the_textbook_estimate(jitter_runs):
    # White jitter sigma on every edge adds noise (sigma f_m)^2 E[(y[n] - y[n-1])^2] spread
    # evenly to f_m / 2 (Schreier & Temes 2005, clock jitter of continuous-time DACs; Cherry &
    # Snelgrove 2000): the dynamic range with jitter is the jitter-free one with that noise
    # added. The chain's jitter stage, measured by the battery, follows it within 1 dB.
    for name, (_, res) in jitter_runs.items():
        curve = res.curves["dynamic_range_vs_jitter"]
        assert list(curve["sigma_s"]) == [1e-12, 1e-11, 1e-10]
        np.testing.assert_allclose(
            curve["dynamic_range_db"], curve["predicted_dynamic_range_db"], atol=1.0, err_msg=name
        )
        assert res.metrics["jitter_dynamic_range_db_at_100ps"] == curve["dynamic_range_db"][2]


def test_single_bit_jitter_penalty_is_the_ratio_of_mean_squared_steps(jitter_runs):
    # issue 13 section 3c: the jitter noise goes with the mean squared step (Schreier & Temes
    # 2005; Cherry & Snelgrove 2000), so the single-bit stream's jitter noise exceeds the
    # 17-level one's by the ratio of their mean squared steps, within 1 dB. The noise is read
    # from the battery's dynamic range at 100 ps minus its jitter-free dynamic range; the
    # steps are computed here from each chain's modulator output.
    noise, steps = {}, {}
    for name, (profile, res) in jitter_runs.items():
        m = res.metrics
        total = 10 ** (-m["jitter_dynamic_range_db_at_100ps"] / 10)
        noise[name] = 10 * math.log10(total - 10 ** (-m["dynamic_range_db"] / 10))
        steps[name] = _step_rms(profile)
        # the battery reports the same rms step (its own run, other dither): within 0.1 dB
        assert 20 * math.log10(m["output_step_rms_fs"] / steps[name]) == pytest.approx(0, abs=0.1)
    want = 20 * math.log10(steps["pdm5_64x"] / steps["nrz17_64x"])
    got = noise["pdm5_64x"] - noise["nrz17_64x"]
    assert want > 15.0  # the single-bit stream is far more jitter-sensitive
    assert got == pytest.approx(want, abs=1.0), (got, want)


def test_jitter_sweep_on_pwm_where_the_model_holds():
    # PWM edges are in the jitter model with ideal switches and no dead time (valid numbers);
    # the switched filter with on-resistance and the dead-time loop do not model jitter, and
    # the readings say so instead of a number
    amp = ROOT / "profiles" / "pocket_amp"
    bridge = load_profile(amp / "pwm9_bridge_16x.toml")
    ideal = _with(bridge, high_side_on_ohm=0.0, low_side_on_ohm=0.0)
    res = run_battery(ideal, tests=("jitter_sweep",), plan=QUICK, jobs=1)
    assert res.invalid == {} and res.metrics["jitter_dynamic_range_db_at_1ps"] > 60.0
    for profile, words in (
        (bridge, "on-resistance"),
        (load_profile(amp / "pwm9_halfbridge_deadtime_16x.toml"), "dead"),
    ):
        res = run_battery(profile, tests=("jitter_sweep",), plan=QUICK, jobs=1)
        assert res.metrics["jitter_dynamic_range_db_at_1ps"] is None
        assert words in res.invalid["jitter_dynamic_range_db_at_1ps"], res.invalid


@pytest.mark.parametrize("name", ["pdm5_64x", "nrz17_64x"])
def test_one_run_serves_every_jitter_of_the_sweep(name):
    # The edge error of a displaced edge is -step * shift (stages/jitter.py), linear in the
    # shift, and the shifts of a jitter sigma are sigma times the same normal draws; every
    # stage after the edges is linear. So the output with jitter sigma is the run at the
    # largest sigma plus (sigma / largest - 1) times the part the random jitter makes, to
    # rounding (the reference here: separate runs, one per sigma, with the same seed). The
    # dithered 17-level NRZ loop checks that the shared run keeps the dither too.
    from audiodsm.evaluate.battery import _Context
    from audiodsm.evaluate.battery_impairments import _test_jitter, jitter_scales_linearly
    from audiodsm.stages.chain import run_chain

    profile = _ideal(name)
    assert jitter_scales_linearly(profile)
    sigmas = (1e-12, 1e-11, 1e-10)
    x = 10 ** (-60 / 20) * np.sin(2 * np.pi * 997.0 * np.arange(RATE // 5) / RATE)
    top = run_chain(
        _with(profile, jitter_rms_s=sigmas[-1]),
        x,
        rate_hz=RATE,
        keep=("listening", "jitter_error"),
        threads=1,
    )
    for sigma in sigmas:
        alone = run_chain(_with(profile, jitter_rms_s=sigma), x, rate_hz=RATE, threads=1)
        shared = top.listening + (sigma / sigmas[-1] - 1.0) * top.jitter_error
        # rounding of float64 sums of numbers up to full scale: far below any reading
        np.testing.assert_allclose(shared, alone.listening, rtol=0, atol=1e-14)
    # the jitter's part is no rounding pattern: 100 ps moves a single-bit PDM output by
    # tens of dB more than the rounding bound above
    assert np.sqrt(np.mean(top.jitter_error**2)) > 1e-9
    # the battery's readings: the sweep in one run against one run per sigma
    ctx = _Context(QUICK, RATE, 0.01)
    together = _test_jitter(ctx, profile, sigmas)
    assert len(together["stats"]) == 1
    for point in together["jitter_sweep"]:
        alone = _test_jitter(ctx, profile, point["sigma_s"])["jitter_sweep"][0]
        assert point["reason"] == alone["reason"] == ""
        assert point["dr_db"] == pytest.approx(alone["dr_db"], abs=1e-9)
        assert point["dr_db_a"] == pytest.approx(alone["dr_db_a"], abs=1e-9)


def test_jitter_error_is_refused_where_it_is_not_defined():
    # no random jitter, nothing to keep: one-line error instead of zeros
    from audiodsm.errors import ParameterError

    chain = Chain.from_profile(_ideal("pdm5_64x"), RATE, 1)
    with pytest.raises(ParameterError, match="jitter_error"):
        chain.process(np.zeros(64), keep=("listening", "jitter_error"))


# -- DC offset -----------------------------------------------------------------------------


def test_dc_offset_reads_the_inl_of_the_idle_codes():
    # An undithered 17-level loop fed digital silence idles on its middle codes (here a
    # pattern of codes 7, 8 and 9). With thermometer selection code k turns elements
    # 0..k-1 on, so it is off by its end-point INL, sum(e[:k]) - sum(e)/2 LSB (IEEE Std 1241
    # end-point INL), one LSB being 2/16 of the loop's full scale and the loop's full scale
    # 1/input_scale of the chain's. The output's DC is the INL averaged over the codes the
    # loop used (counted here from its output); the battery's reading equals it within 0.1 %.
    mismatch, seed = 0.01, 11
    base = _ideal("nrz17_64x")
    base = dataclasses.replace(base, modulator=dataclasses.replace(base.modulator, dither_lsb=0.0))
    profile = _with(
        base, element_mismatch=mismatch, element_selection="thermometer", part_seed=seed
    )
    res = run_battery(profile, tests=("idle",), plan=QUICK, jobs=1)
    chain = Chain.from_profile(profile, RATE, 1)
    levels = chain.process(np.zeros(RATE // 2), keep=("modulator",))[0].modulator[:, 0]
    levels = levels[levels.size // 5 :]  # past the start-up, as the battery reads it
    codes, counts = np.unique(np.round((levels + 1) * 8).astype(int), return_counts=True)
    errors = draw_element_errors(16, mismatch=mismatch, seed=seed)
    inl = _inl(errors, codes)
    want = float(np.sum(counts * inl) / np.sum(counts)) * (2 / 16) / chain.input_scale
    got = res.metrics["dc_offset_fs"]
    assert abs(want) > 1e-4  # a real offset, far above the reading's floor
    assert got == pytest.approx(want, rel=1e-3)
    # AES17 dBFS of a constant: 20 log10(|dc| sqrt 2)
    want_dbfs = 20 * math.log10(abs(want) * 2**0.5)
    assert res.metrics["dc_offset_dbfs"] == pytest.approx(want_dbfs, abs=0.01)


# -- analog noise --------------------------------------------------------------------------


def test_analog_noise_floor_is_density_squared_times_bandwidth():
    # the definition of a one-sided density: white D gives D^2 B in a band B, a 1/f corner
    # f_c adds D^2 f_c ln(f_hi / f_lo) (the integral of D^2 f_c / f); referred to full scale
    # through the chain's calibrated gain (volts per full-scale unit), 0 dBFS = power 0.5
    density_nv, corner = 40.0, 500.0
    profile = _with(_ideal("nrz17_64x"), noise_density_nv=density_nv, noise_corner_hz=corner)
    res = run_battery(profile, tests=("dynamic_range",), plan=QUICK, jobs=1)
    gain = Chain.from_profile(profile, RATE, 1).gain
    band = (20000.0 - 20.0) + corner * math.log(20000.0 / 20.0)
    want = 10 * math.log10((density_nv * 1e-9) ** 2 * band / gain**2 / 0.5)
    assert res.metrics["analog_noise_dbfs"] == pytest.approx(want, abs=0.01)
    # A-weighting (IEC 61672-1) takes power off the band's ends: below the unweighted floor
    assert res.metrics["analog_noise_dbfs_a"] < res.metrics["analog_noise_dbfs"]
    ideal = run_battery(_ideal("nrz17_64x"), tests=("dynamic_range",), plan=QUICK, jobs=1)
    assert ideal.metrics["analog_noise_dbfs"] is None
    assert "analog_noise_dbfs" not in ideal.invalid


def test_analog_noise_floor_is_what_the_chain_adds():
    # white analog noise far above the loop's own floor: the battery's measured noise (its
    # dynamic range, noise re full scale) is the computed floor, within 0.2 dB (the band
    # filter is not a brick wall), unweighted and A-weighted
    profile = _with(_ideal("nrz17_64x"), noise_density_nv=2000.0, part_seed=5)
    res = run_battery(profile, tests=("dynamic_range",), plan=QUICK, jobs=1)
    m = res.metrics
    assert -m["analog_noise_dbfs"] < m["dynamic_range_db"] + 0.2
    assert -m["dynamic_range_db"] == pytest.approx(m["analog_noise_dbfs"], abs=0.2)
    assert -m["dynamic_range_db_a"] == pytest.approx(m["analog_noise_dbfs_a"], abs=0.2)


# -- the demo's trade-off ------------------------------------------------------------------


def test_demo_spec_fails_the_thermometer_dac_and_passes_the_shaped_one():
    # the two shipped 17-level DACs share the part (element mismatch and its seed) and differ
    # in the element selection only: without mismatch shaping the -1 dBFS THD+N misses the
    # demo spec's target, with it the target is met
    from audiodsm.evaluate.grade import grade_metrics
    from audiodsm.spec import load_spec

    spec = load_spec(ROOT / "profiles" / "specs" / "dac_chip.toml")
    thermo = load_profile(DAC / "nrz17_thermometer_64x.toml")
    shaped = load_profile(DAC / "nrz17_shaped_64x.toml")
    assert thermo.impairments.element_mismatch == shaped.impairments.element_mismatch > 0
    assert thermo.impairments.part_seed == shaped.impairments.part_seed
    assert thermo.impairments.element_selection == "thermometer"
    assert shaped.impairments.element_selection != "thermometer"
    verdict = {}
    for name, profile in (("thermometer", thermo), ("shaped", shaped)):
        res = run_battery(profile, tests=("level_sweep",), plan=QUICK, jobs=2)
        lines = grade_metrics(res.metrics, res.curves, spec, res.invalid)
        (line,) = [g for g in lines if g.target.metric == "thd_n_db_at_minus1_dbfs"]
        verdict[name] = line.passed
    assert verdict == {"thermometer": False, "shaped": True}
