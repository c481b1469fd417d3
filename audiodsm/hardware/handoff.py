"""The hardware handoff: plan a fixed-point loop, check it, write the RTL engineer's folder.

:func:`plan_profile` runs the profile's float loop, plans the word of every node against a noise
budget (:func:`audiodsm.design.fixed_point.plan_word_lengths`) and checks that the quantized
coefficients still give a stable loop by the project's own stability search.
:func:`check_fixed_point` refuses a ``[fixed_point]`` section that cannot hold the loop.
:func:`write_handoff` writes, atomically, one folder per profile: the word formats and
coefficients as JSON (integers with their binary points), input and output test vectors from
the battery's stimuli (one hexadecimal word per line, for ``$readmemh``), the generated Verilog
and a README generated from the profile.
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from audiodsm.design.fixed_point import (
    COEFFICIENT_ROWS,
    coefficient_report,
    csd_digits,
    plan_word_lengths,
    smallest_coefficient_bits,
)
from audiodsm.errors import OutputError, ParameterError, ProfileError
from audiodsm.profile import ChainProfile, FixedPointSettings
from audiodsm.stages.fixed_loop import (
    FixedPointModulator,
    format_from_settings,
    in_band_noise_power,
)

__all__ = [
    "DEFAULT_VECTOR_SAMPLES",
    "FloatLoopFacts",
    "HandoffSummary",
    "check_fixed_point",
    "float_loop_facts",
    "hex_lines",
    "plan_profile",
    "profile_with_plan",
    "settings_from_plan",
    "stimulus_vectors",
    "write_handoff",
]

#: Modulator samples per stimulus in the test vectors.
DEFAULT_VECTOR_SAMPLES = 32768
_DEFAULT_RATE_HZ = 48000
_NOISE_RUN_SAMPLES = 1 << 18
_MARKER = "format.json"  # a folder holding it is taken as an earlier handoff folder


# ---------------------------------------------------------------------------------------------
# The design layer, reached from here only (names change with the design-layer vocabulary)
# ---------------------------------------------------------------------------------------------


def _limit_values(limit):
    """(stable amplitude, state peaks) of a stability-search result."""
    return float(limit.stable_amplitude), np.asarray(limit.state_peaks, dtype=float)


def _stability_search(modulator, osr):
    """The project's stability search on a float modulator -> (amplitude, state peaks)."""
    return _limit_values(modulator.probe_stability(osr=osr))


# ---------------------------------------------------------------------------------------------
# Facts from the float loop
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class FloatLoopFacts:
    """What the float loop of a profile tells the plan.

    Attributes
    ----------
    loop : LoopRealization
        The loop the chain runs (state-scaled as the profile asks).
    levels, osr : int
        Quantizer levels and oversampling ratio.
    rate_hz : int
        Audio rate the chain was built for; the modulator clock is ``rate_hz * osr``.
    input_scale : float
        Modulator input for a full-scale sample.
    stable_amplitude : float
        Largest stable sine amplitude at the modulator input (fraction of full scale).
    state_peaks : ndarray
        Peak |state| on a sine at that amplitude.
    loop_noise_power : float
        In-band noise of the float loop: the lower of a sine at half that amplitude and one
        80 dB lower.
    upsampler_design : object
        The chain's upsampler design (for the test vectors).
    signal_upsampler : object
        The upsampler of the chain's signal path: the float one, or the fixed-point one the
        profile's ``fixed_point.interpolator`` asks for (the test vectors go through it).
    band_edge_hz : float
        Upper edge of the audio band every in-band noise figure of the plan is taken over
        (from DC): the profile's ``modulator.zero_band_edge_hz`` (20 kHz unless set; the band
        the NTF zeros are spread over and the battery's 20 kHz upper limit), capped at half the
        audio rate.
    """

    loop: object
    levels: int
    osr: int
    rate_hz: int
    input_scale: float
    stable_amplitude: float
    state_peaks: np.ndarray
    loop_noise_power: float
    upsampler_design: object
    signal_upsampler: object
    band_edge_hz: float

    @property
    def band_ratio(self) -> float:
        """Modulator rate over twice the band edge: the band is 0..0.5/band_ratio per sample.

        It stands where the in-band functions take ``osr``; it equals the OSR when the band
        reaches half the audio rate.
        """
        return self.rate_hz * self.osr / (2.0 * self.band_edge_hz)


def _noise_tone(osr: float, samples: int, amplitude: float):
    """A coherent tone at 0.6 of the band edge (harmonics out of band) and its bin."""
    tone_bin = int(samples / osr / 2 * 0.6) | 1
    t = np.arange(samples)
    return amplitude * np.sin(2 * np.pi * tone_bin / samples * t), tone_bin


def _profile_error(profile, key, message):
    return ProfileError(f"profile {profile.name!r}", key, message)


def float_loop_facts(profile: ChainProfile, *, rate_hz: int = _DEFAULT_RATE_HZ) -> FloatLoopFacts:
    """Build the profile's chain and run its float loop for the plan.

    Raises
    ------
    ProfileError
        The loop is not a feedback loop, has no stable amplitude, or its levels are not on a
        binary grid.
    """
    from audiodsm.stages.chain import Chain

    mod = profile.modulator
    if mod.structure != "feedback":
        raise _profile_error(
            profile,
            "modulator.structure",
            f"got {mod.structure!r}; expected 'feedback' (the fixed-point loop's structure)",
        )
    chain = Chain.from_profile(profile, rate_hz, 1)
    modulator = chain.modulator
    osr = int(chain.osr)
    limit = chain.state_scaling_probe
    if limit is not None:
        amplitude, peaks = _limit_values(limit)
    else:
        amplitude, peaks = _stability_search(modulator, osr)
    if amplitude <= 0 or not np.all(peaks > 0):
        raise _profile_error(
            profile, "modulator", "the float loop has no stable amplitude to plan for"
        )
    # the loop's own noise where it is lowest of a loud and a quiet tone (a single-bit loop's
    # in-band noise falls by several dB at small inputs); exact silence is left out, where a
    # float loop settles into a limit cycle that any rounding breaks up
    band_edge_hz = min(float(mod.zero_band_edge_hz), 0.5 * rate_hz)
    band_ratio = rate_hz * osr / (2.0 * band_edge_hz)
    noise = np.inf
    for level in (0.5, 1e-4):
        x, tone_bin = _noise_tone(band_ratio, _NOISE_RUN_SAMPLES, level * amplitude)
        y, _ = modulator.run(x)
        noise = min(noise, in_band_noise_power(y, osr=band_ratio, tone_bin=tone_bin))
    return FloatLoopFacts(
        loop=modulator.loop,
        levels=int(mod.levels),
        osr=osr,
        rate_hz=int(rate_hz),
        input_scale=float(chain.input_scale),
        stable_amplitude=amplitude,
        state_peaks=peaks,
        loop_noise_power=float(noise),
        upsampler_design=chain.upsampler_design,
        signal_upsampler=chain.signal_upsampler,
        band_edge_hz=band_edge_hz,
    )


# ---------------------------------------------------------------------------------------------
# Planning
# ---------------------------------------------------------------------------------------------


def _quantized_stability(facts: FloatLoopFacts, fmt):
    """Stable amplitude of the float loop with the quantized coefficients (0 if none)."""
    from audiodsm.stages.modulator import Modulator

    fx = FixedPointModulator(facts.loop, fmt, facts.levels)
    if not np.all(np.isfinite(fx.quantized_loop.feedback)):
        return 0.0
    amplitude, _ = _stability_search(Modulator(fx.quantized_loop, levels=facts.levels), facts.osr)
    return amplitude


def plan_profile(
    profile: ChainProfile,
    *,
    rate_hz: int = _DEFAULT_RATE_HZ,
    budget_db: float = 20.0,
    margin_db: float = 6.0,
    rounding: str = "round-half-up",
    overflow: str = "saturate",
    coefficient_fraction_bits: int = 0,
    coefficient_digits: int = 0,
):
    """Plan the fixed-point loop of a profile from its float run and a noise budget.

    Parameters
    ----------
    profile : ChainProfile
        A profile with a feedback loop.
    rate_hz : int, keyword-only
        Audio rate the chain is built for.
    budget_db, margin_db, rounding, overflow, coefficient_fraction_bits, coefficient_digits
        See :func:`audiodsm.design.fixed_point.plan_word_lengths`.

    Returns
    -------
    plan : WordLengthPlan
    facts : FloatLoopFacts
    stable_amplitude : float
        Largest stable amplitude of the loop with quantized coefficients (stability search).

    Raises
    ------
    ProfileError
        No feedback loop or no stable amplitude.
    ParameterError
        A planning option out of range, or coefficients that no longer give a stable loop.
    """
    facts = float_loop_facts(profile, rate_hz=rate_hz)
    plan = plan_word_lengths(
        facts.loop,
        osr=facts.band_ratio,
        state_peaks=facts.state_peaks,
        loop_noise_power=facts.loop_noise_power,
        budget_db=budget_db,
        margin_db=margin_db,
        rounding=rounding,
        overflow=overflow,
        coefficient_fraction_bits=coefficient_fraction_bits,
        coefficient_digits=coefficient_digits,
    )
    stable = _quantized_stability(facts, plan.format)
    if not plan.coefficients.poles_inside or stable <= 0:
        raise ParameterError(
            "coefficient_fraction_bits",
            plan.coefficients.fraction_bits,
            "more bits: the quantized coefficients do not give a stable loop",
        )
    return plan, facts, stable


def settings_from_plan(plan) -> FixedPointSettings:
    """The ``[fixed_point]`` profile section a plan describes."""
    fmt = plan.format
    return FixedPointSettings(
        state_integer_bits=tuple(s.integer_bits for s in fmt.states),
        state_fraction_bits=tuple(s.fraction_bits for s in fmt.states),
        state_rounding=tuple(s.rounding for s in fmt.states),
        state_overflow=tuple(s.overflow for s in fmt.states),
        input_fraction_bits=fmt.input.fraction_bits,
        input_rounding=fmt.input.rounding,
        coefficient_fraction_bits=fmt.coefficient_fraction_bits,
        coefficient_digits=fmt.coefficient_digits,
    )


def profile_with_plan(profile: ChainProfile, plan) -> ChainProfile:
    """``profile`` with the loop keys of its ``[fixed_point]`` section replaced by the plan's.

    The ``interpolator*`` keys (the plan does not size the interpolator) are kept as they are.
    """
    planned = settings_from_plan(plan)
    loop_keys = {
        f.name: getattr(planned, f.name)
        for f in dataclasses.fields(planned)
        if not f.name.startswith("interpolator")
    }
    return dataclasses.replace(
        profile, fixed_point=dataclasses.replace(profile.fixed_point, **loop_keys)
    )


# ---------------------------------------------------------------------------------------------
# Checking a profile's fixed-point section
# ---------------------------------------------------------------------------------------------


def check_fixed_point(profile: ChainProfile, *, rate_hz: int = _DEFAULT_RATE_HZ):
    """Refuse a ``[fixed_point]`` section that cannot hold the loop; build the loop otherwise.

    Checks, each refused with one line naming the key and what would work: the section is
    there; every state's integer bits hold its peak in the float run at the maximum stable
    amplitude; the accumulators fit in 63 bits; the quantized coefficients give a stable loop
    (realized poles inside the unit circle and a stable amplitude in the stability search);
    the fixed-point loop runs a sine at that amplitude without any overflow.

    Returns
    -------
    modulator : FixedPointModulator
    facts : FloatLoopFacts

    Raises
    ------
    ProfileError
    """
    fp = profile.fixed_point
    if not fp.active:
        raise _profile_error(
            profile,
            "fixed_point.state_integer_bits",
            "the profile has no [fixed_point] section; `audiodsm plan` writes one",
        )
    facts = float_loop_facts(profile, rate_hz=rate_hz)
    try:
        fmt = format_from_settings(fp)
    except ParameterError as exc:
        raise _profile_error(profile, "fixed_point", str(exc)) from None
    for j, (node, peak) in enumerate(zip(fmt.states, facts.state_peaks, strict=True)):
        needed = max(int(np.floor(np.log2(peak))) + 1, 0)
        if node.integer_bits < needed:
            raise _profile_error(
                profile,
                "fixed_point.state_integer_bits",
                f"state {j + 1} needs at least {needed} integer bits (peak {peak:.3g} at the "
                f"maximum stable amplitude); got {node.integer_bits}",
            )
    try:
        fx = FixedPointModulator(
            facts.loop,
            fmt,
            facts.levels,
            dither_lsb=profile.modulator.dither_lsb,
            seed=profile.modulator.seed,
        )
    except ParameterError as exc:
        raise _profile_error(profile, "fixed_point.state_fraction_bits", str(exc)) from None
    report = coefficient_report(
        facts.loop,
        osr=facts.band_ratio,
        fraction_bits=fmt.coefficient_fraction_bits,
        digits=fmt.coefficient_digits,
    )
    if not report.poles_inside or _quantized_stability(facts, fmt) <= 0:
        try:
            works = smallest_coefficient_bits(
                facts.loop, osr=facts.band_ratio, digits=fmt.coefficient_digits
            ).fraction_bits
            hint = f"at least {works} bits keep the loop as designed"
        except ParameterError:
            hint = "more CSD digits (coefficient_digits)"
        raise _profile_error(
            profile,
            "fixed_point.coefficient_fraction_bits",
            f"got {fmt.coefficient_fraction_bits} (digits {fmt.coefficient_digits}): the "
            f"quantized coefficients do not give a stable loop; {hint}",
        )
    x, _ = _noise_tone(facts.band_ratio, _NOISE_RUN_SAMPLES, facts.stable_amplitude)
    _, st = fx.run(x)
    if st.overflow_count.any():
        j = int(np.argmax(st.overflow_count > 0))
        node = fmt.states[j]
        raise _profile_error(
            profile,
            "fixed_point.state_integer_bits",
            f"state {j + 1} overflowed {int(st.overflow_count[j])} times at the maximum stable "
            f"amplitude; it needs at least {node.integer_bits + 1} integer bits",
        )
    return fx, facts


# ---------------------------------------------------------------------------------------------
# Test vectors
# ---------------------------------------------------------------------------------------------


def _stimuli(rate_hz: int, audio_samples: int):
    """The battery's stimuli (AES17 practice), each ``audio_samples`` long at ``rate_hz``.

    Names are file-name safe. Levels and frequencies follow :class:`BatteryPlan`'s defaults.
    """
    from audiodsm import signals
    from audiodsm.evaluate.battery import BatteryPlan

    plan = BatteryPlan()
    seconds = audio_samples / rate_hz
    common = {"rate_hz": rate_hz, "duration_s": seconds}
    out = [
        ("tone_997hz_m1dbfs", signals.sine(997.0, -1.0, **common)),
        ("tone_997hz_m60dbfs", signals.sine(997.0, -60.0, **common)),
        ("silence", signals.silence(**common)),
        (
            "tone_image_m6dbfs",
            signals.sine(plan.image_tone_hz, plan.composite_level_dbfs, **common),
        ),
        (
            "twin_tone_smpte_m6dbfs",
            signals.twin_tone_smpte(plan.composite_level_dbfs, **common),
        ),
    ]
    return [(name, np.asarray(x, dtype=float)[:audio_samples]) for name, x in out]


def stimulus_vectors(fx: FixedPointModulator, facts: FloatLoopFacts, *, samples: int):
    """Input words and output level indices of the fixed-point loop on the battery's stimuli.

    Each stimulus is scaled by the chain's input scale, upsampled by the chain's upsampler
    (the fixed-point one when the profile asks for it), fitted to the input word and run
    through the loop from rest.

    Returns
    -------
    list of (name, input_words, output_indices)
    """
    audio = -(-samples // facts.osr)
    out = []
    for name, x in _stimuli(facts.rate_hz, audio):
        xu, _ = facts.signal_upsampler.process(x * facts.input_scale)
        words = fx.input_words(np.asarray(xu, dtype=float)[:samples])
        q, _ = fx.run_words(words)
        out.append((name, words, q))
    return out


def _interpolator_files(facts: FloatLoopFacts, samples: int) -> list:
    """(relative path, text) of the fixed-point interpolator's last stage: RTL and vectors.

    Empty unless the profile runs the interpolator in fixed point. The vectors are that
    stage's input words (one per R clocks) and output words (one per clock) on the battery's
    stimuli, from rest; ``samples`` output words each.
    """
    from audiodsm.hardware.rtl import INTERPOLATOR_MODULE_NAME, interpolator_verilog_text
    from audiodsm.stages.fixed_upsample import FixedPointUpsampler

    fu = facts.signal_upsampler
    if not isinstance(fu, FixedPointUpsampler):
        return []
    fmt = fu.format
    bits = fmt.integer_bits + fmt.fraction_bits + 1
    ratio = fu.fixed_stage_ratios[-1]
    out = [(f"rtl/{INTERPOLATOR_MODULE_NAME}.v", interpolator_verilog_text(fu))]
    audio = -(-samples // facts.osr)
    for name, x in _stimuli(facts.rate_hz, audio):
        words_in, words_out = fu.trace_words(x * facts.input_scale)[-2:]
        out.append((f"vectors/{name}_interp_in.hex", hex_lines(words_in[: samples // ratio], bits)))
        out.append((f"vectors/{name}_interp_out.hex", hex_lines(words_out[:samples], bits)))
    return out


def _interpolator_readme(fu) -> str:
    from audiodsm.hardware.rtl import INTERPOLATOR_MODULE_NAME

    fmt = fu.format
    bits = fmt.integer_bits + fmt.fraction_bits + 1
    ratio = fu.fixed_stage_ratios[-1]
    return "\n".join(
        [
            "",
            "## The interpolator's last stage",
            "",
            f"`rtl/{INTERPOLATOR_MODULE_NAME}.v`: the last stage of the fixed-point "
            f"interpolator (ratio {ratio}, taps with {fmt.coefficient_fraction_bits} fractional "
            f"bits as shift-adds, rounding {fmt.rounding}, overflow {fmt.overflow}). Ports: "
            f"`sample_in` ({bits}-bit signed word, binary point {fmt.fraction_bits}) with `load` "
            f"high for one clock every {ratio} clocks, `sample_out` (same format), one word per "
            "clock: phase 0 in the clock cycle after the edge that takes the load, phases "
            f"1..{ratio - 1} in the cycles after that.",
            f"`vectors/<stimulus>_interp_in.hex` and `_interp_out.hex`: its input words (one per "
            f"{ratio} clocks) and output words (one per clock) on the same stimuli, from reset. "
            "Its output is the loop's input before the loop's input word is fitted.",
            "",
        ]
    )


def hex_lines(words, bits: int) -> str:
    """Two's-complement words as hexadecimal text, one per line (``$readmemh`` format).

    References
    ----------
    .. [1] IEEE Std 1364-2005, *Verilog Hardware Description Language*, clause 17.2.9
       (``$readmemh``: hexadecimal numbers separated by white space; clause from memory).
    """
    digits = -(-bits // 4)
    mask = (1 << bits) - 1
    return "".join(f"{int(w) & mask:0{digits}x}\n" for w in words)


# ---------------------------------------------------------------------------------------------
# The folder
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class HandoffSummary:
    """What :func:`write_handoff` wrote."""

    folder: Path
    files: tuple
    vector_samples: int
    in_band_noise_dbfs: float
    float_in_band_noise_dbfs: float


def _format_dict(fx: FixedPointModulator) -> dict:
    fmt = fx.format

    def node(n):
        return {
            "node": n.name,
            "word_bits": n.word_bits,
            "integer_bits": n.integer_bits,
            "fraction_bits": n.fraction_bits,
            "binary_point": n.fraction_bits,
            "rounding": n.rounding,
            "overflow": n.overflow,
        }

    return {
        "input": node(fmt.input),
        "states": [node(s) for s in fmt.states],
        "quantizer": {
            "levels": fx.levels,
            "output": "level index q, unsigned, 0 .. levels - 1; value = q * 2/(levels-1) - 1",
            "output_bits": _output_bits(fx),
        },
    }


def _output_bits(fx) -> int:
    return max(int(fx.levels - 1).bit_length(), 1)


def _coefficient_dict(fx: FixedPointModulator) -> dict:
    fc = fx.format.coefficient_fraction_bits
    rows = {}
    for row in COEFFICIENT_ROWS:
        ints = fx.coefficients[row]
        rows[row] = [
            {
                "integer": int(c),
                "binary_point": fc,
                "value": c / 2.0**fc,
                "csd_digits_lsb_first": csd_digits(int(c)),
            }
            for c in ints
        ]
    return {
        "fraction_bits": fc,
        "csd_digit_limit": fx.format.coefficient_digits,
        "rows": rows,
    }


def _readme(profile, fx, facts, vectors, summary_noise, files) -> str:
    from audiodsm.hardware.rtl import MODULE_NAME

    fmt = fx.format
    clock = facts.rate_hz * facts.osr
    lines = [
        f"# Fixed-point noise shaper: {profile.name}",
        "",
        *([profile.description, ""] if profile.description else []),
        "Generated by audiodsm from the profile; every number below comes from it.",
        "",
        "## Rates",
        "",
        f"- Audio rate {facts.rate_hz} Hz, oversampling ratio {facts.osr}: the loop runs one "
        f"sample per clock at {clock} Hz (for 44.1 kHz material: {44100 * facts.osr} Hz).",
        f"- Loop: order {fx.order}, feedback structure, {fx.levels}-level quantizer.",
        "",
        "## Word formats (two's complement; `binary_point` = fractional bits)",
        "",
        "| node | word bits | integer bits | fraction bits | rounding | overflow |",
        "| --- | --- | --- | --- | --- | --- |",
    ]
    for n in (fmt.input, *fmt.states):
        lines.append(
            f"| {n.name} | {n.word_bits} | {n.integer_bits} | {n.fraction_bits} | "
            f"{n.rounding} | {n.overflow} |"
        )
    lines += [
        "",
        f"Coefficients: integers with {fmt.coefficient_fraction_bits} fractional bits"
        + (
            f", at most {fmt.coefficient_digits} non-zero canonic signed digits each"
            if fmt.coefficient_digits
            else ""
        )
        + " (`coefficients.json`).",
        "",
        "Each state update sums its products exactly, rounds once to the state's fractional "
        "bits by its rounding rule, then applies its overflow rule. States update from the "
        "last to the first; the upstream state of a resonator pair reads the updated "
        "downstream state. The quantizer reads the last state before the update.",
        "",
        "## Files",
        "",
        "| file | holds |",
        "| --- | --- |",
        "| `format.json` | word format of every node, quantizer output format |",
        "| `coefficients.json` | every coefficient: integer, binary point, value, CSD digits |",
        "| `plan.json` | coefficient effects on the NTF and the in-band noise check |",
        f"| `rtl/{MODULE_NAME}.v` | the generated loop (Verilog, one sample per clock) |",
    ]
    for name, _, _ in vectors:
        lines.append(
            f"| `vectors/{name}_in.hex` | input words ({fmt.input.word_bits} bits, two's "
            f"complement, binary point {fmt.input.fraction_bits}), one per line |"
        )
        lines.append(
            f"| `vectors/{name}_out.hex` | expected level index q ({_output_bits(fx)} bits), "
            "one per line |"
        )
        if fx.dither_lsb > 0:
            lines.append(
                f"| `vectors/{name}_dither.hex` | dither words ({fx.dither_word_bits} bits, "
                f"binary point {fmt.states[-1].fraction_bits}), one per line, for `dither_in` |"
            )
    lines += [
        "",
        f"Each vector file has {len(vectors[0][1])} words. Load with "
        '`$readmemh("vectors/<name>_in.hex", mem)` (IEEE Std 1364). Start from reset (all '
        "states zero); output word n is the level index for input word n (the quantizer reads "
        "the state before the input word is used).",
        "",
        "## Ports of the generated module",
        "",
        f"- `sample_in` ({fmt.input.word_bits}-bit signed input word), `level_out` "
        f"({_output_bits(fx)}-bit level index), `clk`, `rst` (synchronous, active high).",
        *(
            [
                f"- `dither_in` ({fx.dither_word_bits}-bit signed dither word, binary point "
                f"{fmt.states[-1].fraction_bits}): added to the last state at the quantizer "
                "only. The words are the model's TPDF dither (SplitMix64 on a counter seeded "
                f"from seed {fx.seed}); each vector starts the sequence afresh.",
            ]
            if fx.dither_lsb > 0
            else []
        ),
        "",
        "## Check",
        "",
        f"In-band noise of the fixed-point loop {summary_noise[0]:.1f} dBFS against "
        f"{summary_noise[1]:.1f} dBFS for the float loop over 0..{facts.band_edge_hz:g} Hz (a "
        "tone at 0.6 of that band edge at half the maximum stable amplitude).",
        "",
    ]
    return "\n".join(lines)


def _write_text(folder: Path, rel: str, text: str, files: list) -> None:
    path = folder / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    files.append(rel)


def _check_target(target: Path) -> None:
    """Refuse to replace anything but an empty folder or an earlier handoff folder."""
    if not target.exists():
        return
    if not target.is_dir():
        raise OutputError(f"{target}: exists and is not a folder; choose a new folder name")
    if any(target.iterdir()) and not (target / _MARKER).is_file():
        raise OutputError(
            f"{target}: exists and is not a handoff folder (no {_MARKER}); it would be "
            "replaced whole, so choose a new or empty folder"
        )


def write_handoff(
    profile: ChainProfile,
    folder,
    *,
    rate_hz: int = _DEFAULT_RATE_HZ,
    vector_samples: int = DEFAULT_VECTOR_SAMPLES,
) -> HandoffSummary:
    """Write the handoff folder of a profile with a ``[fixed_point]`` section.

    The folder is built under a temporary name beside ``folder`` and renamed into place when
    complete, so it is never half written. An existing folder of that name is replaced whole
    when it is empty or an earlier handoff folder (it holds ``format.json``); any other
    existing path is refused.

    Parameters
    ----------
    profile : ChainProfile
    folder : path-like
        The folder to write.
    rate_hz : int, keyword-only
        Audio rate (sets the clock rate in the README and the stimuli's sample rate).
    vector_samples : int, keyword-only
        Modulator samples per stimulus (at least 1024).

    Returns
    -------
    HandoffSummary

    Raises
    ------
    ProfileError
        The fixed-point section cannot hold the loop (see :func:`check_fixed_point`).
    OutputError
        The folder cannot be written.
    """
    from audiodsm.hardware.rtl import MODULE_NAME, verilog_text

    if isinstance(vector_samples, bool) or not isinstance(vector_samples, int | np.integer):
        raise ParameterError("vector_samples", vector_samples, "an integer >= 1024")
    if vector_samples < 1024:
        raise ParameterError("vector_samples", vector_samples, "an integer >= 1024")
    fx, facts = check_fixed_point(profile, rate_hz=rate_hz)
    vectors = stimulus_vectors(fx, facts, samples=int(vector_samples))
    x, tone_bin = _noise_tone(facts.band_ratio, _NOISE_RUN_SAMPLES, 0.5 * facts.stable_amplitude)
    y, _ = fx.run(x)
    fixed_noise = in_band_noise_power(y, osr=facts.band_ratio, tone_bin=tone_bin)
    noise_db = (
        10 * np.log10(fixed_noise / 0.5),
        10 * np.log10(facts.loop_noise_power / 0.5),
    )
    report = coefficient_report(
        facts.loop,
        osr=facts.band_ratio,
        fraction_bits=fx.format.coefficient_fraction_bits,
        digits=fx.format.coefficient_digits,
    )
    target = Path(folder)
    _check_target(target)
    parent = target.parent if str(target.parent) else Path(".")
    try:
        parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".partial", dir=parent))
    except OSError as exc:
        raise OutputError(f"{target}: cannot create the folder ({exc.strerror or exc})") from None
    files: list = []
    try:
        _write_text(tmp, "format.json", json.dumps(_format_dict(fx), indent=2) + "\n", files)
        _write_text(
            tmp, "coefficients.json", json.dumps(_coefficient_dict(fx), indent=2) + "\n", files
        )
        plan_data = {
            "profile": profile.name,
            "rate_hz": facts.rate_hz,
            "osr": facts.osr,
            "clock_hz": facts.rate_hz * facts.osr,
            "band_edge_hz": facts.band_edge_hz,
            "input_scale": facts.input_scale,
            "stable_amplitude": facts.stable_amplitude,
            "state_peaks": [float(p) for p in facts.state_peaks],
            "in_band_noise_dbfs": float(noise_db[0]),
            "float_in_band_noise_dbfs": float(noise_db[1]),
            "coefficient_effects": {
                "pole_shift": report.pole_shift,
                "zero_shift": report.zero_shift,
                "largest_ntf_gain": report.largest_gain,
                "design_largest_ntf_gain": report.design_largest_gain,
                "in_band_noise_change_db": report.in_band_noise_change_db,
                "signal_change_db": report.signal_change_db,
                "adders": report.adders,
            },
        }
        _write_text(tmp, "plan.json", json.dumps(plan_data, indent=2) + "\n", files)
        for name, words, q in vectors:
            _write_text(
                tmp, f"vectors/{name}_in.hex", hex_lines(words, fx.format.input.word_bits), files
            )
            _write_text(tmp, f"vectors/{name}_out.hex", hex_lines(q, _output_bits(fx)), files)
            if fx.dither_lsb > 0:
                dither, _ = fx.dither_words(len(words), fx.initial_state().dither_counter)
                _write_text(
                    tmp, f"vectors/{name}_dither.hex", hex_lines(dither, fx.dither_word_bits), files
                )
        _write_text(tmp, f"rtl/{MODULE_NAME}.v", verilog_text(fx), files)
        interpolator = _interpolator_files(facts, int(vector_samples))
        for rel, text in interpolator:
            _write_text(tmp, rel, text, files)
        readme = _readme(profile, fx, facts, vectors, noise_db, files)
        if interpolator:
            readme += _interpolator_readme(facts.signal_upsampler)
        _write_text(tmp, "README.md", readme, files)
        if target.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".old", dir=parent))
            os.replace(target, old / "previous")
            os.replace(tmp, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, target)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise OutputError(f"{target}: cannot write the folder ({exc.strerror or exc})") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return HandoffSummary(
        folder=target,
        files=tuple(files),
        vector_samples=int(vector_samples),
        in_band_noise_dbfs=float(noise_db[0]),
        float_in_band_noise_dbfs=float(noise_db[1]),
    )
