"""The class-D power stage as built: on-resistance, loudspeaker load, volts/amperes/watts."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
import scipy.signal
from profile_helpers import assert_refused_at_load

from audiodsm.errors import ParameterError, ProfileError
from audiodsm.evaluate.battery import BatteryPlan, run_battery
from audiodsm.evaluate.battery_runs import _sideband_levels
from audiodsm.profile import load_profile, parse_profile
from audiodsm.stages import output_stage as out_mod
from audiodsm.stages.filter_design import LoudspeakerLoad, lc_filter, lc_filter_with_load
from audiodsm.stages.output_stage import PulseWaveform, pwm_waveform
from audiodsm.stages.power_stage import (
    class_d_readings,
    filter_switched_waveform,
    segment_switch_states,
    switched_lc_filter,
)
from audiodsm.stages.reconstruct import filter_pwm_with_dead_time, filter_waveform_power

ROOT = Path(__file__).resolve().parents[1]
BRIDGE = ROOT / "profiles" / "pocket_amp" / "pwm9_bridge_16x.toml"
HALF = ROOT / "profiles" / "pocket_amp" / "pwm9_halfbridge_deadtime_16x.toml"

L_H, C_F = 22e-6, 680e-9
SPEAKER = LoudspeakerLoad(7.2, 1.2e-4, 180.0, 2.8, 0.9)


# ---------------------------------------------------------------------------------------------
# The loudspeaker load
# ---------------------------------------------------------------------------------------------


def test_loudspeaker_impedance_at_resonance_is_re_plus_res():
    # Thiele-Small electrical equivalent (Small, JAES 20(5) 1972): at fs the parallel
    # Res-Lces-Cmes circuit is the pure resistance Res = Re Qms / Qes, so
    # Z(fs) = Re + Res + j 2 pi fs Le.
    z = complex(SPEAKER.impedance(np.array([SPEAKER.resonance_hz]))[0])
    res = 7.2 * 2.8 / 0.9
    assert z.real == pytest.approx(7.2 + res, rel=1e-12)
    assert z.imag == pytest.approx(2 * math.pi * 180.0 * 1.2e-4, rel=1e-9)
    assert SPEAKER.parallel_ohm == pytest.approx(res, rel=1e-15)


def test_loudspeaker_impedance_curve_equals_the_mechanical_side_model():
    # Independent route (mobility analogy, Beranek "Acoustics" ch. 7; Small 1972): a driver
    # with force factor Bl, moving mass Mms, compliance Cms and losses Rms has
    # Z = Re + j w Le + Bl^2 / (Rms + j w Mms + 1 / (j w Cms)), with fs = 1 / (2 pi
    # sqrt(Mms Cms)), Qms = ws Mms / Rms and Qes = ws Mms Re / Bl^2.
    re_, le, bl, mms, cms, rms = 6.4, 0.3e-3, 5.1, 8.2e-3, 0.6e-3, 1.3
    ws = 1.0 / math.sqrt(mms * cms)
    speaker = LoudspeakerLoad(re_, le, ws / (2 * math.pi), ws * mms / rms, ws * mms * re_ / bl**2)
    f = np.geomspace(5.0, 40000.0, 400)
    jw = 2j * np.pi * f
    direct = re_ + jw * le + bl**2 / (rms + jw * mms + 1.0 / (jw * cms))
    got = speaker.impedance(f)
    assert np.allclose(np.abs(got), np.abs(direct), rtol=1e-10)
    assert np.allclose(got, direct, rtol=1e-10)


@pytest.mark.parametrize(
    "name",
    ["coil_ohm", "coil_inductance_h", "resonance_hz", "mechanical_q", "electrical_q"],
)
@pytest.mark.parametrize("value", [0.0, -1.0, float("nan")])
def test_loudspeaker_refuses_non_positive_parts(name, value):
    parts = dict(
        coil_ohm=7.2, coil_inductance_h=1e-4, resonance_hz=180.0, mechanical_q=3, electrical_q=1
    )
    parts[name] = value
    with pytest.raises(ParameterError, match=name):
        LoudspeakerLoad(**parts)


@pytest.mark.parametrize("bridged", [False, True])
def test_lc_into_loudspeaker_matches_the_complex_divider(bridged):
    # Closed form (nodal analysis): the inductor's path Zs = Rs + j w L into Zp = the load in
    # parallel with the capacitor. Single-ended H = Zp / (Zs + Zp); bridged, each half drives
    # half the load (its midpoint at 0 V): H = Zh / (Zs + Zh), Zh = (Z / 2) || 1 / (j w C).
    rs = 0.13
    filt, _ = lc_filter_with_load(L_H, C_F, SPEAKER, series_ohm=rs, bridged=bridged)
    f = np.geomspace(10.0, 300e3, 300)
    jw = 2j * np.pi * f
    z = SPEAKER.impedance(f) / (2.0 if bridged else 1.0)
    zp = 1.0 / (1.0 / z + jw * C_F)
    want = zp / (rs + jw * L_H + zp)
    assert np.allclose(filt.response(f), want, rtol=1e-9, atol=1e-12)


# ---------------------------------------------------------------------------------------------
# The simulated stage against closed forms
# ---------------------------------------------------------------------------------------------


def _sine_response(switched, freq_hz, frame_rate_hz, *, configs_value=0):
    """Gain of the simulated switched stage at ``freq_hz``: a held sine, frame means, LS fit.

    The frame means of the filtered zero-order hold see the filter times the hold's and the
    boxcar's responses, sinc^2(f / fr) (the hold's half-frame delay and the frame mean's
    half-frame advance cancel): divided out.
    """
    n = 1 << 15
    k = np.arange(n)
    u = np.sin(2 * np.pi * freq_hz * k / frame_rate_hz)
    wave = PulseWaveform(u[:, None], np.ones((n, 1), dtype=np.int64), 1, frame_rate_hz)
    configs = np.full((n, 1), configs_value, dtype=np.int64)
    y, _, _ = filter_switched_waveform(switched, wave, configs)
    t = k[n // 2 :]
    w = 2 * np.pi * freq_hz / frame_rate_hz
    basis = np.column_stack([np.sin(w * t), np.cos(w * t)])
    (a, b), *_ = np.linalg.lstsq(basis, y[n // 2 :], rcond=None)
    # y = |H| sin(w t + phase) = Re H sin(w t) + Im H cos(w t)
    return complex(a, b) / np.sinc(freq_hz / frame_rate_hz) ** 2


@pytest.mark.parametrize("freq_hz", [1000.0, 20000.0, 41000.0, 90000.0])
def test_stage_response_with_resistive_load_is_the_second_order_low_pass(freq_hz):
    # H(s) = 1 / (L C s^2 + (L / R) s + 1): the LC low-pass with load R (any circuits text),
    # evaluated with scipy.signal.freqs.
    r = 8.0
    switched = switched_lc_filter(L_H, C_F, r, half_bridge=True)
    _, want = scipy.signal.freqs([1.0], [L_H * C_F, L_H / r, 1.0], worN=[2 * np.pi * freq_hz])
    got = _sine_response(switched, freq_hz, 3.072e6)
    assert abs(got - want[0]) <= 2e-5 * abs(want[0])


@pytest.mark.parametrize("freq_hz", [100.0, 180.0, 1000.0, 30000.0])
def test_stage_response_with_loudspeaker_is_the_lc_into_its_impedance(freq_hz):
    # Closed form: H = Zp / (j w L + Zp), Zp = Z_speaker || 1 / (j w C), Z_speaker from the
    # Thiele-Small model; the simulated stage (frame means of a held sine) within 2e-5.
    switched = switched_lc_filter(L_H, C_F, SPEAKER, half_bridge=True)
    jw = 2j * np.pi * freq_hz
    zp = 1.0 / (1.0 / complex(SPEAKER.impedance(np.array([freq_hz]))[0]) + jw * C_F)
    want = zp / (jw * L_H + zp)
    got = _sine_response(switched, freq_hz, 768e3)
    assert abs(got - want) <= 2e-5 * abs(want)


def test_half_bridge_on_resistance_follows_the_duty_cycle():
    # State-space averaging (Middlebrook & Cuk, IEEE PESC 1976): a half bridge at duty D on
    # rails +-V drives the LC and load R through R_hs while high and R_ls while low, so the
    # steady load current is I = V (2 D - 1) / (R + Rs + D R_hs + (1 - D) R_ls). The carrier
    # ripple adds a term of second order in the ripple (below 1e-4 here).
    r, rs, r_hs, r_ls, volts = 8.0, 0.05, 0.4, 0.1, 5.0
    steps = 16
    switched = switched_lc_filter(
        L_H, C_F, r, series_ohm=rs, high_side_ohm=r_hs, low_side_ohm=r_ls, half_bridge=True
    )
    for code in (12, 3):
        y = np.full(6000, 2.0 * code / steps - 1.0)
        kw = dict(frame_rate_hz=768e3, levels=steps + 1, bridge="half", supply_volts=volts)
        wave, _, _ = pwm_waveform(y, carrier="trailing", **kw)
        plan = out_mod.pwm_switching_plan(
            y, 768e3, steps + 1, None, "two-level", "trailing", "half", 1, 0, 0, "drop", volts
        )
        configs = segment_switch_states(wave, plan)
        means, _, _ = filter_switched_waveform(switched, wave, configs)
        d = code / steps
        current = volts * (2 * d - 1) / (r + rs + d * r_hs + (1 - d) * r_ls)
        assert means[-1] == pytest.approx(current * r, rel=1e-4)
        # and the plain filter with the mean resistance would miss it by far more
        plain = switched.average
        assert abs(plain.dc_gain * volts * (2 * d - 1) - current * r) > 20e-4 * abs(current * r)


def test_equal_on_resistance_is_a_series_resistance():
    # With R_hs = R_ls = R every switch state is the same filter: the result equals
    # lc_filter with the series resistance Rs + R (half bridge) to rounding.
    rng = np.random.default_rng(3)
    y = rng.integers(0, 9, 3000) / 4.0 - 1.0
    wave, _, _ = pwm_waveform(
        y, frame_rate_hz=768e3, levels=9, bridge="half", carrier="double-edge", supply_volts=5.0
    )
    plan = out_mod.pwm_switching_plan(
        y, 768e3, 9, None, "two-level", "double-edge", "half", 1, 0, 0, "drop", 5.0
    )
    sw = switched_lc_filter(L_H, C_F, 8.0, high_side_ohm=0.2, low_side_ohm=0.2, half_bridge=True)
    got, got_sq, _ = filter_switched_waveform(sw, wave, segment_switch_states(wave, plan))
    want, want_sq, _ = filter_waveform_power(lc_filter(L_H, C_F, 8.0, series_ohm=0.2), wave)
    assert np.allclose(got, want, rtol=0, atol=1e-9)
    assert np.allclose(got_sq, want_sq, rtol=0, atol=1e-8)


def _slow_switched(switched, wave, configs):
    """Slow twin of the switched filter: one matrix exponential per segment, frame means."""
    f0 = switched.filters[0]
    m = f0.order
    x = np.zeros(m)
    tpf = wave.ticks_per_frame
    dt = 1.0 / (wave.frame_rate_hz * tpf)
    out = []
    for i in range(wave.n_frames):
        acc = 0.0
        for j in range(wave.n_segments):
            k = int(wave.ticks[i, j])
            if k == 0:
                continue
            filt = switched.filters[int(configs[i, j])]
            aug = np.zeros((m + 2, m + 2))  # [x; integral of y; u]
            aug[:m, :m] = filt.a
            aug[:m, m + 1] = filt.b[:, 0]
            aug[m, :m] = filt.c[0]
            e = scipy.linalg.expm(aug * k * dt)
            z = e @ np.concatenate([x, [0.0, wave.levels[i, j]]])
            x = z[:m]
            acc += z[m]
        out.append(acc / (tpf * dt))
    return np.array(out), x


@pytest.mark.parametrize("mode", ["three-level", "two-level-half"])
def test_switched_kernel_against_its_slow_twin_and_streams(mode):
    rng = np.random.default_rng(11)
    y = rng.integers(0, 9, 400) / 4.0 - 1.0
    half = mode == "two-level-half"
    kw = dict(
        frame_rate_hz=768e3,
        levels=9,
        mode="two-level" if half else "three-level",
        bridge="half" if half else "full",
        carrier="double-edge",
        tick_subdivision=2,
        supply_volts=5.0,
    )
    wave, _, _ = pwm_waveform(y, **kw)
    plan = out_mod.pwm_switching_plan(
        y, 768e3, 9, None, kw["mode"], "double-edge", kw["bridge"], 2, 0, 0, "drop", 5.0
    )
    configs = segment_switch_states(wave, plan)
    sw = switched_lc_filter(
        L_H, C_F, SPEAKER, bridged=not half, high_side_ohm=0.3, low_side_ohm=0.05, half_bridge=half
    )
    means, _, state = filter_switched_waveform(sw, wave, configs)
    slow, x_end = _slow_switched(sw, wave, configs)
    assert np.allclose(means, slow, rtol=0, atol=1e-9)
    assert np.allclose(state.coords, x_end, rtol=0, atol=1e-9)
    if not half:  # the three-level bridge uses its zero states (both high, both low)
        assert {0, 3} <= set(np.unique(configs[wave.ticks > 0]))
    # block by block equals one call, bit for bit
    cut = 157
    first = PulseWaveform(wave.levels[:cut], wave.ticks[:cut], wave.ticks_per_frame, 768e3)
    rest = PulseWaveform(wave.levels[cut:], wave.ticks[cut:], wave.ticks_per_frame, 768e3)
    a, _, st = filter_switched_waveform(sw, first, configs[:cut])
    b, _, _ = filter_switched_waveform(sw, rest, configs[cut:], st)
    assert np.array_equal(np.concatenate([a, b]), means)


def test_dead_time_loop_with_equal_on_resistance_is_a_series_resistance():
    rng = np.random.default_rng(5)
    y = rng.integers(0, 9, 2000) / 4.0 - 1.0
    kw = dict(
        frame_rate_hz=768e3,
        levels=9,
        bridge="half",
        tick_subdivision=4,
        dead_time_ticks=1,
        supply_volts=5.0,
    )
    sw = switched_lc_filter(L_H, C_F, 8.0, high_side_ohm=0.2, low_side_ohm=0.2, half_bridge=True)
    got, _, _, _ = filter_pwm_with_dead_time(sw.average, y, switched=sw, **kw)
    want, _, _, _ = filter_pwm_with_dead_time(lc_filter(L_H, C_F, 8.0, series_ohm=0.2), y, **kw)
    assert np.allclose(got, want, rtol=0, atol=1e-9)


# ---------------------------------------------------------------------------------------------
# Volts, amperes, watts
# ---------------------------------------------------------------------------------------------


def test_readings_at_constant_duty_match_the_averaged_circuit():
    # Constant duty D, half bridge on +-V, load R (state-space averaging, Middlebrook & Cuk
    # 1976): load current I as above; the inductor current ripples by
    # dI = (V - V_out) D T / L peak to peak (a triangle: rms^2 = I^2 + dI^2 / 12), so the
    # conduction loss is (I^2 + dI^2 / 12) (D R_hs + (1 - D) R_ls), the peak inductor current
    # I + dI / 2, the load power I^2 R (Mohan, Undeland & Robbins, ch. 7 and 26). Within 1 %.
    r, r_hs, r_ls, volts, rate, steps = 8.0, 0.3, 0.1, 5.0, 384e3, 16
    code = 12
    d = code / steps
    y = np.full(4000, 2.0 * d - 1.0)
    wave, _, _ = pwm_waveform(
        y, frame_rate_hz=rate, levels=steps + 1, bridge="half", supply_volts=volts
    )
    plan = out_mod.pwm_switching_plan(
        y, rate, steps + 1, None, "two-level", "double-edge", "half", 1, 0, 0, "drop", volts
    )
    sw = switched_lc_filter(L_H, C_F, r, high_side_ohm=r_hs, low_side_ohm=r_ls, half_bridge=True)
    got = class_d_readings(sw, wave, segment_switch_states(wave, plan), skip_frames=3000)
    current = volts * (2 * d - 1) / (r + d * r_hs + (1 - d) * r_ls)
    ripple = (volts - current * r) * d / (rate * L_H)
    assert got.load_power_watts == pytest.approx(current**2 * r, rel=1e-3)
    # the capacitor voltage ripples by at most dI / (8 f C) peak to peak (buck-converter
    # output ripple, Mohan et al. ch. 7; less here, the load takes part of the ripple current)
    ripple_v = ripple / (8 * rate * C_F)
    assert current * r < got.output_peak_volts <= current * r + 0.5 * ripple_v
    assert got.load_current_peak_amperes == pytest.approx(got.output_peak_volts / r, rel=1e-12)
    assert got.inductor_current_peak_amperes == pytest.approx(current + ripple / 2, rel=1e-2)
    want_loss = (current**2 + ripple**2 / 12) * (d * r_hs + (1 - d) * r_ls)
    assert got.switch_conduction_watts == pytest.approx(want_loss, rel=1e-2)


def test_load_power_equals_the_mean_square_output_over_r():
    # Independent route: with a resistive load the power is mean(y^2) / R, and the existing
    # exact frame mean squares (filter_waveform_power, Van Loan 1978) give mean(y^2).
    rng = np.random.default_rng(2)
    y = np.clip(0.6 * np.sin(np.arange(6000) * 0.01) + rng.normal(0, 0.1, 6000), -1, 1)
    y = np.round(y * 4) / 4
    wave, _, _ = pwm_waveform(y, frame_rate_hz=768e3, levels=9, supply_volts=5.0)
    plan = out_mod.pwm_switching_plan(
        y, 768e3, 9, None, "two-level", "double-edge", "full", 1, 0, 0, "drop", 5.0
    )
    sw = switched_lc_filter(L_H, C_F, 8.0, bridged=True, high_side_ohm=0.1, low_side_ohm=0.1)
    got = class_d_readings(sw, wave, segment_switch_states(wave, plan), skip_frames=1000)
    _, squares, _ = filter_waveform_power(sw.average, wave)
    assert got.load_power_watts == pytest.approx(np.mean(squares[1000:]) / 8.0, rel=1e-9)


def test_sideband_reader_on_amplitude_modulation():
    # A sin(w t) (1 + m sin(w_r t)) has sidebands at f +- f_r of A m / 2: 20 log10(m / 2)
    # re the tone (amplitude modulation theory).
    rate, m = 48000, 0.03
    t = np.arange(24000) / rate
    y = 0.7 * np.sin(2 * np.pi * 997 * t) * (1 + m * np.sin(2 * np.pi * 217 * t))
    levels = _sideband_levels(y, rate, 997.0, 217.0)
    assert len(levels) == 2
    for got in levels:
        assert got == pytest.approx(20 * math.log10(m / 2), abs=1e-6)


def test_battery_supply_rejection_and_power_of_the_demo_bridge():
    # The demo bridge (0.5 % ripple at 217 Hz, open loop): the supply-rejection reading is
    # 20 log10(m / 2) within 0.3 dB (amplitude modulation). Load power at -1 dBFS: a sine of
    # amplitude V into 8 ohm gives V^2 / (2 R) (V from the chain's own calibration: the
    # modulator's input scale, the stage's volts, the loop's STF and the filter at 997 Hz);
    # the loop's shaped noise and the ripple sidebands add well under 1 %.
    from audiodsm.stages.chain import Chain

    profile = load_profile(BRIDGE)
    result = run_battery(profile, tests=("class_d_stage",), plan=BatteryPlan.quick(), jobs=1)
    m = profile.impairments.supply_ripple
    got = result.metrics["supply_ripple_sideband_db"]
    assert abs(got - 20 * math.log10(m / 2)) <= 0.3
    chain = Chain.from_profile(profile, 48000, 1)
    f = np.array([997.0])
    rates = abs(chain.upsampler_design.response(f)[0] * chain.downsampler_design.response(f)[0])
    amplitude = 10 ** (-1 / 20) * chain.gain / rates
    assert result.metrics["load_power_watts"] == pytest.approx(amplitude**2 / 16.0, rel=0.01)
    v = result.metrics["output_peak_volts"]
    assert v > amplitude
    assert result.metrics["load_current_peak_amperes"] == pytest.approx(v / 8.0, rel=1e-9)
    assert result.metrics["switch_conduction_watts"] > 0
    assert (
        result.metrics["inductor_current_peak_amperes"]
        > result.metrics["load_current_peak_amperes"]
    )


def test_battery_class_d_metrics_are_invalid_elsewhere():
    profile = load_profile(ROOT / "profiles" / "dac_chip" / "nrz17_64x.toml")
    result = run_battery(profile, tests=("class_d_stage",), plan=BatteryPlan.quick(), jobs=1)
    assert result.metrics["load_power_watts"] is None
    assert "class-D" in result.invalid["load_power_watts"]


# ---------------------------------------------------------------------------------------------
# Bad input
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "key", "words"),
    [
        ("high_side_on_ohm = -0.1", "impairments.high_side_on_ohm", "from 0 to 10 (ohm)"),
        ("low_side_on_ohm = 12.0", "impairments.low_side_on_ohm", "from 0 to 10 (ohm)"),
        ("speaker_coil_ohm = -4.0", "impairments.speaker_coil_ohm", "from 0 to 100 (ohm)"),
        (
            "speaker_coil_ohm = 6.0\nspeaker_coil_inductance_h = 1e-4\nspeaker_resonance_hz = 90"
            "\nspeaker_mechanical_q = 3.0",
            "impairments.speaker_electrical_q",
            "above 0 and at most 100",
        ),
        (
            "speaker_coil_ohm = 6.0\nspeaker_coil_inductance_h = 0.0\nspeaker_resonance_hz = 90"
            "\nspeaker_mechanical_q = 3.0\nspeaker_electrical_q = 0.5",
            "impairments.speaker_coil_inductance_h",
            "above 0 and at most 0.1 (henry)",
        ),
    ],
)
def test_bad_power_stage_keys_refused_at_load(tmp_path, text, key, words):
    path = tmp_path / "bad.toml"
    body = "\n".join(
        line
        for line in HALF.read_text().splitlines()
        if not line.startswith(("speaker_", "high_", "low_"))
    )
    path.write_text(body + f"\n{text}\n")
    assert_refused_at_load(path, key, words)


def test_power_stage_keys_need_a_class_d_stage_with_an_lc_filter():
    with pytest.raises(ProfileError, match="impairments.high_side_on_ohm"):
        parse_profile("[impairments]\nhigh_side_on_ohm = 0.1\n")
    text = BRIDGE.read_text().replace('kind = "lc"', 'kind = "none"')
    text = "\n".join(
        ln
        for ln in text.splitlines()
        if not ln.startswith(("inductance", "capac", "load_", "series", "bridged"))
    )
    with pytest.raises(ProfileError, match="reconstruction.kind"):
        parse_profile(text)


def test_power_stage_keys_leave_other_digests_alone():
    from audiodsm.profile_text import profile_digest

    profile = load_profile(BRIDGE)
    plain = dataclasses.replace(
        profile,
        impairments=dataclasses.replace(profile.impairments, high_side_on_ohm=0.0),
    )
    assert profile_digest(plain) != profile_digest(profile)


def test_dead_time_loop_carries_the_supply_ripple_exactly():
    # With zero dead time the fused loop equals the plain stage scaled by the rippling supply
    # (exact segment means, audiodsm.stages.supply) through the filter, to rounding; block by
    # block equals one call (the ripple's time runs on across blocks).
    from audiodsm.stages.supply import apply_supply_ripple

    rng = np.random.default_rng(8)
    y = rng.integers(0, 9, 3000) / 4.0 - 1.0
    kw = dict(frame_rate_hz=768e3, levels=9, bridge="half", tick_subdivision=4, supply_volts=5.0)
    filt = lc_filter(L_H, C_F, 8.0)
    ripple = dict(supply_ripple=0.05, supply_ripple_hz=1234.5)
    got, _, _, _ = filter_pwm_with_dead_time(filt, y, dead_time_ticks=0, **kw, **ripple)
    wave, _, _ = pwm_waveform(y, **kw)
    wave = apply_supply_ripple(wave, ripple=0.05, ripple_hz=1234.5, first_frame=0)
    want, _, _ = filter_waveform_power(filt, wave)
    assert np.allclose(got, want, rtol=0, atol=1e-9)
    full, _, _, _ = filter_pwm_with_dead_time(filt, y, dead_time_ticks=1, **kw, **ripple)
    a, _, _, st = filter_pwm_with_dead_time(filt, y[:1111], dead_time_ticks=1, **kw, **ripple)
    b, _, _, _ = filter_pwm_with_dead_time(
        filt, y[1111:], dead_time_ticks=1, state=st, **kw, **ripple
    )
    assert np.array_equal(np.concatenate([a, b]), full)


def test_supply_sidebands_with_dead_time_follow_amplitude_modulation():
    # Open loop, every leg voltage is +-V(t): the whole output, dead-time error included,
    # scales with the supply, so the sidebands stay at 20 log10(m / 2) re the tone
    # (amplitude modulation) within 0.3 dB.
    profile = load_profile(HALF)
    profile = dataclasses.replace(
        profile,
        impairments=dataclasses.replace(
            profile.impairments, supply_ripple=0.05, supply_ripple_hz=300.0
        ),
    )
    result = run_battery(profile, tests=("class_d_stage",), plan=BatteryPlan.quick(), jobs=1)
    got = result.metrics["supply_ripple_sideband_db"]
    assert abs(got - 20 * math.log10(0.05 / 2)) <= 0.3


@pytest.mark.parametrize(("mode", "bridge"), [("two-level", "half"), ("three-level", "full")])
def test_dead_time_loop_picks_the_same_switches_as_the_plain_stage(mode, bridge):
    # With zero dead time the fused loop's switch states (from the legs' levels) and
    # segment_switch_states (from the waveform and the codes) must pick the same filter in
    # every segment: unequal switches, a loudspeaker, both implementations equal to rounding.
    rng = np.random.default_rng(21)
    y = rng.integers(0, 9, 2500) / 4.0 - 1.0
    kw = dict(
        frame_rate_hz=768e3,
        levels=9,
        mode=mode,
        bridge=bridge,
        carrier="double-edge",
        tick_subdivision=2,
        supply_volts=5.0,
    )
    sw = switched_lc_filter(
        L_H,
        C_F,
        SPEAKER,
        bridged=bridge == "full",
        high_side_ohm=0.4,
        low_side_ohm=0.05,
        half_bridge=bridge == "half",
    )
    got, got_sq, _, _ = filter_pwm_with_dead_time(sw.average, y, switched=sw, **kw)
    wave, _, _ = pwm_waveform(y, **kw)
    plan = out_mod.pwm_switching_plan(
        y, 768e3, 9, None, mode, "double-edge", bridge, 2, 0, 0, "drop", 5.0
    )
    want, want_sq, _ = filter_switched_waveform(sw, wave, segment_switch_states(wave, plan))
    assert np.allclose(got, want, rtol=0, atol=1e-9)
    assert np.allclose(got_sq, want_sq, rtol=0, atol=1e-8)


def test_on_resistance_refuses_pwm_edge_jitter():
    text = BRIDGE.read_text() + "jitter_rms_s = 1e-11\n"
    with pytest.raises(ProfileError, match="impairments.jitter_rms_s.*on-resistance"):
        parse_profile(text)
