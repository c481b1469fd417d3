"""The interpolation chain in fixed point: integer words and quantized taps, as the RTL runs it.

:class:`FixedPointUpsampler` runs the stages of an :class:`~audiodsm.stages.upsample.
UpsamplerDesign` (half-bands, droop compensator, final sinc^k or hold) in integers: every
signal between stages is a two's-complement word with a binary point (one word format for all
of them), every tap an integer with ``coefficient_fraction_bits`` fractional bits (optionally
limited to a number of canonic signed digits, shift-add), every output an exact sum rounded
once to the word by a rounding rule and fitted by an overflow rule. Either the whole cascade
runs so (``scope="all"``) or only its last stage, the one feeding the modulator
(``scope="last"``; the earlier stages are the float :class:`~audiodsm.stages.upsample.
Upsampler`'s, bit for bit). The per-sample loop is ``fixed_interpolate_row`` in
:mod:`audiodsm.stages._fixed_kernels`; its pure-Python twin is in
``tests/test_fixed_upsample.py``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from audiodsm.design.fixed_point import OVERFLOW_RULES, ROUNDING_RULES, NodeFormat, round_to_csd
from audiodsm.errors import ParameterError
from audiodsm.stages import _fixed_kernels, _rate_kernels
from audiodsm.stages.rate_common import _as_frames, _frozen, _phase_table, _to_frames
from audiodsm.stages.upsample import Upsampler, UpsamplerDesign

__all__ = [
    "INTERPOLATOR_SCOPES",
    "FixedInterpolatorFormat",
    "FixedPointUpsampler",
    "FixedUpsamplerState",
    "interpolator_format_from_settings",
]

#: Which stages of the interpolation chain run in fixed point: none, the last one, all.
INTERPOLATOR_SCOPES = ("float", "last", "all")
_ROUNDING_CODES = {"truncate": 0, "round-half-up": 1, "convergent": 2}
_MAX_BITS = 62  # every exact sum stays below 2**62 in magnitude (int64 with a bit to spare)
_FLOAT_EXACT_BITS = 53  # words up to this wide are exact as float64 values


def _frozen_words(a):
    a = np.array(a, dtype=np.int64, copy=True)
    a.setflags(write=False)
    return a


@dataclass(frozen=True)
class FixedInterpolatorFormat:
    """Word and taps of the fixed-point interpolator.

    Attributes
    ----------
    integer_bits : int
        Bits left of the binary point of every inter-stage word, sign not counted (1: the
        words hold [-2, 2), room for the filters' overshoot above full scale).
    fraction_bits : int
        Bits right of the binary point of every word.
    coefficient_fraction_bits : int
        Fractional bits of every tap.
    coefficient_digits : int
        At most this many non-zero canonic signed digits per tap (0: plain rounding).
    rounding : str
        One of ``ROUNDING_RULES``: how each output (and the float input) drops its surplus bits.
    overflow : str
        One of ``OVERFLOW_RULES``.
    """

    integer_bits: int = 1
    fraction_bits: int = 23
    coefficient_fraction_bits: int = 20
    coefficient_digits: int = 0
    rounding: str = "convergent"
    overflow: str = "saturate"

    def __post_init__(self):
        for name, lo, hi in (
            ("integer_bits", 0, 8),
            ("fraction_bits", 1, 48),
            ("coefficient_fraction_bits", 2, 40),
            ("coefficient_digits", 0, 16),
        ):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int | np.integer) or not lo <= v <= hi:
                raise ParameterError(name, v, f"an integer from {lo} to {hi}")
        if self.integer_bits + self.fraction_bits + 1 > _FLOAT_EXACT_BITS:
            raise ParameterError(
                "fraction_bits",
                self.fraction_bits,
                f"at most {_FLOAT_EXACT_BITS - 1 - self.integer_bits} (the words must be exact "
                "as float64 values)",
            )
        if self.rounding not in ROUNDING_RULES:
            raise ParameterError("rounding", self.rounding, f"one of {', '.join(ROUNDING_RULES)}")
        if self.overflow not in OVERFLOW_RULES:
            raise ParameterError("overflow", self.overflow, f"one of {', '.join(OVERFLOW_RULES)}")

    @property
    def word(self) -> NodeFormat:
        """The inter-stage word as a :class:`NodeFormat`."""
        return NodeFormat(
            "interpolator", self.integer_bits, self.fraction_bits, self.rounding, self.overflow
        )

    @property
    def step(self) -> float:
        """Value of one least significant bit of a word."""
        return 2.0**-self.fraction_bits


@dataclass(frozen=True, eq=False)
class FixedUpsamplerState:
    """Streaming state of a :class:`FixedPointUpsampler` (a value).

    Attributes
    ----------
    float_histories : ndarray, shape (float stages, channels, H)
        Histories of the float stages ahead of the fixed ones (none with ``scope="all"``).
    word_histories : tuple of ndarray of int64, shape (channels, taps - 1) each
        The last input words each fixed stage needs.
    overflow_count : int
        Outputs on which the overflow rule acted so far (all fixed stages).
    channels, ndim : int
        The stream's channel count and layout (1: (n,), 2: (n, channels)).
    """

    float_histories: np.ndarray
    word_histories: tuple
    overflow_count: int
    channels: int
    ndim: int


def _float_stage_taps(design: UpsamplerDesign) -> list:
    """Every stage of the chain in order as (interpolation taps with gain R, R)."""
    stages = [(2.0 * np.asarray(h, dtype=float), 2) for h in design.halfband_taps]
    stages.insert(1, (np.asarray(design.compensator_taps, dtype=float), 1))
    if design.final_order == 1:
        stages.append((np.ones(design.final_ratio), design.final_ratio))
    else:
        stages.append((np.asarray(design.final_taps, dtype=float), design.final_ratio))
    return stages


class FixedPointUpsampler:
    """The interpolation chain (or its last stage) in fixed-point arithmetic.

    Parameters
    ----------
    design : UpsamplerDesign
        The float design whose stages are run.
    fmt : FixedInterpolatorFormat
        Word, taps, rounding and overflow rules.
    scope : {"last", "all"}
        Only the last stage in integers (the float stages ahead of it are the float
        :class:`Upsampler`'s), or every stage.

    Notes
    -----
    The float signal entering the first fixed stage is fitted to the word by the format's
    rules (as :func:`audiodsm.stages.fixed_loop.quantize_words` does). Outputs are the words'
    values (word times step), exact in float64. A half-band runs as a two-phase FIR whose
    second phase is its centre tap (gain 2 x 1/2 = 1: a delay, exact in integers).

    References
    ----------
    .. [1] B. Widrow and I. Kollár, *Quantization Noise*, Cambridge University Press, 2008
       (each rounding as an additive error of power step**2/12).
    .. [2] R. E. Crochiere and L. R. Rabiner, *Multirate Digital Signal Processing*,
       Prentice-Hall, 1983 (polyphase interpolators).
    """

    def __init__(self, design: UpsamplerDesign, fmt: FixedInterpolatorFormat, scope: str = "all"):
        if not isinstance(design, UpsamplerDesign):
            raise ParameterError("design", type(design).__name__, "an UpsamplerDesign")
        if not isinstance(fmt, FixedInterpolatorFormat):
            raise ParameterError("fmt", type(fmt).__name__, "a FixedInterpolatorFormat")
        if scope not in ("last", "all"):
            raise ParameterError("scope", scope, "'last' or 'all'")
        self.design = design
        self.format = fmt
        self.scope = scope
        stages = _float_stage_taps(design)
        first = 0 if scope == "all" else len(stages) - 1
        self._float = Upsampler(design) if first else None
        self._float_stages = first
        fc = fmt.coefficient_fraction_bits
        self.tap_integers = []  # per fixed stage: integer taps (gain R x 2**fc)
        self._tables = []
        for taps, ratio in stages[first:]:
            ints = np.array(
                [
                    round_to_csd(float(t), fraction_bits=fc, max_digits=fmt.coefficient_digits)
                    for t in taps
                ],
                dtype=np.int64,
            )
            ints.setflags(write=False)
            self.tap_integers.append(ints)
            table, lengths = _phase_table(ints.astype(float), ratio)
            table = np.ascontiguousarray(
                np.array([[int(round(v)) for v in row] for row in table], dtype=np.int64)
            )
            widest = max(int(np.sum(np.abs(table[p]))) for p in range(ratio))
            if widest.bit_length() + fmt.integer_bits + fmt.fraction_bits + 1 > _MAX_BITS:
                raise ParameterError(
                    "coefficient_fraction_bits",
                    fc,
                    f"fewer bits: a stage's exact sums need more than {_MAX_BITS} bits",
                )
            self._tables.append((table, lengths, ratio))
        self.total_ratio = int(np.prod([r for _, r in stages]))

    @property
    def quantized_taps(self) -> list:
        """Each fixed stage's taps as values (integer over ``2**coefficient_fraction_bits``).

        Every stage's interpolation filter has gain R (its ratio); the stages are in order.
        """
        scale = 2.0**-self.format.coefficient_fraction_bits
        return [ints * scale for ints in self.tap_integers]

    @property
    def fixed_stage_ratios(self) -> list:
        """Interpolation ratio of each fixed stage, in order."""
        return [r for _, _, r in self._tables]

    def trace_words(self, x) -> list:
        """The words entering each fixed stage and leaving the last one, from rest.

        Parameters
        ----------
        x : array_like, shape (n,)
            One channel at the input rate.

        Returns
        -------
        list of ndarray of int64
            Input words of fixed stage 1, 2, ..., then the output words (what ``process``
            returns, divided by the step); the test vectors of a generated stage.
        """
        from audiodsm.stages.fixed_loop import quantize_words

        frames, ndim = _as_frames(x)
        if ndim != 1:
            raise ParameterError("x.shape", np.shape(x), "(frames,)")
        state = self.initial_state(1)
        if self._float is not None:
            frames, _ = self._float_prefix(np.ascontiguousarray(frames), state.float_histories)
        fmt = self.format
        words = quantize_words(frames[:, 0], fmt.word)
        trace = [words]
        for s, (table, lengths, ratio) in enumerate(self._tables):
            row = np.concatenate([state.word_histories[s][0], words])
            words = np.empty(len(trace[-1]) * ratio, dtype=np.int64)
            _fixed_kernels.fixed_interpolate_row(
                row,
                table,
                ratio,
                table.shape[1],
                lengths,
                words,
                fmt.coefficient_fraction_bits,
                _ROUNDING_CODES[fmt.rounding],
                fmt.integer_bits + fmt.fraction_bits + 1,
                fmt.overflow == "wrap",
            )
            trace.append(words)
        return trace

    def initial_state(self, channels: int = 1, *, ndim: int = 2) -> FixedUpsamplerState:
        """Zero histories for a stream of ``channels`` channels."""
        if self._float is not None:
            n_float = self._float_stages
            width = max(1, max(int(t) - 1 for t in self._float._cascade[2][:n_float]))
            held = np.zeros((n_float, channels, width))
        else:
            held = np.zeros((0, channels, 1))
        words = tuple(
            _frozen_words(np.zeros((channels, table.shape[1] - 1), dtype=np.int64))
            for table, _, _ in self._tables
        )
        return FixedUpsamplerState(_frozen(held), words, 0, channels, ndim)

    def _float_prefix(self, frames, held):
        """The float stages ahead of the fixed ones (the float Upsampler's kernel, its tables)."""
        kinds, ratios, taps, tables, lengths = self._float._cascade
        k = self._float_stages
        ratio = int(np.prod(ratios[:k]))
        out = np.empty((frames.shape[0] * ratio, frames.shape[1]))
        rest = np.empty_like(held)
        if frames.shape[0]:
            _rate_kernels.interpolate_cascade(
                frames.T,
                kinds[:k].copy(),
                ratios[:k].copy(),
                taps[:k].copy(),
                np.ascontiguousarray(tables[:k]),
                np.ascontiguousarray(lengths[:k]),
                held,
                out.T,
                rest,
            )
        else:
            rest[...] = held
        return out, rest

    def process(self, x, state: FixedUpsamplerState | None = None):
        """Interpolate one block.

        Parameters
        ----------
        x : array_like
            Block of shape (n,) or (n, channels) at the input rate.
        state : FixedUpsamplerState, optional
            From the previous call; None starts from silence.

        Returns
        -------
        y : numpy.ndarray
            Shape (n * osr,) or (n * osr, channels): the output words' values.
        state : FixedUpsamplerState
            Block-wise runs equal one run, bit for bit.
        """
        from audiodsm.stages.fixed_loop import quantize_words

        frames, ndim = _as_frames(x)
        n, channels = frames.shape
        if state is None:
            state = self.initial_state(channels, ndim=ndim)
        elif not isinstance(state, FixedUpsamplerState) or len(state.word_histories) != len(
            self._tables
        ):
            raise ParameterError("state", type(state).__name__, "a FixedUpsamplerState of this")
        elif state.channels != channels:
            raise ParameterError("x channels", channels, f"{state.channels} (as the state)")
        held = np.array(state.float_histories)
        if self._float is not None:
            frames, held = self._float_prefix(np.ascontiguousarray(frames), held)
        fmt = self.format
        rule = _ROUNDING_CODES[fmt.rounding]
        wrap = fmt.overflow == "wrap"
        word_bits = fmt.integer_bits + fmt.fraction_bits + 1
        shift = fmt.coefficient_fraction_bits
        overflows = state.overflow_count
        result = np.empty((n * self.total_ratio, channels))
        new_words = [np.empty_like(h) for h in state.word_histories]
        for c in range(channels):
            words = quantize_words(frames[:, c], fmt.word)
            for s, (table, lengths, ratio) in enumerate(self._tables):
                hist = state.word_histories[s][c]
                row = np.concatenate([hist, words])
                out = np.empty(len(words) * ratio, dtype=np.int64)
                overflows += int(
                    _fixed_kernels.fixed_interpolate_row(
                        row,
                        table,
                        ratio,
                        table.shape[1],
                        lengths,
                        out,
                        shift,
                        rule,
                        word_bits,
                        wrap,
                    )
                )
                new_words[s][c] = row[len(row) - hist.size :]
                words = out
            result[:, c] = words * fmt.step
        new_state = FixedUpsamplerState(
            _frozen(held),
            tuple(_frozen_words(w) for w in new_words),
            int(overflows),
            channels,
            ndim,
        )
        return _to_frames(result, ndim), new_state


def interpolator_format_from_settings(settings) -> FixedInterpolatorFormat:
    """The interpolator format a profile's ``[fixed_point]`` section describes.

    Parameters
    ----------
    settings : FixedPointSettings
        Its ``interpolator_*`` keys.

    Returns
    -------
    FixedInterpolatorFormat
    """
    return FixedInterpolatorFormat(
        integer_bits=settings.interpolator_integer_bits,
        fraction_bits=settings.interpolator_fraction_bits,
        coefficient_fraction_bits=settings.interpolator_coefficient_fraction_bits,
        coefficient_digits=settings.interpolator_coefficient_digits,
        rounding=settings.interpolator_rounding,
        overflow=settings.interpolator_overflow,
    )
