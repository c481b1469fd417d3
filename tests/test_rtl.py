"""Tests of the generated hardware (hardware/rtl.py): bit-for-bit against the model, Verilog."""

from __future__ import annotations

import numpy as np
import pytest

from audiodsm.design.fixed_point import FixedPointFormat, NodeFormat
from audiodsm.hardware.rtl import MODULE_NAME, simulate_words, verilog_text
from audiodsm.stages.fixed_loop import FixedPointModulator


def _loop(order):
    # a loop from the realization layer (the one design-layer call of this file)
    from audiodsm.design.ntf import NoiseTransfer
    from audiodsm.design.realize import LoopRealization

    ntf = NoiseTransfer.designed(order, osr=32, out_of_band_gain=1.5)
    return LoopRealization.for_ntf(ntf, structure="feedback")


def _mixed(order):
    """Every rounding and overflow rule, narrow words, CSD coefficients."""
    rules = ["truncate", "round-half-up", "convergent"]
    states = tuple(
        NodeFormat(
            f"state {i + 1}", 1 + i % 2, 9 + 2 * i, rules[i % 3], ("saturate", "wrap")[i % 2]
        )
        for i in range(order)
    )
    return FixedPointFormat(
        input=NodeFormat("input", 0, 12, "convergent", "saturate"),
        states=states,
        coefficient_fraction_bits=10,
        coefficient_digits=3,
    )


@pytest.mark.parametrize(("levels", "dither_lsb"), [(2, 0.0), (9, 0.0), (2, 0.4)])
def test_simulated_rtl_matches_the_model_bit_for_bit(levels, dither_lsb):
    # >= 20,000 clocks of Amaranth's simulator on the generated design against the compiled
    # integer loop; the narrow words make every rounding rule and both overflow rules act.
    # With dither the design takes the dither words on a port of its own (dither_in).
    fx = FixedPointModulator(_loop(4), _mixed(4), levels, dither_lsb=dither_lsb, seed=2)
    n = 20000
    t = np.arange(n)
    x = 0.7 * np.sin(2 * np.pi * 0.0031 * t) + 0.2 * np.sin(2 * np.pi * 0.011 * t)
    words = fx.input_words(x)
    expected, state = fx.run_words(words)
    assert state.overflow_count.sum() > 0  # the overflow logic is exercised
    dither, _ = fx.dither_words(n, fx.initial_state().dither_counter)
    np.testing.assert_array_equal(simulate_words(fx, words, dither), expected)
    if dither_lsb:
        assert np.any(
            FixedPointModulator(_loop(4), _mixed(4), levels).run_words(words)[0] != expected
        )
        errors, tops = _diagnostics(verilog_text(fx))
        assert errors == [] and tops == [MODULE_NAME]


def _diagnostics(text):
    import pyslang

    tree = pyslang.syntax.SyntaxTree.fromText(text, f"{MODULE_NAME}.v")
    compilation = pyslang.ast.Compilation()
    compilation.addSyntaxTree(tree)
    errors = [str(d.code) for d in compilation.getAllDiagnostics() if d.isError()]
    tops = [inst.name for inst in compilation.getRoot().topInstances]
    return errors, tops


def test_emitted_verilog_parses_and_elaborates_in_an_independent_front_end():
    # pyslang (the slang SystemVerilog compiler, IEEE 1800 front end) parses and elaborates
    # the Verilog that Amaranth's yosys back end wrote: no errors, one top module
    text = verilog_text(FixedPointModulator(_loop(5), FixedPointFormat.uniform(5), 17))
    errors, tops = _diagnostics(text)
    assert errors == []
    assert tops == [MODULE_NAME]
    # and the same check does catch a broken file
    broken, _ = _diagnostics(text.replace("endmodule", "assign level_out = ;\nendmodule"))
    assert broken


def _shipped_fixed_point_profiles():
    from pathlib import Path

    from audiodsm.profile import load_profile

    root = Path(__file__).resolve().parents[1] / "profiles"
    found = []
    for path in sorted(root.glob("*/*.toml")):
        if path.parent.name in ("specs", "spaces"):  # spec sheets and design spaces
            continue
        profile = load_profile(path)
        if profile.fixed_point.active:
            found.append(pytest.param(profile, id=path.stem))
    return found


def test_there_is_a_shipped_fixed_point_profile():
    assert len(_shipped_fixed_point_profiles()) >= 1


@pytest.mark.parametrize("profile", _shipped_fixed_point_profiles())
def test_shipped_profile_rtl_matches_its_test_vectors(profile):
    # the acceptance check: every shipped profile with a [fixed_point] section, its
    # generated design simulated on the handoff's own input vector (>= 20,000 clocks) gives
    # the handoff's expected output vector bit for bit
    from audiodsm.hardware.handoff import check_fixed_point, stimulus_vectors

    fx, facts = check_fixed_point(profile)
    vectors = dict((name, (w, q)) for name, w, q in stimulus_vectors(fx, facts, samples=20480))
    words, expected = vectors["tone_997hz_m1dbfs"]
    assert len(words) >= 20000 and np.abs(words).max() > 0
    np.testing.assert_array_equal(simulate_words(fx, words), expected)


@pytest.mark.parametrize(
    ("rounding", "overflow", "digits"), [("convergent", "saturate", 0), ("truncate", "wrap", 2)]
)
def test_simulated_interpolator_last_stage_matches_the_model_bit_for_bit(
    rounding, overflow, digits
):
    # the interpolator's last stage (sinc^4 by 2 of the default 64x chain) generated as RTL:
    # 20,000 output clocks of Amaranth's simulator against the compiled integer stage, and
    # the emitted Verilog parses and elaborates in pyslang. (Its taps are positive and sum to
    # 1 per phase, so no output leaves the word: the overflow logic is the loop test's.)
    from audiodsm.hardware.rtl import (
        INTERPOLATOR_MODULE_NAME,
        interpolator_verilog_text,
        simulate_interpolator_words,
    )
    from audiodsm.stages.fixed_upsample import FixedInterpolatorFormat, FixedPointUpsampler
    from audiodsm.stages.upsample import design_upsampler

    design = design_upsampler(48000.0, 64)
    fmt = FixedInterpolatorFormat(
        integer_bits=0,
        fraction_bits=15,
        coefficient_fraction_bits=6,
        coefficient_digits=digits,
        rounding=rounding,
        overflow=overflow,
    )
    fu = FixedPointUpsampler(design, fmt, "last")
    n = 20000 // 64 + 1
    t = np.arange(n)
    x = 0.999 * np.sign(np.sin(2 * np.pi * 0.013 * t)) * (t % 7 != 0) + 0.3 * np.sin(0.7 * t)
    x = np.clip(x, -1.0, 1.0)
    words_in, words_out = fu.trace_words(x)
    assert len(words_out) >= 20000
    np.testing.assert_array_equal(simulate_interpolator_words(fu, words_in), words_out)
    # the rounding acts: phase 0 (taps 1/8, 3/4, 1/8) drops three bits that are not all zero
    exact8 = words_in + 6 * np.r_[0, words_in[:-1]] + np.r_[0, 0, words_in[:-2]]
    assert np.count_nonzero(exact8 % 8) > 1000
    errors, tops = _diagnostics(interpolator_verilog_text(fu))
    assert errors == [] and tops == [INTERPOLATOR_MODULE_NAME]
