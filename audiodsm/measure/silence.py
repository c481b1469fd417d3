"""A-weighted noise of an output in the silent passages of its input, measured while streaming.

A render plays program material through a chain; where the program is silent, what comes out
of the chain is the chain's own noise. :class:`SilenceNoiseMeter` finds those passages in the
input and measures the output there: band-limited to 20 Hz-20 kHz (AES17 band,
:mod:`audiodsm.measure.bands`) and A-weighted (IEC 61672-1, :mod:`audiodsm.measure.weighting`),
as an AES17 level in dBFS. It takes the input and the time-aligned output in blocks of any size
and keeps bounded state (one number per 0.1 s window).
"""

from __future__ import annotations

import math

import numpy as np

from audiodsm.measure.spectrum import NUMERIC_FLOOR_DBFS

__all__ = [
    "SILENCE_WINDOW_S",
    "SILENCE_PEAK",
    "SILENCE_GUARD_WINDOWS",
    "SILENCE_MIN_S",
    "mean_power_dbfs",
    "SilenceNoiseMeter",
]

#: Length of the windows in which the input is checked for silence (seconds).
SILENCE_WINDOW_S = 0.1
#: An input window is silent when no sample exceeds this magnitude (-100 dBFS peak).
SILENCE_PEAK = 1e-5
#: Windows right after sound that are skipped before the noise is measured (decay of the
#: chain's filters and of the program's reverberation tail in the output).
SILENCE_GUARD_WINDOWS = 2
#: Least total silent time for the silence noise level to be reported (seconds).
SILENCE_MIN_S = 0.5


def mean_power_dbfs(power_mean: float) -> float | None:
    """AES17 level of a mean-square value: rms relative to a full-scale sine.

    Parameters
    ----------
    power_mean : float
        Mean-square value in full-scale units (full scale = ±1.0).

    Returns
    -------
    float or None
        ``10 log10(2 * power_mean)`` dBFS (a full-scale sine, mean power 1/2, reads 0 dBFS);
        None when the power is zero or negative.

    References
    ----------
    AES17-2015, definition of dBFS (from memory).
    """
    if power_mean <= 0:
        return None
    return 10.0 * math.log10(2.0 * power_mean)


class SilenceNoiseMeter:
    """A-weighted noise of the output in the input's silent passages (streaming).

    The input is cut into windows of :data:`SILENCE_WINDOW_S`; a window is silent when its
    peak is at most :data:`SILENCE_PEAK`. The output (already time-aligned with the input) is
    band-limited to 20 Hz-20 kHz (AES17 band) and A-weighted (IEC 61672-1); its power is
    summed over the same windows. The level is taken over silent windows that follow at least
    :data:`SILENCE_GUARD_WINDOWS` silent windows, so decays are left out.

    Parameters
    ----------
    rate_in : int
        Sample rate of the input (Hz).
    rate_out : int
        Sample rate of the output (Hz); it may differ from the input's.
    channels : int
        Channels of both.

    References
    ----------
    AES17-2015, standard low-pass filter and idle-channel noise (from memory); IEC 61672-1:2013,
    A-weighting.
    """

    def __init__(self, rate_in, rate_out, channels):
        self.win_in = max(1, round(SILENCE_WINDOW_S * rate_in))
        self.win_out = max(1, round(SILENCE_WINDOW_S * rate_out))
        self.rate_out = rate_out
        self.channels = channels
        self.in_flags: list[bool] = []
        self.in_fill = 0
        self.in_peak = 0.0
        self.out_power: list[np.ndarray] = []
        self.out_acc = np.zeros(channels)
        self.out_fill = 0
        self.band_state = None
        self.weight_state = None

    def feed_input(self, x):
        """Take the next input block, shape ``(frames, channels)``."""
        pos = 0
        n = x.shape[0]
        while pos < n:
            take = min(self.win_in - self.in_fill, n - pos)
            if take:
                self.in_peak = max(self.in_peak, float(np.abs(x[pos : pos + take]).max()))
            pos += take
            self.in_fill += take
            if self.in_fill == self.win_in:
                self.in_flags.append(self.in_peak <= SILENCE_PEAK)
                self.in_fill = 0
                self.in_peak = 0.0

    def feed_output(self, y):
        """Take the next output block, shape ``(frames, channels)``."""
        from audiodsm.measure.bands import band_limit
        from audiodsm.measure.weighting import apply_weighting

        if y.shape[0] == 0:
            return
        yb, self.band_state = band_limit(y, rate_hz=self.rate_out, state=self.band_state)
        yw, self.weight_state = apply_weighting(
            yb, rate_hz=self.rate_out, kind="a", state=self.weight_state
        )
        sq = yw * yw
        pos = 0
        n = sq.shape[0]
        while pos < n:
            take = min(self.win_out - self.out_fill, n - pos)
            self.out_acc += sq[pos : pos + take].sum(axis=0)
            pos += take
            self.out_fill += take
            if self.out_fill == self.win_out:
                self.out_power.append(self.out_acc / self.win_out)
                self.out_acc = np.zeros(self.channels)
                self.out_fill = 0

    def result(self):
        """(silent seconds measured, A-weighted noise dBFS per channel or None).

        The levels are None when fewer than :data:`SILENCE_MIN_S` seconds were usable, and
        :data:`~audiodsm.measure.spectrum.NUMERIC_FLOOR_DBFS` for an output digitally silent in
        the band (below the simulation's float64 rounding noise, no physical reading).
        """
        flags = self.in_flags
        usable = [
            k
            for k in range(min(len(flags), len(self.out_power)))
            if k >= SILENCE_GUARD_WINDOWS and all(flags[k - SILENCE_GUARD_WINDOWS : k + 1])
        ]
        seconds = len(usable) * SILENCE_WINDOW_S
        if seconds < SILENCE_MIN_S:
            return seconds, [None] * self.channels
        power = np.mean([self.out_power[k] for k in usable], axis=0)
        levels = [mean_power_dbfs(float(p)) for p in power]
        return seconds, [
            NUMERIC_FLOOR_DBFS if v is None or v < NUMERIC_FLOOR_DBFS else v for v in levels
        ]
