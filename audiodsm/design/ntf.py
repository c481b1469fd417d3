"""Noise transfer functions (NTFs) of delta-sigma loops: the result type and its evaluation.

An NTF is kept as zeros and poles in the z-plane. A causal loop has NTF(z -> inf) = 1, so
numerator and denominator are both monic in z and the zpk gain is 1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["NoiseTransfer"]


@dataclass(frozen=True, eq=False)
class NoiseTransfer:
    """A noise transfer function H(z) = prod(z - zeros) / prod(z - poles).

    Parameters
    ----------
    zeros, poles : ndarray of complex
        Same count (the loop order); complex values come in conjugate pairs.
    gain : float
        The zpk gain; 1.0 for a causal loop (H(inf) = 1).
    """

    zeros: np.ndarray
    poles: np.ndarray
    gain: float = 1.0

    @property
    def order(self) -> int:
        """Loop order (number of poles)."""
        return len(self.poles)

    def polynomials(self) -> tuple[np.ndarray, np.ndarray]:
        """Numerator and denominator coefficients, highest power of z first (real)."""
        b = self.gain * np.real_if_close(np.poly(self.zeros), tol=1e6)
        a = np.real_if_close(np.poly(self.poles), tol=1e6)
        return np.real(b).astype(float), np.real(a).astype(float)

    def response(self, freq: np.ndarray) -> np.ndarray:
        """Complex response at normalized frequencies ``freq`` (cycles per sample, 0..0.5)."""
        z = np.exp(2j * np.pi * np.asarray(freq, dtype=float))
        num = np.prod(z[..., None] - self.zeros, axis=-1)
        den = np.prod(z[..., None] - self.poles, axis=-1)
        return self.gain * num / den
