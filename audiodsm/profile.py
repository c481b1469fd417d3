"""Chain profiles: one TOML file describes one candidate signal chain.

A profile names every setting of the chain a render or a test battery runs: how the input is
treated above full scale, the upsampler, the modulator (an NTF design or explicit zeros and
poles, the loop structure, quantizer levels, dither, stability guard), the output stage (PDM,
multi-level NRZ or PWM), the reconstruction filter and the listening output. The file is read
with the standard library's :mod:`tomllib` and parsed into frozen, validated dataclasses.

Every key has one default, defined once: the ``default`` of its dataclass field below. The
documentation (``docs/profiles.md``) lists the same keys, types, ranges and defaults, and a test
checks that it stays in step with this module.

A bad file raises :class:`~audiodsm.errors.ProfileError` with one line naming the file, the
dotted key, the value received and what is allowed.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from audiodsm.errors import ProfileError
from audiodsm.limits import (
    AUDIO_RATES_HZ,
    CUTOFF_HZ_RANGE,
    ELEMENT_MISMATCH_RANGE,
    ELEMENT_SELECTIONS,
    FILTER_ORDER_RANGE,
    LEVELS_RANGE,
    ORDER_RANGE,
    OSR_CHOICES,
    OUT_OF_BAND_GAIN_RANGE,
    PARTS_RANGE,
    ZERO_LAYOUTS,
)
from audiodsm.profile_checks import _check_fixed_point, _check_impairments, _check_whole
from audiodsm.profile_parse import _describe, _parse_section, _type_name

__all__ = [
    "AUDIO_RATES_HZ",
    "ChainProfile",
    "InputSettings",
    "UpsamplerSettings",
    "ModulatorSettings",
    "OutputStageSettings",
    "ReconstructionSettings",
    "ListeningSettings",
    "FixedPointSettings",
    "ImpairmentSettings",
    "load_profile",
    "parse_profile",
    "profile_from_dict",
]


# ---------------------------------------------------------------------------------------------
# Field helpers: each key carries its type and its allowed values in the field metadata.
# ---------------------------------------------------------------------------------------------


def _key(default, kind, expect, check=None, **extra):
    """A profile key: its one default, its TOML type, plain words for what is allowed."""
    meta = {"kind": kind, "expect": expect, "check": check, **extra}
    if isinstance(default, (list, tuple)):
        value = tuple(default)
        return field(default_factory=lambda: value, metadata=meta)
    return field(default=default, metadata=meta)


def _choice(*options):
    return lambda v: v in options


def _int_range(lo, hi):
    return lambda v: lo <= v <= hi


def _power_of_two(lo, hi):
    return lambda v: lo <= v <= hi and v & (v - 1) == 0


def _float_range(lo, hi, *, lo_open=False, hi_open=False):
    def check(v):
        above = v > lo if lo_open else v >= lo
        below = v < hi if hi_open else v <= hi
        return math.isfinite(v) and above and below

    return check


def _short(value: float) -> str:
    """A number as short as it reads in the documentation: 20000, 1e7."""
    return f"{value:g}".replace("e+0", "e").replace("e+", "e")


def _fmt_choices(*options):
    return "one of " + ", ".join(repr(o) for o in options)


# ---------------------------------------------------------------------------------------------
# The sections
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class InputSettings:
    """How the chain treats its input (TOML table ``[input]``)."""

    over_full_scale: str = _key(
        "clip",
        "str",
        _fmt_choices("clip", "refuse"),
        _choice("clip", "refuse"),
        doc="Samples beyond ±1.0: 'clip' clips them to ±1.0 and counts them; 'refuse' "
        "stops with an error naming the file.",
    )
    source_bits: int = _key(
        24,
        "int",
        "an integer from 8 to 32",
        _int_range(8, 32),
        doc="Word length of the source the product plays (bits, two's complement, full scale "
        "±1.0): what requantize rounds the input to.",
    )
    requantize: str = _key(
        "tpdf",
        "str",
        _fmt_choices("tpdf", "off"),
        _choice("tpdf", "off"),
        doc="'tpdf': round every input sample to source_bits with TPDF dither of 2 LSB peak to "
        "peak before the upsampler, as a source file of that word length carries it (noise "
        "LSB²/4, so no reading beats the source); 'off': feed the samples unrounded (an ideal "
        "source of unlimited word length).",
    )
    dither_seed: int = _key(
        0,
        "int",
        "an integer from 0 to 2**63 - 1",
        _int_range(0, 2**63 - 1),
        doc="Seed of the requantization dither (channel c draws its own stream from it).",
    )


@dataclass(frozen=True)
class UpsamplerSettings:
    """The interpolation chain from the audio rate to the modulator rate (``[upsampler]``)."""

    osr: int = _key(
        64,
        "int",
        f"a power of two from {OSR_CHOICES[0]} to {OSR_CHOICES[-1]}",
        _choice(*OSR_CHOICES),
        doc="Oversampling ratio: modulator rate = osr x audio rate.",
    )
    final_stage: str = _key(
        "sinc",
        "str",
        _fmt_choices("sinc", "linear", "hold"),
        _choice("sinc", "linear", "hold"),
        doc="The cheap last interpolation stage after the half-band FIR stages.",
    )
    passband_edge: float = _key(
        0.4535,
        "float",
        "a number from 0.3 to 0.49 (fraction of the audio rate)",
        _float_range(0.3, 0.49),
        doc="Edge of the flat passband as a fraction of the audio rate.",
    )
    passband_ripple_db: float = _key(
        0.005,
        "float",
        "a number from 0.0001 to 1.0",
        _float_range(0.0001, 1.0),
        doc="Allowed passband ripple, ± dB.",
    )
    stopband_edge: float = _key(
        0.5465,
        "float",
        "a number from 0.5 to 0.7 (fraction of the audio rate)",
        _float_range(0.5, 0.7),
        doc="Start of the stopband as a fraction of the audio rate.",
    )
    stopband_atten_db: float = _key(
        100.0,
        "float",
        "a number from 40 to 160",
        _float_range(40.0, 160.0),
        doc="Attenuation of every image of the audio band, dB.",
    )


@dataclass(frozen=True)
class ModulatorSettings:
    """The noise-shaping loop (``[modulator]``).

    Either the NTF is designed from ``order``, ``out_of_band_gain`` and ``zero_layout``, or it is
    given explicitly by ``zeros`` and ``poles`` (both, same count). Complex roots are written as
    ``[re, im]`` pairs and each one needs its conjugate listed too; real roots may be plain
    numbers.
    """

    order: int = _key(
        5,
        "int",
        f"an integer from {ORDER_RANGE[0]} to {ORDER_RANGE[1]}",
        _int_range(*ORDER_RANGE),
        doc="Loop order of the designed NTF.",
    )
    out_of_band_gain: float = _key(
        1.5,
        "float",
        f"a number above {OUT_OF_BAND_GAIN_RANGE[0]} and at most {OUT_OF_BAND_GAIN_RANGE[1]}",
        _float_range(*OUT_OF_BAND_GAIN_RANGE, lo_open=True),
        doc="Largest out-of-band NTF gain (Lee's rule: about 1.5 for single-bit loops).",
    )
    zero_layout: str = _key(
        "spread",
        "str",
        _fmt_choices(*ZERO_LAYOUTS),
        _choice(*ZERO_LAYOUTS),
        doc="'spread': NTF zeros at the optimal positions over the band; 'dc': all at DC.",
    )
    zero_band_edge_hz: float = _key(
        20000.0,
        "float",
        "a number from 1000 to 96000",
        _float_range(1000.0, 96000.0),
        doc="Edge of the band the spread NTF zeros are optimized over, Hz: the band the "
        "product is judged in. Capped at half the input rate.",
    )
    zeros: tuple = _key(
        (),
        "roots",
        "a list of numbers or [re, im] pairs",
        doc="Explicit NTF zeros (z-plane). Empty: design the NTF from order/out_of_band_gain.",
    )
    poles: tuple = _key(
        (),
        "roots",
        "a list of numbers or [re, im] pairs",
        doc="Explicit NTF poles (z-plane), inside the unit circle. Empty: design the NTF.",
    )
    structure: str = _key(
        "feedback",
        "str",
        _fmt_choices("feedback", "feedforward", "error-feedback"),
        _choice("feedback", "feedforward", "error-feedback"),
        doc="Loop structure realizing the NTF.",
    )
    input_feed_in: bool = _key(
        False,
        "bool",
        "true or false",
        only="feedforward",
        only_by="structure",
        doc="Feedforward loop only: feed the input straight to the quantizer too (and to the "
        "first integrator with the feedback's weight), so the signal transfer is exactly 1 "
        "and the integrators carry only shaped noise, not the signal.",
    )
    levels: int = _key(
        2,
        "int",
        f"an integer from {LEVELS_RANGE[0]} to {LEVELS_RANGE[1]}",
        _int_range(*LEVELS_RANGE),
        doc="Quantizer levels, evenly spaced in [-1, 1]; 2 is a single-bit loop.",
    )
    dither_lsb: float = _key(
        0.0,
        "float",
        "a number from 0 to 4",
        _float_range(0.0, 4.0),
        doc="TPDF dither amplitude at the quantizer, in LSB (0 = none).",
    )
    seed: int = _key(
        0,
        "int",
        "an integer from 0 to 2**63 - 1",
        _int_range(0, 2**63 - 1),
        doc="Seed of the dither generator (results are reproducible from it).",
    )
    input_scale: float = _key(
        0.0,
        "float",
        "0 (automatic) or a number from 0.01 to 1",
        lambda v: v == 0.0 or (math.isfinite(v) and 0.01 <= v <= 1.0),
        doc="Modulator input for a full-scale (0 dBFS peak) sample, as a fraction of the "
        "quantizer's full scale: headroom that keeps the loop stable; the chain's calibration "
        "divides it out again. 0 chooses it: the guaranteed no-overload bound "
        "(M + 2 - sum|h|) / M of a multi-bit loop (M = levels - 1, h the NTF's impulse "
        "response) when that is at least 0.5, else 0.5.",
    )
    guard: str = _key(
        "reset",
        "str",
        _fmt_choices("reset", "clamp"),
        _choice("reset", "clamp"),
        doc="What the stability guard does on overload: reset the loop states to zero or "
        "clamp them.",
    )
    state_bound: float = _key(
        0.0,
        "float",
        "0 (the modulator's own bound) or a number from 1 to 1e6",
        lambda v: v == 0.0 or (math.isfinite(v) and 1.0 <= v <= 1e6),
        doc="State magnitude that counts as overload; 0 keeps the modulator's default. With "
        "state scaling on it applies to the scaled states.",
    )
    state_scaling: str = _key(
        "power-of-two",
        "str",
        _fmt_choices("power-of-two", "exact", "off"),
        _choice("power-of-two", "exact", "off"),
        doc="Scale the integrator states (without changing the NTF) so each peaks within "
        "state_peak_bound on a sine at the loop's maximum stable amplitude. 'power-of-two': "
        "factors are powers of two, peaks land in (bound/2, bound] and the output bits are "
        "exactly those of the unscaled loop; 'exact': peaks land on the bound, output equal up "
        "to floating-point rounding; 'off': the unscaled realization. The quantizer-facing "
        "state keeps its size in error-feedback loops and multi-level feedback loops, where "
        "the quantizer sets it.",
    )
    state_peak_bound: float = _key(
        1.0,
        "float",
        "a number from 0.001 to 1000",
        _float_range(0.001, 1000.0),
        doc="Peak each scaled integrator state should reach at the maximum stable amplitude.",
    )

    @property
    def explicit_ntf(self) -> bool:
        """True when the profile gives the NTF's zeros and poles itself."""
        return bool(self.zeros)


@dataclass(frozen=True)
class OutputStageSettings:
    """The output stage after the modulator (``[output]``).

    ``kind = "pdm"`` needs a two-level modulator. The PWM keys apply only to ``kind = "pwm"``;
    giving one for another kind is an error, so a profile never carries a setting that does
    nothing.
    """

    kind: str = _key(
        "pdm",
        "str",
        _fmt_choices("pdm", "nrz", "pwm"),
        _choice("pdm", "nrz", "pwm"),
        doc="Single-bit PDM stream, multi-level NRZ DAC, or class-D PWM.",
    )
    full_scale_volts: float = _key(
        1.0,
        "float",
        "a number above 0 and at most 1000",
        _float_range(0.0, 1000.0, lo_open=True),
        doc="Output voltage of the top level (PDM, NRZ) or the supply voltage (PWM).",
    )
    pwm_mode: str = _key(
        "two-level",
        "str",
        _fmt_choices("two-level", "three-level"),
        _choice("two-level", "three-level"),
        only="pwm",
        doc="Two-level (single-ended or full-bridge 'AD') or three-level bridge ('BD').",
    )
    pwm_carrier: str = _key(
        "double-edge",
        "str",
        _fmt_choices("trailing", "double-edge"),
        _choice("trailing", "double-edge"),
        only="pwm",
        doc="Trailing-edge or double-edge (symmetric) carrier.",
    )
    pwm_bridge: str = _key(
        "full",
        "str",
        _fmt_choices("full", "half"),
        _choice("full", "half"),
        only="pwm",
        doc="Two-level only: full bridge with complementary legs, or one half bridge on split "
        "rails. Three-level needs 'full'.",
    )
    counter_steps: int = _key(
        0,
        "int",
        "0 (levels - 1) or an integer from 1 to 65536",
        _int_range(0, 65536),
        only="pwm",
        doc="PWM counter steps per frame: 0 uses levels - 1; otherwise a multiple of levels - 1.",
    )
    tick_subdivision: int = _key(
        1,
        "int",
        "an integer from 1 to 64",
        _int_range(1, 64),
        only="pwm",
        doc="Ticks per counter step: a finer grid for dead time and minimum pulse width.",
    )
    dead_time_ticks: int = _key(
        0,
        "int",
        "an integer from 0 to 4096 and at most half a frame's ticks",
        _int_range(0, 4096),
        only="pwm",
        doc="Dead time after every command edge of every leg, in ticks (counter steps / "
        "tick_subdivision); the leg then follows the inductor current (needs an LC filter).",
    )
    min_pulse_ticks: int = _key(
        0,
        "int",
        "an integer from 0 to 4096 and at most half a frame's ticks",
        _int_range(0, 4096),
        only="pwm",
        doc="Shortest pulse the power stage can make, in ticks (0 = no limit).",
    )
    short_pulse_action: str = _key(
        "drop",
        "str",
        _fmt_choices("drop", "stretch"),
        _choice("drop", "stretch"),
        only="pwm",
        doc="What happens to a pulse shorter than min_pulse_ticks.",
    )


@dataclass(frozen=True)
class ReconstructionSettings:
    """The analog reconstruction filter model (``[reconstruction]``).

    ``kind = "prototype"`` uses ``family``, ``filter_order``, ``cutoff_hz`` and ``ripple_db``;
    ``kind = "lc"`` uses the component values; ``kind = "none"`` passes the waveform through.
    ``fir_taps`` (a semi-digital FIR on the bitstream) may go with any kind.
    """

    kind: str = _key(
        "prototype",
        "str",
        _fmt_choices("prototype", "lc", "none"),
        _choice("prototype", "lc", "none"),
        doc="Analog prototype low-pass, class-D LC filter from components, or no filter.",
    )
    family: str = _key(
        "butterworth",
        "str",
        _fmt_choices("butterworth", "bessel", "chebyshev1"),
        _choice("butterworth", "bessel", "chebyshev1"),
        only="prototype",
        doc="Prototype family.",
    )
    filter_order: int = _key(
        3,
        "int",
        f"an integer from {FILTER_ORDER_RANGE[0]} to {FILTER_ORDER_RANGE[1]}",
        _int_range(*FILTER_ORDER_RANGE),
        only="prototype",
        doc="Prototype order.",
    )
    cutoff_hz: float = _key(
        60000.0,
        "float",
        f"a number from {_short(CUTOFF_HZ_RANGE[0])} to {_short(CUTOFF_HZ_RANGE[1])}",
        _float_range(*CUTOFF_HZ_RANGE),
        only="prototype",
        doc="Prototype corner frequency (Hz).",
    )
    ripple_db: float = _key(
        0.5,
        "float",
        "a number from 0.01 to 3",
        _float_range(0.01, 3.0),
        only="prototype",
        doc="Passband ripple of a chebyshev1 prototype (dB).",
    )
    inductance_h: float = _key(
        22e-6,
        "float",
        "a number from 1e-7 to 1e-2",
        _float_range(1e-7, 1e-2),
        only="lc",
        doc="Filter inductance (H).",
    )
    capacitance_f: float = _key(
        680e-9,
        "float",
        "a number from 1e-9 to 1e-4",
        _float_range(1e-9, 1e-4),
        only="lc",
        doc="Filter capacitance (F).",
    )
    load_ohm: float = _key(
        8.0,
        "float",
        "a number from 0.5 to 1000",
        _float_range(0.5, 1000.0),
        only="lc",
        doc="Resistive load (ohm).",
    )
    series_ohm: float = _key(
        0.0,
        "float",
        "a number from 0 to 10",
        _float_range(0.0, 10.0),
        only="lc",
        doc="Series resistance of the inductor (ohm).",
    )
    bridged: bool = _key(
        False,
        "bool",
        "true or false",
        only="lc",
        doc="Bridged (BTL) load with one LC section per half instead of single-ended.",
    )
    fir_taps: tuple = _key(
        (),
        "floats",
        "a list of at most 256 finite numbers with a non-zero sum",
        doc="Semi-digital FIR taps applied to the bitstream (empty = none).",
    )


@dataclass(frozen=True)
class ListeningSettings:
    """The listening file written by ``audiodsm render`` (``[listening]``)."""

    rate_hz: int = _key(
        0,
        "int",
        "0 (the input rate) or one of " + ", ".join(str(r) for r in AUDIO_RATES_HZ),
        lambda v: v == 0 or v in AUDIO_RATES_HZ,
        doc="Sample rate of the listening file; 0 keeps the input rate.",
    )
    sample_format: str = _key(
        "int24",
        "str",
        _fmt_choices("int24", "float32"),
        _choice("int24", "float32"),
        doc="24-bit integer or 32-bit float WAV.",
    )
    error_file: bool = _key(
        False,
        "bool",
        "true or false",
        doc="Also write the error-only file (output minus the time-aligned ideal).",
    )
    error_gain_db: float = _key(
        40.0,
        "float",
        "a number from 0 to 80",
        _float_range(0.0, 80.0),
        doc="Gain applied to the error-only file (dB); it appears in the file name.",
    )
    passband_hz: float = _key(
        20000.0,
        "float",
        "a number from 15000 to 40000",
        _float_range(15000.0, 40000.0),
        doc="Flat band kept by the listening decimator (Hz).",
    )
    decimator: str = _key(
        "half-band",
        "str",
        _fmt_choices("half-band", "counting"),
        _choice("half-band", "counting"),
        doc="Listening decimator: 'half-band' (the clean cascade) or 'counting' (count the "
        "stream over counting_length clocks in counting_stages cascaded counters, sinc^K, "
        "then the clean cascade for any further ratio).",
    )
    counting_stages: int = _key(
        1,
        "int",
        "an integer from 1 to 6",
        _int_range(1, 6),
        only="counting",
        only_by="decimator",
        doc="Cascaded counters K (sinc^K); K >= loop order + 1 keeps folded noise down.",
    )
    counting_length: int = _key(
        64,
        "int",
        "a power of two from 2 to 1024",
        _power_of_two(2, 1024),
        only="counting",
        only_by="decimator",
        doc="Counting window N in modulator clocks (also its decimation ratio); at most the "
        "modulator rate over the listening rate.",
    )


_ROUNDING = ("truncate", "round-half-up", "convergent")
_OVERFLOW = ("saturate", "wrap")


@dataclass(frozen=True)
class FixedPointSettings:
    """The loop as the hardware computes it (``[fixed_point]``; see docs/fixed_point.md).

    The section is off while ``state_integer_bits`` is empty; every other key then needs it.
    The lists have one entry per integrator state, from the input side. ``audiodsm plan``
    writes this section from a float run and a noise budget.
    """

    state_integer_bits: tuple = _key(
        (),
        "ints",
        "a list of integers from 0 to 24, one per state (empty = floating point)",
        lambda v: all(0 <= i <= 24 for i in v),
        doc="Bits left of the binary point of each state word, sign not counted.",
    )
    state_fraction_bits: tuple = _key(
        (),
        "ints",
        "a list of integers from 0 to 48, one per state",
        lambda v: all(0 <= i <= 48 for i in v),
        doc="Bits right of the binary point of each state word.",
    )
    state_rounding: tuple = _key(
        (),
        "strs",
        "a list of 'truncate', 'round-half-up' or 'convergent', one per state (empty = all "
        "'round-half-up')",
        lambda v: all(r in _ROUNDING for r in v),
        doc="How each state update drops its surplus fractional bits.",
    )
    state_overflow: tuple = _key(
        (),
        "strs",
        "a list of 'saturate' or 'wrap', one per state (empty = all 'saturate')",
        lambda v: all(r in _OVERFLOW for r in v),
        doc="What each state word does with a value outside its range.",
    )
    input_fraction_bits: int = _key(
        23,
        "int",
        "an integer from 1 to 40",
        _int_range(1, 40),
        doc="Fractional bits of the modulator's input word (one sign bit, no integer bits: "
        "full scale ±1).",
    )
    input_rounding: str = _key(
        "round-half-up",
        "str",
        _fmt_choices(*_ROUNDING),
        _choice(*_ROUNDING),
        doc="How the float input is rounded into the input word.",
    )
    coefficient_fraction_bits: int = _key(
        20,
        "int",
        "an integer from 2 to 40",
        _int_range(2, 40),
        doc="Fractional bits shared by every loop coefficient.",
    )
    coefficient_digits: int = _key(
        0,
        "int",
        "an integer from 0 (no limit) to 16",
        _int_range(0, 16),
        doc="At most this many non-zero canonic signed digits per coefficient (shift-add "
        "multipliers); 0 = plain rounding.",
    )
    interpolator: str = _key(
        "float",
        "str",
        _fmt_choices("float", "last", "all"),
        _choice("float", "last", "all"),
        doc="Which stages of the interpolation filter run in fixed point: none, the last one "
        "(the one feeding the loop) or all of them.",
    )
    interpolator_integer_bits: int = _key(
        1,
        "int",
        "an integer from 0 to 8",
        _int_range(0, 8),
        doc="Bits left of the binary point of the interpolator's words, sign not counted.",
    )
    interpolator_fraction_bits: int = _key(
        23,
        "int",
        "an integer from 1 to 44",
        _int_range(1, 44),
        doc="Bits right of the binary point of the interpolator's words.",
    )
    interpolator_coefficient_fraction_bits: int = _key(
        20,
        "int",
        "an integer from 2 to 40",
        _int_range(2, 40),
        doc="Fractional bits of every interpolator tap.",
    )
    interpolator_coefficient_digits: int = _key(
        0,
        "int",
        "an integer from 0 (no limit) to 16",
        _int_range(0, 16),
        doc="At most this many non-zero canonic signed digits per interpolator tap; 0 = plain "
        "rounding.",
    )
    interpolator_rounding: str = _key(
        "convergent",
        "str",
        _fmt_choices(*_ROUNDING),
        _choice(*_ROUNDING),
        doc="How each interpolator output (and its float input) drops its surplus bits.",
    )
    interpolator_overflow: str = _key(
        "saturate",
        "str",
        _fmt_choices(*_OVERFLOW),
        _choice(*_OVERFLOW),
        doc="What an interpolator word does with a value outside its range.",
    )

    @property
    def active(self) -> bool:
        """True when the profile asks for the fixed-point loop."""
        return bool(self.state_integer_bits)


@dataclass(frozen=True)
class ImpairmentSettings:
    """How the built converter departs from the ideal one (``[impairments]``).

    See docs/impairments.md. Every key at its default is the ideal converter. The element
    keys apply to a multi-level NRZ output (``output.kind = "nrz"``), the edge keys (rise and
    fall times, return to zero) to PDM and NRZ outputs, the jitter keys to PDM, NRZ and PWM
    outputs, the analog noise to every output; the supply ripple to PWM, the switches'
    on-resistance to PWM with an LC filter, the loudspeaker (all five ``speaker_*`` keys
    together) to an LC filter, in place of ``reconstruction.load_ohm``.
    """

    element_mismatch: float = _key(
        0.0,
        "float",
        f"a number from {_short(ELEMENT_MISMATCH_RANGE[0])} to {_short(ELEMENT_MISMATCH_RANGE[1])}",
        _float_range(*ELEMENT_MISMATCH_RANGE),
        doc="Relative standard deviation of one unit element's weight (0.001 = 0.1 %; NRZ).",
    )
    element_selection: str = _key(
        "thermometer",
        "str",
        _fmt_choices(*ELEMENT_SELECTIONS),
        _choice(*ELEMENT_SELECTIONS),
        doc="Which unit elements a code turns on: fixed (thermometer), random, or "
        "mismatch-shaping (NRZ).",
    )
    part_seed: int = _key(
        0,
        "int",
        "an integer from 0 to 2147483647",
        _int_range(0, 2**31 - 1),
        doc="The part: seeds the element weights, the random selection, the random jitter "
        "and the analog noise.",
    )
    parts: int = _key(
        1,
        "int",
        f"an integer from {PARTS_RANGE[0]} to {PARTS_RANGE[1]}",
        _int_range(*PARTS_RANGE),
        doc="How many parts `measure` and `grade` run when a random impairment is on "
        "(element mismatch, random jitter, analog noise); part 0 is part_seed itself, the "
        "others derived seeds (docs/impairments.md). A profile with no random draw runs once.",
    )
    jitter_rms_s: float = _key(
        0.0,
        "float",
        "a number from 0 to 1e-6 (seconds)",
        _float_range(0.0, 1e-6),
        doc="Standard deviation of the random (white Gaussian) displacement of every output "
        "edge, in seconds (PDM, NRZ, PWM).",
    )
    jitter_sine_peak_s: float = _key(
        0.0,
        "float",
        "a number from 0 to 1e-6 (seconds)",
        _float_range(0.0, 1e-6),
        doc="Peak displacement of the output edges by sinusoidal jitter, in seconds (PDM, NRZ, "
        "PWM).",
    )
    jitter_sine_hz: float = _key(
        0.0,
        "float",
        "a number from 0 to 1e8 (Hz)",
        _float_range(0.0, 1e8),
        doc="Frequency of the sinusoidal jitter, in Hz.",
    )
    rise_time_s: float = _key(
        0.0,
        "float",
        "a number from 0 to 1e-6 (seconds)",
        _float_range(0.0, 1e-6),
        doc="Duration of every rising output edge (a linear ramp of equal area), in seconds "
        "(PDM, NRZ); below half an output period (half of its half with return to zero).",
    )
    fall_time_s: float = _key(
        0.0,
        "float",
        "a number from 0 to 1e-6 (seconds)",
        _float_range(0.0, 1e-6),
        doc="Duration of every falling output edge, in seconds (PDM, NRZ); unequal rise and "
        "fall times make a data-dependent error.",
    )
    return_to_zero: bool = _key(
        False,
        "bool",
        "true or false",
        doc="Return-to-zero coding: each level for the first half of its output period, 0 "
        "for the second (PDM, NRZ; halves the gain, calibrated out).",
    )
    noise_density_nv: float = _key(
        0.0,
        "float",
        "a number from 0 to 1e6 (nV/sqrt(Hz))",
        _float_range(0.0, 1e6),
        doc="Output-referred white noise density of the analog side, in nV/sqrt(Hz).",
    )
    noise_corner_hz: float = _key(
        0.0,
        "float",
        "a number from 0 to 1e5 (Hz)",
        _float_range(0.0, 1e5),
        doc="1/f corner of the analog noise, in Hz (0 = white only).",
    )

    supply_ripple: float = _key(
        0.0,
        "float",
        "a number from 0 to 0.99 (relative to the supply)",
        _float_range(0.0, 0.99),
        doc="Relative amplitude m of the sinusoidal ripple on the PWM stage's supply "
        "(open loop: the output is the duty cycle times the supply; PWM).",
    )
    supply_ripple_hz: float = _key(
        0.0,
        "float",
        "a number from 0 to 1e5 (Hz)",
        _float_range(0.0, 1e5),
        doc="Frequency of the supply ripple, in Hz.",
    )
    high_side_on_ohm: float = _key(
        0.0,
        "float",
        "a number from 0 to 10 (ohm)",
        _float_range(0.0, 10.0),
        doc="On-resistance of each leg's high-side switch, in ohm, in series with the LC "
        "filter while the leg is high (PWM with an LC filter).",
    )
    low_side_on_ohm: float = _key(
        0.0,
        "float",
        "a number from 0 to 10 (ohm)",
        _float_range(0.0, 10.0),
        doc="On-resistance of each leg's low-side switch, in ohm, in series with the LC "
        "filter while the leg is low (PWM with an LC filter).",
    )
    speaker_coil_ohm: float = _key(
        0.0,
        "float",
        "a number from 0 to 100 (ohm)",
        _float_range(0.0, 100.0),
        doc="Loudspeaker load instead of reconstruction.load_ohm: voice-coil resistance Re, "
        "in ohm (0 = resistive load; LC filter).",
    )
    speaker_coil_inductance_h: float = _key(
        0.0,
        "float",
        "a number from 0 to 0.1 (henry)",
        _float_range(0.0, 0.1),
        doc="Loudspeaker voice-coil inductance Le, in henry.",
    )
    speaker_resonance_hz: float = _key(
        0.0,
        "float",
        "a number from 0 to 20000 (Hz)",
        _float_range(0.0, 20000.0),
        doc="Loudspeaker free-air resonance fs, in Hz.",
    )
    speaker_mechanical_q: float = _key(
        0.0,
        "float",
        "a number from 0 to 100",
        _float_range(0.0, 100.0),
        doc="Loudspeaker mechanical quality factor Qms.",
    )
    speaker_electrical_q: float = _key(
        0.0,
        "float",
        "a number from 0 to 100",
        _float_range(0.0, 100.0),
        doc="Loudspeaker electrical quality factor Qes.",
    )

    @property
    def loudspeaker(self) -> bool:
        """True when the profile gives a loudspeaker load."""
        return any(getattr(self, k) > 0.0 for k in SPEAKER_KEYS)

    @property
    def on_resistance(self) -> bool:
        """True when a switch has on-resistance."""
        return self.high_side_on_ohm > 0.0 or self.low_side_on_ohm > 0.0

    @property
    def active(self) -> bool:
        """True when any key differs from the ideal converter (``parts`` alone does not)."""
        from dataclasses import replace

        return replace(self, parts=1) != ImpairmentSettings()


#: The [impairments] keys of a loudspeaker load, given all together or none.
SPEAKER_KEYS = (
    "speaker_coil_ohm",
    "speaker_coil_inductance_h",
    "speaker_resonance_hz",
    "speaker_mechanical_q",
    "speaker_electrical_q",
)

_SECTIONS = {
    "input": InputSettings,
    "upsampler": UpsamplerSettings,
    "modulator": ModulatorSettings,
    "output": OutputStageSettings,
    "reconstruction": ReconstructionSettings,
    "listening": ListeningSettings,
    "fixed_point": FixedPointSettings,
    "impairments": ImpairmentSettings,
}


@dataclass(frozen=True)
class ChainProfile:
    """One candidate chain: a name, a free-text description and one settings group per stage.

    Build it with :func:`load_profile` (from a file) or :func:`profile_from_dict`; change it
    with :func:`dataclasses.replace`. Frozen and hashable.
    """

    name: str = "unnamed"
    description: str = ""
    input: InputSettings = field(default_factory=InputSettings)
    upsampler: UpsamplerSettings = field(default_factory=UpsamplerSettings)
    modulator: ModulatorSettings = field(default_factory=ModulatorSettings)
    output: OutputStageSettings = field(default_factory=OutputStageSettings)
    reconstruction: ReconstructionSettings = field(default_factory=ReconstructionSettings)
    listening: ListeningSettings = field(default_factory=ListeningSettings)
    fixed_point: FixedPointSettings = field(default_factory=FixedPointSettings)
    impairments: ImpairmentSettings = field(default_factory=ImpairmentSettings)


# ---------------------------------------------------------------------------------------------
# Parsing
# ---------------------------------------------------------------------------------------------


def profile_from_dict(data: dict, *, source: str = "<profile>") -> ChainProfile:
    """Build a validated :class:`ChainProfile` from a nested dict (the parsed TOML).

    Parameters
    ----------
    data : dict
        Top-level keys ``name``, ``description`` and one table per section.
    source : str, keyword-only
        Name used in error messages (usually the file path).

    Returns
    -------
    ChainProfile

    Raises
    ------
    ProfileError
        Unknown key, wrong type, value out of range, or an inconsistent combination.
    """
    if not isinstance(data, dict):
        raise ProfileError(source, "", f"got {_describe(data)}; expected a table of settings")
    allowed = ["name", "description", *_SECTIONS]
    for key in data:
        if key not in allowed:
            raise ProfileError(source, key, f"unknown key; expected one of: {', '.join(allowed)}")
    values = {}
    for key in ("name", "description"):
        if key in data:
            if not isinstance(data[key], str):
                raise ProfileError(
                    source,
                    key,
                    f"got {_describe(data[key])} ({_type_name(data[key])}); expected a string",
                )
            values[key] = data[key]
    if "name" in values and not values["name"].strip():
        raise ProfileError(source, "name", "got an empty string; expected a non-empty name")
    for section, cls in _SECTIONS.items():
        if section in data:
            values[section] = _parse_section(cls, data[section], source, section)
    profile = ChainProfile(**values)
    _check_whole(profile, source)
    _check_fixed_point(profile, data.get("fixed_point", {}), source)
    _check_impairments(profile, source)
    modulator_table = data.get("modulator", {})
    if profile.modulator.explicit_ntf:
        for key in _DESIGN_KEYS:
            if key in modulator_table:
                raise ProfileError(
                    source,
                    f"modulator.{key}",
                    "applies only when the NTF is designed; this profile gives zeros and poles",
                )
    return profile


def parse_profile(text: str, *, source: str = "<profile>", default_name: str = "") -> ChainProfile:
    """Parse profile TOML text.

    Parameters
    ----------
    text : str
        TOML text.
    source : str, keyword-only
        Name used in error messages.
    default_name : str, keyword-only
        Name used when the text has no ``name`` key (a file's stem); empty keeps
        ``ChainProfile.name``'s default.

    Returns
    -------
    ChainProfile
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(source, "", f"not valid TOML ({exc})") from None
    if default_name and "name" not in data:
        data["name"] = default_name
    return profile_from_dict(data, source=source)


def load_profile(path) -> ChainProfile:
    """Read and validate a chain profile file.

    Parameters
    ----------
    path : str or path-like
        A TOML file. A profile without a ``name`` key is named after the file's stem.

    Returns
    -------
    ChainProfile

    Raises
    ------
    ProfileError
        Missing or unreadable file, invalid TOML, unknown key, wrong type, value out of range.
    """
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise ProfileError(str(p), "", f"cannot read the file ({exc.strerror or exc})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise ProfileError(
            str(p), "", "got bytes that are not UTF-8; expected a TOML text file"
        ) from None
    return parse_profile(text, source=str(p), default_name=p.stem)


#: The modulator keys of an NTF design (they do nothing when explicit zeros and poles are given).
_DESIGN_KEYS = ("order", "out_of_band_gain", "zero_layout", "zero_band_edge_hz")
