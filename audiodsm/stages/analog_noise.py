"""The analog side's own noise, referred to the converter's output.

White noise of one-sided density ``D`` (V/sqrt(Hz)) over the frame rate ``fs`` has, averaged
over each frame of length ``T = 1/fs``, independent frame means of variance ``D^2 fs / 2``
(the integral of white noise over disjoint intervals): that is the exact frame-mean sequence
the chain adds to its analog output, so ``D^2 B`` falls in any band ``B`` well below ``fs``.
The optional 1/f part (corner ``f_c``: density ``D^2 (1 + f_c / f)``) is a sum of
first-order relaxation processes with corners spaced a factor ``ratio`` apart from 1 Hz to
``fs / 8`` (weights ``2 ln(ratio) / pi * D^2 f_c / f_k``): the sum of their Lorentzian spectra
approximates ``D^2 f_c / f`` within a few tenths of a dB between the outer corners (the
standard construction; e.g. Keshner, Proc. IEEE 70(3), 1982, from memory).

References
----------
.. [1] M. S. Keshner, "1/f noise", Proc. IEEE 70(3), 1982 (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.stages import _element_kernels as _k

__all__ = ["AnalogNoise", "NoiseState"]

#: Spacing of the relaxation corners of the 1/f part (two per decade).
_CORNER_RATIO = math.sqrt(10.0)
#: Most frames a slow relaxation process is held between its updates.
_MAX_HOLD = 1024


@dataclass(frozen=True)
class NoiseState:
    """Between blocks: the relaxation processes' values, the generator's state, frames done."""

    relax: tuple
    generator: int  # splitmix64 state of the normal draws (_element_kernels.normal_draws)
    frames: int = 0


class AnalogNoise:
    """Output-referred analog noise, as exact frame means.

    Parameters
    ----------
    frame_rate_hz : float
    density_v : float, keyword-only
        One-sided white density, V/sqrt(Hz).
    corner_hz : float, keyword-only
        1/f corner (0: white only).
    seed : int, keyword-only
    """

    def __init__(self, frame_rate_hz, *, density_v, corner_hz=0.0, seed=0):
        self.frame_rate_hz = float(frame_rate_hz)
        if not (math.isfinite(density_v) and density_v >= 0.0):
            raise ParameterError("density_v", density_v, "a density of at least 0 V/sqrt(Hz)")
        if not (math.isfinite(corner_hz) and 0.0 <= corner_hz < self.frame_rate_hz / 8):
            raise ParameterError("corner_hz", corner_hz, "a corner from 0 to an eighth of fs")
        self.density_v = float(density_v)
        self.corner_hz = float(corner_hz)
        self.seed = int(seed)
        self.frame_std = self.density_v * math.sqrt(self.frame_rate_hz / 2.0)
        corners = []
        if self.corner_hz > 0.0:
            f = 1.0
            while f < self.frame_rate_hz / 8:
                corners.append(f)
                f *= _CORNER_RATIO
        corners = np.array(corners)
        weight = 2.0 * math.log(_CORNER_RATIO) / math.pi * self.density_v**2 * self.corner_hz
        level = weight / corners if corners.size else corners  # S0 of each Lorentzian
        # a first-order process of one-sided density S0 / (1 + (f/fk)^2) has variance
        # S0 pi fk / 2; an AR(1) with pole a and input gain b has b^2 / (1 - a^2)
        variance = level * np.pi * corners / 2.0
        # a slow process is updated every `hold` frames (its AR(1) over that step) and held
        # between: its corner stays below 1/64 of its update rate, so the hold changes its
        # spectrum by less than 0.05 dB up to 10 corners, where faster processes take over
        # (tests/test_analog_noise.py checks the sum analytically). It saves most draws.
        hold = np.floor(np.log2(self.frame_rate_hz / (64.0 * corners))) if corners.size else []
        self._holds = np.clip(2 ** np.maximum(hold, 0), 1, _MAX_HOLD).astype(np.int64)
        self._poles = np.exp(-2.0 * np.pi * corners * self._holds / self.frame_rate_hz)
        self._gains = np.sqrt(variance * (1.0 - self._poles**2))

    def initial_state(self) -> NoiseState:
        """The processes at rest, the generator freshly seeded."""
        seeded = np.random.SeedSequence([self.seed, 0xA0]).generate_state(1, dtype=np.uint64)
        return NoiseState(relax=(0.0,) * self._poles.size, generator=int(seeded[0]))

    def process(self, count: int, state=None):
        """The next ``count`` frame means of the noise (volts) and the new state."""
        st = state if state is not None else self.initial_state()
        rng = np.array([st.generator], dtype=np.uint64)
        # the draws in frame order (white, then the processes updated on that frame): any
        # split into blocks draws the same numbers in the same order
        first, end = st.frames, st.frames + count
        updates = int(np.sum(-(-end // self._holds) - (-(-first // self._holds))))
        draws = np.empty(count + updates)
        _k.normal_draws(rng, 1.0, draws)
        noise = np.empty(count)
        relax = np.array(st.relax, dtype=np.float64)
        _k.relaxation_noise(
            draws, first, self.frame_std, self._poles, self._gains, self._holds, relax, noise
        )
        state = NoiseState(relax=tuple(float(v) for v in relax), generator=int(rng[0]), frames=end)
        return noise, state
