"""Integrated programme loudness per ITU-R BS.1770-4 (through pyloudnorm).

The K-weighting filters, the 400 ms gating blocks with 75 % overlap, the absolute gate at
-70 LKFS and the relative gate 10 LU below the ungated level are pyloudnorm's implementation
of the Recommendation; this module checks the input, adapts the shapes and names the unit.
"""

from __future__ import annotations

import math

import numpy as np

from audiodsm.errors import ParameterError

__all__ = [
    "MAX_LOUDNESS_CHANNELS",
    "GATE_BLOCK_S",
    "integrated_loudness_lufs",
    "gain_to_loudness_db",
]

#: BS.1770-4 weights channels up to a 5-channel layout (L, R, C, Ls, Rs).
MAX_LOUDNESS_CHANNELS = 5
#: Length of a gating block (seconds); a signal must be at least this long.
GATE_BLOCK_S = 0.4


def integrated_loudness_lufs(x, *, rate_hz) -> float:
    """Integrated, gated loudness of a signal in LUFS (LKFS).

    Parameters
    ----------
    x : array_like
        ``(frames,)`` or ``(frames, channels)`` float samples, full scale ±1.0, channels in
        the order L, R, C, Ls, Rs (at most :data:`MAX_LOUDNESS_CHANNELS`).
    rate_hz : float
        Sample rate in Hz.

    Returns
    -------
    float
        Loudness in LUFS; ``-inf`` when every gating block falls below the absolute gate
        (-70 LUFS), e.g. digital silence.

    Raises
    ------
    ParameterError
        Too many channels, a signal shorter than one gating block (0.4 s), or non-finite
        samples.

    References
    ----------
    .. [1] ITU-R BS.1770-4 (10/2015), "Algorithms to measure audio programme loudness and
       true-peak audio level", Annex 1 (K-weighting, gating, channel weights).
    .. [2] C. J. Steinmetz and J. D. Reiss, "pyloudnorm: A simple yet flexible loudness meter
       in Python", 150th AES Convention, 2021.
    """
    import pyloudnorm

    a = np.asarray(x, dtype=np.float64)
    if a.ndim not in (1, 2) or (a.ndim == 2 and not 1 <= a.shape[1] <= MAX_LOUDNESS_CHANNELS):
        raise ParameterError(
            "x", a.shape, f"(frames,) or (frames, 1..{MAX_LOUDNESS_CHANNELS}) samples"
        )
    if not (math.isfinite(rate_hz) and rate_hz > 0):
        raise ParameterError("rate_hz", rate_hz, "a positive sample rate in Hz")
    if a.shape[0] < GATE_BLOCK_S * rate_hz:
        raise ParameterError(
            "x", f"{a.shape[0] / rate_hz:.3f} s", f"at least {GATE_BLOCK_S} s of audio"
        )
    if not np.isfinite(a).all():
        raise ParameterError("x", "non-finite samples", "finite samples")
    with np.errstate(divide="ignore"):
        value = float(pyloudnorm.Meter(rate_hz).integrated_loudness(a))
    return value if math.isfinite(value) else -math.inf


def gain_to_loudness_db(x, *, rate_hz, target_lufs, tolerance_lu=0.01, max_steps=6) -> float:
    """The gain that brings a signal's integrated loudness to a target.

    A plain gain moves the loudness by the same number of dB except where a gating block
    crosses a gate; the gain is therefore refined by re-measuring until it lands within
    ``tolerance_lu`` of the target (a few steps at most).

    Parameters
    ----------
    x : array_like
    rate_hz : float
    target_lufs : float
    tolerance_lu : float, keyword-only
    max_steps : int, keyword-only

    Returns
    -------
    float
        Gain in dB.

    Raises
    ------
    ParameterError
        A silent signal (its loudness is -inf) or any error of
        :func:`integrated_loudness_lufs`.

    References
    ----------
    .. [1] ITU-R BS.1770-4 (10/2015), Annex 1, eq. (2) (gated integration).
    """
    a = np.asarray(x, dtype=np.float64)
    gain_db = 0.0
    for _ in range(max_steps):
        level = integrated_loudness_lufs(a * 10.0 ** (gain_db / 20.0), rate_hz=rate_hz)
        if not math.isfinite(level):
            raise ParameterError("x", "silence (loudness -inf)", "a signal above -70 LUFS")
        miss = target_lufs - level
        if abs(miss) <= tolerance_lu:
            break
        gain_db += miss
    return gain_db
