"""Checks of a whole chain profile: settings that are valid alone but not together.

:func:`audiodsm.profile.profile_from_dict` validates each key on its own (type, range, choice)
and then calls :func:`_check_whole` for what only the profile as a whole can tell: explicit NTF
roots that fit, semi-digital FIR taps that the chain can divide by, PWM timing that fits the
frame, and the rules of the [fixed_point] and [impairments] sections that involve the other
sections (:func:`_check_fixed_point`, :func:`_check_impairments`). Each failure raises
:class:`~audiodsm.errors.ProfileError` with one line.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from audiodsm.errors import ProfileError

if TYPE_CHECKING:
    from audiodsm.profile import ChainProfile


#: The farthest an explicit NTF zero may lie from the z-plane's origin. Zeros belong on or
#: near the unit circle (in band); one at radius r lifts the NTF's gain near Nyquist by about
#: (1 + r) / 2, so beyond 10 no loop is stable, and far beyond it the arithmetic overflows.
ZERO_RADIUS_MAX = 10.0
#: The largest sum of |taps| a semi-digital FIR may have: the filter adds tap x level terms,
#: and this leaves room below the float64 limit (about 1.8e308) for levels in volts.
FIR_ABS_SUM_MAX = 1e300
#: The smallest |sum of taps| relative to the sum of |taps|: the chain divides by the sum to
#: calibrate its gain, so a sum that cancels to nothing would blow the output up.
FIR_SUM_RATIO_MIN = 1e-12


def _check_roots_fit(path: str, key: str, roots) -> None:
    """Refuse NTF zeros so far out that the loop's arithmetic would overflow."""
    for r in roots:
        if not abs(r) <= ZERO_RADIUS_MAX:  # abs() of a huge complex is inf
            raise ProfileError(
                path,
                key,
                f"got a root of magnitude {abs(r):.6g}; expected roots within radius "
                f"{ZERO_RADIUS_MAX:g} of the origin (NTF zeros lie on or near the unit circle)",
            )


def _check_taps_fit(path: str, key: str, taps) -> None:
    """Refuse FIR taps whose sums overflow or cancel (the chain divides by their sum)."""
    try:
        abs_sum = math.fsum(abs(t) for t in taps)
        total = math.fsum(taps)
    except OverflowError:
        abs_sum = total = math.inf
    if not abs_sum <= FIR_ABS_SUM_MAX:
        raise ProfileError(
            path,
            key,
            f"got taps whose absolute values sum to {abs_sum:.6g}; expected at most "
            f"{FIR_ABS_SUM_MAX:g} (larger sums overflow)",
        )
    if total != 0.0 and abs(total) < FIR_SUM_RATIO_MIN * abs_sum:  # 0: refused below
        raise ProfileError(
            path,
            key,
            f"got taps summing to {total:.6g} against {abs_sum:.6g} in absolute value; expected "
            f"a sum of at least {FIR_SUM_RATIO_MIN:g} of that (the gain is set by the sum)",
        )


def _pwm_frame_ticks(mod, out) -> int:
    """Ticks in one PWM frame: counter steps x tick_subdivision, doubled for double-edge."""
    steps = out.counter_steps or (mod.levels - 1)
    return steps * out.tick_subdivision * (1 if out.pwm_carrier == "trailing" else 2)


def _check_pwm_timing(profile: ChainProfile, path: str) -> None:
    """Dead time and the minimum pulse each fit in half a frame.

    The output stage itself takes a dead time up to a whole frame, but beyond half a frame
    most pulses vanish and the chain's output collapses; real power stages use a few percent.
    """
    mod, out = profile.modulator, profile.output
    if out.kind != "pwm":
        return
    frame = _pwm_frame_ticks(mod, out)
    how = (
        f"counter steps {out.counter_steps or mod.levels - 1} x tick_subdivision "
        f"{out.tick_subdivision}" + (" x 2 (double-edge)" if out.pwm_carrier != "trailing" else "")
    )
    for name, value, limit, what in (
        ("dead_time_ticks", out.dead_time_ticks, frame // 2, "half the ticks of one frame"),
        ("min_pulse_ticks", out.min_pulse_ticks, frame // 2, "half the ticks of one frame"),
    ):
        if value > limit:
            raise ProfileError(
                path, f"output.{name}", f"got {value}; expected at most {limit}, {what} ({how})"
            )


def _check_whole(profile: ChainProfile, path: str) -> None:
    """Rules that involve more than one key."""
    mod, out, rec = profile.modulator, profile.output, profile.reconstruction
    _check_roots_fit(path, "modulator.zeros", mod.zeros)
    _check_taps_fit(path, "reconstruction.fir_taps", rec.fir_taps)
    if bool(mod.zeros) != bool(mod.poles):
        key = "modulator.poles" if mod.zeros else "modulator.zeros"
        raise ProfileError(
            path, key, "got an empty list; expected zeros and poles to be given together"
        )
    if mod.zeros:
        if len(mod.zeros) != len(mod.poles):
            raise ProfileError(
                path,
                "modulator.poles",
                f"got {len(mod.poles)} poles for {len(mod.zeros)} zeros; expected the same count",
            )
        for key, roots in (("modulator.zeros", mod.zeros), ("modulator.poles", mod.poles)):
            for r in roots:
                if r.imag != 0.0 and not any(
                    abs(s - r.conjugate()) <= 1e-12 * max(1.0, abs(r)) for s in roots
                ):
                    raise ProfileError(
                        path,
                        key,
                        f"got [{r.real!r}, {r.imag!r}] without its conjugate; "
                        "expected complex roots in conjugate pairs",
                    )
        if any(abs(p) >= 1.0 for p in mod.poles):
            raise ProfileError(
                path,
                "modulator.poles",
                "got a pole on or outside the unit circle; expected |pole| < 1",
            )
    if out.kind == "pdm" and mod.levels != 2:
        raise ProfileError(
            path,
            "modulator.levels",
            f"got {mod.levels} with output.kind = 'pdm'; expected 2 (PDM is a single-bit stream)",
        )
    if out.kind == "pwm" and mod.levels - 1 > 65536:
        raise ProfileError(
            path,
            "modulator.levels",
            f"got {mod.levels} with output.kind = 'pwm'; expected at most 65537 (the PWM "
            "counter steps, a multiple of levels - 1, are at most 65536)",
        )
    if out.kind == "pwm" and out.pwm_mode == "three-level" and out.pwm_bridge != "full":
        raise ProfileError(
            path,
            "output.pwm_bridge",
            f"got {out.pwm_bridge!r} with three-level PWM; expected 'full' (both legs switch)",
        )
    if out.kind == "pwm" and out.counter_steps and out.counter_steps % (mod.levels - 1):
        raise ProfileError(
            path,
            "output.counter_steps",
            f"got {out.counter_steps}; expected a multiple of modulator.levels - 1 = "
            f"{mod.levels - 1} (every level an exact pulse width)",
        )
    if out.kind == "pwm" and out.dead_time_ticks > 0 and rec.kind != "lc":
        raise ProfileError(
            path,
            "output.dead_time_ticks",
            f"got {out.dead_time_ticks} with reconstruction.kind = {rec.kind!r}; dead time needs "
            "reconstruction.kind = 'lc' (the leg voltage in a dead interval follows the "
            "inductor current)",
        )
    if rec.fir_taps and out.kind == "pwm":
        raise ProfileError(
            path,
            "reconstruction.fir_taps",
            "applies only to a bitstream (output.kind = 'pdm' or 'nrz'); this profile has 'pwm'",
        )
    if rec.fir_taps and sum(rec.fir_taps) == 0.0:
        raise ProfileError(
            path, "reconstruction.fir_taps", "got taps summing to 0; expected a non-zero sum"
        )
    _check_pwm_timing(profile, path)


def _check_fixed_point(profile: ChainProfile, table: dict, path: str) -> None:
    """Rules of the [fixed_point] section that involve the modulator."""
    fp, mod = profile.fixed_point, profile.modulator
    if not fp.active:
        for key in table:
            if key != "state_integer_bits":
                raise ProfileError(
                    path,
                    f"fixed_point.{key}",
                    "applies only with fixed_point.state_integer_bits (one entry per state)",
                )
        return
    order = len(mod.zeros) if mod.explicit_ntf else mod.order
    for key in ("state_integer_bits", "state_fraction_bits", "state_rounding", "state_overflow"):
        got = len(getattr(fp, key))
        if got != order and (got or key in ("state_integer_bits", "state_fraction_bits")):
            raise ProfileError(
                path,
                f"fixed_point.{key}",
                f"got {got} entries; expected {order}, one per state of the order-{order} loop",
            )
    if mod.structure != "feedback":
        raise ProfileError(
            path,
            "modulator.structure",
            f"got {mod.structure!r} with a [fixed_point] section; expected 'feedback' (the "
            "fixed-point loop is the feedback structure)",
        )
    m = (mod.levels - 1).bit_length() - 1
    if mod.levels != 2 and (mod.levels - 1 != 1 << m or m > 16):
        raise ProfileError(
            path,
            "modulator.levels",
            f"got {mod.levels} with a [fixed_point] section; expected 2 or 2**m + 1 "
            "(3, 5, 9, 17, ...), levels on a binary grid",
        )


#: Most levels a DAC built from unit elements may have (stages/elements.py: MAX_ELEMENTS + 1).
_MAX_ELEMENT_LEVELS = 1025


def _check_impairments(profile: ChainProfile, path: str) -> None:
    """Rules of the [impairments] section that involve the output stage."""
    imp, kind = profile.impairments, profile.output.kind
    element = imp.element_mismatch > 0.0 or imp.element_selection != "thermometer"
    if element and kind != "nrz":
        key = "element_mismatch" if imp.element_mismatch > 0.0 else "element_selection"
        raise ProfileError(
            path,
            f"impairments.{key}",
            f"applies only to unit elements (output.kind = 'nrz'); this profile has {kind!r}",
        )
    if element and profile.modulator.levels > _MAX_ELEMENT_LEVELS:
        raise ProfileError(
            path,
            "modulator.levels",
            f"got {profile.modulator.levels} with unit-element impairments; expected 3 to "
            f"{_MAX_ELEMENT_LEVELS} (one element per step)",
        )
    jitter = imp.jitter_rms_s > 0.0 or imp.jitter_sine_peak_s > 0.0
    if jitter and kind == "pwm" and profile.output.dead_time_ticks > 0:
        key = "jitter_rms_s" if imp.jitter_rms_s > 0.0 else "jitter_sine_peak_s"
        raise ProfileError(
            path,
            f"impairments.{key}",
            "got jitter with output.dead_time_ticks > 0; expected no dead time (the "
            "dead-time loop does not model jitter yet)",
        )
    for key in ("rise_time_s", "fall_time_s", "return_to_zero"):
        if getattr(imp, key) and kind == "pwm":
            raise ProfileError(
                path,
                f"impairments.{key}",
                "applies only to a bitstream (output.kind = 'pdm' or 'nrz'); this profile has "
                "'pwm'",
            )
    if imp.return_to_zero and profile.reconstruction.fir_taps:
        raise ProfileError(
            path,
            "impairments.return_to_zero",
            "got true with reconstruction.fir_taps; expected no semi-digital FIR (it takes "
            "one level a frame)",
        )
    if (imp.jitter_sine_peak_s > 0.0) != (imp.jitter_sine_hz > 0.0):
        key = "jitter_sine_hz" if imp.jitter_sine_peak_s > 0.0 else "jitter_sine_peak_s"
        raise ProfileError(
            path,
            f"impairments.{key}",
            "got 0; expected jitter_sine_peak_s and jitter_sine_hz to be given together",
        )
    if imp.supply_ripple > 0.0 and kind != "pwm":
        raise ProfileError(
            path,
            "impairments.supply_ripple",
            f"applies only to a class-D stage (output.kind = 'pwm'); this profile has {kind!r}",
        )
    if (imp.supply_ripple > 0.0) != (imp.supply_ripple_hz > 0.0):
        key = "supply_ripple_hz" if imp.supply_ripple > 0.0 else "supply_ripple"
        raise ProfileError(
            path,
            f"impairments.{key}",
            "got 0; expected supply_ripple and supply_ripple_hz to be given together",
        )
    _check_power_stage(profile, path)
    if imp.noise_corner_hz > 0.0 and imp.noise_density_nv == 0.0:
        raise ProfileError(
            path,
            "impairments.noise_corner_hz",
            f"got {imp.noise_corner_hz!r} with no noise; expected impairments.noise_density_nv",
        )


def _check_power_stage(profile: ChainProfile, path: str) -> None:
    """The switches' on-resistance and the loudspeaker load: where they apply, all parts given."""
    from audiodsm.profile import SPEAKER_KEYS

    imp = profile.impairments
    kind, rec = profile.output.kind, profile.reconstruction.kind
    if imp.on_resistance and (kind != "pwm" or rec != "lc"):
        key = "high_side_on_ohm" if imp.high_side_on_ohm > 0.0 else "low_side_on_ohm"
        raise ProfileError(
            path,
            f"impairments.{key}",
            "applies only to a class-D stage with an LC filter (output.kind = 'pwm', "
            f"reconstruction.kind = 'lc'); this profile has {kind!r} and {rec!r}",
        )
    jitter = imp.jitter_rms_s > 0.0 or imp.jitter_sine_peak_s > 0.0
    if imp.on_resistance and jitter:
        key = "jitter_rms_s" if imp.jitter_rms_s > 0.0 else "jitter_sine_peak_s"
        raise ProfileError(
            path,
            f"impairments.{key}",
            "got jitter with the switches' on-resistance; expected one of the two (the "
            "switched filter reads whole ticks and does not model jittered edges yet)",
        )
    if not imp.loudspeaker:
        return
    if rec != "lc":
        raise ProfileError(
            path,
            "impairments.speaker_coil_ohm",
            f"applies only to reconstruction.kind = 'lc' (the load of the LC filter); this "
            f"profile has {rec!r}",
        )
    import dataclasses

    expects = {f.name: f.metadata["expect"] for f in dataclasses.fields(imp)}
    for key in SPEAKER_KEYS:
        value = getattr(imp, key)
        if not value > 0.0:
            accepted = expects[key].replace("from 0 to", "above 0 and at most")
            raise ProfileError(
                path,
                f"impairments.{key}",
                f"got {value!r}; expected {accepted} (a loudspeaker load has no part of zero "
                "size: give all five speaker_* keys)",
            )
