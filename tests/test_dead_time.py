"""Dead time that follows the load current: the PWM leg and the LC filter in one loop."""

import math

import numpy as np
import pytest
import scipy.integrate
import scipy.linalg

from audiodsm.errors import ParameterError
from audiodsm.stages.filter_design import analog_prototype, lc_filter
from audiodsm.stages.output_stage import pwm_waveform
from audiodsm.stages.reconstruct import filter_pwm_with_dead_time, filter_waveform

CASES = {
    "half trailing": dict(mode="two-level", carrier="trailing", bridge="half"),
    "full two-level": dict(mode="two-level", carrier="trailing", bridge="full"),
    "three-level": dict(mode="three-level", carrier="double-edge", bridge="full"),
    "half double-edge": dict(mode="two-level", carrier="double-edge", bridge="half"),
}


def _slow_dead_time(filt, y, *, rate, levels, sub, dead, volts, mode, carrier, bridge):
    """Slow twin, tick by tick in the filter's own coordinates (independent of the kernel's
    segment bookkeeping and modal form). Every tick: each leg's command from its code; a
    command change starts (or, inside one, extends) a dead interval whose level is low for a
    current out of the leg (i > 0), high for a current into it, unchanged at i == 0; the filter
    advances one tick with expm of the augmented matrix [[A, 0, B], [I, 0, 0], [0, 0, 0]]."""
    steps = levels - 1
    codes = np.rint((np.asarray(y) + 1) / 2 * steps).astype(int)
    double = carrier == "double-edge"
    frame = steps * sub * (2 if double else 1)
    centre = steps * sub
    legs = 2 if bridge == "full" else 1
    three = mode == "three-level"

    def command(leg, k, t):
        if leg == 1 and three:
            k = steps - k
        if double:
            high = centre - k * sub <= t < centre + k * sub
        else:
            high = t < k * sub
        if leg == 1 and not three:
            high = not high
        return int(high)

    m = filt.order
    dt = 1.0 / (rate * frame)
    aug = np.zeros((2 * m + 1, 2 * m + 1))
    aug[:m, :m] = filt.a
    aug[:m, 2 * m] = filt.b[:, 0]
    aug[m : 2 * m, :m] = np.eye(m)
    big = scipy.linalg.expm(aug * dt)
    phi, gam = big[:m, :m], big[:m, 2 * m]
    w_x = filt.c[0] @ big[m : 2 * m, :m]
    w_u = filt.c[0] @ big[m : 2 * m, 2 * m] + filt.d[0, 0] * dt
    # the squared output over one tick as a quadratic form in z = [x; u], by numerical
    # quadrature of (H expm(F t))' (H expm(F t)) (scipy.integrate.quad_vec), F = [[A, B], [0, 0]]
    f = np.zeros((m + 1, m + 1))
    f[:m, :m] = filt.a
    f[:m, m] = filt.b[:, 0]
    hrow = np.append(filt.c[0], filt.d[0, 0])

    def integrand(t):
        v = hrow @ scipy.linalg.expm(f * t)
        return np.outer(v, v)

    q_tick = scipy.integrate.quad_vec(integrand, 0.0, dt, epsabs=0, epsrel=1e-13)[0]
    x = np.zeros(m)
    prev = [0] * legs
    level = [0] * legs
    dead_level = [0] * legs
    dead_until = [-1] * legs
    out, squares = [], []
    g = 0
    for k in codes:
        area = 0.0
        square = 0.0
        for t in range(frame):
            for leg in range(legs):
                c = command(leg, int(k), t)
                if c != prev[leg] and dead > 0:
                    if g >= dead_until[leg]:
                        i = x[filt.current_index] * (1.0 if leg == 0 else -1.0)
                        dead_level[leg] = 0 if i > 0 else (1 if i < 0 else level[leg])
                    dead_until[leg] = g + dead
                prev[leg] = c
                level[leg] = dead_level[leg] if g < dead_until[leg] else c
            u = volts * (2 * level[0] - 1 if legs == 1 else level[0] - level[1])
            area += w_x @ x + w_u * u
            z = np.append(x, u)
            square += z @ q_tick @ z
            x = phi @ x + gam * u
            g += 1
        out.append(area / (frame * dt))
        squares.append(square / (frame * dt))
    return np.array(out), np.array(squares)


@pytest.mark.parametrize("dead", [0, 1, 3, 7])
@pytest.mark.parametrize("case", sorted(CASES))
def test_kernel_equals_tick_by_tick_twin(case, dead, rng):
    filt = lc_filter(10e-6, 1e-6, 4.0, series_ohm=0.05, bridged=CASES[case]["bridge"] == "full")
    y = rng.integers(0, 5, 150) / 2.0 - 1.0
    kw = dict(levels=5, tick_subdivision=2, supply_volts=3.0, **CASES[case])
    got, got_sq, _, _ = filter_pwm_with_dead_time(
        filt, y, frame_rate_hz=384e3, dead_time_ticks=dead, **kw
    )
    ref, ref_sq = _slow_dead_time(
        filt,
        y,
        rate=384e3,
        levels=5,
        sub=2,
        dead=dead,
        volts=3.0,
        mode=kw["mode"],
        carrier=kw["carrier"],
        bridge=kw["bridge"],
    )
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9)
    np.testing.assert_allclose(got_sq, ref_sq, rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("case", sorted(CASES))
def test_zero_dead_time_equals_the_plain_waveform_through_the_filter(case, rng):
    """With t_d = 0 the dead-time term vanishes: the coupled loop gives the filter's frame means
    of the plain PWM waveform (to rounding: the segments are cut at the same edges)."""
    filt = lc_filter(22e-6, 680e-9, 8.0, bridged=CASES[case]["bridge"] == "full")
    y = rng.integers(0, 9, 2000) / 4.0 - 1.0
    kw = dict(frame_rate_hz=768e3, levels=9, tick_subdivision=4, supply_volts=5.0, **CASES[case])
    got, _, stats, _ = filter_pwm_with_dead_time(filt, y, dead_time_ticks=0, **kw)
    wave, plain_stats, _ = pwm_waveform(y, **kw)
    ref, _ = filter_waveform(filt, wave)
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12)
    assert stats.transitions == plain_stats.transitions


def test_blockwise_equals_one_shot(rng):
    """Dead intervals that run over a frame's end carry across blocks in the state."""
    filt = lc_filter(10e-6, 1e-6, 4.0, bridged=True)
    y = rng.integers(0, 5, 900) / 2.0 - 1.0
    kw = dict(
        frame_rate_hz=384e3,
        levels=5,
        tick_subdivision=2,
        dead_time_ticks=5,
        supply_volts=2.0,
        mode="three-level",
        carrier="double-edge",
    )
    whole, whole_sq, stats, end = filter_pwm_with_dead_time(filt, y, **kw)
    parts, squares, state = [], [], None
    for lo, hi in ((0, 1), (1, 1), (1, 333), (333, 900)):
        out, sq, _, state = filter_pwm_with_dead_time(filt, y[lo:hi], state=state, **kw)
        parts.append(out)
        squares.append(sq)
    assert np.array_equal(np.concatenate(parts), whole)
    assert np.array_equal(np.concatenate(squares), whole_sq)
    assert np.array_equal(state.filter.coords, end.filter.coords)
    assert state.totals == end.totals
    assert stats.transitions == end.totals.transitions


def test_dead_time_error_is_a_square_wave_in_phase_with_the_load_current():
    """Textbook inverter analysis (N. Mohan, T. M. Undeland, W. P. Robbins, "Power
    Electronics", Wiley, 2003, blanking-time effect): with a current large enough to change sign
    cleanly, dead time t_d changes every switching period's mean leg voltage by
    -sign(i) * (leg voltage step) * t_d / T, a square wave of amplitude a = step * t_d / T
    opposing the load current. Its Fourier series (any signals text): odd harmonics of
    amplitude 4 a / (pi h), so the fundamental is 4 a / pi and the third a third of it; both
    within 0.3 dB. The error is the difference of the outputs with and without dead time (the
    filter is linear), read at the harmonics and divided by the filter's gain and the frame
    mean's boxcar sinc(h f / f_c). A resistive load (Q well below 0.5) with a ripple current
    of +-0.06 A against 2 A of load current makes the sign changes clean."""
    fc, f0 = 400e3, 1000.0
    per = int(fc / f0)
    volts, steps, dead = 10.0, 400, 4
    filt = lc_filter(100e-6, 0.47e-6, 4.0)
    y = 0.8 * np.cos(2 * np.pi * np.arange(30 * per) / per)
    kw = dict(frame_rate_hz=fc, counter_steps=steps, bridge="half", supply_volts=volts)
    with_dead, _, _, _ = filter_pwm_with_dead_time(filt, y, dead_time_ticks=dead, **kw)
    without, _, _, _ = filter_pwm_with_dead_time(filt, y, dead_time_ticks=0, **kw)
    keep = 10 * per
    err = np.fft.rfft((with_dead - without)[-keep:]) * 2 / keep
    ref = np.fft.rfft(without[-keep:]) * 2 / keep
    amplitude = 2 * volts * dead / steps  # half bridge: the leg steps from -V to +V
    gain = {h: filt.response(h * f0) * np.sinc(h * f0 / fc) for h in (1, 3)}
    fund = abs(err[10] / gain[1])
    third = abs(err[30] / gain[3])
    assert 20 * math.log10(fund / (4 * amplitude / math.pi)) == pytest.approx(0.0, abs=0.3)
    assert 20 * math.log10(third / (fund / 3)) == pytest.approx(0.0, abs=0.3)
    # in phase with the load current, with the sign that opposes it: the inductor current's
    # transfer from the bridge voltage is row 0 of (j w I - A)^-1 B
    s = 2j * np.pi * f0
    current_per_volt = np.linalg.solve(s * np.eye(2) - filt.a, filt.b[:, 0])[0]
    bridge_fund = ref[10] / gain[1]
    current_phase = np.angle(bridge_fund * current_per_volt)
    error_phase = np.angle(err[10] / gain[1])
    diff = np.angle(np.exp(1j * (error_phase - current_phase - np.pi)))
    assert abs(math.degrees(diff)) < 3.0
    # with zero dead time the term vanishes exactly
    again, _, _, _ = filter_pwm_with_dead_time(filt, y, dead_time_ticks=0, **kw)
    assert np.array_equal(again, without)


def test_a_filter_without_an_inductor_current_is_refused():
    with pytest.raises(ParameterError, match="inductor current"):
        filter_pwm_with_dead_time(
            analog_prototype("butterworth", order=2, cutoff_hz=40e3),
            np.zeros(4),
            frame_rate_hz=384e3,
            levels=3,
            dead_time_ticks=1,
        )
