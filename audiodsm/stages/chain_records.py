"""The chain's records: counts, state between blocks, one block's outputs, a run's result.

:class:`ChainStats` holds a run's running counts, :class:`ChainState` the state a
:class:`~audiodsm.stages.chain.Chain` carries from block to block, :class:`ChainBlock` one
block's outputs and :class:`ChainResult` the result of :func:`audiodsm.stages.chain.run_chain`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ChainStats", "ChainState", "ChainBlock", "ChainResult"]


# ---------------------------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ChainStats:
    """Running counts of one run, per channel (arrays of length ``channels``).

    Attributes
    ----------
    input_frames : int
        Input frames consumed (without the flush).
    clipped_samples : ndarray of int
        Input samples beyond ±1.0 that were clipped (``input.over_full_scale = "clip"``).
    overload_count : ndarray of int
        Modulator samples where the stability guard acted.
    state_peak : ndarray of float, shape (channels, order)
        Largest magnitude each loop state reached.
    dropped_pulses, stretched_pulses : ndarray of int
        PWM pulses shorter than the minimum width that were dropped or stretched.
    switching_events : ndarray of float
        Output level changes (PDM/NRZ: changes of the modulator level; PWM: transitions per
        bridge leg, averaged over the legs).
    output_clipped : ndarray of int
        Listening samples beyond ±1.0 (clipped only when written to an integer file).
    ripple_energy, ripple_frames : ndarray
        Only counted while ``"analog"`` is kept: the sum over frames of the reconstructed
        output's power inside each frame that the frame means do not carry (its mean square
        minus its squared mean, in volts squared: a PWM carrier's ripple after the filter),
        and the number of frames summed.
    """

    input_frames: int
    clipped_samples: np.ndarray
    overload_count: np.ndarray
    state_peak: np.ndarray
    dropped_pulses: np.ndarray
    stretched_pulses: np.ndarray
    switching_events: np.ndarray
    output_clipped: np.ndarray
    ripple_energy: np.ndarray | None = None
    ripple_frames: np.ndarray | None = None

    def switching_rate_hz(self, rate_hz: float) -> np.ndarray:
        """Average switching events per second, given the input rate."""
        seconds = self.input_frames / float(rate_hz)
        return self.switching_events / seconds if seconds > 0 else self.switching_events * 0.0

    def ripple_rms(self) -> np.ndarray:
        """Rms of the in-frame ripple per channel, in volts (NaN where none was counted)."""
        if self.ripple_energy is None or self.ripple_frames is None:
            return np.full(len(self.overload_count), np.nan)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.sqrt(self.ripple_energy / self.ripple_frames)


@dataclass(frozen=True)
class ChainState:
    """Everything the chain carries from one block to the next (a value).

    Attributes
    ----------
    channels : tuple
        One tuple of stage states per channel.
    stats : ChainStats
        Running counts.
    to_skip : int
        Listening samples still to drop at the start (latency alignment, :meth:`Chain.stream`).
    requantizer : RequantizerState or None
        The source requantization's dither state (``input.requantize = "tpdf"``).
    """

    channels: tuple
    stats: ChainStats
    to_skip: int = 0
    requantizer: object = None


@dataclass(frozen=True)
class ChainBlock:
    """What one block of input produced; fields not asked for are None.

    ``listening``, ``error`` and ``jitter_error`` are ``(n, channels)`` at the listening
    rate; ``modulator`` and ``analog`` are ``(n * osr, channels)`` at the modulator rate.
    """

    listening: np.ndarray | None = None
    modulator: np.ndarray | None = None
    analog: np.ndarray | None = None
    error: np.ndarray | None = None
    jitter_error: np.ndarray | None = None


@dataclass(frozen=True)
class ChainResult:
    """The outcome of :func:`run_chain`.

    Attributes
    ----------
    listening : ndarray or None
        Calibrated reconstructed output at ``listening_rate_hz``, ``(n, channels)``.
    modulator : ndarray or None
        Modulator output (levels in [-1, 1]) at ``modulator_rate_hz``.
    analog : ndarray or None
        Calibrated reconstructed output at ``modulator_rate_hz`` (for out-of-band noise).
    error : ndarray or None
        Listening output minus the ideal (the input through the same linear filters),
        without any gain, at ``listening_rate_hz``.
    rate_hz, modulator_rate_hz, listening_rate_hz : float
        The three rates.
    latency_s : float
        Total latency of the chain (upsampler + loop + output stage + analog filter +
        downsampler).
    aligned : bool
        True when the latency was removed from the outputs.
    gain : float
        Static gain divided out by the calibration (volts per full-scale unit at 997 Hz).
    stats : ChainStats
        Counts: clipped inputs, overloads, state peaks, dropped/stretched pulses, switching.
    jitter_error : ndarray or None
        The part of ``listening`` the random edge jitter makes (``Chain.process``, keep
        ``"jitter_error"``), ``(n, channels)`` at ``listening_rate_hz``.
    """

    listening: np.ndarray | None
    modulator: np.ndarray | None
    analog: np.ndarray | None
    error: np.ndarray | None
    rate_hz: float
    modulator_rate_hz: float
    listening_rate_hz: float
    latency_s: float
    aligned: bool
    gain: float
    stats: ChainStats
    jitter_error: np.ndarray | None = None

    @property
    def switching_rate_hz(self) -> np.ndarray:
        """Average output switching events per second, per channel."""
        return self.stats.switching_rate_hz(self.rate_hz)
