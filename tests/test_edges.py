"""Edge errors of the output (stages/jitter.py): unequal edges, return to zero, PWM jitter."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest
from profile_helpers import assert_refused_at_load
from scipy.signal import welch

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.errors import ParameterError, ProfileError
from audiodsm.profile import ImpairmentSettings, load_profile, parse_profile
from audiodsm.stages.chain import Chain
from audiodsm.stages.jitter import EdgeJitter
from audiodsm.stages.modulator import Modulator
from audiodsm.stages.output_stage import pwm_waveform, return_to_zero_waveform

ROOT = Path(__file__).resolve().parents[1]
PDM2 = ROOT / "profiles" / "dac_chip" / "pdm2_64x.toml"
NRZ17 = ROOT / "profiles" / "dac_chip" / "nrz17_64x.toml"
PWM9 = ROOT / "profiles" / "pocket_amp" / "pwm9_bridge_16x.toml"
RATE = 3_072_000.0


def _with(profile, **keys):
    return dataclasses.replace(
        profile, impairments=dataclasses.replace(profile.impairments, **keys)
    )


def _ideal_pwm():
    """The demo bridge amplifier with an ideal power stage (its shipped on-resistance and
    supply ripple left out: the jitter alone is under test)."""
    return dataclasses.replace(load_profile(PWM9), impairments=ImpairmentSettings())


def _text_with(path, keys):
    """A profile file's text with ``keys`` added to its [impairments] section."""
    text = path.read_text()
    if "\n[impairments]\n" in text:
        return text.replace("\n[impairments]\n", f"\n[impairments]\n{keys}\n", 1)
    return text + f"\n[impairments]\n{keys}\n"


def _stream(levels, n, *, amplitude=0.5, cycles=211, osr=64):
    order = 2 if levels == 2 else 3
    ntf = NoiseTransfer.designed(order, osr=osr, out_of_band_gain=1.5)
    x = amplitude * np.sin(2 * np.pi * np.arange(n) * cycles / n)
    y, _ = Modulator(ntf, levels=levels, seed=2).run(x)
    return y


# ---------------------------------------------------------------------------------------------
# A slow twin: the piecewise-linear waveform built edge by edge and integrated exactly
# ---------------------------------------------------------------------------------------------


def _ramp_area(a, b, t0, step, ramp):
    """Integral over [a, b] of step * clip((t - t0) / ramp, 0, 1) (a step at t0 if ramp = 0)."""

    def primitive(t):  # integral from -inf (where the ramp is 0) to t
        if t <= t0:
            return 0.0
        if ramp == 0.0 or t >= t0 + ramp:
            return t - t0 - 0.5 * ramp
        return (t - t0) ** 2 / (2.0 * ramp)

    return step * (primitive(b) - primitive(a))


def _twin_slots(levels, shifts, rise, fall, *, rz, top, rest):
    """Slot means of the waveform, every edge as ramp parts (slot units), slots -1 .. end-1.

    An independent sum over edges: the rest level plus every edge part's ramp, integrated
    over each slot with the closed form of a linear ramp's integral.
    """
    slots_per_frame = 2 if rz else 1
    values = []
    for level in levels:
        values.extend([level, 0.0] if rz else [level])
    parts = []  # (nominal time, shift, step, ramp)
    prev = rest
    for e, value in enumerate(values):
        if rz and e % 2 == 0:
            up, down = 0.5 * (value + top), 0.5 * (value - top)
        elif rz:
            level = values[e - 1]
            up, down = 0.5 * (top - level), -0.5 * (level + top)
        else:
            step = value - prev
            up, down = max(step, 0.0), min(step, 0.0)
        parts.append((e, shifts[e], up, rise))
        parts.append((e, shifts[e], down, fall))
        prev = value
    n_slots = len(values)
    out = []
    for slot in range(-slots_per_frame, n_slots - slots_per_frame):
        area = rest
        for t, shift, step, ramp in parts:
            area += _ramp_area(slot, slot + 1, t + shift, step, ramp)
        out.append(area)
    return np.array(out).reshape(-1, slots_per_frame)


def _drawn_shifts(stage, count):
    return stage.shifts(0, count)


def test_unequal_edges_of_a_short_sequence_equal_the_hand_computation():
    # Hand computation (linear ramps; Schreier & Temes 2005, ISI of continuous-time DACs;
    # Adams et al. 1991, from memory): a rising edge of a +-1 stream (step 2) ramping over r
    # holds back the area 2 r / 2 = r, a falling one over f gives back f. Frame mean after
    # each edge (T = 1 us, r = 0.2 us, f = 0.1 us): -0.2 after a rise, +0.1 after a fall.
    rate, rise, fall = 1e6, 0.2e-6, 0.1e-6
    y = np.array([-1, 1, 1, -1, 1, -1, -1, 1, 1, 1, -1, -1], dtype=float)
    stage = EdgeJitter(rate, rise_s=rise, fall_s=fall, rest_level=-1.0)
    out, _ = stage.process(np.append(y, -1.0))  # one more frame: the output is a frame behind
    assert out[0] == -1.0  # the rest frame
    steps = np.diff(y, prepend=-1.0)
    hand = y + np.where(steps > 0, -0.2, 0.0) + np.where(steps < 0, 0.1, 0.0)
    np.testing.assert_allclose(out[1:], hand, rtol=0, atol=1e-15)
    # the stretch starts and ends at -1: its summed error is the asymmetry (r - f) / T
    # times the number of rising edges
    rising = int(np.count_nonzero(steps > 0))
    assert rising == 3
    assert np.sum(out[1:] - y) == pytest.approx(-(rise - fall) * rate * rising, abs=1e-12)


@pytest.mark.parametrize("rz", [False, True])
@pytest.mark.parametrize("levels", [2, 9])
def test_kernel_matches_ramp_by_ramp_integration(rz, levels):
    rng = np.random.default_rng(11)
    n = 150
    y = -1.0 + 2.0 * rng.integers(0, levels, n) / (levels - 1)
    slot = (1.0 / RATE) / (2 if rz else 1)
    stage = EdgeJitter(
        RATE,
        rms_s=0.02 * slot,
        sine_peak_s=0.1 * slot,
        sine_hz=40e3,
        rise_s=0.3 * slot,
        fall_s=0.12 * slot,
        return_to_zero=rz,
        top_level=1.0,
        seed=3,
    )
    out, _ = stage.process(y)
    shifts = _drawn_shifts(stage, n * (2 if rz else 1))
    twin = _twin_slots(y, shifts, 0.3, 0.12, rz=rz, top=1.0, rest=0.0)
    np.testing.assert_allclose(out.reshape(n, -1), twin, rtol=0, atol=1e-12)


@pytest.mark.parametrize("levels", [2, 17])
def test_return_to_zero_leaves_a_constant_edge_error(levels):
    # each of the N unit elements (size a, N a = the top level) goes out of 0 and back every
    # frame: one up part and one down part of a each, so every frame mean errs by the same
    # N a (fall - rise) / (2 T), whatever the data (Adams et al. 1991; Schreier & Temes 2005)
    y = _stream(levels, 4000)
    rise, fall, top = 9e-9, 4e-9, 1.0
    out, _ = EdgeJitter(RATE, rise_s=rise, fall_s=fall, return_to_zero=True).process(y)
    frame_means = out.mean(axis=1)[1:]  # one frame behind
    error = frame_means - 0.5 * y[:-1]
    want = top * (fall - rise) * RATE / 2.0  # the mean of the frame's two half slots
    np.testing.assert_allclose(error, want, rtol=0, atol=1e-13)
    # without return to zero the same edges make an error that follows the data
    nrz, _ = EdgeJitter(RATE, rise_s=rise, fall_s=fall).process(y)
    assert np.std(nrz[1:] - y[:-1]) > 1e3 * np.std(error)


def _in_band_error(profile, x, rate, skip, tone_hz, band=20000.0):
    """In-band noise and distortion of the error output, and its spectrum.

    The mean (the offset) and the tone's own bins are left out: a pure delay of the output
    (equal ramps, the return-to-zero pulse's centre) leaves a linear residue of the tone in
    the error, which is no distortion.
    """
    chain = Chain.from_profile(profile, rate, 1)
    error = chain.process(x, keep=("error",))[0].error[skip:, 0]
    error = error - error.mean()
    freqs, psd = welch(error, fs=rate, nperseg=1 << 12)
    step = freqs[1] - freqs[0]
    keep = (freqs >= 20.0) & (freqs <= band) & (np.abs(freqs - tone_hz) > 3 * step)
    return float(np.sum(psd[keep]) * step), freqs, psd


def test_return_to_zero_removes_the_in_band_distortion_of_unequal_edges():
    # A PDM stream's rising edges per frame follow the signal nonlinearly, so unequal edges
    # raise the in-band error with harmonics of the tone; with return-to-zero coding every
    # frame has the same edges and only an offset remains (removed with the mean here) and
    # the RZ gain of 1/2, which the calibration divides out (Adams et al. 1991; Schreier &
    # Temes 2005, ISI and RZ DACs, from memory). 10 ns asymmetry at 3.072 MHz (3 % of T).
    rate, n, skip = 48000, 1 << 15, 4096
    tone_hz = 48 * rate / 4096  # on a welch bin: 562.5 Hz
    x = 0.5 * np.sin(2 * np.pi * tone_hz * np.arange(n) / rate)
    base = load_profile(PDM2)
    asym = {"rise_time_s": 15e-9, "fall_time_s": 5e-9}
    rz = {"return_to_zero": True}
    runs = {
        "nrz": _in_band_error(base, x, rate, skip, tone_hz),
        "nrz_asym": _in_band_error(_with(base, **asym), x, rate, skip, tone_hz),
        "rz": _in_band_error(_with(base, **rz), x, rate, skip, tone_hz),
        "rz_asym": _in_band_error(_with(base, **rz, **asym), x, rate, skip, tone_hz),
    }
    freqs = runs["nrz"][1]

    def ratio_db(a, b, k=None):
        if k is None:
            return 10 * np.log10(runs[a][0] / runs[b][0])
        return 10 * np.log10(runs[a][2][k] / runs[b][2][k])

    assert ratio_db("nrz_asym", "nrz") > 10.0  # about 16 dB in a run
    assert abs(ratio_db("rz_asym", "rz")) < 0.05
    for harmonic in (2, 3, 4):
        k = int(np.argmin(np.abs(freqs - harmonic * tone_hz)))
        assert ratio_db("nrz_asym", "nrz", k) > 30.0, harmonic  # 43 to 74 dB in a run
        assert abs(ratio_db("rz_asym", "rz", k)) < 0.1, harmonic


def test_return_to_zero_waveform_halves_the_frame_means():
    from audiodsm.stages.output_stage import nrz_waveform

    y = _stream(5, 200)
    wf = return_to_zero_waveform(nrz_waveform(y, levels=5, frame_rate_hz=RATE))
    assert wf.ticks_per_frame == 2 and wf.n_segments == 2
    np.testing.assert_array_equal(wf.frame_means(), 0.5 * y)
    with pytest.raises(ParameterError, match="ticks_per_frame"):
        return_to_zero_waveform(wf)


@pytest.mark.parametrize("rz", [False, True])
def test_edge_stage_blocks_equal_one_call(rz):
    y = _stream(17, 9000)
    stage = EdgeJitter(
        RATE,
        rms_s=1e-9,
        sine_peak_s=2e-9,
        sine_hz=7000.0,
        rise_s=5e-9,
        fall_s=3e-9,
        return_to_zero=rz,
        seed=8,
    )
    whole, _ = stage.process(y)
    parts, st = [], None
    for a, b in ((0, 1), (1, 4097), (4097, 4100), (4100, 9000)):
        part, st = stage.process(y[a:b], st)
        parts.append(part)
    assert np.array_equal(np.concatenate(parts), whole)


def test_edges_beyond_half_a_slot_refused():
    with pytest.raises(ParameterError, match="half the output period"):
        EdgeJitter(RATE, rise_s=0.6 / RATE)
    with pytest.raises(ParameterError, match="return-to-zero half"):
        EdgeJitter(RATE, fall_s=0.3 / RATE, return_to_zero=True)


# ---------------------------------------------------------------------------------------------
# PWM edges
# ---------------------------------------------------------------------------------------------


def _pwm(n, *, carrier="double-edge", mode="three-level"):
    y = _stream(9, n, amplitude=0.6, cycles=17)
    wf, _, _ = pwm_waveform(y, frame_rate_hz=RATE, levels=9, mode=mode, carrier=carrier)
    return wf


def _twin_pwm(wf, pieces, shifts, sine_peak, sine_ratio):
    """Means of the jittered PWM waveform over the output pieces (ticks ``pieces``).

    Edges are the level changes between nonzero segments (on absolute tick times); each moves
    by its shift; every output segment's mean is the integral of the displaced
    piecewise-constant waveform over its span.
    """
    tpf = wf.ticks_per_frame
    times, values = [], []
    t = 0
    for i in range(wf.n_frames):
        for j in range(wf.n_segments):
            k = int(wf.ticks[i, j])
            if k:
                times.append((t, i))
                values.append(float(wf.levels[i, j]))
                t += k
    edges = []  # (time, level after)
    prev, e = 0.0, 0
    for (t0, i), v in zip(times, values, strict=True):
        if v != prev:
            shift = shifts[e]
            e += 1
            frac = t0 - i * tpf
            cycles = (i * sine_ratio + frac * (sine_ratio / tpf)) % 1.0
            shift = min(max(shift + sine_peak * np.sin(2 * np.pi * cycles), -0.5), 0.5)
            edges.append((t0 + shift, v))
            prev = v
    bounds = [(-np.inf, 0.0)] + edges

    def integral(a, b):
        area = 0.0
        for q, (start, value) in enumerate(bounds):
            stop = bounds[q + 1][0] if q + 1 < len(bounds) else np.inf
            lo, hi = max(a, start), min(b, stop)
            if hi > lo:
                area += value * (hi - lo)
        return area

    out = np.zeros(pieces.shape)
    t = -tpf  # frame -1: the rest frame
    for i in range(pieces.shape[0]):
        for j in range(pieces.shape[1]):
            k = int(pieces[i, j])
            out[i, j] = integral(t, t + k) / k if k else 0.0
            t += k
    return out


@pytest.mark.parametrize("carrier", ["double-edge", "trailing"])
def test_pwm_jitter_matches_edge_by_edge_integration(carrier):
    wf = _pwm(60, carrier=carrier)
    tick = 1.0 / (RATE * wf.ticks_per_frame)
    stage = EdgeJitter(
        RATE,
        rms_s=0.03 * tick,
        sine_peak_s=0.1 * tick,
        sine_hz=50e3,
        seed=6,
        ticks_per_frame=wf.ticks_per_frame,
    )
    out, _ = stage.process_waveform(wf)
    on = wf.levels[wf.ticks > 0]
    count = int(np.count_nonzero(np.diff(on, prepend=0.0)))
    # the random part alone (the twin adds the sine at each edge's tick)
    plain = EdgeJitter(RATE, rms_s=0.03 * tick, seed=6, ticks_per_frame=wf.ticks_per_frame)
    shifts = plain.shifts(0, count)
    twin = _twin_pwm(wf, out.ticks, shifts, 0.1 * tick * RATE * wf.ticks_per_frame, 50e3 / RATE)
    # the pieces tile the input segments, one frame behind
    np.testing.assert_array_equal(out.ticks[1:].reshape(59, -1, 3).sum(axis=2), wf.ticks[:-1])
    live = out.ticks > 0
    np.testing.assert_allclose(out.levels[live], twin[live], rtol=0, atol=1e-9)


def test_pwm_jitter_blocks_equal_one_call():
    wf = _pwm(3000)
    tick = 1.0 / (RATE * wf.ticks_per_frame)
    stage = EdgeJitter(
        RATE,
        rms_s=0.02 * tick,
        sine_peak_s=0.05 * tick,
        sine_hz=3e3,
        seed=2,
        ticks_per_frame=wf.ticks_per_frame,
    )
    whole, _ = stage.process_waveform(wf)
    parts, st = [], None
    from audiodsm.stages.output_stage import PulseWaveform

    for a, b in ((0, 1), (1, 1000), (1000, 1003), (1003, 3000)):
        piece = PulseWaveform(wf.levels[a:b], wf.ticks[a:b], wf.ticks_per_frame, RATE)
        part, st = stage.process_waveform(piece, st)
        parts.append(part.levels)
    assert np.array_equal(np.concatenate(parts), whole.levels)


def test_pwm_random_jitter_noise_matches_the_edge_estimate():
    # Derivation (as for NRZ, Schreier & Temes 2005 / Cherry & Snelgrove 1999, from memory):
    # an edge of step s displaced by delta adds a pulse of area -s delta, so frame n's mean
    # errs by -sum_e s_e delta_e / T. With independent delta of variance sigma^2 that error
    # is white with variance (sigma / T)^2 E[sum over a frame's edges of s_e^2], of which
    # 1/OSR lies in band. A PWM frame has several edges (a three-level bridge: up to four of
    # one supply step each), where NRZ has one step y[n] - y[n-1].
    n, osr = 1 << 16, 16
    wf = _pwm(n)
    tpf = wf.ticks_per_frame
    tick = 1.0 / (RATE * tpf)
    sigma = 0.03 * tick
    stage = EdgeJitter(RATE, rms_s=sigma, seed=5, ticks_per_frame=tpf)
    out, _ = stage.process_waveform(wf)
    error = out.frame_means()[1:] - wf.frame_means()[:-1]
    freqs, psd = welch(error, fs=1.0, nperseg=1 << 12)
    got = np.sum(psd[freqs <= 0.5 / osr]) * (freqs[1] - freqs[0])
    on = wf.levels[wf.ticks > 0]
    steps = np.diff(on, prepend=0.0)
    want = (sigma * RATE) ** 2 * np.sum(steps * steps) / n / osr
    assert abs(10 * np.log10(got / want)) <= 0.5, (got, want)


@pytest.mark.parametrize(
    ("mode", "carrier"), [("three-level", "double-edge"), ("two-level", "trailing")]
)
def test_pwm_sinusoidal_jitter_sidebands_follow_phase_modulation(mode, carrier):
    # Jitter delta(t) on every edge is the waveform delayed by delta(t): y(t - delta) = y(t)
    # - delta(t) y'(t) to first order (small-angle phase modulation, e.g. Schreier & Temes
    # 2005, clock jitter; derived here for PWM: y' is the sum of the edges, so moving every
    # edge by delta(t_e) is exactly -delta y'). In band y' is the tone's derivative A w cos(w
    # t): sidebands at f +- f_j of A w J / 2, 20 log10(pi f J) re the tone. The PWM carrier's
    # terms shift by f_j but stay near the carrier, which the LC filter removes. The filter's
    # own response at the sidebands is added (they pass it after the jitter made them).
    rate, n = 48000, 1 << 15
    cycles, jcycles = 1365, 205  # coherent bins: f = 2.0 kHz, f_j = 300 Hz
    f, f_j = cycles * rate / n, jcycles * rate / n
    # (The frame means alone would not show it: a pulse's two edges move nearly opposite
    # areas, and where they sit inside the frame matters as much as their sum; spread over
    # whole segments, the two-level trailing stage read 16 dB low. The stage keeps each
    # moved area within the tick next to its edge.)
    base = _ideal_pwm()
    profile = dataclasses.replace(
        base, output=dataclasses.replace(base.output, pwm_mode=mode, pwm_carrier=carrier)
    )
    peak = 30e-9  # below half a tick: 81 ns double-edge, 163 ns trailing
    chain = Chain.from_profile(_with(profile, jitter_sine_peak_s=peak, jitter_sine_hz=f_j), rate, 1)
    x = 0.5 * np.sin(2 * np.pi * f * np.arange(2 * n) / rate)
    y = chain.process(x)[0].listening[n:, 0]
    spectrum = np.abs(np.fft.rfft(y * np.hanning(n)))
    filt = chain.analog_filter
    for side in (cycles - jcycles, cycles + jcycles):
        h = np.abs(filt.response(np.array([side * rate / n, f])))
        want = 20 * np.log10(np.pi * f * peak * h[0] / h[1])
        got = 20 * np.log10(spectrum[side] / spectrum[cycles])
        assert abs(got - want) <= 0.2, (side, got, want)


def test_pwm_chain_with_jitter_streams():
    profile = _with(_ideal_pwm(), jitter_rms_s=2e-9, part_seed=4)
    chain = Chain.from_profile(profile, 48000, 1)
    x = 0.5 * np.sin(2 * np.pi * 997 * np.arange(3000) / 48000)
    whole = chain.process(x, keep=("listening", "error"))[0]
    first, st = chain.process(x[:1111], keep=("listening", "error"))
    second, _ = chain.process(x[1111:], st, keep=("listening", "error"))
    assert np.array_equal(np.concatenate([first.listening, second.listening]), whole.listening)
    assert np.array_equal(np.concatenate([first.error, second.error]), whole.error)


def test_rz_chain_with_edges_streams():
    profile = _with(load_profile(NRZ17), rise_time_s=4e-9, fall_time_s=2e-9, return_to_zero=True)
    chain = Chain.from_profile(profile, 48000, 1)
    x = 0.5 * np.sin(2 * np.pi * 997 * np.arange(3000) / 48000)
    whole = chain.process(x)[0].listening
    first, st = chain.process(x[:1501])
    second, _ = chain.process(x[1501:], st)
    assert np.array_equal(np.concatenate([first.listening, second.listening]), whole)


# ---------------------------------------------------------------------------------------------
# Bad input
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("profile", "text", "key", "words"),
    [
        (PDM2, "rise_time_s = -1e-9", "impairments.rise_time_s", "from 0 to 1e-6"),
        (PDM2, "fall_time_s = 2e-6", "impairments.fall_time_s", "from 0 to 1e-6"),
        (PDM2, "return_to_zero = 'yes'", "impairments.return_to_zero", "true or false"),
        (PWM9, "rise_time_s = 1e-9", "impairments.rise_time_s", "'pdm' or 'nrz'"),
        (PWM9, "return_to_zero = true", "impairments.return_to_zero", "'pdm' or 'nrz'"),
    ],
)
def test_edge_keys_refused_at_load(tmp_path, profile, text, key, words):
    path = tmp_path / "bad.toml"
    path.write_text(_text_with(profile, text))
    assert_refused_at_load(path, key, words)


def test_pwm_jitter_refused_with_dead_time_and_beyond_half_a_tick():
    path = ROOT / "profiles" / "pocket_amp" / "pwm9_halfbridge_deadtime_16x.toml"
    with pytest.raises(ProfileError, match="impairments.jitter_rms_s"):
        parse_profile(_text_with(path, "jitter_rms_s = 1e-10"))
    profile = _with(_ideal_pwm(), jitter_rms_s=5e-9)  # 10 sigma > half the 81 ns tick
    with pytest.raises(ProfileError, match="half a PWM tick"):
        Chain.from_profile(profile, 48000, 1)


def test_battery_jitter_reading_of_pwm_predicts_the_jittered_chain():
    # The battery's reading for PWM (the estimate above from every edge's squared step, at
    # 1 ps) against the chain with 2 ns rms white jitter on its PWM edges: the added in-band
    # noise of the error path is the reading + 20 log10(2000) within 1 dB (the LC filter's
    # small rise toward 20 kHz shapes the white jitter noise a little).
    from audiodsm.evaluate.battery import BatteryPlan, run_battery

    profile = _ideal_pwm()
    res = run_battery(profile, tests=("dynamic_range",), plan=BatteryPlan.quick())
    reading = res.metrics["jitter_noise_dbfs_at_1ps"]
    assert reading is not None and np.isfinite(reading)
    rate, sigma, n, skip = 48000, 2e-9, 1 << 16, 4096
    x = 10 ** (-60 / 20) * np.sin(2 * np.pi * 997 * np.arange(n) / rate)

    def band_power(p):
        error = Chain.from_profile(p, rate, 1).process(x, keep=("error",))[0].error[skip:, 0]
        freqs, psd = welch(error, fs=rate, nperseg=1 << 13)
        return float(np.sum(psd[freqs <= 20000.0]) * (freqs[1] - freqs[0]))

    added = band_power(_with(profile, jitter_rms_s=sigma, part_seed=2)) - band_power(profile)
    got_dbfs = 10 * np.log10(added / 0.5)
    assert abs(got_dbfs - (reading + 20 * np.log10(sigma / 1e-12))) <= 1.0, (got_dbfs, reading)


def test_return_to_zero_refused_with_a_semi_digital_fir():
    text = _text_with(PDM2, "return_to_zero = true")
    if "[reconstruction]" in text:
        text = text.replace("[reconstruction]", "[reconstruction]\nfir_taps = [0.5, 0.5]", 1)
    else:
        text += "\n[reconstruction]\nfir_taps = [0.5, 0.5]\n"
    with pytest.raises(ProfileError, match="impairments.return_to_zero") as info:
        parse_profile(text)
    assert "\n" not in str(info.value) and "fir_taps" in str(info.value)


@pytest.mark.parametrize("levels", [2, 17])
def test_return_to_zero_white_jitter_noise_counts_two_edges_a_frame(levels):
    # The same derivation as for PWM (each edge an independent pulse of area -step delta):
    # with return to zero every frame has two edges of the held level y, so the in-band noise
    # of the frame means is (sigma / T)^2 2 E[y^2] / OSR (the battery's reading for RZ).
    n, osr, sigma = 1 << 18, 64, 1e-9
    y = _stream(levels, n)
    out, _ = EdgeJitter(RATE, rms_s=sigma, return_to_zero=True, seed=4).process(y)
    error = out.mean(axis=1)[1:] - 0.5 * y[:-1]  # one frame behind
    freqs, psd = welch(error, fs=1.0, nperseg=1 << 14)
    got = np.sum(psd[freqs <= 0.5 / osr]) * (freqs[1] - freqs[0])
    want = (sigma * RATE) ** 2 * 2.0 * np.mean(y * y) / osr
    assert abs(10 * np.log10(got / want)) <= 0.5, (got, want)


def test_sine_jitter_from_anchors_stays_at_the_exact_sine():
    # the sinusoidal jitter's sine comes from exact anchors by the angle sum
    # (stages/_element_kernels.py); the reference is numpy's sine of the same phase,
    # 2 pi ((start + n) ratio mod 1)
    from audiodsm.stages import _element_kernels as kernels

    # (at large indices the reference's own phase n * ratio rounds to about 1e-16 n ratio
    # cycles, so the bound is for the first few million edges, a second at 3 MHz; near the
    # start both round the phase 2 pi x to about 4e-16 rad, and the kernel stays within
    # 3e-15 of the peak, docs/impairments.md)
    ratio, peak = 1234.5 / 3.072e6, 0.3
    for start in (0, 1, 1023, 1024, 3_000_017):
        got = np.zeros(5000)
        kernels.add_sine_shifts(got, start, peak, ratio)
        n = np.arange(start, start + 5000, dtype=np.float64)
        want = peak * np.sin(2 * np.pi * np.mod(n * ratio, 1.0))
        bound = 1e-11 if start > 5000 else 3e-15
        np.testing.assert_allclose(got, want, rtol=0, atol=bound * peak)
    # any split gives the same numbers
    whole = np.zeros(3000)
    kernels.add_sine_shifts(whole, 777, peak, ratio)
    parts = [np.zeros(1000), np.zeros(2000)]
    kernels.add_sine_shifts(parts[0], 777, peak, ratio)
    kernels.add_sine_shifts(parts[1], 1777, peak, ratio)
    np.testing.assert_array_equal(np.concatenate(parts), whole)


def test_pwm_sine_jitter_from_anchors_stays_at_the_exact_sine():
    # The PWM edges' sine (stages/_element_kernels.py, add_tick_sine_shifts) comes from
    # frame anchors and a tick table by angle sums. References: the sine of the exact phase
    # (the float ratio taken as an exact fraction, Python's fractions module; its sine then
    # rounds once, about 1e-16), and the per-edge sine of the phase in floating point the
    # stage used before, 2 pi (((start + i) r + t r / ticks) mod 1).
    import math
    from fractions import Fraction

    from audiodsm.stages import _element_kernels as kernels

    wf = _pwm(1200)
    levels = np.ascontiguousarray(wf.levels)
    ticks = np.ascontiguousarray(wf.ticks, dtype=np.int64)
    tpf = wf.ticks_per_frame
    places, prev = [], 0.0  # (frame, tick) of every edge, as the stage counts them
    for i in range(wf.n_frames):
        t = 0
        for j in range(wf.n_segments):
            if ticks[i, j]:
                if levels[i, j] != prev:
                    places.append((i, t))
                    prev = levels[i, j]
                t += int(ticks[i, j])
    ratio, peak = 1000.0 / (RATE / 4), 0.3  # a 1 kHz sine on a frame rate of RATE / 4
    exact_ratio = Fraction(ratio)
    for start in (0, 1, 1023, 1024, 3_000_017):
        got = np.zeros(len(places))
        kernels.add_tick_sine_shifts(levels, ticks, 0.0, start, tpf, peak, ratio, got)
        exact = [
            peak
            * math.sin(2 * math.pi * float(((start + i) * exact_ratio + t * exact_ratio / tpf) % 1))
            for i, t in places
        ]
        # near the start within a few roundings (2.7e-15 seen); 3 million frames on, the
        # anchor's own phase (a product near 4e3 cycles) rounds to about 5e-13 cycles
        bound = 5e-15 if start < 5000 else 5e-12
        np.testing.assert_allclose(got, exact, rtol=0, atol=bound * peak)
        if start < 5000:
            i, t = np.array(places).T
            per_edge = peak * np.sin(
                2 * np.pi * np.mod((start + i) * ratio + t * (ratio / tpf), 1.0)
            )
            np.testing.assert_allclose(got, per_edge, rtol=0, atol=2e-14 * peak)
    # any split into blocks gives the same numbers (the state carried: the level before)
    whole = np.zeros(len(places))
    kernels.add_tick_sine_shifts(levels, ticks, 0.0, 777, tpf, peak, ratio, whole)
    first = sum(1 for i, _ in places if i < 500)
    parts = [np.zeros(first), np.zeros(len(places) - first)]
    kernels.add_tick_sine_shifts(levels[:500], ticks[:500], 0.0, 777, tpf, peak, ratio, parts[0])
    before = levels[:500][ticks[:500] > 0][-1]
    kernels.add_tick_sine_shifts(
        levels[500:], ticks[500:], float(before), 1277, tpf, peak, ratio, parts[1]
    )
    np.testing.assert_array_equal(np.concatenate(parts), whole)


def test_return_to_zero_counts_two_switchings_a_frame():
    # a single-bit stream never rests at 0: with return to zero it switches out of 0 and
    # back in every frame, twice the frame rate
    profile = _with(load_profile(PDM2), return_to_zero=True)
    chain = Chain.from_profile(profile, 48000, 1)
    x = 0.25 * np.sin(2 * np.pi * 997 * np.arange(2000) / 48000)
    result, state = chain.process(x)
    frames = 2000 * chain.modulator_rate_hz / 48000
    assert state.stats.switching_events[0] == 2 * frames
