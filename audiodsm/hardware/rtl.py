"""The generated hardware: the fixed-point loop as an Amaranth HDL design, Verilog, simulation.

:class:`FeedbackLoopCircuit` describes the loop of a
:class:`~audiodsm.stages.fixed_loop.FixedPointModulator` as synchronous logic: one register per
state, one input word and one level index per clock. Every constant multiplier is written as
shifts and adds from the coefficient's canonic signed-digit form. :func:`verilog_text` emits
Verilog through Amaranth's yosys back end; :func:`simulate_words` runs Amaranth's own simulator
on input words, for the bit-for-bit comparison with the compiled model.

The arithmetic is the kernel's (:mod:`audiodsm.stages._fixed_kernels`): exact sums, one
rounding per state, its overflow rule, states updated from the last to the first with the
upstream state of a resonator pair reading the updated downstream state (combinationally, in
the same clock).

References
----------
.. [1] Amaranth HDL documentation, https://amaranth-lang.org/docs/amaranth/ (language,
   simulator, Verilog back end).
.. [2] G. W. Reitwiesner, "Binary arithmetic", *Advances in Computers* 1, 1960 (the
   canonic signed-digit form behind the shift-add multipliers).
"""

from __future__ import annotations

import numpy as np

from audiodsm.design.fixed_point import csd_digits

__all__ = [
    "INTERPOLATOR_MODULE_NAME",
    "MODULE_NAME",
    "FeedbackLoopCircuit",
    "InterpolatorStageCircuit",
    "interpolator_verilog_text",
    "simulate_interpolator_words",
    "simulate_words",
    "verilog_text",
]

#: Name of the generated Verilog module.
MODULE_NAME = "noise_shaper_loop"
#: Name of the generated Verilog module of the interpolator's last stage.
INTERPOLATOR_MODULE_NAME = "interpolator_last_stage"


def _times_constant(value, constant: int):
    """``value * constant`` as shifts and adds of the constant's CSD digits."""
    from amaranth.hdl import Const

    total = None
    for shift, digit in enumerate(csd_digits(int(constant))):
        if digit == 0:
            continue
        term = value << shift if shift else value
        if total is None:
            total = term if digit > 0 else -term
        else:
            total = total + term if digit > 0 else total - term
    return Const(0, 1) if total is None else total


def _round(acc, r: int, rule: str):
    """Drop ``r`` low bits of a signed value by a rounding rule."""
    if r == 0:
        return acc
    if rule == "truncate":
        return acc >> r
    if rule == "round-half-up":
        return (acc + (1 << (r - 1))) >> r
    q = acc >> r
    rem = acc.as_unsigned()[:r]
    half = 1 << (r - 1)
    bump = (rem > half) | ((rem == half) & q[0])
    return q + bump


def _fit(value, bits: int, rule: str):
    """Fit a signed value into ``bits`` by an overflow rule."""
    from amaranth.hdl import Mux

    hi = (1 << (bits - 1)) - 1
    lo = -hi - 1
    if rule == "wrap":
        return value.as_unsigned()[:bits].as_signed()
    return Mux(value > hi, hi, Mux(value < lo, lo, value))


def _elaboratable_base():
    from amaranth.hdl import Elaboratable

    return Elaboratable


class FeedbackLoopCircuit(_elaboratable_base()):
    """The fixed-point feedback loop as synchronous logic (an Amaranth ``Elaboratable``).

    Parameters
    ----------
    fx : FixedPointModulator
        The loop: coefficients, word formats, quantizer levels.

    Attributes
    ----------
    sample_in : Signal, signed
        The input word of this clock.
    level_out : Signal, unsigned
        The quantizer's level index of this clock (read from the states before the update).
    states : list of Signal
        The state registers (reset to 0).
    dither_in : Signal, signed, or None
        With dither: the dither word of this clock (the last state's fractional bits), added to
        the last state at the quantizer only.
    """

    def __init__(self, fx):
        from amaranth.hdl import Signal, signed, unsigned

        self.fx = fx
        fmt = fx.format
        self.sample_in = Signal(signed(fmt.input.word_bits), name="sample_in")
        self.level_out = Signal(unsigned(max(int(fx.levels - 1).bit_length(), 1)), name="level_out")
        self.states = [
            Signal(signed(s.word_bits), name=f"state_{i + 1}") for i, s in enumerate(fmt.states)
        ]
        self.dither_in = (
            Signal(signed(fx.dither_word_bits), name="dither_in") if fx.dither_lsb > 0 else None
        )

    def elaborate(self, platform):  # noqa: D102 - Amaranth's interface
        from amaranth.hdl import Module, Mux, Signal, signed

        fx = self.fx
        fmt = fx.format
        shifts = fx.alignment_shifts
        coef = fx.coefficient_table
        m = fx.m
        n = fmt.order
        mod = Module()
        y = self.states[-1]
        if self.dither_in is not None:
            width = max(len(y), len(self.dither_in)) + 1
            y_dithered = Signal(signed(width), name="quantizer_in")
            mod.d.comb += y_dithered.eq(y + self.dither_in)
            y = y_dithered
        f_last = fmt.states[-1].fraction_bits
        if m == 0:
            q = ~y[-1]
            v = Mux(q, 1, -1)
            mod.d.comb += self.level_out.eq(q)
        else:
            top = 1 << m
            raw = ((y << m) + (1 << (m + f_last)) + (1 << f_last)) >> (f_last + 1)
            clipped = Signal(signed(m + 2), name="level_index")
            mod.d.comb += clipped.eq(Mux(raw < 0, 0, Mux(raw > top, top, raw)))
            mod.d.comb += self.level_out.eq(clipped.as_unsigned())
            v = clipped - (1 << (m - 1))
        new = [None] * n
        for i in range(n - 1, -1, -1):
            node = fmt.states[i]
            acc = _times_constant(self.states[i], coef[0, i]) << int(shifts[0, i])
            if i > 0:
                acc = acc + (_times_constant(self.states[i - 1], coef[1, i]) << int(shifts[1, i]))
            else:
                acc = acc + (_times_constant(self.sample_in, coef[4, 0]) << int(shifts[1, 0]))
            acc = acc - (_times_constant(v, coef[3, i]) << int(shifts[2, i]))
            if i < n - 1:
                acc = acc - (_times_constant(new[i + 1], coef[2, i]) << int(shifts[3, i]))
            nxt = Signal(signed(node.word_bits), name=f"next_{i + 1}")
            mod.d.comb += nxt.eq(
                _fit(_round(acc, int(shifts[4, i]), node.rounding), node.word_bits, node.overflow)
            )
            new[i] = nxt
            mod.d.sync += self.states[i].eq(nxt)
        return mod

    @property
    def ports(self) -> list:
        """The module's ports besides ``clk`` and ``rst``."""
        extra = [self.dither_in] if self.dither_in is not None else []
        return [self.sample_in, *extra, self.level_out]


def verilog_text(fx) -> str:
    """Verilog of the loop, emitted by Amaranth's yosys back end (module ``MODULE_NAME``)."""
    from amaranth.back import verilog

    circuit = FeedbackLoopCircuit(fx)
    return verilog.convert(circuit, name=MODULE_NAME, ports=circuit.ports, emit_src=False)


def simulate_words(fx, words, dither=None) -> np.ndarray:
    """Run the generated design in Amaranth's simulator, one input word per clock.

    Parameters
    ----------
    fx : FixedPointModulator
        The loop.
    words : array_like of int
        Input words.
    dither : array_like of int, optional
        With a dithered loop: the dither word of each clock (``fx.dither_words``).

    Returns
    -------
    ndarray of int64
        The level index the design puts out on each clock, from reset.
    """
    from amaranth.sim import Simulator

    circuit = FeedbackLoopCircuit(fx)
    words = [int(w) for w in np.asarray(words, dtype=np.int64)]
    out = np.empty(len(words), dtype=np.int64)
    if circuit.dither_in is not None:
        dither = [int(d) for d in np.asarray(dither, dtype=np.int64)]

    async def bench(ctx):
        for t, w in enumerate(words):
            ctx.set(circuit.sample_in, w)
            if circuit.dither_in is not None:
                ctx.set(circuit.dither_in, dither[t])
            out[t] = ctx.get(circuit.level_out)
            await ctx.tick()

    sim = Simulator(circuit)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    return out


class InterpolatorStageCircuit(_elaboratable_base()):
    """The fixed-point interpolator's last stage as synchronous logic (an ``Elaboratable``).

    One output word per clock at the modulator rate; a new input word every R clocks (R the
    stage's ratio), presented on ``sample_in`` with ``load`` high for one clock. The clock on
    which ``load`` is high shifts the word into the tap registers and restarts the phase
    count; ``sample_out`` then gives phase 0 of that input, and phases 1 .. R-1 on the R - 1
    clocks after it: ``out[R i + p] = fit(round(sum_m h[p + m R] x[i - m]))``, the
    :func:`~audiodsm.stages._fixed_kernels.fixed_interpolate_row` arithmetic, every tap a
    shift-add of its CSD digits.

    Parameters
    ----------
    fu : FixedPointUpsampler
        Its last fixed stage is generated.

    Attributes
    ----------
    sample_in, sample_out : Signal, signed
        Input and output words (the format's word).
    load : Signal
        High for one clock with each new input word.
    """

    def __init__(self, fu):
        from amaranth.hdl import Signal, signed

        self.fu = fu
        fmt = fu.format
        bits = fmt.integer_bits + fmt.fraction_bits + 1
        self.sample_in = Signal(signed(bits), name="sample_in")
        self.load = Signal(name="load")
        self.sample_out = Signal(signed(bits), name="sample_out")

    def elaborate(self, platform):  # noqa: D102 - Amaranth's interface
        from amaranth.hdl import Module, Signal, signed

        fu = self.fu
        fmt = fu.format
        bits = fmt.integer_bits + fmt.fraction_bits + 1
        taps = [int(v) for v in fu.tap_integers[-1]]
        ratio = fu.fixed_stage_ratios[-1]
        n_hist = -(-len(taps) // ratio)  # input words one phase reads
        mod = Module()
        held = [Signal(signed(bits), name=f"tap_{m}") for m in range(n_hist)]
        phase = Signal(range(max(ratio, 2)), name="phase")
        with mod.If(self.load):
            mod.d.sync += held[0].eq(self.sample_in)
            mod.d.sync += [held[m].eq(held[m - 1]) for m in range(1, n_hist)]
            mod.d.sync += phase.eq(0)
        with mod.Elif(phase != ratio - 1):
            mod.d.sync += phase.eq(phase + 1)
        outputs = []
        for p in range(ratio):
            acc = None
            for m, c in enumerate(taps[p::ratio]):
                if c == 0:
                    continue
                term = _times_constant(held[m], c)
                acc = term if acc is None else acc + term
            if acc is None:
                from amaranth.hdl import Const

                acc = Const(0, 1)
            value = Signal(signed(bits), name=f"phase_{p}_out")
            mod.d.comb += value.eq(
                _fit(_round(acc, fmt.coefficient_fraction_bits, fmt.rounding), bits, fmt.overflow)
            )
            outputs.append(value)
        with mod.Switch(phase):
            for p in range(ratio):
                with mod.Case(p):
                    mod.d.comb += self.sample_out.eq(outputs[p])
        return mod

    @property
    def ports(self) -> list:
        """The module's ports besides ``clk`` and ``rst``."""
        return [self.sample_in, self.load, self.sample_out]


def interpolator_verilog_text(fu) -> str:
    """Verilog of the interpolator's last stage (module ``INTERPOLATOR_MODULE_NAME``)."""
    from amaranth.back import verilog

    circuit = InterpolatorStageCircuit(fu)
    return verilog.convert(
        circuit, name=INTERPOLATOR_MODULE_NAME, ports=circuit.ports, emit_src=False
    )


def simulate_interpolator_words(fu, words) -> np.ndarray:
    """Run the generated last stage in Amaranth's simulator on its input words.

    Parameters
    ----------
    fu : FixedPointUpsampler
        The interpolator.
    words : array_like of int
        Input words of its last stage, one per R clocks (``load`` high on the first).

    Returns
    -------
    ndarray of int64
        The output word of each clock (R per input word), from reset.
    """
    from amaranth.sim import Simulator

    circuit = InterpolatorStageCircuit(fu)
    ratio = fu.fixed_stage_ratios[-1]
    words = [int(w) for w in np.asarray(words, dtype=np.int64)]
    out = np.empty(len(words) * ratio, dtype=np.int64)

    async def bench(ctx):
        for i, w in enumerate(words):
            ctx.set(circuit.sample_in, w)
            ctx.set(circuit.load, 1)
            await ctx.tick()
            ctx.set(circuit.load, 0)
            for p in range(ratio):
                if p:
                    await ctx.tick()
                out[i * ratio + p] = ctx.get(circuit.sample_out)

    sim = Simulator(circuit)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    return out
