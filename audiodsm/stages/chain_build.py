"""Stage construction for the chain: a profile's settings become stage objects.

The chain driver (:mod:`audiodsm.stages.chain`) calls these builders when a :class:`Chain
<audiodsm.stages.chain.Chain>` is made: the NTF designed or read from the profile, the loop
realized and its states scaled (cached per setting), the output stage's waveform function, the
analog reconstruction filter, the input scale a profile gets when it leaves ``input_scale`` at
0, and the loop's signal transfer for the error-only path.
"""

from __future__ import annotations

import contextlib
import functools
import math

import numpy as np

from audiodsm.errors import ParameterError, ProfileError
from audiodsm.profile import AUDIO_RATES_HZ, ChainProfile

__all__ = ["auto_input_scale", "no_overload_input_bound"]


# ---------------------------------------------------------------------------------------------
# Stage construction from a profile
# ---------------------------------------------------------------------------------------------


def _build_ntf(mod):
    """The NTF a profile gives by its zeros and poles (checked by the design library)."""
    from audiodsm.design.ntf import NoiseTransfer

    return NoiseTransfer.from_roots(zeros=np.array(mod.zeros), poles=np.array(mod.poles))


@contextlib.contextmanager
def _settings_of(profile: ChainProfile, section: str):
    """Turn a stage's ParameterError into a ProfileError naming the profile and section."""
    try:
        yield
    except ParameterError as exc:
        raise ProfileError(f"profile {profile.name!r}", section, str(exc)) from None


@functools.lru_cache(maxsize=64)
def _designed_ntf(order, osr, out_of_band_gain, zero_layout, zero_band_edge=None):
    """NoiseTransfer.designed, remembered in this process and on disk (stages/loop_cache.py)."""
    from audiodsm.design.ntf import NoiseTransfer
    from audiodsm.stages import loop_cache

    key = (int(order), float(osr), float(out_of_band_gain), str(zero_layout))
    if zero_band_edge is not None:
        key += (float(zero_band_edge),)
    ntf = loop_cache.load("ntf", key)
    if not isinstance(ntf, NoiseTransfer):
        ntf = NoiseTransfer.designed(
            order,
            osr=osr,
            out_of_band_gain=out_of_band_gain,
            zero_layout=zero_layout,
            zero_band_edge=zero_band_edge,
        )
        loop_cache.store("ntf", key, ntf)
    return ntf


def _zero_band_edge(edge_hz, rate_hz, modulator_rate_hz):
    """The spread zeros' band edge in cycles per modulator sample (None: the whole audio band).

    The profile's edge is capped at half the input rate; at the cap the design's own default
    (0.5/osr) is used, so such a chain designs exactly what it did before the key existed.
    """
    if edge_hz >= 0.5 * rate_hz:
        return None
    return float(edge_hz) / float(modulator_rate_hz)


_SCALED_LOOPS: dict = {}
_SCALED_LOOPS_MAX = 64


def _scaled_loop(ntf, mod_kwargs, osr, mode, bound):
    """The loop the chain runs: ``ntf`` realized, its states scaled as the profile asks.

    Scaling simulates (a stability search and one check run, see
    :meth:`~audiodsm.stages.modulator.Modulator.with_scaled_states`), so results are remembered
    per process and on disk (:mod:`audiodsm.stages.loop_cache`), keyed by the NTF's values and
    every setting that enters the simulation; the runs are deterministic, so a remembered
    result equals a fresh one. The search runs the unscaled
    loop with the modulator's default guard bounds (the profile's ``state_bound`` is meant for
    the scaled states). A loop with no stable amplitude at all is left unscaled.

    Returns
    -------
    loop : LoopRealization or NoiseTransfer
        What to build the chain's Modulator from (the NTF itself when scaling is off).
    probe : StabilityProbe or None
        The scaled loop's simulated state peaks at the maximum stable amplitude (None when
        scaling is off; amplitude 0 when no stable amplitude was found).
    """
    from audiodsm.stages import loop_cache
    from audiodsm.stages.modulator import Modulator, StabilityProbe

    if mode == "off":
        return ntf, None
    key = (
        np.asarray(ntf.zeros, dtype=complex).tobytes(),
        np.asarray(ntf.poles, dtype=complex).tobytes(),
        float(ntf.gain),
        tuple(sorted(mod_kwargs.items())),
        int(osr),
        mode,
        float(bound),
    )
    hit = _SCALED_LOOPS.get(key)
    if hit is not None:
        return hit
    result = loop_cache.load("scaled-loop", key)
    if not (isinstance(result, tuple) and isinstance(result[1], StabilityProbe)):
        unscaled = Modulator(ntf, **mod_kwargs)
        try:
            scaled, probe = unscaled.with_scaled_states(
                osr=osr, peak_target=bound, powers_of_two=(mode == "power-of-two")
            )
            result = (scaled.loop, probe)
        except ParameterError:  # no stable amplitude: nothing to scale for
            zero = StabilityProbe(0.0, np.zeros(unscaled.order), 0.0, 0.0, 0.0)
            result = (unscaled.loop, zero)
        loop_cache.store("scaled-loop", key, result)
    if len(_SCALED_LOOPS) >= _SCALED_LOOPS_MAX:
        _SCALED_LOOPS.pop(next(iter(_SCALED_LOOPS)))
    _SCALED_LOOPS[key] = result
    return result


def _output_waveform_fn(profile: ChainProfile, frame_rate_hz: float):
    """A function ``(y, state) -> (PulseWaveform, (dropped, stretched), state)``.

    With ``impairments.return_to_zero`` every frame of the PDM / NRZ stage returns to 0 for
    its second half.
    """
    stage = _stage_waveform_fn(profile, frame_rate_hz)
    if not profile.impairments.return_to_zero:
        return stage
    from audiodsm.stages.output_stage import return_to_zero_waveform

    def return_to_zero(y, state):
        wf, counts, state = stage(y, state)
        return return_to_zero_waveform(wf), counts, state

    return return_to_zero


def _stage_waveform_fn(profile: ChainProfile, frame_rate_hz: float):
    """The output stage's function, one segment a frame for PDM and NRZ."""
    from audiodsm.stages import output_stage as out_mod

    out = profile.output
    levels = profile.modulator.levels
    volts = out.full_scale_volts
    if out.kind == "pdm":

        def pdm(y, state):
            # y is the single-bit loop's own output (+-1 by construction): no re-check, no copy
            wf = out_mod.pdm_waveform(
                y, frame_rate_hz=frame_rate_hz, full_scale_volts=volts, validate=False
            )
            return wf, (0, 0), state

        return pdm
    if out.kind == "nrz":
        lsb = 2.0 * volts / (levels - 1)
        imp = profile.impairments
        if imp.element_mismatch > 0.0 or imp.element_selection != "thermometer":
            return _unit_element_fn(profile, frame_rate_hz, lsb)

        def nrz(y, state):
            # the loop's own output (and the calibration's grid levels): no grid check
            wf = out_mod.nrz_waveform(
                y, levels=levels, frame_rate_hz=frame_rate_hz, lsb_volts=lsb, validate=False
            )
            return wf, (0, 0), state

        return nrz

    settings = pwm_keywords(profile, dead_time_ticks=out.dead_time_ticks)

    def pwm(y, state):
        wf, stats, state = out_mod.pwm_waveform(
            y, frame_rate_hz=frame_rate_hz, state=state, **settings
        )
        return wf, (stats.dropped_pulses, stats.stretched_pulses), state

    return pwm


def _unit_element_fn(profile: ChainProfile, frame_rate_hz: float, lsb_volts: float):
    """The NRZ stage built from unit elements with mismatch and an element-selection logic."""
    from audiodsm.stages import output_stage as out_mod
    from audiodsm.stages.elements import UnitElements

    imp, levels = profile.impairments, profile.modulator.levels
    elements = UnitElements(
        levels, imp.element_selection, mismatch=imp.element_mismatch, seed=imp.part_seed
    )

    def nrz_elements(y, state):
        codes = out_mod.level_codes(y, levels=levels)
        centred, state = elements.process(codes, state)
        ones = out_mod._ONE_TICK[: y.size]  # the shared read-only column of ones
        wf = out_mod.PulseWaveform._trusted(
            (centred * lsb_volts).reshape(-1, 1), ones, 1, frame_rate_hz
        )
        return wf, (0, 0), state

    return nrz_elements


def _edge_jitter_and_noise(profile: ChainProfile, frame_rate_hz: float):
    """The [impairments] section's edge stage (jitter, unequal edges) and analog noise, or None."""
    from audiodsm.stages.analog_noise import AnalogNoise
    from audiodsm.stages.jitter import EdgeJitter

    imp, out = profile.impairments, profile.output
    jitter = noise = None
    edges = imp.rise_time_s > 0.0 or imp.fall_time_s > 0.0
    if imp.jitter_rms_s > 0.0 or imp.jitter_sine_peak_s > 0.0 or edges:
        if out.kind == "pwm":
            steps = out.counter_steps or profile.modulator.levels - 1
            ticks = steps * out.tick_subdivision * (2 if out.pwm_carrier == "double-edge" else 1)
        else:
            ticks = 1
        jitter = EdgeJitter(
            frame_rate_hz,
            rms_s=imp.jitter_rms_s,
            sine_peak_s=imp.jitter_sine_peak_s,
            sine_hz=imp.jitter_sine_hz,
            seed=imp.part_seed,
            rise_s=imp.rise_time_s,
            fall_s=imp.fall_time_s,
            return_to_zero=imp.return_to_zero,
            top_level=out.full_scale_volts,
            ticks_per_frame=ticks,
        )
    if imp.noise_density_nv > 0.0:
        noise = AnalogNoise(
            frame_rate_hz,
            density_v=imp.noise_density_nv * 1e-9,
            corner_hz=imp.noise_corner_hz,
            seed=imp.part_seed,
        )
    return jitter, noise


def _pwm_dead_time_fn(profile: ChainProfile, frame_rate_hz: float, filt):
    """PWM with load-current-dependent dead time and the LC filter, in one loop.

    A function ``(y, state) -> (frame means, frame mean squares, (dropped, stretched),
    state)``: the leg voltage
    during each dead interval follows the sign of the filter's inductor current, so the output
    stage cannot run ahead of the filter (see
    :func:`~audiodsm.stages.reconstruct.filter_pwm_with_dead_time`).
    """
    from audiodsm.stages.reconstruct import filter_pwm_with_dead_time

    out = profile.output

    imp = profile.impairments
    switched = _power_stage_filter(profile) if imp.on_resistance else None

    settings = pwm_keywords(profile, dead_time_ticks=out.dead_time_ticks)

    def pwm_dead_time(y, state):
        means, squares, stats, state = filter_pwm_with_dead_time(
            filt,
            y,
            frame_rate_hz=frame_rate_hz,
            state=state,
            switched=switched,
            supply_ripple=imp.supply_ripple,
            supply_ripple_hz=imp.supply_ripple_hz,
            **settings,
        )
        return means, squares, (stats.dropped_pulses, stats.stretched_pulses), state

    return pwm_dead_time


def _analog_filter(profile: ChainProfile):
    from audiodsm.stages import filter_design as rec_mod

    rec = profile.reconstruction
    if rec.kind == "prototype":
        return rec_mod.analog_prototype(
            rec.family, order=rec.filter_order, cutoff_hz=rec.cutoff_hz, ripple_db=rec.ripple_db
        )
    if rec.kind == "lc":
        imp = profile.impairments
        if imp.loudspeaker or imp.on_resistance:  # the mean switch resistance, the real load
            return _power_stage_filter(profile).average
        return rec_mod.lc_filter(
            rec.inductance_h,
            rec.capacitance_f,
            rec.load_ohm,
            series_ohm=rec.series_ohm,
            bridged=rec.bridged,
        )
    return None


def _power_stage_filter(profile: ChainProfile):
    """The LC filter, its load and the switches' on-resistance (a SwitchedLcFilter).

    For a profile with ``reconstruction.kind = "lc"``: the load is the loudspeaker of the
    [impairments] section or ``reconstruction.load_ohm``; the switches have the section's
    on-resistance (0 when not given).
    """
    from audiodsm.stages.filter_design import LoudspeakerLoad
    from audiodsm.stages.power_stage import switched_lc_filter

    rec, imp = profile.reconstruction, profile.impairments
    load = rec.load_ohm
    if imp.loudspeaker:
        load = LoudspeakerLoad(
            imp.speaker_coil_ohm,
            imp.speaker_coil_inductance_h,
            imp.speaker_resonance_hz,
            imp.speaker_mechanical_q,
            imp.speaker_electrical_q,
        )
    return switched_lc_filter(
        rec.inductance_h,
        rec.capacitance_f,
        load,
        series_ohm=rec.series_ohm,
        bridged=rec.bridged,
        high_side_ohm=imp.high_side_on_ohm,
        low_side_ohm=imp.low_side_on_ohm,
        half_bridge=profile.output.kind == "pwm" and profile.output.pwm_bridge == "half",
    )


def pwm_keywords(profile: ChainProfile, *, dead_time_ticks: int = 0) -> dict:
    """The profile's PWM settings as keywords of :func:`~audiodsm.stages.output_stage.pwm_waveform`.

    Everything but the samples, the frame rate and the state; the dead time is 0 unless given
    (the switched filter and the class-D readings run the stage without it).
    """
    out = profile.output
    return {
        "levels": profile.modulator.levels,
        "counter_steps": out.counter_steps or None,
        "mode": out.pwm_mode,
        "carrier": out.pwm_carrier,
        "bridge": out.pwm_bridge,
        "tick_subdivision": out.tick_subdivision,
        "dead_time_ticks": dead_time_ticks,
        "min_pulse_ticks": out.min_pulse_ticks,
        "min_pulse_action": out.short_pulse_action,
        "supply_volts": out.full_scale_volts,
    }


def _switched_filter_fn(profile: ChainProfile, frame_rate_hz: float):
    """The PWM waveform through the filter of the switches conducting in each segment, or None.

    None when every switch state gives the same loop resistance (equal high- and low-side
    on-resistance in a half bridge, or a two-level full bridge, whose legs always differ):
    the filter with the mean resistance is then exact. Otherwise a function ``(wf, y,
    state) -> (means, mean_squares, state)`` for waveforms made without dead time.
    """
    from audiodsm.stages import output_stage as out_mod
    from audiodsm.stages.power_stage import filter_switched_waveform, segment_switch_states

    if profile.output.kind != "pwm" or not profile.impairments.on_resistance:
        return None
    switched = _power_stage_filter(profile)
    if len(set(switched.loop_ohm)) == 1:
        return None

    def run(wf, y, state):
        plan = out_mod.pwm_switching_plan(y, frame_rate_hz, **pwm_keywords(profile))
        configs = segment_switch_states(wf, plan)
        return filter_switched_waveform(switched, wf, configs, state)

    return run


def _mean_level(wf) -> np.ndarray:
    """Per-frame mean value of a PulseWaveform (the area of each frame over its length)."""
    return (wf.levels * wf.ticks).sum(axis=1) / float(wf.ticks_per_frame)


def _check_rate(rate_hz, name="rate_hz"):
    if isinstance(rate_hz, bool) or not isinstance(rate_hz, (int, float, np.integer, np.floating)):
        raise ParameterError(name, rate_hz, "one of " + ", ".join(map(str, AUDIO_RATES_HZ)))
    if float(rate_hz) not in AUDIO_RATES_HZ:
        raise ParameterError(name, rate_hz, "one of " + ", ".join(map(str, AUDIO_RATES_HZ)))
    return int(rate_hz)


def no_overload_input_bound(ntf, levels: int, dither_lsb: float = 0.0) -> float:
    """Largest input amplitude for which a multi-level quantizer can never overload.

    Parameters
    ----------
    ntf : NoiseTransfer
    levels : int
        Quantizer levels, ``M = levels - 1`` steps.
    dither_lsb : float
        Peak of the TPDF dither added before the quantizer, in quantizer steps (LSB).

    Returns
    -------
    float
        In full-scale units (may be 0 or negative: no guarantee at all; ``-inf`` for a
        single-bit loop, which has none). In units of half a step (step 2, levels at the odd
        integers up to +-M) the quantizer input is ``w = u + (h - 1) * q + h * d`` for a loop
        with unity STF, where ``q`` is the quantization error (``|q| <= 1`` while the
        quantizer does not overload) and ``d`` the dither (``|d| <= 2 dither_lsb``): the
        dither enters the loop where the quantization error does, so the NTF shapes it too.
        No overload (``|w| <= M + 1``) is then guaranteed while
        ``|u| <= M + 2 - ||h||_1 (1 + 2 dither_lsb)``; divided by ``M`` for full scale. With
        no dither this is the rule of [1]_; the dither term follows from the same worst-case
        sum (a dither of +-1 LSB spends ``2 ||h||_1`` half-steps of the headroom, at least its
        own peak of 1 LSB).

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE/Wiley 2005, ch. 4 (stability of multi-bit modulators: no overload when
       max|u| <= M + 2 - ||h||_1, with the quantizer step 2; from memory).
    """
    m = levels - 1
    if m < 2:
        return -math.inf
    from scipy.signal import lfilter

    b, a = ntf.polynomials()
    impulse = np.zeros(1 << 14)
    impulse[0] = 1.0
    h1 = float(np.abs(lfilter(b, a, impulse)).sum())
    return (m + 2 - h1 * (1.0 + 2.0 * float(dither_lsb))) / m


def auto_input_scale(ntf, levels: int, dither_lsb: float = 0.0) -> float:
    """The modulator input scale a profile gets when it leaves ``input_scale`` at 0.

    Parameters
    ----------
    ntf : NoiseTransfer
    levels : int
        Quantizer levels.
    dither_lsb : float
        The modulator's TPDF dither peak in quantizer steps; it uses up headroom.

    Returns
    -------
    float
        For a multi-bit loop, :func:`no_overload_input_bound` (the dither subtracted) when it
        is at least 0.5 (capped at 1.0); otherwise 0.5, the common practice for single-bit
        audio loops (about 6 dB of headroom). Below 0.5 nothing is guaranteed: the battery's
        stability search (which counts quantizer clipping as overload) says how far the loop
        really goes.

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE/Wiley 2005, ch. 4 (stability of multi-bit modulators; from memory).
    """
    bound = no_overload_input_bound(ntf, levels, dither_lsb)
    return float(min(1.0, bound)) if bound >= 0.5 else 0.5


def _stf_filter(linear):
    """The loop's linearized signal transfer as ``(num, den)`` for lfilter; None if it is 1.

    From the closed-loop state space ``x+ = A_cl x + B u``, ``v = c x + d u`` of the
    :class:`~audiodsm.design.realize.LinearLoop` (quantizer as additive noise), with
    ``A_cl`` its closed transition, ``B = input_entry + feedback_entry d``, ``c`` the
    quantizer tap and ``d`` the direct input path.
    """
    from scipy.signal import ss2tf

    a_cl = linear.closed_transition()
    direct = linear.input_direct
    b = linear.input_entry + linear.feedback_entry * direct
    if not np.any(b) and direct == 1.0:
        return None  # error feedback: the signal goes straight through
    num, den = ss2tf(a_cl, b[:, None], linear.quantizer_tap[None, :], np.array([[direct]]))
    return np.asarray(num[0], dtype=float), np.asarray(den, dtype=float)
