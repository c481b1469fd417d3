"""The quantizer's effective gain and the noise transfer it gives the loop.

The linear model of a delta-sigma loop replaces the quantizer by a gain ``k`` and an additive
error: ``y = k v + e`` (``v`` the quantizer input, ``y`` its output). A multi-level quantizer
that does not clip has ``k = 1`` by its step, but a sign quantizer has no gain of its own (any
positive scale of ``v`` gives the same bits), so the loop sets one. With the loop filter
``L1 = 1 - 1/NTF`` (the filter from the output back to the quantizer input that realizes the NTF
at unit gain), ``Y = k (L0 U + L1 Y) + E`` gives the noise transfer

    NTF_k = 1 / (1 - k L1) = NTF / (k + (1 - k) NTF),

a causal NTF with the zeros of the NTF and the poles of ``k A + (1 - k) B`` (``NTF = B / A``,
both monic). In the band, where ``|NTF|`` is small, ``NTF_k ~ NTF / k``.

Two ways to find ``k`` (both least-squares gains, which make ``e`` uncorrelated with ``v``, the
Bussgang / describing-function choice, so that the error carries the least power any gain
leaves; for a sign quantizer ``E[y v] = E[|v|]``, so it is also the ``E[|v|] / E[v^2]`` form):

- :func:`single_bit_describing_gain`, from the NTF alone: ``v`` taken Gaussian and its power
  closed through the loop (A. Ardalan and J. J. Paulos 1987).
- :func:`least_squares_gain`, from a simulation's quantizer input and output.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.errors import ParameterError

__all__ = [
    "QuantizerGain",
    "effective_ntf",
    "least_squares_gain",
    "single_bit_describing_gain",
]

#: samples of the impulse response used for ||NTF_k - 1||^2 (a stable NTF of order <= 8 with
#: poles inside |z| < 0.999 has decayed far below 1e-12 by then)
_IMPULSE_SAMPLES = 1 << 15


@dataclass(frozen=True)
class QuantizerGain:
    """A quantizer's effective gain and the power of the error it leaves.

    Attributes
    ----------
    gain : float
        ``k`` in ``y = k v + e``.
    error_power : float
        Mean square of ``e`` (full-scale units squared), white in the linear model.
    method : str
        How it was found: ``"describing function"`` or ``"least squares, simulated"``.
    """

    gain: float
    error_power: float
    method: str


def effective_ntf(ntf: NoiseTransfer, gain: float) -> NoiseTransfer:
    """The noise transfer of a loop whose quantizer has the effective gain ``gain``.

    Parameters
    ----------
    ntf : NoiseTransfer
        The loop's NTF at unit quantizer gain (causal, monic).
    gain : float
        The quantizer's effective gain ``k`` > 0.

    Returns
    -------
    NoiseTransfer
        ``NTF_k = NTF / (k + (1 - k) NTF)``: the zeros of ``ntf`` and the roots of
        ``k A + (1 - k) B`` as poles (both polynomials monic, so ``NTF_k`` is causal with
        ``NTF_k(inf) = 1``).

    Raises
    ------
    ParameterError
        A gain that is not a finite number > 0, or one for which the loop is unstable
        (a pole of ``NTF_k`` on or outside the unit circle).

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", 2005,
       ch. 2 and 4 (linear model with a quantizer gain k; NTF and loop filter L1 = 1 - 1/NTF).
    """
    if not (isinstance(gain, int | float | np.floating) and np.isfinite(gain) and gain > 0):
        raise ParameterError("gain", gain, "a finite number > 0")
    if gain == 1.0:
        return ntf
    b, a = ntf.polynomials()
    poles = np.roots(gain * a + (1.0 - gain) * b)
    if np.any(np.abs(poles) >= 1.0):
        raise ParameterError("gain", gain, "a quantizer gain at which the loop stays stable")
    return NoiseTransfer(ntf.zeros, poles, 1.0)


def single_bit_describing_gain(ntf: NoiseTransfer) -> QuantizerGain:
    """Effective gain of a sign quantizer in a loop with ``ntf``, by the describing function.

    The quantizer input is taken Gaussian with rms ``s`` and zero mean (a small input: the
    signal's share of ``v`` is neglected). For a sign quantizer with outputs +-1 the
    least-squares gain is then ``k = E[|v|] / E[v^2] = sqrt(2/pi) / s`` and the error power
    ``E[y^2] - k^2 s^2 = 1 - 2/pi``. The loop closes the power: the quantizer input carries
    ``v = (y - e) / k``, whose noise part is ``(NTF_k - 1) e / k``, so
    ``(k s)^2 = 2/pi = ||NTF_k - 1||^2 (1 - 2/pi)``, solved for ``k`` by Brent's method
    (scipy.optimize.brentq) with ``||.||^2`` the energy of the impulse response
    (scipy.signal.lfilter).

    Parameters
    ----------
    ntf : NoiseTransfer
        The loop's NTF at unit quantizer gain.

    Returns
    -------
    QuantizerGain
        ``method="describing function"``.

    Raises
    ------
    ParameterError
        When no gain from 0.05 to 20 closes the loop's power (an NTF whose out-of-band gain is
        too large for a single-bit loop, which has no stable operating point to model).

    References
    ----------
    .. [1] A. Ardalan and J. J. Paulos, "An analysis of nonlinear behavior in delta-sigma
       modulators", IEEE Trans. Circuits Syst. 34(6), 1987 (describing-function gain of the
       single-bit quantizer with a Gaussian input).
    .. [2] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", 2005,
       ch. 4 (effective quantizer gain of a single-bit loop).
    """
    from scipy import optimize
    from scipy import signal as sig

    b, a = ntf.polynomials()
    b, a = np.real(b), np.real(a)
    impulse = np.zeros(_IMPULSE_SAMPLES)
    impulse[0] = 1.0
    error_power = 1.0 - 2.0 / np.pi

    def excess(k):
        den = k * a + (1.0 - k) * b
        if np.any(np.abs(np.roots(den)) >= 1.0):
            return np.inf  # the loop at this gain is unstable: its noise power has no bound
        with np.errstate(over="ignore", invalid="ignore"):
            h = sig.lfilter(b, den, impulse)
        h[0] -= 1.0
        return float(np.sum(h**2)) * error_power - 2.0 / np.pi

    # Where the excess rises through zero the loop's operating point is stable: a larger gain
    # makes the quantizer input larger, which lowers the gain again (Ardalan & Paulos). Where
    # it falls through zero (a second, smaller root some NTFs have) it is not.
    grid = np.geomspace(0.05, 20.0, 80)
    values = np.nan_to_num([excess(k) for k in grid], nan=np.inf)
    rise = np.flatnonzero((values[:-1] <= 0) & (values[1:] > 0))
    if len(rise) == 0:
        raise ParameterError(
            "ntf", "its out-of-band gain", "an NTF for which a single-bit loop's power closes"
        )
    low, high = grid[rise[-1]], grid[rise[-1] + 1]
    while not np.isfinite(excess(high)):  # unstable at the upper end: bisect to a stable gain
        mid = 0.5 * (low + high)
        if excess(mid) <= 0:
            low = mid
        else:
            high = mid
    k = optimize.brentq(excess, low, high, xtol=1e-12)
    return QuantizerGain(
        gain=float(k), error_power=float(error_power), method="describing function"
    )


def least_squares_gain(quantizer_input, quantizer_output) -> QuantizerGain:
    """Effective gain of a quantizer from a simulation: ``k = E[y v] / E[v^2]``.

    The least-squares fit of ``y`` by ``k v`` leaves an error ``e = y - k v`` uncorrelated
    with ``v`` (Bussgang's theorem for a Gaussian ``v``; the describing function of the
    quantizer), of power ``E[y^2] - k^2 E[v^2]``, the least any gain leaves. For a sign
    quantizer ``E[y v] = E[|v|]``: the ``E[|v|] / E[v^2]`` form of the effective gain.

    Parameters
    ----------
    quantizer_input : array_like, shape (n,)
        The quantizer's input ``v`` (without dither), as the linearized loop defines it.
    quantizer_output : array_like, shape (n,)
        Its output ``y``, same length (dither, where there is any, shows in ``e``).

    Returns
    -------
    QuantizerGain
        ``method="least squares, simulated"``.

    Raises
    ------
    ParameterError
        Arrays of different or zero length, non-finite values, or an input of zero power.

    References
    ----------
    .. [1] J. J. Bussgang, "Crosscorrelation functions of amplitude-distorted Gaussian
       signals", MIT RLE Technical Report 216, 1952.
    .. [2] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", 2005,
       ch. 2 and 4 (effective quantizer gain, least-squares definition).
    """
    v = np.asarray(quantizer_input, dtype=float).ravel()
    y = np.asarray(quantizer_output, dtype=float).ravel()
    if v.shape != y.shape or v.size == 0:
        raise ParameterError(
            "quantizer_output", f"{y.size} samples", f"as many samples as the input ({v.size}), > 0"
        )
    if not (np.all(np.isfinite(v)) and np.all(np.isfinite(y))):
        raise ParameterError("quantizer_input", "non-finite values", "finite samples")
    power = float(np.mean(v * v))
    if power <= 0.0:
        raise ParameterError("quantizer_input", "all zero", "an input with some power")
    k = float(np.mean(y * v)) / power
    error_power = max(float(np.mean(y * y)) - k * k * power, 0.0)
    return QuantizerGain(gain=k, error_power=error_power, method="least squares, simulated")
