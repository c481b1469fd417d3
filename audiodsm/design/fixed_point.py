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
    "coefficient_integers",
    "csd_digits",
    "csd_nonzero_count",
    "csd_value",
    "quantize_coefficients",
    "round_to_csd",
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
