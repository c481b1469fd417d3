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
    a_open = np.column_stack([_linear_step(loop, np.eye(n)[j], 0.0, 0.0) for j in range(n)])
    b_feedback = _linear_step(loop, zero, 0.0, 1.0)
    c = np.asarray(loop.output_weight, dtype=float)
    a_cl = a_open + np.outer(b_feedback, c)
    entries = [_linear_step(loop, zero, 1.0, 0.0)]
    entries += [_linear_step(loop, zero, 0.0, 0.0, node=j, error=1.0) for j in range(n)]
    p = np.column_stack(entries)
    freqs = np.linspace(0.0, 0.5 / osr, points | 1)
    eye = np.eye(n)
    resp = np.empty((len(freqs), p.shape[1]), dtype=complex)
    for i, f in enumerate(freqs):
        z = np.exp(2j * np.pi * f)
        resp[i] = c @ np.linalg.solve(z * eye - a_cl, p)
    from scipy.integrate import simpson

    power = 2.0 * simpson(np.abs(resp) ** 2, x=freqs, axis=0)
    names = ("input",) + tuple(f"state {j + 1}" for j in range(n))
    return NodeNoiseGains(names, power, resp[0].real.copy())


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
