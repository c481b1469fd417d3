"""Clock jitter on every edge of a PDM or NRZ output, integrated exactly over each frame.

Every output edge happens at its nominal time ``n T`` displaced by ``delta_n = sigma g_n + J
sin(2 pi f_j n T)`` (``g_n`` independent standard normal draws: white random jitter; the sine:
a spur on the clock). The reconstruction filter is exact for the frame means of its input
(stages/reconstruct.py), and a displaced edge changes exactly one frame's mean, by ``-step *
delta / T`` (``step = y[n] - y[n-1]``): the mean of the frame after the edge when the edge is
late, of the frame before when it is early. That is what :class:`EdgeJitter` computes; the
waveform inside a frame is then taken as constant at its exact mean, which moves the edge's
area by less than one frame inside the frame (an error of order ``2 pi f T`` of the jitter
error itself at frequency ``f``, -26 dB at the band edge of OSR 64, and only in phase).

An early edge changes the frame before it, so the stage's output runs one frame behind its
input (the chain adds the frame to its latency). Displacements are limited to half a frame;
the chain refuses jitter whose 10-sigma value plus the sine's peak reaches that.

References
----------
.. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", IEEE/Wiley
   2005, the section on clock jitter in continuous-time converters (from memory): white
   jitter on an NRZ DAC adds the error power ``(sigma / T)^2 E[(y[n] - y[n-1])^2]`` spread
   evenly, so ``1 / OSR`` of it lands in band.
.. [2] J. A. Cherry and W. M. Snelgrove, "Continuous-Time Delta-Sigma Modulators for
   High-Speed A/D Conversion", Kluwer 1999 (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.stages import _element_kernels as _k

__all__ = ["EdgeJitter", "JitterState", "jitter_in_band_power"]


@dataclass(frozen=True)
class JitterState:
    """Between blocks: frames done, the frame held back, the random generator's state."""

    frames: int
    held: tuple
    generator: dict


class EdgeJitter:
    """Random and sinusoidal jitter on the edges of a one-level-per-frame output.

    Parameters
    ----------
    frame_rate_hz : float
        The modulator (frame) rate ``1 / T``.
    rms_s : float, keyword-only
        Standard deviation of the white random displacement, seconds.
    sine_peak_s, sine_hz : float, keyword-only
        Peak displacement and frequency of the sinusoidal jitter.
    seed : int, keyword-only
        Seeds the random displacements.
    rest_level : float, keyword-only
        The output before the first frame (the held-back frame at start).
    """

    def __init__(
        self, frame_rate_hz, *, rms_s=0.0, sine_peak_s=0.0, sine_hz=0.0, seed=0, rest_level=0.0
    ):
        self.frame_rate_hz = float(frame_rate_hz)
        if not (math.isfinite(self.frame_rate_hz) and self.frame_rate_hz > 0):
            raise ParameterError("frame_rate_hz", frame_rate_hz, "a rate above 0 Hz")
        period = 1.0 / self.frame_rate_hz
        for name, value in (("rms_s", rms_s), ("sine_peak_s", sine_peak_s), ("sine_hz", sine_hz)):
            if not (math.isfinite(value) and value >= 0.0):
                raise ParameterError(name, value, "a number of at least 0")
        if 10.0 * rms_s + sine_peak_s >= 0.5 * period:
            raise ParameterError(
                "jitter",
                f"10 x {rms_s!r} s rms + {sine_peak_s!r} s peak",
                f"below half the output period, {0.5 * period:.4g} s",
            )
        self.rms_s, self.sine_peak_s, self.sine_hz = (
            float(rms_s),
            float(sine_peak_s),
            float(sine_hz),
        )
        self.seed = int(seed)
        self.rest_level = float(rest_level)

    def initial_state(self) -> JitterState:
        """Before the first edge: the rest level held, the generator freshly seeded."""
        gen = np.random.Generator(np.random.PCG64(np.random.SeedSequence([self.seed, 0x717])))
        held = (self.rest_level, self.rest_level)
        return JitterState(frames=0, held=held, generator=gen.bit_generator.state)

    def shifts(self, start: int, count: int, generator) -> np.ndarray:
        """Displacements of edges ``start .. start+count-1`` in frames (clipped to ±1/2).

        What :meth:`process` applies (it adds the sine inside its compiled loop).
        """
        shift = self._random_shifts(count, generator)
        if self.sine_peak_s > 0.0:
            n = np.arange(start, start + count, dtype=np.float64)
            cycles = np.mod(n * (self.sine_hz / self.frame_rate_hz), 1.0)
            shift += (self.sine_peak_s * self.frame_rate_hz) * np.sin(2.0 * np.pi * cycles)
        return np.clip(shift, -0.5, 0.5)

    def _random_shifts(self, count, generator):
        if self.rms_s > 0.0:
            return (self.rms_s * self.frame_rate_hz) * generator.standard_normal(count)
        return np.zeros(count)

    def process(self, levels, state=None):
        """Frame means of the jittered output, one frame behind.

        Parameters
        ----------
        levels : ndarray, shape (n,)
            The level of each frame (volts or full-scale units).
        state : JitterState, optional

        Returns
        -------
        means : ndarray, shape (n,)
            ``means[i]`` is the exact mean of frame ``i - 1`` (the first: of the frame held
            back from the previous block, or the rest level).
        state : JitterState
        """
        st = state if state is not None else self.initial_state()
        levels = np.ascontiguousarray(levels, dtype=np.float64)
        gen = np.random.Generator(np.random.PCG64())
        gen.bit_generator.state = st.generator
        shift = self._random_shifts(levels.size, gen)
        held = np.array(st.held, dtype=np.float64)
        out = np.empty(levels.size)
        peak = self.sine_peak_s * self.frame_rate_hz
        ratio = self.sine_hz / self.frame_rate_hz
        _k.jittered_frame_means(levels, shift, st.frames, peak, ratio, held, out)
        new = JitterState(
            frames=st.frames + levels.size,
            held=(float(held[0]), float(held[1])),
            generator=gen.bit_generator.state,
        )
        return out, new


def jitter_in_band_power(y, *, rms_s: float, frame_rate_hz: float, osr: float) -> float:
    """The textbook in-band error power of white jitter on an NRZ output.

    ``(sigma / T)^2 * mean((y[n] - y[n-1])^2) / OSR`` (Schreier & Temes 2005; Cherry &
    Snelgrove 1999): each edge's error is a pulse of area ``step * delta``, white because the
    ``delta`` are, and its power spreads evenly over the Nyquist band.

    Parameters
    ----------
    y : ndarray
        The output levels (their units give the result's: squared).
    rms_s, frame_rate_hz, osr : float

    Returns
    -------
    float
    """
    y = np.asarray(y, dtype=np.float64)
    steps = np.diff(y)
    return float((rms_s * frame_rate_hz) ** 2 * np.mean(steps * steps) / osr)
