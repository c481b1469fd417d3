"""A class-D stage's supply with ripple, feeding an open-loop PWM stage.

The open-loop output is the duty cycle times the instantaneous supply. The supply is ``V (1 + m
sin(2 pi f_r t))``. An open-loop PWM stage switches its output between the rails, so every segment
of the pulse waveform is its nominal level (volts at the nominal supply) times ``1 + m sin(2 pi f_r
t)``. :func:`apply_supply_ripple` replaces each segment's level by its exact mean over the segment,

``L (1 + m (cos(w t0) - cos(w t1)) / (w (t1 - t0)))``,  ``w = 2 pi f_r``,

so the waveform the reconstruction filter integrates keeps each segment's exact area (and so
the exact frame means). A tone ``A sin(w_s t)`` at the output gains the product ``A m sin(w_s
t) sin(w_r t)``: two sidebands at ``f +- f_r`` of amplitude ``A m / 2`` each, ``20 log10(m /
2)`` re the tone (amplitude modulation; any communications text). That is the open-loop
stage's supply rejection: none.

References
----------
.. [1] H. S. Black, "Modulation Theory", Van Nostrand 1953 (amplitude modulation; from memory).
"""

from __future__ import annotations

import math

import numpy as np

from audiodsm.errors import ParameterError

__all__ = ["apply_supply_ripple"]


def apply_supply_ripple(waveform, *, ripple: float, ripple_hz: float, first_frame: int):
    """The waveform with every segment scaled by the rippling supply (exact segment means).

    Parameters
    ----------
    waveform : PulseWaveform
        The stage's output at the nominal supply.
    ripple : float, keyword-only
        Relative ripple amplitude ``m`` (0 <= m < 1).
    ripple_hz : float, keyword-only
        Ripple frequency ``f_r`` (> 0).
    first_frame : int, keyword-only
        Index of the waveform's first frame since the start (the ripple's time origin).

    Returns
    -------
    PulseWaveform
    """
    from audiodsm.stages.output_stage import PulseWaveform

    if not (math.isfinite(ripple) and 0.0 <= ripple < 1.0):
        raise ParameterError("ripple", ripple, "a relative amplitude from 0 to below 1")
    if not (math.isfinite(ripple_hz) and ripple_hz > 0.0):
        raise ParameterError("ripple_hz", ripple_hz, "a frequency above 0 Hz")
    ticks = waveform.ticks
    n, segs = ticks.shape
    tpf = waveform.ticks_per_frame
    period = 1.0 / waveform.frame_rate_hz
    # segment edges in frames: frame index + ticks before the segment / ticks per frame; the
    # phase is taken modulo one ripple cycle from an exact integer frame count
    ratio = ripple_hz * period  # ripple cycles per frame
    frames = np.arange(first_frame, first_frame + n, dtype=np.float64)
    base = np.mod(frames * ratio, 1.0)[:, None]
    before = np.concatenate([np.zeros((n, 1)), np.cumsum(ticks, axis=1)], axis=1) / tpf
    phase = 2.0 * np.pi * (base + before * ratio)  # (n, segs + 1)
    width = 2.0 * np.pi * ticks / tpf * ratio  # segment length in radians of the ripple
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_sin = np.where(
            width > 0,
            (np.cos(phase[:, :-1]) - np.cos(phase[:, 1:])) / width,
            np.sin(phase[:, :-1]),
        )
    levels = waveform.levels * (1.0 + ripple * mean_sin)
    return PulseWaveform._trusted(np.ascontiguousarray(levels), ticks, tpf, waveform.frame_rate_hz)
