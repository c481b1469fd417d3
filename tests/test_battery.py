"""The test battery, checked against outside sources.

Each battery run here uses a short plan or a subset of the tests, to keep the file fast.
"""

import csv
import io
import math
import re
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from audiodsm.errors import ParameterError
from audiodsm.evaluate.battery import (
    METRIC_UNITS,
    TEST_NAMES,
    BatteryPlan,
    battery_rate_hz,
    run_battery,
)
from audiodsm.evaluate.battery_runs import NUMERIC_FLOOR_DBFS
from audiodsm.profile import ChainProfile, profile_from_dict
from audiodsm.stages.chain import Chain

RATE = 48000


def _transparent(bits):
    """A quantizer without noise shaping: NTF = z/z = 1, TPDF dither of 2 LSB peak-to-peak."""
    return profile_from_dict(
        {
            "name": f"transparent-{bits}bit",
            "input": {"requantize": "off"},  # the quantizer alone: a float source
            "upsampler": {"osr": 16},
            "modulator": {
                "zeros": [0.0],
                "poles": [0.0],
                "structure": "error-feedback",
                "levels": 2**bits,
                "dither_lsb": 1.0,
            },
            "output": {"kind": "nrz"},
            "reconstruction": {"kind": "none"},
        }
    )


def _band_integral(power_fn, lo=20.0, hi=20000.0, points=200001):
    """Integral of a power response over the band (trapezoid on a fine linear grid)."""
    f = np.linspace(lo, hi, points)
    return float(np.trapezoid(power_fn(f), f))


@pytest.fixture(scope="module")
def transparent_result():
    return run_battery(_transparent(24), tests=("dynamic_range",), plan=BatteryPlan.quick())


def test_transparent_chain_matches_tpdf_dither_theory(transparent_result):
    # Lipshitz, Wannamaker & Vanderkooy, "Quantization and Dither: A Theoretical Survey",
    # JAES 40(5), 1992: TPDF dither of 2 LSB peak-to-peak gives a total error power of
    # Delta^2/4, white, independent of the signal. Here it is spread evenly over 0..fm/2 at
    # the modulator rate fm, so the noise in the 20 Hz..20 kHz band is
    # (Delta^2/4) * int W(f)^2 df / (fm/2). Dynamic range = 10 log10(0.5 / noise) (0.5 is the
    # power of a 0 dBFS sine, AES17). Tolerance 0.5 dB (the brief's), which covers the AES17
    # band-limit filter's skirts against the ideal band (< 0.1 dB) and the 0.5 s noise
    # estimate (about 0.05 dB rms for 20 kHz of bandwidth).
    import librosa

    levels = 2**24
    delta = 2.0 / (levels - 1)
    fm = RATE * 16
    white = delta**2 / 4.0 / (fm / 2.0)  # power per Hz
    noise = white * _band_integral(lambda f: np.ones_like(f))
    expected = 10.0 * math.log10(0.5 / noise)
    got = transparent_result.metrics["dynamic_range_db"]
    assert got == pytest.approx(expected, abs=0.5)
    # A-weighted: the IEC 61672-1 analytic curve as librosa computes it (an outside library)
    noise_a = white * _band_integral(lambda f: 10.0 ** (librosa.A_weighting(f) / 10.0))
    expected_a = 10.0 * math.log10(0.5 / noise_a)
    assert transparent_result.metrics["dynamic_range_db_a"] == pytest.approx(expected_a, abs=0.5)
    # and the dither-theory figure is far from the undithered one (Delta^2/12, 4.77 dB less
    # noise), so the check can tell the two apart
    assert abs(got - (expected + 10 * math.log10(3.0))) > 4.0


def test_multibit_dynamic_range_agrees_with_linear_model():
    # Schreier & Temes, "Understanding Delta-Sigma Data Converters", 2005, ch. 2/4: white
    # quantization noise Delta^2/12 shaped by the NTF (NoiseTransfer.linear_sqnr_db), here
    # over the 20 kHz measurement band, i.e. an OSR of fm / (2 * 20 kHz). The chain gives the
    # loop input_scale of headroom and calibrates it out, which lowers the dynamic range at the
    # chain input by 20 log10(input_scale). Tolerance 2 dB (the brief's): a multi-bit
    # quantizer's error is close to, but not exactly, white and uniform.
    from audiodsm.stages.chain import Chain

    prof = profile_from_dict(
        {
            "name": "nrz17",
            "input": {"requantize": "off"},  # the loop alone: a float source
            "modulator": {"order": 4, "levels": 17, "out_of_band_gain": 2.5},
            "output": {"kind": "nrz"},
        }
    )
    res = run_battery(prof, tests=("dynamic_range",), plan=BatteryPlan.quick())
    from audiodsm.design.ntf import NoiseTransfer

    chain = Chain.from_profile(prof, RATE, 1)
    fm = 64 * RATE
    # the zeros are optimized over 0..20 kHz (modulator.zero_band_edge_hz)
    ntf = NoiseTransfer.designed(4, osr=64, out_of_band_gain=2.5, zero_band_edge=20000.0 / fm)
    expected = ntf.linear_sqnr_db(levels=17, osr=fm / (2 * 20000.0)) + 20 * math.log10(
        chain.input_scale
    )
    assert res.metrics["dynamic_range_db"] == pytest.approx(expected, abs=2.0)


@pytest.fixture(scope="module")
def stability_by_order():
    out = {}
    for order in (2, 3, 4, 5):
        prof = ChainProfile(
            name=f"pdm{order}", modulator=replace(ChainProfile().modulator, order=order)
        )
        out[order] = run_battery(prof, tests=("stability",), plan=BatteryPlan.quick())
    return out


def test_single_bit_stable_amplitude_drops_with_order(stability_by_order):
    # Common practice (Lee's rule literature; Schreier & Temes 2005, ch. 4): with the peak NTF
    # gain held at 1.5, the maximum stable amplitude of a single-bit loop falls as the order
    # rises. The loop's own amplitude (fraction of its full scale) is compared.
    amps = [stability_by_order[k].curves["stability"]["loop_amplitude"][0] for k in (2, 3, 4, 5)]
    assert all(a > b for a, b in zip(amps, amps[1:], strict=False)), amps
    # Against the figure of maximum stable amplitude vs out-of-band gain (Schreier & Temes
    # 2005, ch. 4, after Schreier 1993, IEEE TCAS-II 40(8); readings FROM MEMORY, not checked
    # against the printed figure): at ||H||_inf = 1.5 the 5th-order curve reads about -4 dBFS
    # and the 2nd-order loop is stable to within about 1 dB of full scale. The tolerance is
    # the 1.5 dB of reading the figure from memory; the search itself is repeatable (seeded
    # dither, fixed frequencies), so the width is the reference's, not the simulation's.
    # The chain scales its states by powers of two: the loop's bits, so its limit, are the
    # unscaled loop's.
    msa_db = [20 * math.log10(a) for a in amps]
    assert msa_db[-1] == pytest.approx(-4.0, abs=1.5), msa_db
    assert msa_db[0] == pytest.approx(-1.0, abs=1.0), msa_db
    assert amps[0] <= 1.0


def test_stable_amplitude_metric_refers_to_the_chain_input(stability_by_order):
    res = stability_by_order[5]
    curve = res.curves["stability"]
    loop_amp = curve["loop_amplitude"][0]
    scale = curve["input_scale"][0]
    assert res.metrics["max_stable_amplitude_dbfs"] == pytest.approx(
        20 * math.log10(loop_amp / scale), abs=1e-12
    )
    hist = res.curves["state_histograms"]
    assert hist["counts"].shape == (5, BatteryPlan.quick().histogram_bins)
    assert np.all(hist["counts"].sum(axis=1) == BatteryPlan.quick().histogram_samples)
    # the histogram spans exactly +-peak of each state
    assert np.allclose(hist["edges"][:, -1], hist["peak"])


def test_overload_above_the_stable_amplitude_only():
    # Common practice (Schreier & Temes 2005, ch. 4): a single-bit loop driven past its
    # maximum stable amplitude overloads (its states run away and the guard acts), while
    # below it the guard stays idle. Without the chain's headroom (input_scale = 1) the
    # 5th-order loop's limit lies below 0 dBFS, so probes above it run through the chain.
    prof = profile_from_dict({"name": "no-headroom", "modulator": {"input_scale": 1.0}})
    res = run_battery(prof, tests=("stability", "level_sweep"), plan=BatteryPlan.quick())
    msa = res.metrics["max_stable_amplitude_dbfs"]
    assert msa < 0.0
    over = res.curves["overload"]
    assert res.metrics["overload_count"] == 0
    assert np.all(over["overload_count"][over["level_dbfs"] <= msa] == 0)
    assert np.any(over["overload_count"][over["level_dbfs"] > msa] > 0)
    assert msa < res.metrics["overload_onset_dbfs"] <= 0.0
    # above the limit the THD+N collapses from the noise floor to gross distortion
    below = over["thd_n_db"][over["level_dbfs"] == -20.0][0]
    assert over["thd_n_db"][-1] > below + 40.0


def test_a_tone_lost_in_a_limit_cycle_is_reported_not_averaged():
    # A low-order single-bit loop without dither can lock into a limit cycle that ignores a
    # small input (Gray 1989 for the first-order case; common practice for low orders). Here
    # a 2nd-order loop at OSR 32 loses the low tones: they are reported as lost and kept out
    # of the noise-modulation spread (which would otherwise compare against digital zero).
    prof = profile_from_dict(
        {"name": "second", "modulator": {"order": 2}, "upsampler": {"osr": 32}}
    )
    res = run_battery(prof, tests=("level_sweep",), plan=BatteryPlan.quick())
    curve = res.curves["thd_n_vs_level"]
    # NaN in tone_dbfs: the tone left no trace at all (below the numeric floor), also lost
    off = ~(np.abs(curve["tone_dbfs"] - curve["level_dbfs"]) <= 3.0)
    assert off.any()
    assert all("tone lost" in why for why in curve["invalid_reason"][off])
    assert np.all(np.isnan(curve["thd_n_db"][off]))
    assert res.metrics["tone_lost_at_dbfs"] == np.max(curve["level_dbfs"][off])
    assert 0.0 <= res.metrics["noise_modulation_db"] < 30.0
    assert any("did not come through" in n for n in res.notes)


def test_first_order_idle_tone_at_the_predicted_frequency():
    # R. M. Gray, IEEE Trans. Commun. 37(6), 1989 (and J. C. Candy, 1981): a first-order
    # single-bit loop (NTF = 1 - z^-1) with a constant input u makes a periodic output whose
    # lines lie at multiples of (1 + u)/2 * fm, folded; the even ones give in-band lines at
    # multiples of u * fm, the fundamental u * fm the strongest. Here u is the DC offset
    # times the chain's input scale. Tolerance: two bins of the detector's spectrum.
    from audiodsm.stages.chain import Chain

    prof = profile_from_dict({"name": "first-order", "modulator": {"zeros": [1.0], "poles": [0.0]}})
    plan = replace(BatteryPlan.quick(), dc_offsets=1, dc_range=(1e-3, 1e-3))
    res = run_battery(prof, tests=("dc_sweep",), plan=plan)
    scale = Chain.from_profile(prof, RATE, 1).input_scale
    fm = 64 * RATE
    tone_map = res.curves["idle_tone_map"]
    assert list(tone_map["dc_offset"]) == [-1e-3, 1e-3]
    for hz in tone_map["line_hz"]:
        assert hz == pytest.approx(1e-3 * scale * fm, abs=2 * RATE / 4096)
    assert res.metrics["idle_tone_count"] == 2
    assert res.metrics["idle_tone_max_dbfs"] == pytest.approx(np.max(tone_map["line_dbfs"]))


@pytest.fixture(scope="module")
def full_quick():
    prof = ChainProfile(name="pdm5")
    seen = []
    res = run_battery(prof, plan=BatteryPlan.quick(), jobs=2, progress=lambda *a: seen.append(a))
    return res, seen


def test_full_battery_gives_every_metric(full_quick):
    res, seen = full_quick
    expected = {k for k in METRIC_UNITS}
    assert set(res.metrics) == expected
    for k, v in res.json_metrics().items():
        assert v is None or isinstance(v, (int, float, bool)), k
    # progress: every run reported once, in order, against a fixed total
    assert [d for d, _, _ in seen] == list(range(1, len(seen) + 1))
    assert {t for _, t, _ in seen} == {len(seen)}
    for name in ("thd_n_vs_level", "idle_tone_map", "frequency_response", "state_histograms"):
        assert name in res.curves
    # a healthy loop has no invalid reading: the validity checks raise no false alarm (the
    # class-D stage's readings do not apply to a PDM stage and say so)
    class_d = {k for k, v in METRIC_UNITS.items() if v[0] == "class_d_stage"}
    assert {k: v for k, v in res.invalid.items() if k not in class_d} == {}
    assert all("class-D" in res.invalid[k] for k in class_d)
    assert all(
        v == {"valid": True, "reason": ""} for k, v in res.validity().items() if k not in class_d
    )
    assert set(res.validity()) == expected
    assert list(res.curves["thd_n_vs_level"]["invalid_reason"]) == [""] * 7


def test_full_battery_readings_are_plausible(full_quick):
    res, _ = full_quick
    m = res.metrics
    # AES17 relations: dynamic range = -(noise floor); THD+N at -20 dBFS = floor + 20 dB
    # when noise dominates (within 1 dB; the loop's distortion at -20 dBFS is far lower)
    assert m["thd_n_db_at_minus20_dbfs"] == pytest.approx(-m["dynamic_range_db"] + 20.0, abs=1.0)
    # the shaped noise of a single-bit loop rises above the band: A-weighting (which falls
    # off above 10 kHz, IEC 61672-1) gives a higher dynamic range than the unweighted one
    assert m["dynamic_range_db_a"] > m["dynamic_range_db"]
    # a chain with a 0.005 dB upsampler spec and a 60 kHz 3rd-order Butterworth filter:
    # |H(20k)|^2 = 1 / (1 + (20/60)^6), so the response may droop by at most about 0.01 dB
    droop = -10 * math.log10(1 + (20 / 60) ** 6)
    assert 0 <= m["passband_ripple_db"] <= abs(droop) + 0.02
    assert m["overload_count"] == 0
    assert m["pwm_dropped_pulses"] is None
    # PDM switching: the output changes level on a large fraction of the clock ticks
    assert 0.1 * 64 * RATE < m["switching_rate_hz"] < 64 * RATE


def test_jobs_and_reruns_give_the_same_numbers(full_quick):
    res, _ = full_quick
    again = run_battery(
        ChainProfile(name="pdm5"), plan=BatteryPlan.quick(), jobs=1, tests=("dynamic_range",)
    )
    for k in ("dynamic_range_db", "dynamic_range_db_a", "out_of_band_noise_dbfs"):
        assert again.metrics[k] == res.metrics[k]


def test_modulator_samples_count_every_run(full_quick, transparent_result):
    # one run, counted by hand from the plan: (settle + tone + tail) s at 48 kHz, times the
    # OSR (16), one channel
    plan = BatteryPlan.quick()
    frames = round((plan.settle_s + plan.tone_s + 0.05) * RATE)
    assert transparent_result.modulator_samples == frames * 16
    # the whole short battery of a 64x loop: every chain run's frames x 64 x channels plus the
    # state trace, summed the same way from the plan (7 sweep levels, 2 x 4 DC offsets, the
    # frequency sweep's tones at two levels; the overload probes: the overload curve's points
    # beyond the 7 sweep levels, none when the curve is absent)
    from audiodsm.evaluate.battery import _sweep_frequencies

    res, _ = full_quick
    n = lambda seconds: round((plan.settle_s + seconds + 0.05) * RATE)  # noqa: E731
    tones = 2 * len(_sweep_frequencies(plan.frequency_sweep_step))
    probes = len(res.curves["overload"]["level_dbfs"]) - 7 if "overload" in res.curves else 0
    expected = (
        64
        * (
            n(plan.tone_s)
            + 7 * n(plan.sweep_s)
            + n(plan.silence_s)
            + 2 * plan.dc_offsets * n(plan.dc_s)
            + n(plan.response_s)
            + tones * n(plan.frequency_sweep_s)
            + n(plan.image_s)
            + 2 * n(plan.imd_s)
            + n(plan.tone_s)  # the jitter sweep: one run serves every sigma (PDM)
        )
        + plan.histogram_samples
    )
    expected += 64 * probes * n(plan.sweep_s)
    assert res.modulator_samples == expected


def test_seed_changes_dithered_runs_only():
    prof = _transparent(16)
    plan = BatteryPlan.quick()
    a = run_battery(prof, tests=("dynamic_range",), plan=plan, seed=1)
    b = run_battery(prof, tests=("dynamic_range",), plan=plan, seed=1)
    c = run_battery(prof, tests=("dynamic_range",), plan=plan, seed=2)
    assert a.metrics == b.metrics
    assert a.metrics["dynamic_range_db"] != c.metrics["dynamic_range_db"]


def test_pwm_switching_rate_from_first_principles():
    # A double-edge (symmetric) PWM frame with a duty strictly between 0 and 1 has one rising
    # and one falling edge per leg, so at idle (an odd level count puts silence on the middle
    # level, 50 % duty) the switching rate is two edges per frame times the frame rate.
    prof = profile_from_dict(
        {
            "name": "pwm",
            "modulator": {"order": 3, "levels": 9, "out_of_band_gain": 2.0},
            "output": {"kind": "pwm", "pwm_carrier": "double-edge"},
            "reconstruction": {"kind": "lc"},
        }
    )
    res = run_battery(prof, tests=("idle",), plan=BatteryPlan.quick())
    # Tolerance 0.5 %: the chain counts the edges of its flush (about its latency, a few ms of
    # silence after the 0.55 s input) but divides by the input's duration only.
    assert res.metrics["switching_rate_hz"] == pytest.approx(2 * 64 * RATE, rel=5e-3)
    assert res.metrics["pwm_dropped_pulses"] == 0
    assert res.metrics["pwm_stretched_pulses"] == 0


def test_bad_arguments_are_refused():
    prof = ChainProfile()
    with pytest.raises(ParameterError, match="tests"):
        run_battery(prof, tests=("loudness",))
    with pytest.raises(ParameterError, match="jobs"):
        run_battery(prof, jobs=0)
    with pytest.raises(ParameterError, match="plan.dc_s"):
        run_battery(prof, plan=replace(BatteryPlan(), dc_s=0.1))
    with pytest.raises(ParameterError, match="profile"):
        run_battery({"name": "x"})
    with pytest.raises(ParameterError, match="plan.frequency_sweep_step"):
        run_battery(prof, plan=replace(BatteryPlan(), frequency_sweep_step=0))
    assert set(TEST_NAMES) >= {m[0] for m in METRIC_UNITS.values() if m[0]}
    assert battery_rate_hz(prof) == 48000


def test_fine_quantizers_are_accepted_and_pwm_keeps_its_counter_bound():
    # the transparent profile needs a 24-bit quantizer (2**24 levels); a PWM stage's counter
    # steps are a multiple of levels - 1 and at most 65536, so it keeps 65537 levels at most
    from audiodsm.errors import ProfileError

    assert _transparent(24).modulator.levels == 2**24
    with pytest.raises(ProfileError, match="modulator.levels"):
        profile_from_dict({"modulator": {"levels": 65538}, "output": {"kind": "pwm"}})
    ok = profile_from_dict({"modulator": {"levels": 65537}, "output": {"kind": "pwm"}})
    assert ok.modulator.levels == 65537


def test_pwm_short_pulses_are_counted():
    # A double-edge carrier makes each counter code 2 x tick_subdivision = 8 ticks wide, so a
    # 12-tick minimum catches the one-code pulses (codes 1 and N-1), which a -1 dBFS tone
    # without headroom (input_scale = 1) drives the 9-level loop into all the time; the
    # configured action must show in its own count and only there. Their number is the same
    # either way: the output stage acts after the loop, so the same frames are caught.
    plan = replace(BatteryPlan.quick(), sweep_levels_dbfs=(-1.0,))
    counts = {}
    for act in ("drop", "stretch"):
        prof = profile_from_dict(
            {
                "name": f"pwm-{act}",
                "modulator": {"order": 3, "levels": 9, "out_of_band_gain": 2.0, "input_scale": 1.0},
                "output": {
                    "kind": "pwm",
                    "tick_subdivision": 4,
                    "min_pulse_ticks": 12,
                    "short_pulse_action": act,
                },
                "reconstruction": {"kind": "lc"},
            }
        )
        res = run_battery(prof, tests=("level_sweep",), plan=plan)
        counts[act] = (res.metrics["pwm_dropped_pulses"], res.metrics["pwm_stretched_pulses"])
    assert counts["drop"][0] > 0 and counts["drop"][1] == 0
    assert counts["stretch"][0] == 0 and counts["stretch"][1] > 0
    assert counts["drop"][0] == counts["stretch"][1]


def test_digitally_silent_idle_output_reports_the_numeric_floor():
    # An undithered 9-level loop idling on its zero level puts out exact zeros, so the idle
    # noise has no physical value; float64 rounding noise on a full-scale signal sits near
    # 20 log10(2**-53) = -319 dB (IEEE 754 double precision), below which a reading means
    # only "digitally silent". The battery reports the floor and says so.
    silent = profile_from_dict(
        {
            "name": "silent-nrz9",
            "input": {"requantize": "off"},  # exact digital silence in
            "modulator": {"order": 2, "levels": 9, "zero_layout": "dc"},
            "output": {"kind": "nrz"},
        }
    )
    result = run_battery(silent, tests=("idle",), plan=BatteryPlan.quick())
    assert 20 * math.log10(2.0**-53) < NUMERIC_FLOOR_DBFS
    for key in ("idle_noise_dbfs", "idle_noise_dbfs_a", "idle_noise_dbfs_ccir"):
        assert result.metrics[key] == NUMERIC_FLOOR_DBFS
    # and its DC is exactly zero: also reported at the floor, not as -inf
    assert result.metrics["dc_offset_dbfs"] == NUMERIC_FLOOR_DBFS
    assert any("digitally silent" in note for note in result.notes)


def test_a_dithered_idle_output_is_not_floored():
    # The same 9-level loop with 1 LSB of TPDF dither is never silent: the total error power is
    # Delta^2/4 whatever the input (Lipshitz, Wannamaker & Vanderkooy 1992), shaped by the NTF,
    # so its idle noise is a real reading far above the numeric floor.
    dithered = profile_from_dict(
        {
            "name": "dithered-nrz9",
            "modulator": {"order": 2, "levels": 9, "zero_layout": "dc", "dither_lsb": 1.0},
            "output": {"kind": "nrz"},
        }
    )
    result = run_battery(dithered, tests=("idle",), plan=BatteryPlan.quick())
    # Linear model (Schreier & Temes 2005, ch. 2): the white loop error of power Delta^2/4
    # (TPDF dither of 2 LSB peak to peak plus the quantizer's Delta^2/12, Lipshitz et al. 1992)
    # spread over 0 .. fm/2 and shaped by |NTF|^2, integrated over 20 Hz .. 20 kHz, and
    # raised by the chain's output calibration 1/input_scale. Three seeds read within 0.15 dB
    # of each other; 0.5 dB covers them and the quick plan's spectral scatter.
    chain = Chain.from_profile(dithered, RATE, 1)
    fm = RATE * chain.osr
    f = np.linspace(20.0, 20000.0, 20001)
    shaped = np.trapezoid(np.abs(chain.ntf.response(f / fm)) ** 2, f) / (fm / 2)
    step = 2.0 / 8
    expected = 10 * np.log10(step**2 / 4 * shaped / chain.input_scale**2 / 0.5)
    assert result.metrics["idle_noise_dbfs"] == pytest.approx(expected, abs=0.5)
    assert not any("digitally silent" in note for note in result.notes)
    # The NTF's zeros at DC (zero_layout = "dc") make the loop's output mean follow its
    # input mean (zero) up to its bounded states over the run length (Schreier & Temes 2005,
    # ch. 2, the noise-shaping loop's DC behaviour): the DC reading is a real number, far below
    # the idle noise and the AES17 level of a DC of 1e-4 of full scale (-77 dBFS).
    dc = result.metrics["dc_offset_dbfs"]
    assert NUMERIC_FLOOR_DBFS < dc < 20 * math.log10(1e-4 * math.sqrt(2))


UNSTABLE = Path(__file__).parent / "profiles" / "unstable_order8.toml"


@pytest.fixture(scope="module")
def unstable_result():
    from audiodsm.profile import load_profile

    tests = ("stability", "dynamic_range", "level_sweep", "idle", "dc_sweep", "thd_n_vs_frequency")
    return run_battery(load_profile(UNSTABLE), tests=tests, plan=BatteryPlan.quick(), jobs=2)


def test_unstable_loop_gets_the_unit_gain_prediction(unstable_result):
    # The order-8 single-bit loop overloads on the -60 dBFS tone: the gain fitted to that run
    # (about 0.15) would make the effective NTF unstable (its poles leave the unit circle), so
    # there is no effective gain to model and the prediction falls back to unit gain.
    c = unstable_result.curves["spectrum"]
    assert c["predicted_quantizer_gain"][0] == 1.0
    assert np.isfinite(c["predicted_density_dbfs_per_hz"][1:]).all()


def test_unstable_loop_readings_are_invalid_with_reasons(unstable_result):
    # Order 8, out-of-band gain 6, single-bit: far past Lee's rule for single-bit loops (peak
    # NTF gain about 1.5; common practice, Schreier & Temes 2005, ch. 4). It overloads at
    # every level and its output holds no trace of the tones. None of its THD+N, dynamic
    # range, idle-noise or idle-tone readings may be a number, and each says why.
    res = unstable_result
    must = [k for k in METRIC_UNITS if k.startswith(("thd_n_", "dynamic_range_", "idle_"))]
    must += ["noise_modulation_db", "max_stable_amplitude_dbfs", "out_of_band_noise_dbfs"]
    for k in must:
        assert res.metrics[k] is None, k
        assert res.invalid[k], k
        assert res.validity()[k]["valid"] is False
    assert "loop overloaded from" in res.invalid["thd_n_db_at_minus1_dbfs"]
    assert "tone lost at -1 dBFS" in res.invalid["thd_n_db_at_minus1_dbfs"]
    assert "no stable amplitude" in res.invalid["max_stable_amplitude_dbfs"]
    # the counts that describe the failure stay readings
    assert res.metrics["overload_count"] > 0 and "overload_count" not in res.invalid
    # the THD+N curve carries no number for an invalid point, and every point has a reason
    curve = res.curves["thd_n_vs_level"]
    assert np.all(np.isnan(curve["thd_n_db"])) and np.all(np.isnan(curve["thd_n_db_a"]))
    assert all(curve["invalid_reason"])
    # a tone sent at -60 dBFS never reads as -313 dBFS: the battery says why instead
    assert not any(re.search(r"-3[0-9][0-9]\.[0-9]+ dBFS", n) for n in res.notes)
    assert np.all(np.isnan(curve["tone_dbfs"]))
    assert any("no trace of it at the output" in n for n in res.notes)


def test_tpdf_dithered_chain_has_no_noise_modulation():
    # Lipshitz, Wannamaker & Vanderkooy, JAES 40(5) 1992: TPDF dither of 2 LSB peak to peak
    # makes the error power independent of the signal, so the noise between the tone's
    # harmonics does not move with its level; only the 0.4 s estimates scatter (about 0.1 dB).
    res = run_battery(_transparent(16), tests=("level_sweep",), plan=BatteryPlan.quick())
    assert res.metrics["noise_modulation_db"] < 0.5
    assert res.invalid == {}
    clear = res.curves["noise_vs_level"]["noise_clear_dbfs_a"]
    assert np.all(np.isfinite(clear))


def test_linear_noise_floor_is_the_undithered_share_of_the_tpdf_error():
    # The floor the battery holds readings against is the quantizer's own error, Delta^2/12
    # (Bennett 1948; Widrow & Kollar 2008), shaped by the NTF. With 2 LSB TPDF dither the
    # total error is Delta^2/4 (Lipshitz et al. 1992), 10 log10(3) = 4.77 dB above it; the
    # measured idle noise of a dithered 9-level loop must sit there, within 0.5 dB.
    from audiodsm.evaluate.battery_runs import _linear_noise_floor

    dithered = profile_from_dict(
        {
            "name": "dithered-nrz9",
            "modulator": {"order": 2, "levels": 9, "zero_layout": "dc", "dither_lsb": 1.0},
            "output": {"kind": "nrz"},
        }
    )
    floor = _linear_noise_floor(Chain.from_profile(dithered, RATE, 1))
    result = run_battery(dithered, tests=("idle",), plan=BatteryPlan.quick())
    got = result.metrics["idle_noise_dbfs"] - floor["unweighted"]
    assert got == pytest.approx(10 * math.log10(3.0), abs=0.5)
    # an undithered multi-level loop can idle with no error at all: it gets no floor
    plain = profile_from_dict(
        {"name": "nrz9", "modulator": {"order": 2, "levels": 9}, "output": {"kind": "nrz"}}
    )
    assert _linear_noise_floor(Chain.from_profile(plain, RATE, 1)) is None


def test_impossible_thd_n_is_called_so():
    # A THD+N whose noise lies far under the chain's own floor, or under the simulation's
    # float64 floor, is not a reading: the sweep point says why.
    from audiodsm.evaluate.battery_assembly import _sweep_reason

    floor = {"unweighted": -110.0, "a": -112.0, "ccir": -108.0}
    point = {
        "level_dbfs": -1.0,
        "tone_dbfs": -1.0,
        "thd_n_db": -150.0,
        "thd_n_db_a": -152.0,
        "noise_dbfs": -151.0,
        "noise_dbfs_a": -153.0,
        "overload_count": 0,
        "faults": [],
    }
    assert "impossible" in _sweep_reason(point, None, floor)
    assert "-110.0 dBFS" in _sweep_reason(point, None, floor)
    sound = dict(point, thd_n_db=-108.0, noise_dbfs=-109.0, thd_n_db_a=-110.0, noise_dbfs_a=-111.0)
    assert _sweep_reason(sound, None, floor) == ""
    silent = dict(sound, noise_dbfs=-320.0)
    assert "numeric floor" in _sweep_reason(silent, None, None)
    over = dict(sound, overload_count=5)
    assert _sweep_reason(over, -12.0, floor) == "loop overloaded from -12 dBFS"


def test_short_plan_sweeps_frequency_on_a_two_thirds_octave_grid(full_quick):
    # the short plan takes one in two of the 1/3-octave centres (IEC 61260-1 base-10:
    # 10^(k/10) kHz): successive tones 2/3 octave apart (a ratio of 10^0.2), from 20 Hz to
    # 20 kHz, with 997 Hz (the reference tone) and 20 kHz always kept
    res, _ = full_quick
    f = res.curves["thd_n_vs_frequency"]["frequency_hz"]
    assert f[0] == pytest.approx(20.0, rel=0.01) and f[-1] == 20000.0 and 997.0 in f
    steps = np.diff(np.log10([v for v in f if v not in (997.0, 20000.0)]))
    assert np.allclose(steps, 0.2, atol=1e-6)
    assert any("one in 2 of the 1/3-octave centres" in n for n in res.notes)


def test_thd_n_against_frequency_of_a_transparent_chain_is_flat():
    # A 24-bit TPDF-dithered quantizer without noise shaping adds white noise that does not
    # depend on the signal (Lipshitz, Wannamaker & Vanderkooy 1992, TPDF dither makes the
    # error's first two moments signal-independent), so THD+N is the same at every frequency
    # to within the scatter of the noise reading (1.5 s of 20 kHz-wide noise: about 0.02 dB
    # rms). Before the ratio was taken to the fitted tone, the band's 20 Hz edge read 3 dB
    # high at 20 Hz.
    plan = replace(BatteryPlan.quick(), frequency_sweep_s=1.5, frequency_sweep_step=1)
    res = run_battery(_transparent(24), tests=("thd_n_vs_frequency",), plan=plan, jobs=2)
    curve = res.curves["thd_n_vs_frequency"]
    f = curve["frequency_hz"]
    # 1/3-octave steps (IEC 61260-1 base-10 centres) from 20 Hz to 20 kHz
    assert f[0] == pytest.approx(20.0, rel=0.01) and f[-1] == pytest.approx(20000.0)
    assert len(f) >= 31 and np.all(np.diff(np.log10(f)) <= 0.102)  # 997 Hz for 1 kHz
    assert list(curve["level_dbfs"]) == [-1.0, -20.0]
    grid = curve["thd_n_db"]
    assert np.isfinite(grid).all()
    for row in grid:
        assert np.max(np.abs(row - row.mean())) <= 0.1
    # same noise under both tones: the ratio differs by the 19 dB between the levels
    assert grid[1].mean() - grid[0].mean() == pytest.approx(19.0, abs=0.05)
    m = res.metrics
    assert m["thd_n_db_worst_over_frequency_at_minus1_dbfs"] == pytest.approx(grid[0].max())
    assert m["thd_n_db_worst_over_frequency_at_minus20_dbfs"] == pytest.approx(grid[1].max())
    assert res.invalid == {}


def test_predicted_noise_density_matches_the_simulated_one():
    # The linear model (Schreier & Temes 2005, ch. 2): quantizer error of power Delta^2/12
    # plus TPDF dither of power (A Delta)^2/6 (Lipshitz, Wannamaker & Vanderkooy 1992), both
    # white over 0..fm/2 and shaped by |NTF|^2. A 17-level dithered loop's error is close to
    # that model, so the density the battery predicts must equal the simulated density within
    # 1 dB wherever the quantization noise dominates: above the audio band, here in
    # 1/3-octave bands (power averaged over each band's bins) from 40 kHz to 0.9 fm/2.
    prof = profile_from_dict(
        {
            "name": "nrz17-dithered",
            "modulator": {"order": 4, "levels": 17, "out_of_band_gain": 2.5, "dither_lsb": 1.0},
            "output": {"kind": "nrz"},
            "reconstruction": {"kind": "none"},
        }
    )
    res = run_battery(prof, tests=("dynamic_range", "stability"), plan=BatteryPlan.quick())
    c = res.curves["spectrum"]
    f = c["frequency_hz"]
    sim = 10.0 ** (c["density_dbfs_per_hz"] / 10.0)
    pred = 10.0 ** (c["predicted_density_dbfs_per_hz"] / 10.0)
    edges = 40000.0 * 2.0 ** (np.arange(0, 40) / 3.0)
    edges = edges[edges <= 0.9 * 64 * RATE / 2]
    assert len(edges) > 15
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        sel = (f >= lo) & (f < hi)
        ratio_db = 10.0 * math.log10(sim[sel].mean() / pred[sel].mean())
        assert abs(ratio_db) <= 1.0, (lo, ratio_db)
    # the audio-band view has fine bins at the audio rate and the prediction stops at 20 kHz
    a = res.curves["audio_spectrum"]
    assert a["resolution_hz"][0] <= 12.0 and a["frequency_hz"][-1] == pytest.approx(RATE / 2)
    assert np.isnan(a["predicted_density_dbfs_per_hz"][a["frequency_hz"] > 20000.0]).all()


def test_a_zero_at_dc_leaves_the_0_hz_bin_empty_not_a_numeric_floor():
    # NTF zeros all at DC: |NTF| is exactly 0 at 0 Hz, so the linear model predicts no noise
    # there and the density has no value in dB. The curves carry NaN (an empty CSV cell),
    # never the 10 log10(1e-300 / 0.5) = -2996.99 of a numeric floor (issue 17).
    from audiodsm.evaluate.report import curve_to_csv

    order = 3
    prof = profile_from_dict(
        {
            "name": "nrz17-zeros-at-dc",
            "modulator": {"order": order, "levels": 17, "zero_layout": "dc", "dither_lsb": 1.0},
            "output": {"kind": "nrz"},
            "reconstruction": {"kind": "none"},
        }
    )
    res = run_battery(prof, tests=("dynamic_range", "stability"), plan=BatteryPlan.quick())
    for name in ("spectrum", "audio_spectrum"):
        c = res.curves[name]
        f, pred = c["frequency_hz"], c["predicted_density_dbfs_per_hz"]
        assert f[0] == 0.0 and np.isnan(pred[0]), name
        assert np.isfinite(pred[1:][f[1:] <= 20000.0]).all(), name
        # every dB number of the curve's CSV is a level, none a floor
        rows = list(csv.DictReader(io.StringIO(curve_to_csv(res.curves, name))))
        assert rows[0]["predicted_density_dbfs_per_hz"] == "", name
        levels = [float(v) for r in rows for k, v in r.items() if "db" in k and v not in ("", None)]
        assert min(levels) > -400.0, (name, min(levels))
    c = res.curves["spectrum"]
    assert np.isnan(c["ntf_gain_db"][0])
    # Off DC the predicted density follows the zeros: (1 - z^-1)^N has |2 sin(pi f / fm)|^N,
    # 20 N dB per decade at low frequencies (Schreier & Temes 2005, ch. 4, NTF zeros at DC);
    # between the first bin and the tenth the denominator and the filters change by far less
    # than 0.05 dB.
    fm = 64 * RATE
    f1, f10 = c["frequency_hz"][1], c["frequency_hz"][10]
    rise = c["predicted_density_dbfs_per_hz"][10] - c["predicted_density_dbfs_per_hz"][1]
    want = 20.0 * order * math.log10(math.sin(math.pi * f10 / fm) / math.sin(math.pi * f1 / fm))
    assert rise == pytest.approx(want, abs=0.05)


def _band_ratios_db(curve, edges):
    """Simulated over predicted density (dB), power-averaged over each band of ``edges``."""
    f = curve["frequency_hz"]
    sim = 10.0 ** (curve["density_dbfs_per_hz"] / 10.0)
    pred = 10.0 ** (curve["predicted_density_dbfs_per_hz"] / 10.0)
    out = []
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        sel = (f >= lo) & (f < hi)
        out.append(10.0 * math.log10(sim[sel].mean() / pred[sel].mean()))
    return np.array(out)


@pytest.mark.parametrize("name", ["nrz17_64x", "pdm2_64x", "pdm5_64x"])
def test_predicted_noise_density_of_the_shipped_loops(name):
    # The shipped loops' whole chain (interpolator, loop, output stage, analog filter), the
    # density read in 1/3-octave bands from 3.2 kHz (above the -60 dBFS tone, its window skirt
    # and its 3rd harmonic at 2991 Hz) to 650 kHz (where the analog filter has taken the noise
    # 60 dB down).
    # Multi-level, dithered: the linear model (Schreier & Temes 2005, ch. 2; TPDF dither power
    # from Lipshitz, Wannamaker & Vanderkooy 1992) holds within 1 dB everywhere.
    # Single-bit: the model with the quantizer's effective gain (least squares, fitted to a run;
    # S&T ch. 4, Ardalan & Paulos 1987) is an upper bound within 1 dB; the simulated density
    # lies up to 4.5 dB under it (measured: 1 to 4 dB; in the audio band 1.2 to 2.5 dB for the
    # 5th order, 3.4 to 4.1 dB for the 2nd), because the sign quantizer's error is not white
    # (its low-frequency share is smaller). With unit gain the model (what the battery drew
    # before) lies 5 to 10 dB above the simulated density in the band: checked against it too.
    from audiodsm.evaluate.battery_runs import _effective_quantizer_gain
    from audiodsm.profile import load_profile

    path = Path(__file__).resolve().parents[1] / "profiles" / "dac_chip" / f"{name}.toml"
    profile = load_profile(path)
    res = run_battery(
        profile, tests=("dynamic_range", "stability"), plan=BatteryPlan.quick(), jobs=2
    )
    c = res.curves["spectrum"]
    k = float(c["predicted_quantizer_gain"][0])
    edges = 3175.0 * 2.0 ** (np.arange(0, 24) / 3.0)
    edges = edges[edges <= 650e3]
    ratios = _band_ratios_db(c, edges)
    if name.startswith("nrz17"):
        assert k == 1.0
        assert np.all(np.abs(ratios) <= 1.0), ratios
    else:
        assert 1.5 < k < 2.2  # a sign quantizer's gain in a loop: above 1 (S&T ch. 4)
        # The 2nd-order loop's noise from 16 to 25 kHz carries a comb of lines 997 Hz apart
        # (the tone's pattern noise: the 2nd-order single-bit loop is known to be tonal, S&T
        # ch. 2), which no white-error model holds: there the bound is 2 dB (measured 1.6).
        comb = name.startswith("pdm2") & (edges[:-1] >= 16000.0) & (edges[:-1] < 25000.0)
        shown = " ".join(f"{e:.0f}:{r:.2f}" for e, r in zip(edges, ratios, strict=False))
        assert np.all(ratios[~comb] <= 1.0) and np.all(ratios[comb] <= 2.0), shown
        assert np.all(ratios >= -4.5), shown
        # the unit-gain model in the audio band: the fitted gain's NTF_k ~ NTF/k there, so the
        # unit-gain density is the prediction times k^2 / error power * step^2/12 (step 2)
        band = edges[:-1] < 20000.0
        fitted = _effective_quantizer_gain(Chain.from_profile(profile, RATE, 1))
        assert fitted.gain == pytest.approx(k)
        unit_gain = ratios[band] - 10.0 * math.log10(k**2 * (4.0 / 12.0) / fitted.error_power)
        assert np.all(unit_gain <= -4.0), unit_gain
    a = res.curves["audio_spectrum"]
    assert float(a["predicted_quantizer_gain"][0]) == k
