"""The bit-true fixed-point modulator: the feedback loop in integers, as the hardware runs it.

:class:`FixedPointModulator` takes a feedback :class:`~audiodsm.design.realize.LoopRealization`
and a :class:`~audiodsm.design.fixed_point.FixedPointFormat` (a word per node, rounding and
overflow rules, coefficient bits), quantizes the coefficients and runs the compiled integer loop
of :mod:`audiodsm.stages._fixed_kernels` block by block with explicit state. Its integer input
and output words are what the generated RTL (:mod:`audiodsm.hardware.rtl`) must reproduce.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from audiodsm.design.fixed_point import (
    COEFFICIENT_ROWS,
    FixedPointFormat,
    coefficient_integers,
    quantize_coefficients,
)
from audiodsm.errors import ParameterError
from audiodsm.stages import _fixed_kernels

__all__ = [
    "FixedLoopState",
    "FixedPointModulator",
    "format_from_settings",
    "in_band_noise_power",
    "quantize_words",
]

_ROUNDING_CODES = {"truncate": 0, "round-half-up": 1, "convergent": 2}
_OVERFLOW_CODES = {"saturate": 0, "wrap": 1}
_NO_DITHER = np.zeros(0, dtype=np.int64)
_MAX_BITS = 63  # int64 holds every intermediate value when all terms fit in this many bits


def _readonly(a):
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


def quantize_words(x, node) -> np.ndarray:
    """Float samples -> integer words of ``node`` (its rounding and overflow rules).

    Parameters
    ----------
    x : array_like
        Values (full-scale units for the input node).
    node : NodeFormat
        The word to fit them into.

    Returns
    -------
    ndarray of int64
        ``X`` with ``X * node.step`` the fixed-point value.
    """
    x = np.ascontiguousarray(x, dtype=np.float64)
    out = np.empty(x.shape, dtype=np.int64)
    _fixed_kernels.float_to_words(
        x.reshape(-1),
        out.reshape(-1),
        2.0**node.fraction_bits,
        _ROUNDING_CODES[node.rounding],
        node.word_bits,
        node.overflow == "wrap",
    )
    return out


@dataclass(frozen=True, eq=False)
class FixedLoopState:
    """What a :class:`FixedPointModulator` carries from one block to the next (a value).

    Attributes
    ----------
    words : ndarray of int64, shape (order,)
        The state words.
    peak_words : ndarray of int64, shape (order,)
        Largest |state word| so far.
    overflow_count : ndarray of int64, shape (order,)
        Samples on which each state's overflow rule acted.
    samples : int
        Samples processed so far.
    state_peak : ndarray, shape (order,)
        ``peak_words`` as values (word times the state's step), as a float loop reports them.
    dither_counter : int
        The dither generator's counter (a uint64 value; the float loop's ``rng_counter``).
    """

    words: np.ndarray
    peak_words: np.ndarray
    overflow_count: np.ndarray
    samples: int = 0
    state_peak: np.ndarray | None = None
    dither_counter: int = 0

    @property
    def overload_count(self) -> int:
        """All overflow events so far, summed over the states (the chain's overload tally)."""
        return int(np.sum(self.overflow_count))


class FixedPointModulator:
    """A feedback delta-sigma loop in fixed-point arithmetic, bit-true to its hardware.

    Parameters
    ----------
    loop : LoopRealization
        A ``"feedback"`` loop (usually the chain's state-scaled one). Its coefficients are
        quantized to ``fmt.coefficient_fraction_bits`` (and ``fmt.coefficient_digits`` CSD
        digits); ``output_weight`` must be 1 on the last state unless the quantizer has two
        levels (a sign decision ignores it).
    fmt : FixedPointFormat
        One word per state, the input word, the coefficient bits.
    levels : int
        Quantizer levels: 2, or ``2**m + 1`` for ``m`` from 1 to 16 (the levels then fall on a
        binary grid, step ``2**(1 - m)``).
    dither_lsb : float
        TPDF dither at the quantizer, peak amplitude in quantizer steps, as the float
        :class:`~audiodsm.stages.modulator.Modulator`'s (0: none).
    seed : int
        Seed of the dither generator (the float loop's first channel's stream).

    Notes
    -----
    Single channel; ``run`` takes ``(frames,)``. No overload guard: the hardware's overflow
    rules are the guard. ``state.overflow_count`` tells how often they acted. The dither is
    the float loop's sequence (same seed, same counter-based generator), each value rounded
    down to a word of the last state and added to it at the quantizer only
    (:meth:`dither_words`).

    References
    ----------
    .. [1] B. Widrow and I. Kollár, *Quantization Noise*, Cambridge University Press, 2008
       (the model each rounding node's added noise follows).
    """

    def __init__(
        self,
        loop,
        fmt: FixedPointFormat,
        levels: int = 2,
        *,
        dither_lsb: float = 0.0,
        seed: int = 0,
    ):
        if getattr(loop, "structure", None) != "feedback":
            raise ParameterError(
                "structure", getattr(loop, "structure", None), "'feedback' (fixed point)"
            )
        if not isinstance(fmt, FixedPointFormat):
            raise ParameterError("fmt", type(fmt).__name__, "a FixedPointFormat")
        if fmt.order != loop.order:
            raise ParameterError(
                "fmt.states", fmt.order, f"{loop.order} state formats, one per integrator"
            )
        if isinstance(levels, bool) or not isinstance(levels, int | np.integer):
            raise ParameterError("levels", levels, "2 or 2**m + 1 (3, 5, 9, 17, ...)")
        m = int(levels - 1).bit_length() - 1
        if levels < 2 or levels - 1 != 1 << m or m > 16:
            raise ParameterError("levels", levels, "2 or 2**m + 1 (3, 5, 9, 17, ... 65537)")
        if levels != 2 and loop.output_weight[-1] != 1.0:
            raise ParameterError(
                "levels", levels, "2 for a loop whose quantizer-facing state is scaled"
            )
        if not (np.isfinite(dither_lsb) and dither_lsb >= 0):
            raise ParameterError("dither_lsb", dither_lsb, "a finite number >= 0")
        if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
            raise ParameterError("seed", seed, "an integer >= 0")
        self.loop = loop
        self.format = fmt
        self.levels = int(levels)
        self.dither_lsb = float(dither_lsb)
        self.seed = int(seed)
        # the float loop's dither scale (Modulator._kernel_scalars: the quantizer reads the
        # last state divided by its output weight), times 2**F of the last state
        gain = float(loop.output_weight[-1]) if levels == 2 else 1.0
        self._dither_scale = (
            self.dither_lsb * (2.0 / (self.levels - 1)) / gain * 2.0 ** fmt.states[-1].fraction_bits
        )
        self.m = m
        fc = fmt.coefficient_fraction_bits
        self.coefficients = coefficient_integers(
            loop, fraction_bits=fc, max_digits=fmt.coefficient_digits
        )
        self.quantized_loop = quantize_coefficients(
            loop, fraction_bits=fc, max_digits=fmt.coefficient_digits
        )
        self.output_fraction_bits = max(m - 1, 0)
        self._coef = np.array([self.coefficients[r] for r in COEFFICIENT_ROWS], dtype=np.int64)
        self._shifts, self._rules = self._plan_shifts()
        self._quantizer = np.array(
            [m, fmt.states[-1].fraction_bits, self.output_fraction_bits], dtype=np.int64
        )
        node = fmt.input
        self._kernel_key = (
            self.order,
            m,
            int(fmt.states[-1].fraction_bits),
            tuple(tuple(int(v) for v in row) for row in self._coef),
            tuple(tuple(int(v) for v in row) for row in self._shifts),
            tuple(tuple(int(v) for v in row) for row in self._rules),
            (
                int(node.fraction_bits),
                _ROUNDING_CODES[node.rounding],
                int(node.word_bits),
                node.overflow == "wrap",
            ),
            float(2.0 / (self.levels - 1)),
            self.dither_lsb > 0.0,
        )
        self._kernels = {}  # compiled on first run: False on words, True on floats

    def _plan_shifts(self):
        """Alignment shifts per node, and a check that every intermediate fits in int64."""
        fmt = self.format
        n = fmt.order
        fc = fmt.coefficient_fraction_bits
        fv = self.output_fraction_bits
        v_bits = self.m + 1 if self.m > 0 else 2
        shifts = np.zeros((5, n), dtype=np.int64)
        rules = np.zeros((3, n), dtype=np.int64)
        for i, node in enumerate(fmt.states):
            src = fmt.states[i - 1] if i > 0 else fmt.input
            src_row = 1 if i > 0 else 4
            terms = [  # (row of the shift, coefficient, fraction bits, word bits of the source)
                (0, self._coef[0, i], node.fraction_bits, node.word_bits),
                (1, self._coef[src_row, i], src.fraction_bits, src.word_bits),
                (2, self._coef[3, i], fv, v_bits),
            ]
            if i < n - 1:
                nxt = fmt.states[i + 1]
                terms.append((3, self._coef[2, i], nxt.fraction_bits, nxt.word_bits))
            finest = max(f for _, _, f, _ in terms)
            widest = 0
            for row, c, f, w in terms:
                shifts[row, i] = finest - f
                widest = max(widest, int(abs(int(c))).bit_length() + w + finest - f)
            if widest + 2 > _MAX_BITS:
                raise ParameterError(
                    f"{node.name} accumulator",
                    f"{widest + 2} bits",
                    f"at most {_MAX_BITS} bits: fewer fractional bits at this node, its "
                    "neighbours or the coefficients",
                )
            shifts[4, i] = fc + finest - node.fraction_bits
            rules[0, i] = _ROUNDING_CODES[node.rounding]
            rules[1, i] = _OVERFLOW_CODES[node.overflow]
            rules[2, i] = node.word_bits
        last = fmt.states[-1]
        if last.word_bits + self.m + 2 > _MAX_BITS:
            raise ParameterError(f"{last.name} word_bits", last.word_bits, "fewer bits")
        return shifts, rules

    @property
    def order(self) -> int:
        """Number of states."""
        return self.loop.order

    @property
    def coefficient_table(self) -> np.ndarray:
        """Coefficient integers, shape (5, order), rows ``COEFFICIENT_ROWS`` (a copy)."""
        return self._coef.copy()

    @property
    def alignment_shifts(self) -> np.ndarray:
        """The alignment shifts of every state update, shape (5, order) (a copy).

        Rows: left shifts of the leak, chain (or input), feedback and resonator products,
        then the right shift to the state's binary point; one column per state.
        """
        return self._shifts.copy()

    @property
    def step(self) -> float:
        """Quantizer step in full-scale units."""
        return 2.0 / (self.levels - 1)

    def initial_state(self) -> FixedLoopState:
        """All state words zero; the dither counter seeded as the float loop's channel 1."""
        from audiodsm.stages.modulator import _splitmix

        zeros = np.zeros(self.order, dtype=np.int64)
        return FixedLoopState(
            _readonly(zeros),
            _readonly(zeros),
            _readonly(zeros),
            0,
            _readonly(np.zeros(self.order)),
            _splitmix(self.seed * 0x100000001 + 1),
        )

    @property
    def dither_word_bits(self) -> int:
        """Bits of a signed word that holds every dither word (0 without dither)."""
        if self.dither_lsb == 0.0:
            return 0
        return (int(np.floor(self._dither_scale)) + 1).bit_length() + 1

    def dither_words(self, frames: int, counter: int):
        """The dither words of ``frames`` samples from ``counter``; returns (words, counter).

        Each is ``floor(d * 2**F)`` with ``d`` the float loop's dither value of that sample
        (last-state units) and ``F`` the last state's fractional bits; all zero without dither.
        """
        out = np.zeros(frames, dtype=np.int64)
        if self.dither_lsb == 0.0:
            return out, int(counter)
        c = _fixed_kernels.dither_words(np.uint64(counter), self._dither_scale, out)
        return out, int(c)

    def input_words(self, x) -> np.ndarray:
        """Full-scale float input -> input words (the input node's rules)."""
        x = np.asarray(x, dtype=np.float64)
        if x.ndim != 1:
            raise ParameterError("x.shape", x.shape, "(frames,)")
        if not np.isfinite(x).all():
            raise ParameterError("x", "non-finite samples", "finite samples")
        return quantize_words(x, self.format.input)

    def levels_from_indices(self, q) -> np.ndarray:
        """Quantizer level indices -> output values in full-scale units."""
        return np.asarray(q, dtype=np.float64) * self.step - 1.0

    def run_words(self, words, state: FixedLoopState | None = None):
        """Run the loop on input words; return the level indices and the new state.

        Parameters
        ----------
        words : array_like of int, shape (frames,)
            Input words (``input_words`` makes them), within the input word's range.
        state : FixedLoopState or None
            From the previous call, or None to start from zero.

        Returns
        -------
        indices : ndarray of int64, shape (frames,)
            The quantizer's level index (0 .. levels - 1) per sample.
        state : FixedLoopState
            Block-by-block runs equal one run, bit for bit.
        """
        u = np.ascontiguousarray(words, dtype=np.int64)
        if u.ndim != 1:
            raise ParameterError("words.shape", u.shape, "(frames,)")
        out = np.empty(len(u), dtype=np.int64)
        return out, self._run_kernel(False, u, out, state)

    def _kernel(self, float_io):
        kernel = self._kernels.get(float_io)
        if kernel is None:
            kernel = _fixed_kernels.fixed_loop_kernel(self._kernel_key, float_io)
            self._kernels[float_io] = kernel
        return kernel

    def _run_kernel(self, float_io, u, out, state):
        if state is None:
            state = self.initial_state()
        elif not isinstance(state, FixedLoopState) or state.words.shape != (self.order,):
            raise ParameterError("state", type(state).__name__, "a FixedLoopState of this loop")
        st = np.array(state.words, dtype=np.int64)
        peaks = np.array(state.peak_words, dtype=np.int64)
        counts = np.array(state.overflow_count, dtype=np.int64)
        if self.dither_lsb > 0.0:
            dither, counter = self.dither_words(len(u), state.dither_counter)
        else:
            dither, counter = _NO_DITHER, state.dither_counter
        if self._kernel(float_io)(u, out, dither, st, peaks, counts) >= 0:
            hi = (1 << (self.format.input.word_bits - 1)) - 1
            raise ParameterError("words", "a word outside the input word", f"-{hi + 1}..{hi}")
        steps = np.array([node.step for node in self.format.states])
        return FixedLoopState(
            _readonly(st),
            _readonly(peaks),
            _readonly(counts),
            state.samples + len(u),
            _readonly(peaks * steps),
            counter,
        )

    def run(self, x, state: FixedLoopState | None = None, *, out=None):
        """Modulate full-scale float input; return output levels in full-scale units.

        The input is fitted to the input word (:meth:`input_words`'s rules) inside the
        compiled loop; the result equals ``levels_from_indices(run_words(input_words(x)))``
        bit for bit.

        Parameters
        ----------
        x : array_like, shape (frames,)
            Full-scale input.
        state : FixedLoopState or None
            From the previous call, or None to start from zero.
        out : ndarray of float64, shape (frames,), optional
            Written with the output and returned (no allocation).
        """
        x = np.ascontiguousarray(x, dtype=np.float64)
        if x.ndim != 1:
            raise ParameterError("x.shape", x.shape, "(frames,)")
        if not np.isfinite(x).all():
            raise ParameterError("x", "non-finite samples", "finite samples")
        if out is None:
            out = np.empty(len(x))
        elif (
            not isinstance(out, np.ndarray)
            or out.dtype != np.float64
            or out.shape != x.shape
            or not out.flags.c_contiguous
            or not out.flags.writeable
        ):
            raise ParameterError("out", type(out).__name__, f"a writable float64 array {x.shape}")
        new = self._run_kernel(True, x, out, state)
        return out, new

    def process(self, x, state: FixedLoopState | None = None):
        """Same as :meth:`run` (the stage interface)."""
        return self.run(x, state)

    def state_peaks(self, state: FixedLoopState) -> np.ndarray:
        """Peak |state| so far as values (word times step)."""
        return np.array(state.state_peak, dtype=float)


def in_band_noise_power(y, *, osr: float, tone_bin: int | None = None) -> float:
    """Output power in the band 0..0.5/osr that is not the test tone (DC included).

    Parameters
    ----------
    y : array_like, shape (n,)
        Loop output.
    osr : float, keyword-only
        Oversampling ratio.
    tone_bin : int or None, keyword-only
        FFT bin (of ``n``) of a coherent test tone to leave out; its bins are replaced by the
        mean of the neighbouring bins.

    Returns
    -------
    float
        Mean-square power (full-scale units squared): a mean ``m`` counts ``m**2``, white noise
        of variance ``s2`` counts ``s2 / osr``.

    Notes
    -----
    Kaiser window, beta = 20 (side lobes about 190 dB down, so the loop's large out-of-band
    noise does not leak into the band; main lobe about 6.5 bins each side); the periodogram
    is normalised so that its one-sided sum is the signal's mean square.

    References
    ----------
    .. [1] F. J. Harris, "On the use of windows for harmonic analysis with the discrete
       Fourier transform", Proc. IEEE 66(1), 1978 (window leakage and normalisation).
    """
    from scipy.signal import windows

    y = np.asarray(y, dtype=float)
    n = len(y)
    w = windows.kaiser(n, 20.0, sym=False)
    spec = np.abs(np.fft.rfft(y * w)) ** 2 / (n * np.sum(w**2))
    spec[1:] *= 2.0
    edge = int(np.floor(n * 0.5 / osr))
    band = spec[: edge + 1].copy()
    if tone_bin is not None:
        half = 10
        lo, hi = max(tone_bin - half, 0), min(tone_bin + half + 1, edge + 1)
        side = np.r_[band[max(lo - 2 * half, 0) : lo], band[hi : hi + 2 * half]]
        band[lo:hi] = side.mean()
    return float(band.sum())


def format_from_settings(settings) -> FixedPointFormat:
    """The loop format a profile's ``[fixed_point]`` section describes.

    Parameters
    ----------
    settings : FixedPointSettings
        An active section (``state_integer_bits`` given).

    Returns
    -------
    FixedPointFormat
    """
    from audiodsm.design.fixed_point import NodeFormat

    n = len(settings.state_integer_bits)
    rounding = settings.state_rounding or ("round-half-up",) * n
    overflow = settings.state_overflow or ("saturate",) * n
    states = tuple(
        NodeFormat(f"state {i + 1}", ib, fb, r, o)
        for i, (ib, fb, r, o) in enumerate(
            zip(
                settings.state_integer_bits,
                settings.state_fraction_bits,
                rounding,
                overflow,
                strict=True,
            )
        )
    )
    return FixedPointFormat(
        input=NodeFormat(
            "input", 0, settings.input_fraction_bits, settings.input_rounding, "saturate"
        ),
        states=states,
        coefficient_fraction_bits=settings.coefficient_fraction_bits,
        coefficient_digits=settings.coefficient_digits,
    )
