"""Unit elements of a multi-level DAC: their mismatch and the logic that selects them.

A multi-level NRZ DAC with ``levels`` levels is built from ``N = levels - 1`` nominally equal
unit elements (current sources or capacitors); code ``k`` turns ``k`` of them on. Each real
element's weight is ``1 + e_i``, ``e_i`` drawn once per part from a normal distribution with the
profile's relative standard deviation. Which ``k`` elements a code turns on decides where the
mismatch error goes in frequency:

==========================  ====================================  =========================
method                      publication                           mismatch error spectrum
==========================  ====================================  =========================
``thermometer``             (no shaping)                          static: harmonics (INL)
``random``                  Carley 1989                           white
``data-weighted``           Baird & Fiez 1995                     first-order shaped
``bidirectional-weighted``  Fujimori et al. 2000                  first-order shaped,
                                                                  fewer tones
``vector-second-order``     Schreier & Zhang 1995                 second-order shaped
==========================  ====================================  =========================

Elements are bipolar: selected ones add ``+(1 + e_i) / 2`` LSB, the others ``-(1 + e_i) / 2``,
so the stage's output for code ``k`` is the centred level ``k - N / 2`` (in LSB) plus the
mismatch error ``sum_selected(e_i) - sum(e_i) / 2``. Multiply by the LSB in volts for the NRZ
output. With zero mismatch the output is exactly the ideal NRZ level for every method.

The selection state (pointers, shaper memory, random generator) streams:
:meth:`UnitElements.process` on consecutive blocks equals one call, bit for bit.

References
----------
.. [1] L. R. Carley, "A noise-shaping coder topology for 15+ bit converters", IEEE J.
   Solid-State Circuits 24(2), 1989 (random selection / dynamic element matching).
.. [2] R. T. Baird and T. S. Fiez, "Linearity enhancement of multibit delta-sigma A/D and D/A
   converters using data weighted averaging", IEEE Trans. Circuits Syst. II 42(12), 1995.
.. [3] I. Fujimori et al., "A 90-dB SNR 2.5-MHz output-rate ADC using cascaded multibit
   delta-sigma modulation at 8x oversampling ratio", IEEE J. Solid-State Circuits 35(12), 2000
   (bi-directional DWA; from memory).
.. [4] R. Schreier and B. Zhang, "Noise-shaped multibit D/A convertor employing unit elements",
   Electronics Letters 31(20), 1995; R. Schreier and G. C. Temes, "Understanding Delta-Sigma
   Data Converters", IEEE/Wiley 2005, ch. 6 (element selection logic; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.limits import ELEMENT_MISMATCH_RANGE, ELEMENT_SELECTIONS
from audiodsm.stages import _element_kernels as _k

__all__ = [
    "SELECTION_METHODS",
    "MAX_ELEMENTS",
    "ElementState",
    "UnitElements",
    "draw_element_errors",
]

#: Element-selection methods, in the order of the table in the module docstring.
SELECTION_METHODS = ELEMENT_SELECTIONS

#: Most unit elements a stage models (a 1025-level DAC).
MAX_ELEMENTS = 1024


def draw_element_errors(n_elements: int, *, mismatch: float, seed: int) -> np.ndarray:
    """The relative weight errors ``e_i`` of one part's unit elements.

    Parameters
    ----------
    n_elements : int
        ``levels - 1``.
    mismatch : float
        Relative standard deviation of one element's weight (0.001 = 0.1 %).
    seed : int
        The part: the same seed draws the same part.

    Returns
    -------
    ndarray, shape (n_elements,)
        ``e_i``, each element's weight being ``1 + e_i``. The draws' mean is subtracted: a
        common error of all elements is a gain error (the chain's calibration divides it out),
        not mismatch; so the end points of the transfer are exact and the integral
        nonlinearity is measured from the end-point line.
    """
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0xE1E]))
    draws = float(mismatch) * rng.standard_normal(int(n_elements))
    return draws - draws.mean()


@dataclass(frozen=True)
class ElementState:
    """The selection logic's state between blocks (a value: arrays are copied out).

    ``pointers``: DWA pointers (forward, backward, parity); ``order`` and ``rng``: the random
    selection's index array and generator; ``past``: the vector shaper's last two errors.
    """

    pointers: np.ndarray
    order: np.ndarray
    rng: np.ndarray
    past: np.ndarray


class UnitElements:
    """One part's unit elements and the logic that selects them.

    Parameters
    ----------
    levels : int
        DAC levels (3 to ``MAX_ELEMENTS + 1``); ``levels - 1`` elements.
    method : str
        One of :data:`SELECTION_METHODS`.
    mismatch : float, keyword-only
        Relative standard deviation of an element's weight, 0 to 0.1.
    seed : int, keyword-only
        Draws the part (the element errors) and seeds random selection.
    errors : array_like, keyword-only, optional
        The element errors themselves (instead of drawing them).

    Attributes
    ----------
    errors : ndarray
        ``e_i`` of the part.
    """

    def __init__(self, levels, method="thermometer", *, mismatch=0.0, seed=0, errors=None):
        if isinstance(levels, bool) or not isinstance(levels, (int, np.integer)):
            raise ParameterError("levels", levels, f"an integer from 3 to {MAX_ELEMENTS + 1}")
        if not 3 <= levels <= MAX_ELEMENTS + 1:
            raise ParameterError("levels", levels, f"an integer from 3 to {MAX_ELEMENTS + 1}")
        if method not in SELECTION_METHODS:
            raise ParameterError(
                "method", method, "one of " + ", ".join(repr(m) for m in SELECTION_METHODS)
            )
        mismatch = float(mismatch)
        lo, hi = ELEMENT_MISMATCH_RANGE
        if not (np.isfinite(mismatch) and lo <= mismatch <= hi):
            raise ParameterError("mismatch", mismatch, f"a relative deviation from {lo} to {hi}")
        self.levels = int(levels)
        self.n_elements = self.levels - 1
        self.method = method
        self.seed = int(seed)
        if errors is None:
            errors = draw_element_errors(self.n_elements, mismatch=mismatch, seed=self.seed)
        errors = np.ascontiguousarray(errors, dtype=np.float64)
        if errors.shape != (self.n_elements,) or not np.isfinite(errors).all():
            raise ParameterError(
                "errors", f"array of shape {errors.shape}", f"{self.n_elements} finite numbers"
            )
        self.errors = errors
        self._half = self.n_elements / 2.0
        self._prefix = np.concatenate(([0.0], np.cumsum(errors)))
        # thermometer: the static error of each code (sum of the first k, less half the total)
        self.code_errors = self._prefix - 0.5 * self._prefix[-1]

    def initial_state(self) -> ElementState:
        """The state of a part just switched on (pointers at element 0)."""
        rng = np.random.SeedSequence([self.seed, 0x5E1]).generate_state(1, dtype=np.uint64)
        return ElementState(
            pointers=np.zeros(3, dtype=np.int64),
            order=np.arange(self.n_elements, dtype=np.int64),
            rng=rng,
            past=np.zeros((2, self.n_elements)),
        )

    def process(self, codes, state=None):
        """Select the elements for each code and return the analog level in LSB.

        Parameters
        ----------
        codes : array_like of int, shape (n,)
            DAC codes 0 .. levels-1 (see :func:`~audiodsm.stages.output_stage.level_codes`).
        state : ElementState, optional
            From the previous block; None starts at :meth:`initial_state`.

        Returns
        -------
        levels_lsb : ndarray, shape (n,)
            ``k - (levels - 1) / 2`` plus the mismatch error of the elements chosen, in LSB.
        state : ElementState
        """
        codes = np.ascontiguousarray(codes, dtype=np.int64)
        if codes.ndim != 1:
            raise ParameterError("codes", f"array of shape {codes.shape}", "shape (n,)")
        if codes.size and (codes.min() < 0 or codes.max() > self.n_elements):
            raise ParameterError("codes", "a code off the range", f"codes 0 to {self.n_elements}")
        st = state if state is not None else self.initial_state()
        pointers, order = st.pointers.copy(), st.order.copy()
        rng, past = st.rng.copy(), st.past.copy()
        out = np.empty(codes.size)
        m = self.method
        if m == "thermometer":
            _k.select_thermometer(codes, self._half, self.code_errors, out)
        elif m == "random":
            _k.select_random(codes, self._half, self.errors, rng, order, out)
        elif m in ("data-weighted", "bidirectional-weighted"):
            bidirectional = m == "bidirectional-weighted"
            _k.select_rotating(codes, self._half, self._prefix, pointers, bidirectional, out)
        else:
            _k.select_vector_shaped(codes, self._half, self.errors, past, out)
        return out, ElementState(pointers=pointers, order=order, rng=rng, past=past)
