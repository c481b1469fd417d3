"""The source's word length: input samples rounded to a fixed number of bits with TPDF dither.

A product plays sources of a finite word length (16 or 24 bits). A chain fed with float
samples would measure a dynamic range no such source can carry, so the chain rounds its input
to the profile's ``input.source_bits`` first, with triangular (TPDF) dither of 2 LSB peak to
peak, as a well-made source file is rounded. The dither makes the rounding error independent
of the signal, white, of power LSB^2/4 (LSB^2/12 from the rounding plus LSB^2/6 from the
dither), so a full-scale sine against that floor gives the familiar TPDF-dithered dynamic range
of the word length.

Full scale is ±1.0 and the codes are two's complement: ``bits`` bits give the LSB
``2 / 2**bits`` and codes from -1.0 up to ``1 - LSB``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError

__all__ = ["SourceRequantizer", "RequantizerState"]


@dataclass(frozen=True)
class RequantizerState:
    """The dither generators' states, one per channel (plain dicts, copied on every step)."""

    generators: tuple


class SourceRequantizer:
    """Round samples to ``bits`` bits with TPDF dither, block by block.

    Parameters
    ----------
    bits : int
        Word length, 8..32.
    seed : int
        Seed of the dither; channel ``c`` uses the stream ``SeedSequence([seed, c])``.

    Notes
    -----
    ``process(x, state) -> (y, state)`` gives the same samples for any split of the input into
    blocks: each frame draws exactly two doubles per channel from a PCG64 generator whose state
    is carried in the (value) state.

    References
    ----------
    .. [1] S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy, "Quantization and dither: a
       theoretical survey", J. Audio Eng. Soc. 40(5), 1992 (TPDF dither of 2 LSB peak to peak
       makes the first and second moments of the total error independent of the signal; total
       error power LSB^2/4).
    """

    def __init__(self, bits: int, *, seed: int = 0):
        if isinstance(bits, bool) or not isinstance(bits, int | np.integer) or not 8 <= bits <= 32:
            raise ParameterError("bits", bits, "an integer from 8 to 32")
        if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
            raise ParameterError("seed", seed, "an integer >= 0")
        self.bits = int(bits)
        self.seed = int(seed)
        self.lsb = 2.0 / 2.0**self.bits

    def initial_state(self, channels: int) -> RequantizerState:
        """Fresh dither generators for ``channels`` channels."""
        gens = tuple(
            np.random.PCG64(np.random.SeedSequence([self.seed, c])).state for c in range(channels)
        )
        return RequantizerState(generators=gens)

    def process(self, x, state: RequantizerState | None = None):
        """Round ``x`` (``(n, channels)``, full scale ±1.0) to the word length.

        Returns
        -------
        y : ndarray, shape (n, channels)
            Multiples of the LSB within [-1, 1 - LSB].
        state : RequantizerState
        """
        x = np.asarray(x, dtype=np.float64)
        if x.ndim != 2:
            raise ParameterError("x", f"array of shape {x.shape}", "shape (n, channels)")
        channels = x.shape[1]
        if state is None:
            state = self.initial_state(channels)
        if len(state.generators) != channels:
            raise ParameterError("state", len(state.generators), f"{channels} channel states")
        y = np.empty_like(x)
        new = []
        for c in range(channels):
            bit_gen = np.random.PCG64()
            bit_gen.state = state.generators[c]
            r = np.random.Generator(bit_gen).random((x.shape[0], 2))
            dither = r[:, 0] - r[:, 1]  # triangular over (-1, 1) LSB
            codes = np.floor(x[:, c] / self.lsb + dither + 0.5)
            y[:, c] = np.clip(codes * self.lsb, -1.0, 1.0 - self.lsb)
            new.append(bit_gen.state)
        return y, RequantizerState(generators=tuple(new))
