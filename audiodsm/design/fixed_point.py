"""Fixed-point loops: word formats, rounding and overflow rules, shift-add coefficients, the plan.

The float loops of :mod:`audiodsm.stages.modulator` compute in float64. The loop built in
hardware computes in integers: every node (the input word and each integrator state) is a
two's-complement word with a binary point, and every coefficient is an integer with a common
number of fractional bits, realized by a multiplier or, in canonic signed-digit (CSD) form, by a
few shifts and adders. This module holds what describes such a loop and plans it; the loop
itself runs in :mod:`audiodsm.stages.fixed_loop`.

Node arithmetic (the compiled kernel, its pure-Python twin in the tests and the generated RTL
all follow it): each state update of the feedback structure (see
:mod:`audiodsm.design.realize`) sums its products exactly, in a wide accumulator aligned to the
finest binary point among its terms, and then rounds once to the node's fractional bits (the
node's rounding rule) and fits the result into the node's word (its overflow rule).

Rounding rules: ``"truncate"`` (toward minus infinity: the arithmetic right shift),
``"round-half-up"`` (to nearest, ties toward plus infinity), ``"convergent"`` (to nearest,
ties to the even neighbour). Overflow rules: ``"saturate"`` (clip to the largest or smallest
word) and ``"wrap"`` (keep the low bits, two's-complement wrap-around).

References
----------
.. [1] G. W. Reitwiesner, "Binary arithmetic", *Advances in Computers* 1, Academic Press,
   1960, pp. 231-308 (the canonic signed-digit form; no two adjacent non-zero digits; fewest
   non-zero digits of all signed-digit forms).
.. [2] B. Widrow and I. Kollár, *Quantization Noise*, Cambridge University Press, 2008
   (the additive model of a rounding: a white error of power step^2/12, and for truncation a
   mean of minus half a step).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from audiodsm.errors import ParameterError

__all__ = [
    "COEFFICIENT_ROWS",
    "CoefficientReport",
    "NodePlan",
    "WordLengthPlan",
    "coefficient_report",
    "plan_word_lengths",
    "smallest_coefficient_bits",
    "OVERFLOW_RULES",
    "ROUNDING_RULES",
    "FixedPointFormat",
    "NodeFormat",
    "NodeNoiseGains",
    "coefficient_integers",
    "csd_digits",
    "csd_nonzero_count",
    "csd_value",
    "node_noise_gains",
    "quantize_coefficients",
    "round_to_csd",
    "rounding_noise_power",
]

ROUNDING_RULES = ("truncate", "round-half-up", "convergent")
OVERFLOW_RULES = ("saturate", "wrap")

#: Coefficient rows of the feedback structure, in the order the kernel and the RTL take them.
COEFFICIENT_ROWS = ("leak", "chain_gain", "resonator", "feedback", "input_gain")


# ---------------------------------------------------------------------------------------------
# Canonic signed-digit form
# ---------------------------------------------------------------------------------------------


def csd_digits(value: int) -> list[int]:
    """The canonic signed-digit form of an integer, least significant digit first.

    Parameters
    ----------
    value : int
        Any integer (negative values too).

    Returns
    -------
    list of int
        Digits in {-1, 0, +1} with ``sum(d * 2**i) == value``; no two adjacent digits are
        non-zero; empty for 0.

    Notes
    -----
    Reitwiesner's recoding, written as the usual scan: while the value is odd, the digit is
    ``2 - (value mod 4)`` (+1 when the next bit is 0, -1 when it is 1, which turns a run of
    ones into a carry), and the value minus the digit is halved.

    References
    ----------
    .. [1] G. W. Reitwiesner, "Binary arithmetic", *Advances in Computers* 1, 1960.
    """
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise ParameterError("value", value, "an integer")
    v = int(value)
    digits = []
    while v != 0:
        if v & 1:
            d = 2 - (v & 3)
            v -= d
        else:
            d = 0
        digits.append(d)
        v >>= 1
    return digits


def csd_value(digits) -> int:
    """The integer a signed-digit list (least significant first) stands for."""
    return sum(int(d) << i for i, d in enumerate(digits))


def csd_nonzero_count(value: int) -> int:
    """Number of non-zero CSD digits of ``value``: the adders a shift-add multiplier needs, +1."""
    return sum(1 for d in csd_digits(value) if d)


def round_to_csd(x: float, *, fraction_bits: int, max_digits: int = 0) -> int:
    """The integer ``c`` whose value ``c / 2**fraction_bits`` approximates ``x``.

    Parameters
    ----------
    x : float
        The coefficient.
    fraction_bits : int, keyword-only
        Fractional bits of the result (0 to 40).
    max_digits : int, keyword-only
        At most this many non-zero CSD digits (0: no limit, plain rounding to nearest).

    Returns
    -------
    int
        With no digit limit, ``round(x * 2**fraction_bits)`` (ties away from zero). With a
        limit, the sum of at most ``max_digits`` signed powers of two chosen greedily, each the
        power of two nearest to what is left (the usual way to fit a shift-add coefficient);
        its CSD form then has at most ``max_digits`` non-zero digits.
    """
    if not (isinstance(fraction_bits, int | np.integer) and 0 <= fraction_bits <= 40):
        raise ParameterError("fraction_bits", fraction_bits, "an integer from 0 to 40")
    if not (isinstance(max_digits, int | np.integer) and max_digits >= 0):
        raise ParameterError("max_digits", max_digits, "an integer >= 0 (0 = no limit)")
    if not math.isfinite(x):
        raise ParameterError("x", x, "a finite number")
    target = float(x) * 2.0**fraction_bits
    nearest = int(math.copysign(math.floor(abs(target) + 0.5), target))
    if max_digits == 0 or csd_nonzero_count(nearest) <= max_digits:
        return nearest
    total = 0
    for _ in range(max_digits):
        rest = target - total
        if abs(rest) < 0.5:
            break
        low = 1 << int(math.floor(math.log2(abs(rest))))
        step = low if abs(abs(rest) - low) <= abs(2 * low - abs(rest)) else 2 * low
        total += int(math.copysign(step, rest))
    return total


# ---------------------------------------------------------------------------------------------
# Word formats
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class NodeFormat:
    """The word of one node: two's complement, a sign bit, integer and fractional bits.

    Attributes
    ----------
    name : str
        ``"input"`` or ``"state 1"`` ... (states numbered from 1, from the input side).
    integer_bits : int
        Bits left of the binary point, sign not counted: the word holds
        ``[-2**integer_bits, 2**integer_bits - 2**-fraction_bits]``.
    fraction_bits : int
        Bits right of the binary point (the step is ``2**-fraction_bits``).
    rounding : str
        One of ``ROUNDING_RULES``.
    overflow : str
        One of ``OVERFLOW_RULES``.
    """

    name: str
    integer_bits: int
    fraction_bits: int
    rounding: str = "round-half-up"
    overflow: str = "saturate"

    def __post_init__(self):
        for key in ("integer_bits", "fraction_bits"):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, int | np.integer) or not 0 <= v <= 48:
                raise ParameterError(f"{self.name} {key}", v, "an integer from 0 to 48")
        if self.word_bits > 56:
            raise ParameterError(
                f"{self.name} word_bits", self.word_bits, "at most 56 bits (sign included)"
            )
        if self.rounding not in ROUNDING_RULES:
            raise ParameterError(
                f"{self.name} rounding", self.rounding, f"one of {', '.join(ROUNDING_RULES)}"
            )
        if self.overflow not in OVERFLOW_RULES:
            raise ParameterError(
                f"{self.name} overflow", self.overflow, f"one of {', '.join(OVERFLOW_RULES)}"
            )

    @property
    def word_bits(self) -> int:
        """Bits of the word: sign + integer + fraction."""
        return 1 + self.integer_bits + self.fraction_bits

    @property
    def step(self) -> float:
        """Value of one LSB."""
        return 2.0**-self.fraction_bits

    @property
    def largest(self) -> float:
        """Largest value the word holds."""
        return 2.0**self.integer_bits - self.step


@dataclass(frozen=True)
class FixedPointFormat:
    """Everything that makes a feedback loop a fixed-point loop.

    Attributes
    ----------
    input : NodeFormat
        The input word (the modulator-rate samples, full scale ±1).
    states : tuple of NodeFormat
        One per integrator, from the input side.
    coefficient_fraction_bits : int
        Fractional bits shared by every coefficient.
    coefficient_digits : int
        At most this many non-zero CSD digits per coefficient (0: no limit).
    """

    input: NodeFormat
    states: tuple
    coefficient_fraction_bits: int
    coefficient_digits: int = 0

    def __post_init__(self):
        f = self.coefficient_fraction_bits
        if isinstance(f, bool) or not isinstance(f, int | np.integer) or not 0 <= f <= 40:
            raise ParameterError("coefficient_fraction_bits", f, "an integer from 0 to 40")
        d = self.coefficient_digits
        if isinstance(d, bool) or not isinstance(d, int | np.integer) or not 0 <= d <= 16:
            raise ParameterError("coefficient_digits", d, "an integer from 0 (no limit) to 16")
        object.__setattr__(self, "states", tuple(self.states))

    @property
    def order(self) -> int:
        """Number of states."""
        return len(self.states)

    @classmethod
    def uniform(
        cls,
        order: int,
        *,
        integer_bits: int = 2,
        fraction_bits: int = 24,
        input_fraction_bits: int = 23,
        coefficient_fraction_bits: int = 24,
        coefficient_digits: int = 0,
        rounding: str = "round-half-up",
        overflow: str = "saturate",
    ) -> FixedPointFormat:
        """The same word for every state (a starting point and a test fixture)."""
        states = tuple(
            NodeFormat(f"state {i + 1}", integer_bits, fraction_bits, rounding, overflow)
            for i in range(order)
        )
        return cls(
            input=NodeFormat("input", 0, input_fraction_bits, "round-half-up", "saturate"),
            states=states,
            coefficient_fraction_bits=coefficient_fraction_bits,
            coefficient_digits=coefficient_digits,
        )

    def with_state(self, index: int, **changes) -> FixedPointFormat:
        """A copy with state ``index`` (0-based) changed (``fraction_bits=...`` etc.)."""
        states = list(self.states)
        states[index] = replace(states[index], **changes)
        return replace(self, states=tuple(states))


# ---------------------------------------------------------------------------------------------
# Quantized coefficients
# ---------------------------------------------------------------------------------------------


def coefficient_integers(loop, *, fraction_bits: int, max_digits: int = 0) -> dict:
    """The loop's coefficients as integers with ``fraction_bits`` fractional bits.

    Parameters
    ----------
    loop : LoopRealization
        A feedback loop (its ``leak``, ``chain_gain``, ``resonator``, ``feedback`` and
        ``input_gain`` are quantized; ``output_weight`` only scales a single-bit quantizer's
        input, whose sign does not see it).
    fraction_bits : int, keyword-only
        Fractional bits of every coefficient.
    max_digits : int, keyword-only
        Non-zero CSD digits allowed per coefficient (0: no limit).

    Returns
    -------
    dict
        ``{row: list of int}`` for each of ``COEFFICIENT_ROWS``.
    """
    if loop.structure != "feedback":
        raise ParameterError("structure", loop.structure, "'feedback' (the fixed-point loop)")
    out = {}
    for row in COEFFICIENT_ROWS:
        values = np.asarray(getattr(loop, row), dtype=float)
        out[row] = [
            round_to_csd(float(v), fraction_bits=fraction_bits, max_digits=max_digits)
            for v in values
        ]
    return out


def quantize_coefficients(loop, *, fraction_bits: int, max_digits: int = 0):
    """The loop with every coefficient replaced by its fixed-point value.

    Returns a ``LoopRealization`` whose coefficient arrays hold exactly
    ``integer / 2**fraction_bits`` (see :func:`coefficient_integers`); its realized NTF is what
    the fixed-point loop implements.
    """
    ints = coefficient_integers(loop, fraction_bits=fraction_bits, max_digits=max_digits)
    scale = 2.0**-fraction_bits
    changes = {row: np.array(ints[row], dtype=float) * scale for row in COEFFICIENT_ROWS}
    return replace(loop, **changes)


# ---------------------------------------------------------------------------------------------
# What each rounding node adds at the output (the linear model)
# ---------------------------------------------------------------------------------------------


def _linear_step(loop, x, u, w, node=-1, error=0.0):
    """One update of the feedback loop in float, optionally adding ``error`` at state ``node``.

    Mirrors the operation order of the integer kernel: the error lands on the new value of
    state ``node`` before the states upstream read it through their resonator term.
    """
    d, k, g, a, b = loop.leak, loop.chain_gain, loop.resonator, loop.feedback, loop.input_gain
    n = len(d)
    new = np.array(x, dtype=float)
    for i in range(n - 1, -1, -1):
        prev = k[i] * x[i - 1] if i > 0 else b[0] * u
        acc = d[i] * x[i] + prev - a[i] * w
        if i + 1 < n:
            acc = acc - g[i] * new[i + 1]
        if i == node:
            acc = acc + error
        new[i] = acc
    return new


@dataclass(frozen=True)
class NodeNoiseGains:
    """How an error made at each node reaches the loop output, in the linear model.

    Attributes
    ----------
    names : tuple of str
        ``"input"``, ``"state 1"`` ... ``"state n"``.
    in_band_power_gain : ndarray
        ``2 * integral_0^(0.5/osr) |H(f)|^2 df`` (f in cycles per sample): a white error of
        variance ``s2`` at the node adds ``s2 * gain`` of output power in the band 0..0.5/osr.
    dc_gain : ndarray
        ``H(0)``: a mean ``m`` at the node adds a DC of ``m * H(0)`` at the output.
    """

    names: tuple
    in_band_power_gain: np.ndarray
    dc_gain: np.ndarray


def node_noise_gains(loop, *, osr: float, points: int = 4097) -> NodeNoiseGains:
    """Transfer from each node's rounding error to the output, integrated over the band.

    Parameters
    ----------
    loop : LoopRealization
        A feedback loop (usually with its coefficients quantized).
    osr : float, keyword-only
        Oversampling ratio: the band is 0..0.5/osr cycles per sample.
    points : int, keyword-only
        Frequency points of the integration (Simpson's rule; odd).

    Returns
    -------
    NodeNoiseGains

    Notes
    -----
    The quantizer is the additive-noise model ``v = c x + e`` (``c`` = ``output_weight``), as
    for the realized NTF. An error ``eps`` at state ``j`` enters the state update as the
    vector ``p_j`` (one step of the update rule with only ``eps = 1`` present: it lands on
    ``x[j]`` and, through the resonator term, on the state upstream of a resonator pair); the
    input's error enters like the input. ``H(z) = c (zI - A_cl)^-1 p``.

    References
    ----------
    .. [1] B. Widrow and I. Kollár, *Quantization Noise*, Cambridge University Press, 2008
       (a rounding as an additive white error, independent of the signal).
    """
    if not (np.isfinite(osr) and osr >= 1):
        raise ParameterError("osr", osr, "a number >= 1")
    n = loop.order
    zero = np.zeros(n)
    entries = [_linear_step(loop, zero, 1.0, 0.0)]
    entries += [_linear_step(loop, zero, 0.0, 0.0, node=j, error=1.0) for j in range(n)]
    freqs = np.linspace(0.0, 0.5 / osr, points | 1)
    resp = _responses(loop, np.column_stack(entries), freqs)
    from scipy.integrate import simpson

    power = 2.0 * simpson(np.abs(resp) ** 2, x=freqs, axis=0)
    names = ("input",) + tuple(f"state {j + 1}" for j in range(n))
    return NodeNoiseGains(names, power, resp[0].real.copy())


def _responses(loop, entries, freqs) -> np.ndarray:
    """``c (zI - A_cl)^-1 p`` for every column ``p`` of ``entries`` at ``freqs``.

    Infinite where a pole sits on the unit circle at that frequency.
    """
    n = loop.order
    zero = np.zeros(n)
    a_open = np.column_stack([_linear_step(loop, np.eye(n)[j], 0.0, 0.0) for j in range(n)])
    c = np.asarray(loop.output_weight, dtype=float)
    a_cl = a_open + np.outer(_linear_step(loop, zero, 0.0, 1.0), c)
    eye = np.eye(n)
    out = np.empty((len(freqs), entries.shape[1]), dtype=complex)
    for i, f in enumerate(freqs):
        try:
            out[i] = c @ np.linalg.solve(np.exp(2j * np.pi * f) * eye - a_cl, entries)
        except np.linalg.LinAlgError:
            out[i] = np.inf
    return out


def _input_response(loop, freqs) -> np.ndarray:
    """Signal transfer (input to output) of the linearized feedback loop at ``freqs``."""
    entry = _linear_step(loop, np.zeros(loop.order), 1.0, 0.0)
    return _responses(loop, entry[:, None], freqs)[:, 0]


def rounding_noise_power(step: float, rule: str, power_gain: float, dc_gain: float) -> float:
    """In-band output power a rounding node adds, by the classic model.

    A white error of power ``step**2 / 12`` times the node's in-band power gain, plus, for
    truncation, the output DC its mean of minus half a step makes, ``(step/2 * H(0))**2``.

    References
    ----------
    .. [1] B. Widrow and I. Kollár, *Quantization Noise*, Cambridge University Press, 2008
       (uniform quantization error: variance step^2/12; truncation: mean -step/2).
    """
    if rule not in ROUNDING_RULES:
        raise ParameterError("rounding", rule, f"one of {', '.join(ROUNDING_RULES)}")
    white = step**2 / 12.0 * power_gain
    if rule == "truncate":
        white += (0.5 * step * dc_gain) ** 2
    return float(white)


# ---------------------------------------------------------------------------------------------
# The word-length plan
# ---------------------------------------------------------------------------------------------

_FULL_SCALE_SINE_POWER = 0.5  # mean square of a 0 dBFS sine (AES17): levels in dBFS below


def _dbfs(power: float) -> float:
    return float(10.0 * np.log10(max(power, 1e-300) / _FULL_SCALE_SINE_POWER))


def _realized_ntf(loop):
    """The NTF computed back from a loop's own coefficients (the one design-layer call here)."""
    return loop.realized_ntf()


def _in_band_power_gain(response, osr: float, points: int = 4097) -> float:
    """``2 * integral_0^(0.5/osr) |H(f)|^2 df`` of a response function (Simpson's rule)."""
    from scipy.integrate import simpson

    f = np.linspace(0.0, 0.5 / osr, points | 1)
    return float(2.0 * simpson(np.abs(response(f)) ** 2, x=f))


def _largest_gain(response, points: int = 8193) -> float:
    f = np.linspace(0.0, 0.5, points)
    return float(np.max(np.abs(response(f))))


@dataclass(frozen=True)
class CoefficientReport:
    """What quantizing the coefficients did to the loop.

    Attributes
    ----------
    fraction_bits, digits : int
        The coefficient format (``digits`` 0: no CSD limit).
    largest_error : float
        Largest |quantized - exact| over all coefficients.
    zeros, poles : ndarray
        The realized NTF's zeros and poles.
    zero_shift, pole_shift : float
        Largest distance a zero / pole moved from the design (roots paired to minimise the
        total distance).
    largest_gain, design_largest_gain : float
        Largest |NTF| over frequency, realized and designed.
    in_band_noise_change_db : float
        Change of the NTF's in-band power gain (realized over designed), dB.
    adders : int
        Adders a shift-add realization of all coefficients needs (non-zero CSD digits - 1,
        summed over the coefficients that are not 0 or a power of two).
    signal_change_db : float
        Largest change of the signal transfer's magnitude in band (realized over the exact
        loop's), dB.
    """

    fraction_bits: int
    digits: int
    largest_error: float
    zeros: np.ndarray
    poles: np.ndarray
    zero_shift: float
    pole_shift: float
    largest_gain: float
    design_largest_gain: float
    in_band_noise_change_db: float
    adders: int
    signal_change_db: float = 0.0

    @property
    def poles_inside(self) -> bool:
        """True when every realized pole is inside the unit circle."""
        return bool(np.all(np.abs(self.poles) < 1.0))


def _largest_move(moved, design) -> float:
    """Largest distance between paired roots, paired to minimise the total distance."""
    from scipy.optimize import linear_sum_assignment

    moved = np.asarray(moved, dtype=complex)
    design = np.asarray(design, dtype=complex)
    cost = np.abs(moved[:, None] - design[None, :])
    rows, cols = linear_sum_assignment(cost)
    return float(cost[rows, cols].max()) if len(rows) else 0.0


def coefficient_report(loop, *, osr: float, fraction_bits: int, digits: int = 0):
    """Quantize ``loop``'s coefficients and compare the realized NTF with the design.

    Parameters
    ----------
    loop : LoopRealization
        The exact (float) feedback loop.
    osr : float, keyword-only
        Oversampling ratio (for the in-band noise change).
    fraction_bits, digits : int, keyword-only
        The coefficient format.

    Returns
    -------
    CoefficientReport
    """
    quantized = quantize_coefficients(loop, fraction_bits=fraction_bits, max_digits=digits)
    design = _realized_ntf(loop)
    realized = _realized_ntf(quantized)
    errors = [
        np.max(np.abs(np.asarray(getattr(quantized, r)) - np.asarray(getattr(loop, r))))
        for r in COEFFICIENT_ROWS
    ]
    ints = coefficient_integers(loop, fraction_bits=fraction_bits, max_digits=digits)
    adders = sum(max(csd_nonzero_count(c) - 1, 0) for row in ints.values() for c in row)
    with np.errstate(divide="ignore", invalid="ignore"):  # a pole may land on the circle
        g_design = _in_band_power_gain(design.response, osr)
        g_real = _in_band_power_gain(realized.response, osr)
        largest, design_largest = _largest_gain(realized.response), _largest_gain(design.response)
    freqs = np.linspace(0.0, 0.5 / osr, 257)
    with np.errstate(divide="ignore", invalid="ignore"):
        stf_ratio = np.abs(_input_response(quantized, freqs) / _input_response(loop, freqs))
        signal_change = float(np.max(np.abs(20 * np.log10(stf_ratio))))
    return CoefficientReport(
        signal_change_db=signal_change,
        fraction_bits=int(fraction_bits),
        digits=int(digits),
        largest_error=float(max(errors)),
        zeros=np.asarray(realized.zeros, dtype=complex),
        poles=np.asarray(realized.poles, dtype=complex),
        zero_shift=_largest_move(realized.zeros, design.zeros),
        pole_shift=_largest_move(realized.poles, design.poles),
        largest_gain=largest,
        design_largest_gain=design_largest,
        in_band_noise_change_db=float(10 * np.log10(g_real / g_design)),
        adders=int(adders),
    )


def smallest_coefficient_bits(
    loop,
    *,
    osr: float,
    digits: int = 0,
    noise_change_db: float = 0.1,
    gain_change: float = 0.02,
    signal_change_db: float = 0.001,
) -> CoefficientReport:
    """The fewest coefficient fractional bits (4 to 32) that leave the loop nearly as designed.

    Accepted when the realized poles are inside the unit circle, the in-band noise gain moved
    by at most ``noise_change_db``, the largest NTF gain by at most the fraction
    ``gain_change`` and the in-band signal transfer by at most ``signal_change_db`` (this
    project's thresholds; the last keeps the passband flat to far below the ±0.005 dB of an
    audio interpolator, common practice in DAC datasheets).
    """
    report = None
    for bits in range(4, 33):
        report = coefficient_report(loop, osr=osr, fraction_bits=bits, digits=digits)
        if (
            report.poles_inside
            and abs(report.in_band_noise_change_db) <= noise_change_db
            and abs(report.largest_gain / report.design_largest_gain - 1) <= gain_change
            and report.signal_change_db <= signal_change_db
        ):
            return report
    raise ParameterError(
        "coefficient_digits",
        digits,
        "more CSD digits (or 0 for no limit): even 32 fractional bits do not keep the NTF",
    )


@dataclass(frozen=True)
class NodePlan:
    """One row of the plan.

    Attributes
    ----------
    name : str
        ``"input"`` or ``"state j"``.
    peak : float
        Peak |value| seen in the float run (full-scale units).
    integer_bits, fraction_bits : int
        The planned word (sign bit not counted).
    rounding : str
        The node's rounding rule.
    added_noise_dbfs : float
        In-band noise this node's rounding adds at the output, by the classic model.
    """

    name: str
    peak: float
    integer_bits: int
    fraction_bits: int
    rounding: str
    added_noise_dbfs: float

    @property
    def word_bits(self) -> int:
        """Sign + integer + fraction."""
        return 1 + self.integer_bits + self.fraction_bits


@dataclass(frozen=True)
class WordLengthPlan:
    """Word lengths of every node and the coefficient format, with the noise they add.

    Attributes
    ----------
    format : FixedPointFormat
        The planned loop format.
    nodes : tuple of NodePlan
        Input first, then the states.
    loop_noise_dbfs : float
        In-band noise of the float loop (its own quantization noise).
    added_noise_dbfs : float
        Sum of what all rounding nodes add in band (classic model).
    budget_db, margin_db : float
        The planning targets: added noise this far under the loop's; range this far over the
        observed peaks.
    coefficients : CoefficientReport
        What coefficient quantization did to the NTF.
    """

    format: FixedPointFormat
    nodes: tuple
    loop_noise_dbfs: float
    added_noise_dbfs: float
    budget_db: float
    margin_db: float
    coefficients: CoefficientReport

    def table(self) -> str:
        """The plan as an aligned text table: node, range, bits, added in-band noise."""
        head = ("node", "peak", "range", "word", "int", "frac", "rounding", "added dBFS")
        rows = [head]
        for node in self.nodes:
            rows.append(
                (
                    node.name,
                    f"{node.peak:.4g}",
                    f"±{2.0**node.integer_bits:g}",
                    str(node.word_bits),
                    str(node.integer_bits),
                    str(node.fraction_bits),
                    node.rounding,
                    f"{node.added_noise_dbfs:.1f}",
                )
            )
        widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
        lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)) for r in rows]
        c = self.coefficients
        digits = f", at most {c.digits} CSD digits" if c.digits else ""
        lines += [
            "",
            f"loop noise in band {self.loop_noise_dbfs:.1f} dBFS; rounding adds "
            f"{self.added_noise_dbfs:.1f} dBFS (budget: {self.budget_db:g} dB under)",
            f"coefficients: {c.fraction_bits} fractional bits{digits}, {c.adders} adders; "
            f"poles moved {c.pole_shift:.2e}, zeros moved {c.zero_shift:.2e}; largest NTF gain "
            f"{c.largest_gain:.3f} (design {c.design_largest_gain:.3f}); in-band noise "
            f"{c.in_band_noise_change_db:+.3f} dB; signal transfer within "
            f"{c.signal_change_db:.4f} dB",
        ]
        return "\n".join(lines)

    def to_dict(self) -> dict:
        """Plain data (for JSON)."""
        c = self.coefficients
        return {
            "loop_noise_dbfs": self.loop_noise_dbfs,
            "added_noise_dbfs": self.added_noise_dbfs,
            "budget_db": self.budget_db,
            "margin_db": self.margin_db,
            "nodes": [
                {
                    "node": n.name,
                    "peak": n.peak,
                    "integer_bits": n.integer_bits,
                    "fraction_bits": n.fraction_bits,
                    "word_bits": n.word_bits,
                    "rounding": n.rounding,
                    "added_noise_dbfs": n.added_noise_dbfs,
                }
                for n in self.nodes
            ],
            "coefficients": {
                "fraction_bits": c.fraction_bits,
                "csd_digits": c.digits,
                "adders": c.adders,
                "largest_error": c.largest_error,
                "pole_shift": c.pole_shift,
                "zero_shift": c.zero_shift,
                "largest_ntf_gain": c.largest_gain,
                "design_largest_ntf_gain": c.design_largest_gain,
                "in_band_noise_change_db": c.in_band_noise_change_db,
                "signal_change_db": c.signal_change_db,
                "realized_poles": [[p.real, p.imag] for p in c.poles],
                "realized_zeros": [[z.real, z.imag] for z in c.zeros],
            },
        }


def _fraction_bits_for(share: float, rule: str, gain: float, dc: float, floor: int) -> int:
    """Fewest fractional bits whose rounding adds at most ``share`` of in-band power."""
    per_step2 = gain / 12.0 + (0.25 * dc * dc if rule == "truncate" else 0.0)
    if per_step2 <= 0:
        return floor
    step = np.sqrt(share / per_step2)
    return int(min(max(np.ceil(-np.log2(step)), floor), 48))


def plan_word_lengths(
    loop,
    *,
    osr: float,
    state_peaks,
    loop_noise_power: float,
    budget_db: float = 20.0,
    margin_db: float = 6.0,
    rounding: str = "round-half-up",
    overflow: str = "saturate",
    coefficient_fraction_bits: int = 0,
    coefficient_digits: int = 0,
    min_fraction_bits: int = 8,
) -> WordLengthPlan:
    """Plan the word of every node from a float run and a noise budget.

    Parameters
    ----------
    loop : LoopRealization
        The exact feedback loop (state-scaled as the chain runs it).
    osr : float, keyword-only
        Oversampling ratio.
    state_peaks : array_like, shape (order,)
        Peak |state| of the float loop on a sine at its maximum stable amplitude.
    loop_noise_power : float
        In-band noise power of the float loop (full-scale units squared).
    budget_db : float, keyword-only
        All rounding nodes together add at most the loop's noise minus this many dB; each of
        the ``order + 1`` nodes gets an equal share.
    margin_db : float, keyword-only
        Range above the observed peaks (6 dB: twice the peak).
    rounding, overflow : str, keyword-only
        Rules for every node.
    coefficient_fraction_bits : int, keyword-only
        0: the fewest that keep the NTF (:func:`smallest_coefficient_bits`).
    coefficient_digits : int, keyword-only
        CSD digit limit per coefficient (0: none).
    min_fraction_bits : int, keyword-only
        No node gets fewer (keeps each rounding's error busy enough for the white model).

    Returns
    -------
    WordLengthPlan

    References
    ----------
    .. [1] B. Widrow and I. Kollár, *Quantization Noise*, Cambridge University Press, 2008
       (each rounding's added noise, see :func:`rounding_noise_power`).
    """
    peaks = np.asarray(state_peaks, dtype=float)
    if peaks.shape != (loop.order,) or not np.all(np.isfinite(peaks)) or np.any(peaks <= 0):
        raise ParameterError("state_peaks", peaks.tolist(), f"{loop.order} positive numbers")
    if not (np.isfinite(loop_noise_power) and loop_noise_power > 0):
        raise ParameterError("loop_noise_power", loop_noise_power, "a positive number")
    if rounding not in ROUNDING_RULES:
        raise ParameterError("rounding", rounding, f"one of {', '.join(ROUNDING_RULES)}")
    if overflow not in OVERFLOW_RULES:
        raise ParameterError("overflow", overflow, f"one of {', '.join(OVERFLOW_RULES)}")
    if coefficient_fraction_bits:
        report = coefficient_report(
            loop, osr=osr, fraction_bits=coefficient_fraction_bits, digits=coefficient_digits
        )
    else:
        report = smallest_coefficient_bits(loop, osr=osr, digits=coefficient_digits)
    if not report.poles_inside:
        raise ParameterError(
            "coefficient_fraction_bits",
            coefficient_fraction_bits,
            "more bits (or 0 to choose): these coefficients put an NTF pole on or outside "
            "the unit circle",
        )
    quantized = quantize_coefficients(
        loop, fraction_bits=report.fraction_bits, max_digits=report.digits
    )
    gains = node_noise_gains(quantized, osr=osr)
    share = loop_noise_power * 10 ** (-budget_db / 10) / len(gains.names)
    margin = 10 ** (margin_db / 20)
    nodes = []
    all_peaks = np.r_[1.0, peaks]  # the input word holds full scale
    for j, name in enumerate(gains.names):
        g, dc = gains.in_band_power_gain[j], gains.dc_gain[j]
        frac = _fraction_bits_for(share, rounding, g, dc, min_fraction_bits)
        integer = 0 if j == 0 else max(int(np.floor(np.log2(all_peaks[j] * margin))) + 1, 0)
        added = rounding_noise_power(2.0**-frac, rounding, g, dc)
        nodes.append(NodePlan(name, float(all_peaks[j]), integer, frac, rounding, _dbfs(added)))
    states = tuple(
        NodeFormat(n.name, n.integer_bits, n.fraction_bits, rounding, overflow) for n in nodes[1:]
    )
    fmt = FixedPointFormat(
        input=NodeFormat("input", 0, nodes[0].fraction_bits, rounding, "saturate"),
        states=states,
        coefficient_fraction_bits=report.fraction_bits,
        coefficient_digits=report.digits,
    )
    total = sum(10 ** (n.added_noise_dbfs / 10) * _FULL_SCALE_SINE_POWER for n in nodes)
    return WordLengthPlan(
        format=fmt,
        nodes=tuple(nodes),
        loop_noise_dbfs=_dbfs(loop_noise_power),
        added_noise_dbfs=_dbfs(total),
        budget_db=float(budget_db),
        margin_db=float(margin_db),
        coefficients=report,
    )
