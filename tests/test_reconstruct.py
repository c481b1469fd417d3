"""Reconstruction filters: exact simulation checked against scipy.signal, circuits, formulas."""

import math

import numpy as np
import pytest
import scipy.signal as ss

from audiodsm.errors import ParameterError
from audiodsm.stages import _waveform_kernels
from audiodsm.stages import reconstruct as rec
from audiodsm.stages.filter_design import (
    AnalogFilter,
    analog_prototype,
    lc_filter,
    semi_digital_fir,
)
from audiodsm.stages.output_stage import PulseWaveform, nrz_waveform, pdm_waveform, pwm_waveform
from audiodsm.stages.reconstruct import (
    filter_report,
    filter_waveform,
    filter_waveform_power,
    filter_waveform_ticks,
    out_of_band_ripple,
    waveform_ripple,
)

RATE = 3.072e6  # 48 kHz x 64


def _integrating_system(filt):
    """The filter with an integrator on its output: states [x, xi], xi' = C x + D u, output xi.

    Driving it with scipy.signal.lsim (zero-order hold) gives the running integral of the
    filter output, so the frame means are the differences of xi at frame ends over the frame
    length: an independent route to the frame mean through scipy's own discretization.
    """
    m = filt.order
    a = np.zeros((m + 1, m + 1))
    a[:m, :m] = filt.a
    a[m, :m] = filt.c[0]
    b = np.vstack([filt.b, filt.d])
    c = np.zeros((1, m + 1))
    c[0, m] = 1.0
    return a, b, c, np.zeros((1, 1))


def _mean_reference(filt, u_ticks, tick_s, ticks_per_frame):
    """Frame means of the filter output for a tick-held input (scipy.signal.cont2discrete
    'zoh' of the integrating system, stepped tick by tick with dlsim)."""
    sys = ss.cont2discrete(_integrating_system(filt), tick_s, method="zoh")
    _, xi, _ = ss.dlsim(sys, np.append(u_ticks, 0.0))
    ends = xi[::ticks_per_frame, 0]
    return np.diff(ends) / (ticks_per_frame * tick_s)


# a critically damped LC (Q = 0.5, a repeated real pole) has no usable modal form: it takes
# the dense path; the prototypes take the modal one.
FILTERS = {
    "butter3": analog_prototype("butterworth", order=3, cutoff_hz=60e3),
    "bessel5": analog_prototype("bessel", order=5, cutoff_hz=80e3),
    "cheby4": analog_prototype("chebyshev1", order=4, cutoff_hz=50e3, ripple_db=0.5),
    "lc_critical": lc_filter(22e-6, 22e-6 / (4 * 4.0**2), 4.0),  # R = 0.5 sqrt(L/C)
}


@pytest.mark.parametrize("name", sorted(FILTERS))
def test_one_segment_matches_scipy_cont2discrete(name, rng):
    filt = FILTERS[name]
    step = np.ones(400)
    bits = np.where(rng.random(400) < 0.5, -1.0, 1.0)
    for u in (step, bits):
        y, _ = filter_waveform(filt, pdm_waveform(u, frame_rate_hz=RATE))
        ref = _mean_reference(filt, u, 1.0 / RATE, 1)
        # scipy.signal.cont2discrete('zoh') + dlsim of the filter with an output integrator:
        # tolerance 1e-9 (outputs are O(1) here; both sides are exact ZOH up to rounding).
        np.testing.assert_allclose(y, ref, rtol=0, atol=1e-9)


def test_modal_and_dense_paths_are_used():
    assert rec._model(FILTERS["butter3"]).modal
    assert not rec._model(FILTERS["lc_critical"]).modal


def _pulse_train(rng, n_frames, tpf):
    """A random piecewise-constant waveform with 3 segments per frame on a tpf-tick grid."""
    cuts = np.sort(rng.integers(0, tpf + 1, size=(n_frames, 2)), axis=1)
    ticks = np.diff(
        np.concatenate([np.zeros((n_frames, 1), int), cuts, np.full((n_frames, 1), tpf)], 1), axis=1
    )
    levels = rng.choice([-1.0, 0.0, 1.0], size=ticks.shape)
    return PulseWaveform(levels, ticks, tpf, 384e3)


@pytest.mark.parametrize("name", ["butter3", "lc_critical"])
def test_multi_segment_matches_scipy_lsim(name, rng):
    filt = FILTERS[name]
    tpf = 16
    wave = _pulse_train(rng, 60, tpf)
    y, _ = filter_waveform(filt, wave)
    u = wave.tick_samples()
    dt = 1.0 / wave.tick_rate_hz
    t = np.arange(u.size + 1) * dt
    # scipy.signal.lsim with interp=False holds each input sample (zero-order hold), exactly
    # the piecewise-constant waveform; run on the filter with an output integrator, the
    # integral's differences at frame ends over the frame length are the frame means.
    _, xi, _ = ss.lsim(_integrating_system(filt), np.append(u, 0.0), t, interp=False)
    np.testing.assert_allclose(y, np.diff(xi[::tpf]) / (tpf * dt), rtol=0, atol=1e-9)
    # per-tick variant: the mean over every tick
    y_ticks, _ = filter_waveform_ticks(filt, wave)
    np.testing.assert_allclose(y_ticks, np.diff(xi) / dt, rtol=0, atol=1e-9)
    # and the frame mean is the mean of the frame's tick means
    np.testing.assert_allclose(y, y_ticks.reshape(-1, tpf).mean(axis=1), rtol=0, atol=1e-12)


def test_pwm_step_response_matches_lsim():
    """A PWM waveform of a constant code, through the LC filter (issue: pulse trains)."""
    filt = lc_filter(10e-6, 1e-6, 8.0)
    wave, _, _ = pwm_waveform(
        np.full(50, 0.5), frame_rate_hz=384e3, levels=5, carrier="double-edge"
    )
    y, _ = filter_waveform(filt, wave)
    u = wave.tick_samples()
    tpf = wave.ticks_per_frame
    t = np.arange(u.size + 1) / wave.tick_rate_hz
    _, xi, _ = ss.lsim(_integrating_system(filt), np.append(u, 0.0), t, interp=False)
    ref = np.diff(xi[::tpf]) * wave.frame_rate_hz
    np.testing.assert_allclose(y, ref, atol=1e-9)


@pytest.mark.parametrize("name", ["butter3", "lc_critical"])
def test_blockwise_equals_one_shot(name, rng):
    filt = FILTERS[name]
    bits = np.where(rng.random(3000) < 0.5, -1.0, 1.0)
    whole, end = filter_waveform(filt, pdm_waveform(bits, frame_rate_hz=RATE))
    parts, state = [], None
    for lo, hi in ((0, 1), (1, 777), (777, 777), (777, 3000)):
        y, state = filter_waveform(filt, pdm_waveform(bits[lo:hi], frame_rate_hz=RATE), state)
        parts.append(y)
    assert np.array_equal(np.concatenate(parts), whole)
    assert np.array_equal(state.coords, end.coords)
    # multi-segment path
    wave = _pulse_train(rng, 200, 8)
    whole, _ = filter_waveform(filt, wave)
    a = PulseWaveform(wave.levels[:73], wave.ticks[:73], 8, wave.frame_rate_hz)
    b = PulseWaveform(wave.levels[73:], wave.ticks[73:], 8, wave.frame_rate_hz)
    ya, st = filter_waveform(filt, a)
    yb, _ = filter_waveform(filt, b, st)
    assert np.array_equal(np.concatenate([ya, yb]), whole)


def test_fine_tick_grids_tabulate_only_the_lengths_present(monkeypatch, rng):
    """Above the full-table limit the matrices come per block for the lengths present; the
    numbers are the same (each expm is computed on its own matrix either way)."""
    filt = FILTERS["butter3"]
    wave = _pulse_train(rng, 300, 64)
    full, _ = filter_waveform(filt, wave)
    monkeypatch.setattr(rec, "_FULL_TABLE_MAX", 8)
    sparse, _ = filter_waveform(filt, wave)
    assert np.array_equal(full, sparse)
    half = PulseWaveform(wave.levels[:150], wave.ticks[:150], 64, wave.frame_rate_hz)
    rest = PulseWaveform(wave.levels[150:], wave.ticks[150:], 64, wave.frame_rate_hz)
    ya, st = filter_waveform(filt, half)
    yb, _ = filter_waveform(filt, rest, st)
    assert np.array_equal(np.concatenate([ya, yb]), full)


def test_state_from_another_filter_is_refused(rng):
    wave = pdm_waveform(np.ones(10), frame_rate_hz=RATE)
    _, state = filter_waveform(FILTERS["butter3"], wave)
    with pytest.raises(ParameterError, match="state"):
        filter_waveform(FILTERS["bessel5"], wave, state)


def test_physical_state_of_lc_at_rest_after_dc():
    """First principles: after a long DC input u the LC settles to v = u R / (R + Rs) and the
    inductor current v / R."""
    filt = lc_filter(22e-6, 680e-9, 8.0, series_ohm=0.1)
    _, state = filter_waveform(
        filt, nrz_waveform(np.full(20000, 1.0), levels=3, frame_rate_hz=RATE)
    )
    i_l, v_c = state.physical(filt)
    assert v_c == pytest.approx(8.0 / 8.1, abs=1e-9)
    assert i_l == pytest.approx(v_c / 8.0, abs=1e-9)


# --- slow twins of the kernels ---------------------------------------------------------------


def _slow_segments(levels, ticks, phis, gammas, wx, wu, x):
    """Slow twin of _waveform_kernels.frame_means_segments (same operation order)."""
    x = list(x)
    m = len(x)
    y = []
    for i in range(levels.shape[0]):
        acc = 0.0
        for j in range(levels.shape[1]):
            k = int(ticks[i, j])
            if k == 0:
                continue
            u = float(levels[i, j])
            acc += wu[k] * u
            for q in range(m):
                acc += wx[k, q] * x[q]
            new = []
            for r in range(m):
                v = gammas[k, r] * u
                for q in range(m):
                    v += phis[k, r, q] * x[q]
                new.append(v)
            x = new
        y.append(acc)
    return np.array(y), np.array(x)


def test_frame_means_kernel_equals_slow_twin(rng):
    model = rec._model(FILTERS["lc_critical"])
    phis, gammas, wx, wu = rec._tables(model, 1 / (384e3 * 8), 8)
    wave = _pulse_train(rng, 40, 8)
    x = np.array([0.1, -0.2])
    y = np.empty(40)
    ref_y, ref_x = _slow_segments(wave.levels, wave.ticks, phis, gammas, wx, wu, x.copy())
    _waveform_kernels.frame_means_segments(wave.levels, wave.ticks, phis, gammas, wx, wu, x, y)
    np.testing.assert_array_equal(y, ref_y)
    np.testing.assert_array_equal(x, ref_x)


@pytest.mark.parametrize("order", [2, 3, 5, 6])
def test_modal_kernel_equals_dense_twin(order, rng):
    """The fast modal loops (a generic one, and scalar ones for orders 2 and 3) reproduce the
    dense segment loop's slow twin exactly."""
    filt = analog_prototype("butterworth", order=order, cutoff_hz=50e3)
    model = rec._model(filt)
    assert model.modal and model.n_real == order % 2
    phis, gammas, wx, wu = rec._tables(model, 1 / RATE, 1)
    u = np.where(rng.random(500) < 0.5, -1.0, 1.0)
    levels = u[:, None].copy()
    ticks = np.ones((500, 1), np.int64)
    ref_y, ref_x = _slow_segments(levels, ticks, phis, gammas, wx, wu, np.zeros(order))
    x = np.zeros(order)
    y = np.empty(500)
    rec._run_modal(u, rec._modal_coefficients(model, phis, gammas, wx, wu), x, y)
    np.testing.assert_array_equal(y, ref_y)
    np.testing.assert_array_equal(x, ref_x)


# --- prototypes and the LC filter ------------------------------------------------------------


@pytest.mark.parametrize("order", [1, 2, 3, 4, 5, 6])
@pytest.mark.parametrize("kind", ["butterworth", "bessel", "chebyshev1"])
def test_prototypes_match_scipy_designs(kind, order):
    fc = 45e3
    filt = analog_prototype(kind, order=order, cutoff_hz=fc, ripple_db=1.0)
    wc = 2 * np.pi * fc
    if kind == "butterworth":
        b, a = ss.butter(order, wc, analog=True)
    elif kind == "bessel":
        b, a = ss.bessel(order, wc, analog=True, norm="mag")
    else:
        b, a = ss.cheby1(order, 1.0, wc, analog=True)
    f = np.array([0.0, 1e3, 20e3, 45e3, 100e3, 1e6])
    _, h_ref = ss.freqs(b, a, worN=2 * np.pi * f)
    # scipy.signal.freqs of the same design: agreement to rounding in the conversions
    np.testing.assert_allclose(filt.response(f), h_ref, rtol=1e-9, atol=1e-15)


def test_butterworth_corner_and_q():
    # Textbook Butterworth: |H(j wc)|^2 = 1/2 (-3.0103 dB); the 2nd-order Q is 1/sqrt(2).
    filt = analog_prototype("butterworth", order=2, cutoff_hz=30e3)
    assert abs(filt.response(30e3)) ** 2 == pytest.approx(0.5, rel=1e-12)
    assert filt.q == pytest.approx(1 / math.sqrt(2), rel=1e-12)
    assert filt.f0_hz == pytest.approx(30e3, rel=1e-12)


def test_chebyshev_gain_at_corner_is_minus_ripple():
    # Chebyshev I definition: the gain at the ripple-band edge is -ripple_db.
    filt = analog_prototype("chebyshev1", order=3, cutoff_hz=40e3, ripple_db=0.5)
    assert 20 * np.log10(abs(filt.response(40e3))) == pytest.approx(-0.5, abs=1e-9)


@pytest.mark.parametrize(("ind", "cap", "r"), [(22e-6, 680e-9, 8.0), (10e-6, 1e-6, 4.0)])
def test_lc_f0_and_q_match_textbook(ind, cap, r):
    filt = lc_filter(ind, cap, r)
    # textbook series-L, shunt-C with load R: f0 = 1 / (2 pi sqrt(LC)), Q = R sqrt(C / L)
    assert filt.f0_hz == pytest.approx(1 / (2 * math.pi * math.sqrt(ind * cap)), rel=1e-12)
    assert filt.q == pytest.approx(r * math.sqrt(cap / ind), rel=1e-12)
    bridged = lc_filter(ind, cap, r, bridged=True)
    assert bridged.f0_hz == pytest.approx(1 / (2 * math.pi * math.sqrt(ind * cap)), rel=1e-12)
    assert bridged.q == pytest.approx((r / 2) * math.sqrt(cap / ind), rel=1e-12)


@pytest.mark.parametrize("rs", [0.0, 0.15])
def test_lc_response_matches_impedance_analysis(rs):
    """Circuit theory with complex impedances, done independently of the state-space model."""
    ind, cap, r = 15e-6, 1.5e-6, 6.0
    f = np.array([10.0, 1e3, 20e3, 33e3, 100e3, 500e3])
    s = 2j * np.pi * f
    zl = s * ind + rs
    zc = 1 / (s * cap)
    # single-ended: voltage divider Z_L against (R || Z_C)
    zp = r * zc / (r + zc)
    np.testing.assert_allclose(
        lc_filter(ind, cap, r, series_ohm=rs).response(f), zp / (zl + zp), rtol=1e-10
    )
    # bridged: nodal analysis of the whole network, +u/2 and -u/2 through Z_L into nodes a, b,
    # each with Z_C to ground, R between a and b; H = (va - vb) / u.
    h = []
    for zl_k, zc_k in zip(zl, zc, strict=True):
        g = np.array([[1 / zl_k + 1 / zc_k + 1 / r, -1 / r], [-1 / r, 1 / zl_k + 1 / zc_k + 1 / r]])
        va, vb = np.linalg.solve(g, np.array([0.5 / zl_k, -0.5 / zl_k]))
        h.append(va - vb)
    bridged = lc_filter(ind, cap, r, series_ohm=rs, bridged=True)
    np.testing.assert_allclose(bridged.response(f), h, rtol=1e-10)
    # DC: resistive dividers R / (R + Rs) and R / (R + 2 Rs)
    assert lc_filter(ind, cap, r, series_ohm=rs).dc_gain == pytest.approx(r / (r + rs))
    assert bridged.dc_gain == pytest.approx(r / (r + 2 * rs))


def test_pdm_of_a_constant_settles_to_the_constant():
    """First principles: a first-order delta-sigma loop's bits average to its constant input,
    and a unity-DC-gain low-pass passes the average. The bits come from the textbook loop
    (integrate the error, take the sign), written out here."""
    value = 0.3
    n = 60000
    bits = np.empty(n)
    acc = 0.0
    for i in range(n):
        bits[i] = 1.0 if acc >= 0 else -1.0
        acc += value - bits[i]
    filt = analog_prototype("butterworth", order=3, cutoff_hz=30e3)
    y, _ = filter_waveform(filt, pdm_waveform(bits, frame_rate_hz=RATE))
    tail = y[-20000:]
    # the mean over the tail: the loop's running-sum error is bounded by 2 (one LSB swing), so
    # the bit mean over 20000 samples is within 2 / 20000 of the input; the filter's ripple
    # averages out in the mean to the same order.
    assert tail.mean() == pytest.approx(value, abs=5e-4)
    # and the output stays near the constant (residual ripple of a 3rd-order 30 kHz filter
    # driven at 3 MHz by +-1 bits: well below 0.05)
    assert np.max(np.abs(tail - value)) < 0.05


# --- semi-digital FIR -------------------------------------------------------------------------


def test_semi_digital_fir_matches_lfilter_and_freqz(rng):
    taps = np.array([0.1, 0.2, 0.4, 0.2, 0.1])
    fir = semi_digital_fir(taps)
    bits = np.where(rng.random(1000) < 0.5, -1.0, 1.0)
    wave = pdm_waveform(bits, frame_rate_hz=RATE)
    out, _ = fir.process(wave)
    # scipy.signal.lfilter with the same taps (zero initial history)
    np.testing.assert_allclose(out.levels[:, 0], ss.lfilter(taps, [1.0], bits), atol=1e-15)
    f = np.array([0.0, 20e3, 400e3, 1e6])
    _, h = ss.freqz(taps, worN=2 * np.pi * f / RATE)
    np.testing.assert_allclose(fir.response(f, frame_rate_hz=RATE), h, rtol=1e-12)
    # blocks
    a, st = fir.process(pdm_waveform(bits[:333], frame_rate_hz=RATE))
    b, _ = fir.process(pdm_waveform(bits[333:], frame_rate_hz=RATE), st)
    assert np.array_equal(np.concatenate([a.levels, b.levels]), out.levels)


def test_semi_digital_fir_rejects_pwm():
    wave, _, _ = pwm_waveform(np.zeros(4), frame_rate_hz=384e3, levels=3)
    with pytest.raises(ParameterError, match="ticks_per_frame"):
        semi_digital_fir([1.0, 1.0]).process(wave)


# --- reports ----------------------------------------------------------------------------------


def test_out_of_band_ripple_of_known_tones():
    rate = 384e3
    t = np.arange(38400) / rate
    amp = 0.01
    y = 0.9 * np.sin(2 * np.pi * 1e3 * t) + amp * np.sin(2 * np.pi * 50e3 * t)
    rep = out_of_band_ripple(y, rate_hz=rate, full_scale_volts=2.0)
    # sine rms = peak / sqrt(2); the 1 kHz tone's leakage beyond 20 kHz through the Hann
    # window is negligible (sidelobes fall 18 dB/octave)
    assert rep.rms_volts == pytest.approx(amp / math.sqrt(2), rel=1e-3)
    # AES17: 0 dBFS = rms of a full-scale sine (peak 2 V here)
    assert rep.rms_dbfs == pytest.approx(20 * math.log10(amp / 2.0), abs=0.01)


def test_carrier_ripple_of_a_square_wave_through_the_lc_filter():
    """A 50 % two-level PWM is a +-V square wave at the frame rate f_c. Its Fourier series
    (textbook): odd harmonics m of amplitude 4 V / (pi m). In steady state the LC filter
    scales each by |H(m f_c)|, so the ripple rms is sqrt(sum_m (4 V |H(m f_c)| / (pi m))^2 / 2).
    """
    filt = lc_filter(22e-6, 680e-9, 8.0)
    fc, volts = 384e3, 20.0
    wave, _, _ = pwm_waveform(
        np.zeros(1500), frame_rate_hz=fc, levels=3, supply_volts=volts, tick_subdivision=16
    )
    assert wave.ticks_per_frame == 32
    rep = waveform_ripple(filt, wave, full_scale_volts=volts)
    # Harmonics up to 15 f_c lie below the tick grid's Nyquist frequency (16 f_c), so the tick
    # samples carry their full power (Parseval); above that the LC has cut the square wave's
    # harmonics by more than 80 dB relative to the first, far below the 1 % tolerance, which
    # covers the Hann-window estimate of a few discrete lines.
    m = np.arange(1, 16, 2)
    amps = 4 * volts / (np.pi * m) * np.abs(filt.response(m * fc))
    expected = math.sqrt(np.sum(amps**2) / 2)
    assert rep.rms_volts == pytest.approx(expected, rel=0.01)
    # AES17 dBFS: relative to the rms of a sine of peak full_scale_volts
    assert rep.rms_dbfs == pytest.approx(20 * math.log10(expected * math.sqrt(2) / volts), abs=0.1)
    # the frame means average the steady carrier out exactly (the mean of a periodic ripple
    # over its period is zero): the frame-rate output carries none of it (why the tick
    # variant exists)
    y, _ = filter_waveform(filt, wave)
    assert out_of_band_ripple(y[750:], rate_hz=fc).rms_volts < 1e-9 * expected


def test_filter_report_fields():
    filt = lc_filter(22e-6, 680e-9, 8.0)
    rep = filter_report(filt, freq_hz=[1e3, filt.f0_hz])
    assert rep.f0_hz == filt.f0_hz and rep.q == filt.q
    # at f0 a 2nd-order low-pass has |H| = Q (textbook)
    assert 10 ** (rep.gain_db[1] / 20) == pytest.approx(filt.q, rel=1e-9)


@pytest.mark.parametrize(
    ("call", "name"),
    [
        (lambda: analog_prototype("elliptic", order=3, cutoff_hz=1e3), "kind"),
        (lambda: analog_prototype("bessel", order=7, cutoff_hz=1e3), "order"),
        (lambda: analog_prototype("bessel", order=2, cutoff_hz=-1.0), "cutoff_hz"),
        (lambda: analog_prototype("chebyshev1", order=2, cutoff_hz=1e3, ripple_db=9), "ripple_db"),
        (lambda: lc_filter(0.0, 1e-6, 8.0), "inductance_h"),
        (lambda: lc_filter(1e-6, 1e-6, 8.0, series_ohm=-1), "series_ohm"),
        (lambda: AnalogFilter(np.eye(2), [1.0], [1.0, 0.0], 0.0), "b.shape"),
        (lambda: semi_digital_fir([1.0, -1.0]), "taps"),
    ],
)
def test_bad_parameters_raise_one_line_errors(call, name):
    with pytest.raises(ParameterError) as info:
        call()
    assert info.value.name == name
    assert "\n" not in str(info.value)


# --- frame means: the output is averaged over every frame, never point-sampled ---------------


def test_frame_mean_of_an_rc_driven_by_a_pulse_train_equals_the_closed_form():
    """Closed form for a first-order RC low-pass (y' = (u - y) / tau), u held at a value over a
    segment of length h from y0: y(t) = u + (y0 - u) exp(-t / tau), so the segment's integral
    is u h + (y0 - u) tau (1 - exp(-h / tau)) and it ends at u + (y0 - u) exp(-h / tau)
    (first-order linear ODE, any circuits or ODE text). Summed per frame and divided by the
    frame length, the frame means must match filter_waveform to 1e-12."""
    tau = 3.3e-6
    rc = AnalogFilter([[-1.0 / tau]], [1.0 / tau], [1.0], 0.0, description="RC")
    tpf, rate = 12, 200e3
    dt = 1.0 / (rate * tpf)
    # a known pulse train: a fixed 4-frame pattern of (level, ticks) segments, repeated
    pattern = [
        ([1.0, -1.0, 0.5], [3, 7, 2]),
        ([-0.25, 1.0, 1.0], [12, 0, 0]),
        ([0.0, 0.75, -1.0], [1, 10, 1]),
        ([1.0, -0.5, 0.25], [5, 5, 2]),
    ]
    reps = 25
    levels = np.array([p[0] for p in pattern] * reps)
    ticks = np.array([p[1] for p in pattern] * reps, dtype=np.int64)
    wave = PulseWaveform(levels, ticks, tpf, rate)
    y, _ = filter_waveform(rc, wave)
    expected = []
    y0 = 0.0
    for lv_row, tk_row in zip(levels, ticks, strict=True):
        area = 0.0
        for u, k in zip(lv_row, tk_row, strict=True):
            h = k * dt
            area += u * h + (y0 - u) * tau * -math.expm1(-h / tau)
            y0 = u + (y0 - u) * math.exp(-h / tau)
        expected.append(area / (tpf * dt))
    np.testing.assert_allclose(y, expected, rtol=0, atol=1e-12)
    # the one-segment (NRZ) fast path, against the same closed form
    u = levels[:, 0]
    y1, _ = filter_waveform(rc, PulseWaveform(u[:, None], np.ones((u.size, 1), np.int64), 1, rate))
    h, y0, expected = 1.0 / rate, 0.0, []
    for v in u:
        expected.append(v + (y0 - v) * tau * -math.expm1(-h / tau) / h)
        y0 = v + (y0 - v) * math.exp(-h / tau)
    np.testing.assert_allclose(y1, expected, rtol=0, atol=1e-12)


def test_a_carrier_sideband_is_not_aliased_into_the_audio_band(rng):
    """A case built so that point sampling folds a carrier sideband onto a known in-band
    frequency. A 50 % two-level carrier at f_c (one frame: low, high, high, low quarters) whose
    supply carries a ripple 1 + e cos(2 pi f_a t) has, after the LC filter, sidebands at
    odd k f_c +- f_a and nothing at f_a itself: the tick values s_j r_j, with s = (-1, 1, 1,
    -1) repeating (DFT bins 0 and 2 of s are zero), have spectral lines only at f_c +- f_a and
    3 f_c +- f_a modulo 4 f_c (product of line spectra; ZOH of tick values). A sample taken at
    every frame end takes the sideband f_c - f_a to f_a in full (sampling theorem); the frame
    mean takes it only scaled by the boxcar's |sinc((f_c - f_a) / f_c)| ~ f_a / f_c.
    White noise on the levels (rms 0.01) gives a floor near -99 dBFS per 12 Hz bin, well above
    the boxcar's residual (about -107 dBFS here) and well below the frame-end alias (about
    -46 dBFS); the project's idle-tone detector (a stated false-alarm rate) must find the line
    in the frame-end values and none in the means."""
    from audiodsm.measure.idle_tones import find_idle_tones

    fc, fa, ripple, n = 384e3, 3000.0, 0.5, 192000
    filt = lc_filter(22e-6, 680e-9, 8.0)
    j = np.arange(4 * n)
    r = 1.0 + ripple * np.cos(2 * np.pi * fa * j / (4 * fc))
    s = np.tile([-1.0, 1.0, 1.0, -1.0], n)
    levels = s * r
    clean = PulseWaveform(levels.reshape(n, 4), np.ones((n, 4), np.int64), 4, fc)
    noisy = PulseWaveform(
        (levels + 0.01 * rng.standard_normal(4 * n)).reshape(n, 4), clean.ticks, 4, fc
    )
    skip = 4000
    # without noise: the line the frame mean leaves at f_a is below the boxcar's bound
    # |sinc((f_c - f_a) / f_c)| = sin(pi f_a / f_c) / (pi (1 - f_a / f_c)) times the alias a
    # frame-end sample takes (both read coherently: 3000 Hz is on a DFT bin of the record)
    means, _ = filter_waveform(filt, clean)
    ends = filter_waveform_ticks(filt, clean)[0][3::4]  # mean over the last quarter: ~ a sample
    k = n - skip
    bin_fa = round(fa * k / fc)
    line_mean = abs(np.fft.rfft(means[skip:])[bin_fa])
    line_end = abs(np.fft.rfft(ends[skip:])[bin_fa])
    bound = math.sin(math.pi * fa / fc) / (math.pi * (1 - fa / fc))
    assert line_mean < bound * line_end
    # with the noise floor: a line in the frame-end values, none in the frame means
    means, _ = filter_waveform(filt, noisy)
    frame_end = filter_waveform_ticks(filt, noisy)[0][3::4]
    near = (fa - 50.0, fa + 50.0)
    found_end = find_idle_tones(frame_end[skip:], rate_hz=fc, band_hz=(20.0, 20000.0))
    assert any(near[0] < t.frequency_hz < near[1] for t in found_end.tones)
    found_mean = find_idle_tones(means[skip:], rate_hz=fc, band_hz=(20.0, 20000.0))
    assert not any(near[0] < t.frequency_hz < near[1] for t in found_mean.tones)


def test_frame_mean_square_of_an_rc_equals_the_closed_form():
    """Closed form (first-order linear ODE): with y(t) = u + (y0 - u) exp(-t / tau) over a
    segment of length h, int y^2 = u^2 h + 2 u (y0 - u) tau (1 - exp(-h / tau))
    + (y0 - u)^2 (tau / 2) (1 - exp(-2 h / tau)). The frame means come out bit for bit as
    filter_waveform's."""
    tau = 2.1e-6
    rc = AnalogFilter([[-1.0 / tau]], [1.0 / tau], [1.0], 0.0, description="RC")
    tpf, rate = 10, 250e3
    dt = 1.0 / (rate * tpf)
    levels = np.array([[1.0, -1.0, 0.5], [0.25, 1.0, -0.75], [-1.0, 0.0, 1.0]] * 30)
    ticks = np.array([[3, 5, 2], [10, 0, 0], [1, 8, 1]] * 30, dtype=np.int64)
    wave = PulseWaveform(levels, ticks, tpf, rate)
    means, squares, _ = filter_waveform_power(rc, wave)
    assert np.array_equal(means, filter_waveform(rc, wave)[0])
    expected, y0 = [], 0.0
    for lv_row, tk_row in zip(levels, ticks, strict=True):
        total = 0.0
        for u, k in zip(lv_row, tk_row, strict=True):
            h, e = k * dt, y0 - u
            total += u * u * h + 2 * u * e * tau * -math.expm1(-h / tau)
            total += e * e * tau / 2 * -math.expm1(-2 * h / tau)
            y0 = u + e * math.exp(-h / tau)
        expected.append(total / (tpf * dt))
    np.testing.assert_allclose(squares, expected, rtol=0, atol=1e-12)


def test_carrier_ripple_power_equals_the_square_wave_fourier_series():
    """A 50 % two-level PWM is a +-V square wave at f_c: odd harmonics m of amplitude
    4 V / (pi m) (Fourier series, any signals text). In steady state the frame mean holds only
    the DC (zero) and the mean square the whole output, so the within-frame variance is the
    ripple power sum_m (4 V |H(m f_c)| / (pi m))^2 / 2 exactly; the sum over m < 2001 is
    checked to 1e-6 relative (the LC's tail beyond is below 1e-12 of it)."""
    filt = lc_filter(22e-6, 680e-9, 8.0)
    fc, volts = 384e3, 20.0
    wave, _, _ = pwm_waveform(np.zeros(3000), frame_rate_hz=fc, levels=3, supply_volts=volts)
    means, squares, _ = filter_waveform_power(filt, wave)
    ripple = np.mean(squares[2000:] - means[2000:] ** 2)
    m = np.arange(1, 2001, 2)
    expected = np.sum((4 * volts * np.abs(filt.response(m * fc)) / (np.pi * m)) ** 2) / 2
    assert ripple == pytest.approx(expected, rel=1e-6)


def test_mean_squares_on_fine_tick_grids_use_only_the_lengths_present(monkeypatch, rng):
    """As filter_waveform: above the full-table limit the matrices come for the lengths
    present; each expm is computed on its own matrix either way, so the numbers are the same."""
    filt = FILTERS["butter3"]
    wave = _pulse_train(rng, 200, 64)
    full = filter_waveform_power(filt, wave)
    monkeypatch.setattr(rec, "_FULL_TABLE_MAX", 8)
    sparse = filter_waveform_power(filt, wave)
    assert np.array_equal(full[0], sparse[0]) and np.array_equal(full[1], sparse[1])
    assert np.array_equal(full[0], filter_waveform(filt, wave)[0])
