"""Time alignment of two recordings of the same programme by cross-correlation.

The delay is the lag of the largest cross-correlation between the channel sums (computed by
FFT); a whole-sample shift then lines the second signal up with the first.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError

__all__ = ["DelayEstimate", "find_delay", "shift_by_frames"]


@dataclass(frozen=True)
class DelayEstimate:
    """The delay of one signal against a reference.

    Attributes
    ----------
    delay_frames : int
        How many frames later the programme appears in the signal than in the reference
        (negative: earlier).
    correlation : float
        The normalized cross-correlation at that lag (1.0: identical shapes); low values
        mean the two signals share little and the alignment is unreliable.
    """

    delay_frames: int
    correlation: float


def _mono(x, name) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    if a.ndim == 2:
        a = a.sum(axis=1)
    if a.ndim != 1 or a.shape[0] == 0:
        raise ParameterError(name, np.shape(x), "(frames,) or (frames, channels), not empty")
    if not np.isfinite(a).all():
        raise ParameterError(name, "non-finite samples", "finite samples")
    return a


def find_delay(reference, signal, *, max_delay_frames=None) -> DelayEstimate:
    """Delay of ``signal`` against ``reference`` at the peak of their cross-correlation.

    Parameters
    ----------
    reference, signal : array_like
        ``(frames,)`` or ``(frames, channels)`` at the same sample rate; channels are summed.
    max_delay_frames : int, optional, keyword-only
        Search only lags within ± this many frames (default: every lag).

    Returns
    -------
    DelayEstimate

    Raises
    ------
    ParameterError
        Empty or non-finite input, or a silent signal (no correlation peak).

    References
    ----------
    .. [1] C. H. Knapp and G. C. Carter, "The generalized correlation method for estimation of
       time delay", IEEE Trans. ASSP 24(4), 1976, pp. 320-327 (plain cross-correlation, eq. 2).
    """
    from scipy.signal import correlate, correlation_lags

    r = _mono(reference, "reference")
    s = _mono(signal, "signal")
    energy = float(np.sqrt(np.dot(r, r) * np.dot(s, s)))
    if energy == 0.0:
        raise ParameterError("signal", "silence", "a signal with content to align on")
    xc = correlate(s, r, mode="full", method="fft")
    lags = correlation_lags(s.shape[0], r.shape[0], mode="full")
    if max_delay_frames is not None:
        keep = np.abs(lags) <= int(max_delay_frames)
        xc, lags = xc[keep], lags[keep]
    k = int(np.argmax(xc))
    return DelayEstimate(delay_frames=int(lags[k]), correlation=float(xc[k] / energy))


def shift_by_frames(x, delay_frames: int, frames: int) -> np.ndarray:
    """Undo a delay: the ``frames`` frames of ``x`` starting ``delay_frames`` in, zero-padded.

    Parameters
    ----------
    x : array_like
        ``(n,)`` or ``(n, channels)``.
    delay_frames : int
        As :attr:`DelayEstimate.delay_frames`; negative values pad the start with zeros.
    frames : int
        Length of the result.

    Returns
    -------
    numpy.ndarray
        Same number of dimensions as ``x``; ``out[i] = x[i + delay_frames]`` where that index
        exists, else 0.

    References
    ----------
    .. [1] Knapp and Carter (1976), see :func:`find_delay`.
    """
    a = np.asarray(x, dtype=np.float64)
    out = np.zeros((frames, *a.shape[1:]))
    lo = max(0, -delay_frames)
    hi = min(frames, a.shape[0] - delay_frames)
    if hi > lo:
        out[lo:hi] = a[lo + delay_frames : hi + delay_frames]
    return out
