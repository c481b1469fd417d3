"""The battery's measurement runs: one function per test, and the helpers they share.

Each ``_test_*`` function synthesizes its stimuli at the battery's audio rate, runs them through
the profile's whole chain (:func:`audiodsm.stages.chain.run_chain`) and measures the output with
:mod:`audiodsm.measure`, returning a dict of partial results.
:func:`audiodsm.evaluate.battery.run_battery` schedules them on worker threads and assembles
their results; the docstring of :mod:`audiodsm.evaluate.battery` describes what each test
measures.
"""

from __future__ import annotations

import math
import threading
from dataclasses import replace

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.measure.spectrum import NUMERIC_FLOOR_DBFS

_TEST_HZ = 997.0
_BAND = (20.0, 20000.0)
_WEIGHTINGS = ("unweighted", "a", "ccir")
#: Extra stimulus after each measured stretch, cut off again (see _chain_run).
_TAIL_S = 0.05
_FLOORED_METRICS = (
    "idle_noise_dbfs",
    "idle_noise_dbfs_a",
    "idle_noise_dbfs_ccir",
    "dc_offset_dbfs",
)
#: Bin spacing wanted for the spectrum at the modulator rate (the next power-of-two segment).
_SPECTRUM_RESOLUTION_HZ = 100.0
#: A tone more than this far from its level counts as lost (dead zone, limit cycle).
_LOST_DB = 3.0
#: Bin spacing wanted for the audio-band spectrum at the audio rate.
_AUDIO_RESOLUTION_HZ = 6.0
#: Lines weaker than this are rounding patterns of float64 arithmetic, not idle tones.
_LINE_FLOOR_DBFS = -200.0
#: A listening output whose peak exceeds full scale by more than this has clipped: a real
#: converter could not have produced it. (0.1 dB leaves room for the passband ripple of a
#: full-scale tone's path, a few hundredths of a dB.)
_CLIP_DB = 0.1


# ---------------------------------------------------------------------------------------------
# Small helpers
# ---------------------------------------------------------------------------------------------


def _db(x: float) -> float:
    return 20.0 * math.log10(x) if x > 0 else -math.inf


def _run_seed(profile_seed: int, seed: int, index: int) -> int:
    """An independent dither seed for run ``index`` (numpy SeedSequence mixing)."""
    ss = np.random.SeedSequence([int(profile_seed), int(seed), int(index)])
    return int(ss.generate_state(1, dtype=np.uint64)[0] >> np.uint64(1))


#: Modulator samples simulated by the run on this thread (see _take_modulator_samples).
_SIMULATED = threading.local()


def _count_modulator_samples(n: int) -> None:
    """Add ``n`` modulator samples (all channels) to this thread's count."""
    _SIMULATED.samples = getattr(_SIMULATED, "samples", 0) + int(n)


def _take_modulator_samples() -> int:
    """Read and reset the count of modulator samples simulated on this thread.

    Each battery run executes on one thread, so the battery reads the count of every run
    around its call: chain runs count their input frames (settling and tail included) times
    the OSR times the channels, and the state trace its samples.
    """
    n = getattr(_SIMULATED, "samples", 0)
    _SIMULATED.samples = 0
    return n


def _chain_run(profile, x, *, rate, keep=("listening",)):
    """Run ``x`` ((n,) or (n, channels)) through the chain with one thread per call.

    The caller's stimulus already runs ``_TAIL_S`` longer than the stretch to measure: the
    chain's linear-phase filters see past the end of the input, so its last milliseconds
    would carry the transient of the stimulus stopping. The listening output is returned
    without that tail. The last half of the tail fades out (raised cosine): a tone stopping
    abruptly near its peak rings up to about 13 % above its level in the upsampler's
    half-band cascade, which at -1 dBFS in a chain without headroom clips the quantizer (an
    overload of the stimulus's making, outside the measured stretch).
    """
    from audiodsm.stages.chain import run_chain

    x = np.array(x, dtype=float)
    fade = int(round(_TAIL_S * rate)) // 2
    if fade > 1 and len(x) > 2 * fade:
        taper = 0.5 * (1.0 + np.cos(np.pi * np.arange(1, fade + 1) / fade))
        x[len(x) - fade :] *= taper[:, None] if x.ndim == 2 else taper
    res = run_chain(profile, x, rate_hz=rate, keep=keep, listening_rate_hz=rate, threads=1)
    channels = x.shape[1] if x.ndim == 2 else 1
    osr = int(round(res.modulator_rate_hz / rate))
    _count_modulator_samples(x.shape[0] * osr * channels)
    if res.listening is not None:
        tail = int(round(_TAIL_S * rate))
        res = replace(res, listening=res.listening[: len(res.listening) - tail])
    return res


def _run_faults(stats, c, y=None):
    """Why channel ``c`` of a chain run cannot be read honestly (empty when it can).

    The loop overloaded (its guard acted), or the measured listening output ``y`` is not
    finite or went beyond full scale by more than ``_CLIP_DB`` (a converter would clip it).
    """
    faults = []
    n = int(stats.overload_count[c])
    if n:
        faults.append(
            f"loop overloaded ({n} overload samples: guard actions or quantizer clipping)"
        )
    if y is not None and len(y):
        if not np.all(np.isfinite(y)):
            faults.append("output not finite")
        else:
            peak = float(np.max(np.abs(y)))
            if peak > 10.0 ** (_CLIP_DB / 20.0):
                faults.append(f"output clipped (peak {_db(peak):+.2f} dB re full scale)")
    return faults


def _tone_came_out(tone_dbfs) -> str:
    """Plain words for the level a tone came out at, never a level below the numeric floor."""
    if tone_dbfs is None or not math.isfinite(tone_dbfs) or tone_dbfs < NUMERIC_FLOOR_DBFS:
        return f"no trace of it at the output, below the {NUMERIC_FLOOR_DBFS:g} dBFS numeric floor"
    return f"it came out at {tone_dbfs:.2f} dBFS"


def _linear_noise_floor(chain):
    """The band-limited noise (dBFS per weighting) the loop's linear model allows, or None.

    White quantization error of power ``step**2 / 12`` spread evenly over 0 .. fm/2, shaped
    by the NTF, integrated over 20 Hz .. 20 kHz with the weighting, referred to the chain
    input through its input scale. It is a lower bound on the noise of a loop whose
    quantization error stays busy: a single-bit loop, or a dithered one (dither adds to it).
    An undithered multi-level loop can idle on one level with almost no error, so it gets no
    floor (None) and only the numeric floor applies.

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", 2005,
       ch. 2 and 4 (linear model of the quantizer, in-band noise of the NTF).
    """
    from audiodsm.measure.weighting import weighting_power_gain

    mod = chain.modulator
    if mod.levels > 2 and mod.dither_lsb <= 0.0:
        return None
    fm = float(chain.modulator_rate_hz)
    f = np.linspace(_BAND[0], _BAND[1], 20001)
    ntf_power = np.abs(chain.ntf.response(f / fm)) ** 2
    scale = float(getattr(chain, "input_scale", 1.0) or 1.0)
    out = {}
    for w in _WEIGHTINGS:
        band = float(np.trapezoid(ntf_power * weighting_power_gain(f, w), f))
        power = mod.step**2 / 12.0 * band / (fm / 2.0) / scale**2
        out[w] = 10.0 * math.log10(power / 0.5)  # 0 dBFS: a full-scale sine, power 0.5
    return out


_GAIN_RUN_SAMPLES = 1 << 17  # modulator samples of the effective-gain fit (after settling)
_GAIN_SETTLE_SAMPLES = 1 << 12
_GAIN_LEVEL_DBFS = -60.0  # the level of the tone the density is measured under


def _effective_quantizer_gain(chain):
    """The single-bit quantizer's effective gain in the chain's loop (None for multi-level).

    A sign quantizer has no gain of its own, so the loop sets one; it is fitted by least
    squares (``design.quantizer_gain.least_squares_gain``) to the quantizer's input and output
    over a run of the chain's own modulator on the tone the density is measured under (997 Hz
    at -60 dBFS, times the chain's input scale), the first samples left out while the loop
    settles. A multi-level quantizer that does not clip has gain 1 by its step.
    """
    from audiodsm.design.quantizer_gain import least_squares_gain

    mod = chain.modulator
    if mod.levels != 2:
        return None
    fm = float(chain.modulator_rate_hz)
    scale = float(getattr(chain, "input_scale", 1.0) or 1.0)
    n = _GAIN_SETTLE_SAMPLES + _GAIN_RUN_SAMPLES
    tone = (
        10.0 ** (_GAIN_LEVEL_DBFS / 20.0)
        * scale
        * np.sin(2.0 * np.pi * _TEST_HZ / fm * np.arange(n))
    )
    y, v = mod.trace_quantizer_input(tone)
    return least_squares_gain(v[_GAIN_SETTLE_SAMPLES:], y[_GAIN_SETTLE_SAMPLES:])


def _predicted_noise_density(chain):
    """The output noise density the loop's linear model predicts, as a function of Hz.

    Returns ``(density, gain)``: ``density(freq_hz)`` is power per Hz (full-scale units
    squared per Hz, one-sided, referred to the chain input like every reading); ``gain`` the
    single-bit quantizer's effective gain (``QuantizerGain``) or None for a multi-level one.

    Multi-level: the quantizer error is white with power ``step**2 / 12``, the TPDF dither
    (peak ``dither_lsb`` steps, the sum of two uniform variables) adds
    ``(dither_lsb * step)**2 / 6``; both enter at the quantizer and leave through
    ``|NTF|**2``, spread over 0 .. fm/2. Single-bit: the quantizer is the effective gain ``k``
    plus a white error of the power the fit leaves (dither included), which leaves through
    the effective NTF ``NTF / (k + (1 - k) NTF)`` (``design.quantizer_gain.effective_ntf``).
    The semi-digital FIR and the analog filter shape it relative to their gain at 997 Hz (the
    calibration divides that out), and the chain's input scale refers it to the input.
    Output-stage effects (PWM) are not modelled.

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", 2005,
       ch. 2 (linear model: white error of power step^2/12 shaped by |NTF|^2) and ch. 4
       (effective gain of a single-bit quantizer).
    .. [2] S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy, "Quantization and Dither: A
       Theoretical Survey", J. Audio Eng. Soc. 40(5), 1992 (TPDF dither power).
    """
    from audiodsm.design.quantizer_gain import effective_ntf

    mod = chain.modulator
    fm = float(chain.modulator_rate_hz)
    step = float(mod.step)
    ntf = chain.ntf
    try:
        gain = _effective_quantizer_gain(chain)
        if gain is not None:
            ntf = effective_ntf(ntf, gain.gain)
    except ParameterError:  # a loop that overloads on the tone: no gain to model; unit gain
        gain = None
    if gain is None:
        power = step**2 / 12.0 + (float(mod.dither_lsb) * step) ** 2 / 6.0
    else:
        power = gain.error_power
    scale = float(getattr(chain, "input_scale", 1.0) or 1.0)
    fir, analog = getattr(chain, "fir", None), getattr(chain, "analog_filter", None)

    def shaping(f):
        g = np.ones_like(f)
        if fir is not None:
            g = g * np.abs(fir.response(f, frame_rate_hz=fm)) ** 2
        if analog is not None:
            g = g * np.abs(analog.response(f)) ** 2
        return g

    ref = float(shaping(np.array([_TEST_HZ]))[0])

    def density(freq_hz):
        f = np.asarray(freq_hz, dtype=float)
        ntf_power = np.abs(ntf.response(f / fm)) ** 2
        return power * ntf_power / (fm / 2.0) * shaping(f) / ref / scale**2

    return density, gain


def _meter(x, rate, frequency_hz, weightings, settle_s):
    """Band-limited residual readings (fundamental removed when ``frequency_hz`` is set).

    The first half of the settling time is cut off before the meter sees the signal, and the
    meter's own settling skips the second half. The cut keeps the stimulus's start transient
    out of the sine fits: a fit over a stretch that holds it is biased, and the bias would
    stay in the residual as a tone about 110 dB below the fundamental.
    """
    from audiodsm.measure.residual import (
        read_residual_meter,
        start_residual_meter,
        update_residual_meter,
    )

    cut = int(round(0.5 * settle_s * rate))
    x = x[cut:]
    settle_s = settle_s - cut / rate
    st = start_residual_meter(
        rate_hz=rate,
        frequency_hz=frequency_hz,
        weightings=weightings,
        upper_hz=_BAND[1],
        lower_hz=_BAND[0],
        segment_s=0.5,
        settle_s=settle_s,
    )
    return read_residual_meter(update_residual_meter(np.ascontiguousarray(x), st))


def _tone(level_dbfs, rate, seconds):
    from audiodsm.signals import sine

    return sine(_TEST_HZ, level_dbfs, rate_hz=rate, duration_s=seconds)


def _lines(x, rate, *, false_alarm, exclude_hz=()):
    """Idle-tone search on one capture: (strongest line level or None, its Hz, limit dBFS).

    Lines within three main lobes of a frequency in ``exclude_hz`` (the test tone's harmonics)
    are not idle tones and are left out, and so are lines below ``_LINE_FLOOR_DBFS`` (patterns
    of float64 rounding in an output that is digitally silent). The detection limit is the
    weakest line the detector would report anywhere in the band, about (threshold - 1) x local
    floor x ENBW in bins, and no lower than that floor.
    """
    from audiodsm.measure.idle_tones import find_idle_tones, line_spectrum

    spec = line_spectrum(x, rate_hz=rate)
    res = find_idle_tones(spec, false_alarm=false_alarm, band_hz=_BAND)
    bin_hz = float(spec.freq_hz[1] - spec.freq_hz[0])
    enbw_bins = float(spec.enbw_hz) / bin_hz
    guard = 3.0 * max(enbw_bins, 2.0) * bin_hz
    kept = [
        t
        for t in res.tones
        if t.level_dbfs > _LINE_FLOOR_DBFS
        and not any(abs(t.frequency_hz - f) <= guard for f in exclude_hz)
    ]
    band = (res.freq_hz >= _BAND[0]) & (res.freq_hz <= _BAND[1])
    t_lin = 10.0 ** (res.threshold_db / 10.0)
    floor = 10.0 ** (res.floor_dbfs[band] / 10.0)
    reportable = (t_lin - 1.0) * floor * enbw_bins
    limit = max(10.0 * math.log10(float(np.max(reportable))), _LINE_FLOOR_DBFS)
    # the weakest line the detector reports where the floor is lowest: no found line is
    # weaker than this (the plots draw it, so a found line never sits under its limit)
    weakest = max(10.0 * math.log10(float(np.min(reportable))), _LINE_FLOOR_DBFS)
    if kept:
        best = max(kept, key=lambda t: t.level_dbfs)
        return best.level_dbfs, best.frequency_hz, limit, weakest
    return None, None, limit, weakest


def _remove_fundamental(x, rate, settle):
    """The capture after ``settle`` frames with a 3-parameter 997 Hz fit removed."""
    from audiodsm.measure.sine_fit import fit_sine

    seg = np.ascontiguousarray(x[settle:])
    return fit_sine(seg, rate_hz=rate, frequency_hz=_TEST_HZ, four_parameter=False).residual


def _coherent_amplitudes(y, bins):
    """Sine amplitudes at exact DFT bins of ``y`` (rectangular window, coherent sampling).

    With a whole number of cycles in the record, the DFT bin of a sine holds exactly its
    amplitude times ``len(y)/2``; it equals a least-squares sine fit at that frequency.
    """
    spec = np.fft.rfft(y - y.mean())
    return 2.0 * np.abs(spec[np.asarray(bins)]) / len(y)


# ---------------------------------------------------------------------------------------------
# The tests. Each returns a dict of partial results; they run in worker threads.
# ---------------------------------------------------------------------------------------------


def _test_dynamic_range(ctx, profile):
    from audiodsm.measure.spectrum import averaged_spectrum, power_to_dbfs

    plan, rate = ctx.plan, ctx.rate
    x = _tone(-60.0, rate, plan.settle_s + plan.tone_s + _TAIL_S)
    res = _chain_run(profile, x, rate=rate, keep=("listening", "analog", "modulator"))
    y = res.listening[:, 0]
    r = _meter(y, rate, _TEST_HZ, _WEIGHTINGS, plan.settle_s)
    out = {"stats": [(res.stats, 0, 10 ** (-60 / 20))]}
    notes = [
        f"dynamic range: -60 dBFS 997 Hz, {plan.tone_s:g} s after {plan.settle_s:g} s "
        f"settling, 20 Hz..20 kHz, fundamental removed by 3-parameter fits over 0.5 s segments"
    ]
    faults = _run_faults(res.stats, 0, y[int(round(plan.settle_s * rate)) :])
    dr_names = [f"dynamic_range_db{name}" for name in ("", "_a", "_ccir")]
    if r.fundamental_dbfs is not None and abs(r.fundamental_dbfs + 60.0) <= 1.0:
        for k, name in zip(_WEIGHTINGS, dr_names, strict=True):
            out[name] = -r.noise_dbfs[k]
    else:
        for name in dr_names:
            out[name] = None
        faults.append("the -60 dBFS tone was lost: " + _tone_came_out(r.fundamental_dbfs))
        notes.append(
            "dynamic range: the -60 dBFS tone did not come out within 1 dB ("
            + _tone_came_out(r.fundamental_dbfs)
            + "), so no dynamic range is given"
        )
    out["invalid"] = {k: "; ".join(faults) for k in (*dr_names, "out_of_band_noise_dbfs")}
    if not faults:
        out["invalid"] = {}
    fm = res.modulator_rate_hz
    a = res.analog[:, 0]
    skip = int(round((plan.settle_s + res.latency_s) * fm))
    a = a[min(skip, len(a) // 2) :]
    upper = min(plan.out_of_band_upper_hz, fm / 2)
    # One averaged spectrum (Welch, 4-term Blackman-Harris) serves the out-of-band power and
    # the spectrum curve; its band power is what measure.noise.out_of_band_power_dbfs reads.
    spec = averaged_spectrum(a, rate_hz=fm, resolution_hz=_SPECTRUM_RESOLUTION_HZ)
    out["out_of_band_noise_dbfs"] = spec.band_noise_dbfs(_BAND[1], upper)
    # the ripple inside the frames (above the frame rate: a PWM carrier and its sidebands),
    # exact from the filter's mean square over every frame, in full-scale units
    ripple = float(res.stats.ripple_rms()[0]) / res.gain
    out["carrier_ripple_dbfs"] = _db(ripple * math.sqrt(2.0)) if ripple > 0 else -math.inf
    notes.append(
        f"out-of-band noise: reconstructed output at {fm / 1e6:g} MHz during the -60 dBFS "
        f"tone, {_BAND[1] / 1e3:g} kHz..{upper / 1e3:g} kHz, {spec.resolution_hz:.0f} Hz bins; "
        "carrier ripple: the output's power inside each frame beyond the frame mean, over the "
        "whole run"
    )
    jitter, step_rms, why = _jitter_sensitivity(profile, res, rate, plan.settle_s)
    out["jitter_noise_dbfs_at_1ps"] = jitter
    out["output_step_rms_fs"] = step_rms
    if why:
        out["invalid"] = {
            **out["invalid"],
            "jitter_noise_dbfs_at_1ps": why,
            "output_step_rms_fs": why,
        }
    from audiodsm.evaluate.battery_impairments import ANALOG_NOISE_METRICS, analog_noise_floor

    floor = analog_noise_floor(profile, res.gain)
    out.update({k: None for k in ANALOG_NOISE_METRICS} if floor is None else floor)
    out["curve_spectrum"] = {
        "frequency_hz": spec.freq_hz,
        "level_dbfs": spec.bins_dbfs(),
        "density_dbfs_per_hz": power_to_dbfs(spec.power / spec.resolution_hz),
        "resolution_hz": np.array([spec.resolution_hz]),
        "out_of_band_hz": np.array([_BAND[1], upper]),
    }
    # the audio band in fine bins, from the listening output (the -60 dBFS tone stays in)
    fine = averaged_spectrum(
        y[int(round(plan.settle_s * rate)) :], rate_hz=rate, resolution_hz=_AUDIO_RESOLUTION_HZ
    )
    out["curve_audio_spectrum"] = {
        "frequency_hz": fine.freq_hz,
        "level_dbfs": fine.bins_dbfs(),
        "density_dbfs_per_hz": power_to_dbfs(fine.power / fine.resolution_hz),
        "resolution_hz": np.array([fine.resolution_hz]),
    }
    out["notes"] = notes
    return out


def _jitter_sensitivity(profile, res, rate, settle_s):
    """The in-band noise 1 ps rms of white jitter on the output edges would add (dBFS).

    Textbook estimate (Schreier & Temes 2005, clock jitter of continuous-time DACs; Cherry &
    Snelgrove 1999; checked against the jitter stage in tests/test_jitter.py): ``(sigma
    f_m)^2 E[(y[n] - y[n-1])^2]`` spread evenly over the Nyquist band, ``2 B / f_m`` of it in
    the band ``B``; referred to the listening full scale through the chain's calibration.
    PWM: every edge of the PWM waveform (without dead time) adds its own independent error,
    so ``E[(y[n] - y[n-1])^2]`` becomes the mean over frames of the sum of a frame's squared
    edge steps (derivation in tests/test_edges.py, checked against the jitter stage there);
    with return to zero, two edges a frame of the held level each: ``2 E[y^2]``.

    Returns
    -------
    (float or None, float or None, str)
        The level, the rms step between successive output samples (listening full-scale
        units; the jitter noise goes with its square), and why they are missing (empty when
        they are not).
    """
    from audiodsm.stages.chain import Chain

    chain = Chain.from_profile(profile, rate, 1, threads=1)
    fm = res.modulator_rate_hz
    m = res.modulator[:, 0]
    m = m[min(int(round(settle_s * fm)), m.size // 2) :]
    if profile.output.kind == "pwm":  # every edge inside the frames, in volts
        wf, _, _ = chain._waveform(m, None)
        steps = np.diff(wf.levels[wf.ticks > 0]) / chain.gain  # listening full-scale units
        mean_square = float(np.sum(steps * steps)) / max(m.size, 1)
    elif profile.impairments.return_to_zero:  # two edges a frame, each the held level
        held = m * (2.0 * chain.stage_gain / chain.gain)  # RZ halves the mean, not the level
        mean_square = 2.0 * float(np.mean(held * held))
    else:
        steps = np.diff(m) * (chain.stage_gain / chain.gain)  # listening full-scale units
        mean_square = float(np.mean(steps * steps))
    power = (1e-12 * fm) ** 2 * mean_square * 2.0 * _BAND[1] / fm
    level = 10.0 * math.log10(power / 0.5) if power > 0 else -math.inf
    return level, math.sqrt(mean_square), ""


def _test_level_sweep(ctx, profile, levels):
    plan, rate = ctx.plan, ctx.rate
    seconds = plan.settle_s + plan.sweep_s + _TAIL_S
    x = np.stack([_tone(lv, rate, seconds) for lv in levels], axis=1)
    res = _chain_run(profile, x, rate=rate)
    settle = int(round(plan.settle_s * rate))
    points = []
    for c, lv in enumerate(levels):
        y = res.listening[:, c]
        r = _meter(y, rate, _TEST_HZ, ("unweighted", "a"), plan.settle_s)
        point = {
            "level_dbfs": lv,
            "tone_dbfs": r.fundamental_dbfs,
            "thd_n_db": r.thd_n_db["unweighted"],
            "thd_n_db_a": r.thd_n_db["a"],
            "noise_dbfs": r.noise_dbfs["unweighted"],
            "noise_dbfs_a": r.noise_dbfs["a"],
            "noise_clear_dbfs_a": _clear_noise(y[settle:], rate),
            "overload_count": int(res.stats.overload_count[c]),
            "faults": _run_faults(res.stats, c, y[settle:]),
        }
        if lv <= -60.0:
            resid = _remove_fundamental(y, rate, settle)
            harmonics = [k * _TEST_HZ for k in range(1, 21)]
            point["lines"] = _lines(resid, rate, false_alarm=ctx.false_alarm, exclude_hz=harmonics)
        points.append(point)
    stats = [(res.stats, c, 10 ** (lv / 20)) for c, lv in enumerate(levels)]
    return {"sweep": points, "stats": stats}


def _clear_noise(y, rate):
    """A-weighted noise between the 997 Hz tone's harmonics (noise modulation), or None."""
    from audiodsm.measure.noise import noise_clear_of_harmonics

    if not np.all(np.isfinite(y)):
        return None
    return noise_clear_of_harmonics(
        y, rate_hz=rate, frequency_hz=_TEST_HZ, weighting="a"
    ).noise_dbfs


def _test_idle(ctx, profile):
    plan, rate = ctx.plan, ctx.rate
    n = int(round((plan.settle_s + plan.silence_s + _TAIL_S) * rate))
    res = _chain_run(profile, np.zeros(n), rate=rate)
    y = res.listening[:, 0]
    r = _meter(y, rate, None, _WEIGHTINGS, plan.settle_s)
    settle = int(round(plan.settle_s * rate))
    # the DC the output really carries: the chain's calibration removes only the static
    # offset of the output stage without dead time, so an offset from dead time (or anything
    # else in the product) stays in; AES17 dBFS of a constant: 20 log10(|dc| sqrt(2))
    dc = float(np.mean(y[settle:]))
    faults = "; ".join(_run_faults(res.stats, 0, y[settle:]))
    out = {
        "invalid": {k: faults for k in (*_FLOORED_METRICS, "switching_rate_hz", "dc_offset_fs")}
        if faults
        else {},
        "silence_faults": faults,
        "dc_offset_dbfs": 20.0 * math.log10(abs(dc) * math.sqrt(2.0)) if dc else -math.inf,
        "dc_offset_fs": dc,
        "idle_noise_dbfs": r.noise_dbfs["unweighted"],
        "idle_noise_dbfs_a": r.noise_dbfs["a"],
        "idle_noise_dbfs_ccir": r.noise_dbfs["ccir"],
        "switching_rate_hz": float(res.stats.switching_rate_hz(rate)[0]),
        "silence_lines": _lines(y[settle:], rate, false_alarm=ctx.false_alarm),
        "stats": [(res.stats, 0, 0.0)],
        "notes": [
            f"idle: {plan.silence_s:g} s of digital silence after {plan.settle_s:g} s settling"
        ],
    }
    return out


def _test_dc(ctx, profile, offsets):
    plan, rate = ctx.plan, ctx.rate
    n = int(round((plan.settle_s + plan.dc_s + _TAIL_S) * rate))
    x = np.ones((n, len(offsets))) * np.asarray(offsets)[None, :]
    res = _chain_run(profile, x, rate=rate)
    settle = int(round(plan.settle_s * rate))
    found = []
    for c, off in enumerate(offsets):
        y = res.listening[settle:, c]
        found.append(
            (
                off,
                _lines(y - y.mean(), rate, false_alarm=ctx.false_alarm),
                "; ".join(_run_faults(res.stats, c, y)),
            )
        )
    stats = [(res.stats, c, abs(off)) for c, off in enumerate(offsets)]
    return {"dc": found, "stats": stats}


def _test_stability(ctx, profile):
    from audiodsm.stages.chain import Chain

    plan = ctx.plan
    chain = Chain.from_profile(profile, ctx.rate, 1, listening_rate_hz=ctx.rate, threads=1)
    from audiodsm.stages.modulator import STABILITY_RUN_SAMPLES

    scaling = getattr(chain, "state_scaling_probe", None)
    if (
        scaling is not None
        and scaling.stable_amplitude > 0
        and plan.stability_samples == STABILITY_RUN_SAMPLES
    ):
        # the search the state scaling was built from (same loop, same long runs; its state
        # peaks are the scaled loop's): one result for both
        limit = scaling
    else:
        limit = chain.modulator.probe_stability(osr=chain.osr, run_samples=plan.stability_samples)
    # the chain scales its input by input_scale before the loop (headroom the calibration
    # divides out again), so an amplitude at the loop is amplitude / input_scale at the input
    scale = float(getattr(chain, "input_scale", 1.0) or 1.0)
    freqs = ", ".join(f"{f * chain.modulator_rate_hz:.0f}" for f in limit.test_frequencies)
    out = {
        "msa": float(limit.stable_amplitude) / scale,
        "msa_modulator": float(limit.stable_amplitude),
        "input_scale": scale,
        "msa_state_peak": np.asarray(limit.state_peaks, dtype=float),
        "ntf": chain.ntf,
        "modulator_rate_hz": float(chain.modulator_rate_hz),
        "noise_floor": _linear_noise_floor(chain),
        "noise_density": _predicted_noise_density(chain),  # (density, effective gain)
        "notes": [
            f"stability: slow ramps then fixed-level runs of {plan.stability_samples} modulator "
            f"samples at {freqs} Hz, each run with its own dither seed, the lowest limit kept; "
            "stable = no overload (guard action or multi-level quantizer clipping) and in-band "
            "SQNR within 6 dB of the linear extrapolation; "
            f"the loop's own limit {limit.stable_amplitude:.4f} of its full scale, divided by the "
            f"chain's input scale {scale:g} to refer it to the chain input"
        ],
    }
    out["curve_stability"] = {
        "loop_amplitude": np.array([float(limit.stable_amplitude)]),
        "input_scale": np.array([scale]),
        "state_peak": np.asarray(limit.state_peaks, dtype=float),
        "sqnr_db": np.array([float(limit.sqnr_db)]),
    }
    if limit.stable_amplitude > 0:
        n = plan.histogram_samples
        t = np.arange(n)
        x = limit.stable_amplitude * np.sin(2 * np.pi * _TEST_HZ / chain.modulator_rate_hz * t)
        _, states = chain.modulator.trace_states(x)
        _count_modulator_samples(n)
        states = np.asarray(states, dtype=float).reshape(n, -1)
        edges, counts = [], []
        for k in range(states.shape[1]):
            top = float(np.max(np.abs(states[:, k]))) or 1.0
            e = np.linspace(-top, top, plan.histogram_bins + 1)
            h, _ = np.histogram(states[:, k], bins=e)
            edges.append(e)
            counts.append(h)
        out["curve_state_histograms"] = {
            "edges": np.array(edges),
            "counts": np.array(counts),
            "peak": np.max(np.abs(states), axis=0),
            "amplitude": np.array([limit.stable_amplitude]),
            "state_bound": np.array([float(chain.modulator.state_bound)]),
        }
    return out


def _test_overload(ctx, profile, levels):
    plan, rate = ctx.plan, ctx.rate
    if not levels:
        return {"overload": []}
    seconds = plan.settle_s + plan.sweep_s + _TAIL_S
    x = np.stack([_tone(lv, rate, seconds) for lv in levels], axis=1)
    res = _chain_run(profile, x, rate=rate)
    points = []
    for c, lv in enumerate(levels):
        r = _meter(res.listening[:, c], rate, _TEST_HZ, ("unweighted",), plan.settle_s)
        points.append(
            {
                "level_dbfs": lv,
                "tone_dbfs": r.fundamental_dbfs,
                "thd_n_db": r.thd_n_db["unweighted"],
                "overload_count": int(res.stats.overload_count[c]),
            }
        )
    stats = [(res.stats, c, 10 ** (lv / 20)) for c, lv in enumerate(levels)]
    return {"overload": points, "stats": stats, "probe_stats": True}


def _response_frequencies():
    """1/3-octave centres 20 Hz .. 20 kHz (exact base-10, IEC 61260-1) plus 997 Hz."""
    # 1 kHz itself gives way to the 997 Hz reference, 3 Hz away
    centres = [1000.0 * 10.0 ** (k / 10.0) for k in range(-17, 14) if k != 0]
    return sorted({*(round(f, 6) for f in centres), _TEST_HZ, 20000.0})


def _test_response(ctx, profile):
    from audiodsm.measure.response import frequency_response
    from audiodsm.signals import multitone

    plan, rate = ctx.plan, ctx.rate
    freqs = _response_frequencies()
    seconds = plan.settle_s + plan.response_s + _TAIL_S
    x = multitone(freqs, plan.response_level_dbfs, rate_hz=rate, duration_s=seconds)
    res = _chain_run(profile, x, rate=rate)
    fr = frequency_response(
        res.listening[:, 0],
        rate_hz=rate,
        frequencies_hz=freqs,
        settle_s=plan.settle_s,
        lower_hz=_BAND[0],
        upper_hz=_BAND[1],
    )
    faults = _run_faults(res.stats, 0, res.listening[int(round(plan.settle_s * rate)) :, 0])
    return {
        "invalid": {"passband_ripple_db": "; ".join(faults)} if faults else {},
        "passband_ripple_db": fr.ripple_db,
        "curve_frequency_response": {
            "frequency_hz": np.array(fr.frequency_hz),
            "gain_db": np.array(fr.gain_db),
        },
        "stats": [(res.stats, 0, 10 ** (plan.response_level_dbfs / 20))],
        "notes": [
            f"frequency response: {len(freqs)}-tone Schroeder multitone at "
            f"{plan.response_level_dbfs:g} dBFS peak, {plan.response_s:g} s, joint "
            "least-squares fit of every tone, relative to 997 Hz"
        ],
    }


def _test_frequency_sweep(ctx, profile, tones):
    """THD+N of single tones ``tones`` [(level_dbfs, frequency_hz), ...], one channel each."""
    from audiodsm.signals import sine

    plan, rate = ctx.plan, ctx.rate
    seconds = plan.settle_s + plan.frequency_sweep_s + _TAIL_S
    x = np.stack([sine(f, lv, rate_hz=rate, duration_s=seconds) for lv, f in tones], axis=1)
    res = _chain_run(profile, x, rate=rate)
    settle = int(round(plan.settle_s * rate))
    points = []
    for c, (lv, f) in enumerate(tones):
        y = res.listening[:, c]
        r = _meter(y, rate, f, ("unweighted",), plan.settle_s)
        faults = _run_faults(res.stats, c, y[settle:])
        tone = r.fundamental_dbfs
        if tone is None or not math.isfinite(tone) or abs(tone - lv) > _LOST_DB:
            faults.append(f"{f:g} Hz tone at {lv:g} dBFS lost: " + _tone_came_out(tone))
        # the ratio is taken to the fitted tone, not to the band-limited total the meter's
        # thd_n_db uses: the band's 20 Hz edge takes 3 dB off a 20 Hz tone (AES17 band
        # filter), which would read as 3 dB more THD+N at the bottom of the sweep
        ok = tone is not None and math.isfinite(tone)
        points.append(
            {"level_dbfs": lv, "frequency_hz": f, "reason": "; ".join(faults),
             "thd_n_db": r.noise_dbfs["unweighted"] - tone if ok else None}
        )  # fmt: skip
    stats = [(res.stats, c, 10 ** (lv / 20)) for c, (lv, _) in enumerate(tones)]
    return {"frequency_sweep": points, "stats": stats}


def _test_images(ctx, profile):
    from audiodsm.signals import sine

    plan, rate = ctx.plan, ctx.rate
    f = float(plan.image_tone_hz)
    level = plan.composite_level_dbfs
    x = sine(f, level, rate_hz=rate, duration_s=plan.settle_s + plan.image_s + _TAIL_S)
    res = _chain_run(profile, x, rate=rate, keep=("analog",))
    fm = res.modulator_rate_hz
    a = res.analog[:, 0]
    skip = int(round((plan.settle_s + res.latency_s) * fm))
    a = a[min(skip, len(a) // 2) :]
    image = rate - f
    # a record holding whole cycles of the tone and of its image: both on exact DFT bins
    cycle = int(round(fm)) // math.gcd(int(round(fm)), int(f), int(image))
    a = a[: (len(a) // cycle) * cycle]
    span = len(a) / fm
    k_tone, k_image = int(round(f * span)), int(round(image * span))
    # noise readings on bins beside the image: uncorrelated with it and with each other
    neighbours = [k_image + d for d in (-9, -7, -5, 5, 7, 9)]
    amps = _coherent_amplitudes(a, [k_tone, k_image, *neighbours])
    tone, img, noise = amps[0], amps[1], float(np.sqrt(np.mean(amps[2:] ** 2)))
    # an image reading within 3x the rms noise reading is indistinguishable from noise
    limited = bool(img < 3.0 * noise)
    rejection = _db(tone) - _db(max(img, 3.0 * noise) if limited else img)
    faults = "; ".join(_run_faults(res.stats, 0))
    return {
        "invalid": {k: faults for k in ("image_rejection_db", "image_rejection_noise_limited")}
        if faults
        else {},
        "image_rejection_db": rejection,
        "image_rejection_noise_limited": limited,
        "stats": [(res.stats, 0, 10 ** (level / 20))],
        "notes": [
            f"images: {f:g} Hz at {level:g} dBFS, image at {image:g} Hz read on the "
            f"reconstructed output at {fm / 1e6:g} MHz over {span:.2f} s (fit bandwidth "
            f"{1 / span:.1f} Hz)"
            + (
                "; the image lies below the noise, so the rejection is a lower bound"
                if limited
                else ""
            )  # fmt: skip
        ],
    }


def _test_imd(ctx, profile):
    from audiodsm.measure.intermod import imd_difference_frequency, imd_smpte
    from audiodsm.signals import twin_tone_difference, twin_tone_smpte

    plan, rate = ctx.plan, ctx.rate
    level = plan.composite_level_dbfs
    seconds = plan.settle_s + plan.imd_s + _TAIL_S
    x = np.stack(
        [
            twin_tone_smpte(level, rate_hz=rate, duration_s=seconds),
            twin_tone_difference(level, rate_hz=rate, duration_s=seconds),
        ],
        axis=1,
    )
    res = _chain_run(profile, x, rate=rate)
    smpte = imd_smpte(res.listening[:, 0], rate_hz=rate, settle_s=plan.settle_s)
    diff = imd_difference_frequency(res.listening[:, 1], rate_hz=rate, settle_s=plan.settle_s)
    peak = 10 ** (level / 20)
    settle = int(round(plan.settle_s * rate))
    invalid = {}
    for c, name in enumerate(("imd_smpte_db", "imd_difference_db")):
        faults = _run_faults(res.stats, c, res.listening[settle:, c])
        if faults:
            invalid[name] = "; ".join(faults)
    return {
        "invalid": invalid,
        "imd_smpte_db": smpte.ratio_db,
        "imd_difference_db": diff.ratio_db,
        "stats": [(res.stats, 0, peak), (res.stats, 1, peak)],
        "notes": [
            f"intermodulation: twin tones at {level:g} dBFS combined peak, {plan.imd_s:g} s; "
            + smpte.convention
        ],
    }


#: The class-D stage's readings (test ``class_d_stage``): metric names in their order.
_CLASS_D_METRICS = (
    "supply_ripple_sideband_db",
    "output_peak_volts",
    "load_current_peak_amperes",
    "inductor_current_peak_amperes",
    "switch_conduction_watts",
    "load_power_watts",
)
#: Level of the class-D stage's test tone (997 Hz), dBFS.
_CLASS_D_LEVEL_DBFS = -1.0
#: Tone periods the volts, amperes and watts are read over, and the filter's run-in before.
_CLASS_D_PERIODS = 20
_CLASS_D_RUN_IN_S = 0.02


def _sideband_levels(y, rate, tone_hz, ripple_hz):
    """Levels (dB re the tone) of the supply ripple's sidebands at ``|f - f_r|`` and ``f + f_r``.

    One least-squares fit of a constant and a sine and cosine at the tone and at each in-band
    sideband (known frequencies: the linear form of the IEEE 1057 sine fit).
    """
    freqs = [tone_hz] + [
        f for f in (abs(tone_hz - ripple_hz), tone_hz + ripple_hz) if _BAND[0] <= f <= _BAND[1]
    ]
    if len(freqs) == 1:
        return []
    t = np.arange(y.size) / rate
    cols = [np.ones_like(t)]
    for f in freqs:
        cols += [np.sin(2 * np.pi * f * t), np.cos(2 * np.pi * f * t)]
    coef, *_ = np.linalg.lstsq(np.column_stack(cols), y, rcond=None)
    amps = np.hypot(coef[1::2], coef[2::2])
    return [20.0 * math.log10(max(a, 1e-300) / amps[0]) for a in amps[1:]]


def _test_class_d_stage(ctx, profile):
    """Supply rejection and the stage's volts, amperes and watts at -1 dBFS, 997 Hz.

    The supply ripple's sidebands are read on the listening output (the whole chain, dead
    time included); the volts, amperes and watts from the modulator output run once more
    through the PWM stage without dead time and the LC filter with its load and switches
    (:func:`audiodsm.stages.power_stage.class_d_readings`).
    """
    plan, rate = ctx.plan, ctx.rate
    out = dict.fromkeys(_CLASS_D_METRICS)
    invalid = {}
    if profile.output.kind != "pwm":
        why = "applies to a class-D (PWM) stage"
        return {**out, "invalid": dict.fromkeys(_CLASS_D_METRICS, why)}
    imp = profile.impairments
    read_s = _CLASS_D_PERIODS / _TEST_HZ
    seconds = plan.settle_s + max(plan.sweep_s, read_s) + _TAIL_S
    x = _tone(_CLASS_D_LEVEL_DBFS, rate, seconds)
    res = _chain_run(profile, x, rate=rate, keep=("listening", "modulator"))
    notes = []
    settle = int(round(plan.settle_s * rate))
    if imp.supply_ripple > 0.0:
        levels = _sideband_levels(res.listening[settle:, 0], rate, _TEST_HZ, imp.supply_ripple_hz)
        if levels:
            out["supply_ripple_sideband_db"] = max(levels)
            notes.append(
                f"supply rejection: {_CLASS_D_LEVEL_DBFS:g} dBFS {_TEST_HZ:g} Hz with the "
                f"profile's supply ripple ({imp.supply_ripple:g} at {imp.supply_ripple_hz:g} "
                "Hz); the stronger in-band sideband at f +- f_ripple re the tone, by a "
                "least-squares fit at the three frequencies"
            )
        else:
            invalid["supply_ripple_sideband_db"] = "no ripple sideband falls in the audio band"
    else:
        invalid["supply_ripple_sideband_db"] = "the profile has no supply ripple"
    power_names = _CLASS_D_METRICS[1:]
    if profile.reconstruction.kind != "lc":
        why = "needs an LC filter (reconstruction.kind = 'lc'): the load is not modelled"
        invalid.update(dict.fromkeys(power_names, why))
    else:
        r = _class_d_power(profile, res, plan.settle_s, read_s)
        out.update(
            output_peak_volts=r.output_peak_volts,
            load_current_peak_amperes=r.load_current_peak_amperes,
            inductor_current_peak_amperes=r.inductor_current_peak_amperes,
            switch_conduction_watts=r.switch_conduction_watts,
            load_power_watts=r.load_power_watts,
        )
        extra = ""
        if profile.output.dead_time_ticks > 0:
            extra = "; read on the stage without dead time"
        notes.append(
            f"class-D volts, amperes, watts: {_CLASS_D_LEVEL_DBFS:g} dBFS {_TEST_HZ:g} Hz, "
            f"{r.seconds * 1e3:.1f} ms ({_CLASS_D_PERIODS} periods) after "
            f"{plan.settle_s:g} s; peaks at every switching instant, conduction loss "
            f"(I^2 R in the switches) and load power as exact averages{extra}"
        )
    return {**out, "invalid": invalid, "notes": notes}


def _class_d_power(profile, res, settle_s, read_s):
    """The chain run's modulator output through the power stage: :class:`ClassDReadings`."""
    from audiodsm.stages import output_stage as out_mod
    from audiodsm.stages.chain_build import _power_stage_filter, pwm_keywords
    from audiodsm.stages.power_stage import class_d_readings, segment_switch_states
    from audiodsm.stages.supply import apply_supply_ripple

    imp = profile.impairments
    fm = res.modulator_rate_hz
    first = max(0, int(round((settle_s - _CLASS_D_RUN_IN_S) * fm)))
    run_in = int(round(settle_s * fm)) - first
    y = np.ascontiguousarray(res.modulator[first : first + run_in + int(round(read_s * fm)), 0])
    settings = pwm_keywords(profile)
    wf, _, _ = out_mod.pwm_waveform(y, frame_rate_hz=fm, **settings)
    if imp.supply_ripple > 0.0:
        wf = apply_supply_ripple(
            wf, ripple=imp.supply_ripple, ripple_hz=imp.supply_ripple_hz, first_frame=first
        )
    configs = segment_switch_states(wf, out_mod.pwm_switching_plan(y, fm, **settings))
    return class_d_readings(_power_stage_filter(profile), wf, configs, skip_frames=run_in)
