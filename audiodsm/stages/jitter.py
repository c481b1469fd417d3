"""Edge errors of an output, integrated exactly: clock jitter, unequal edges, return to zero.

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

Unequal edges (inter-symbol interference): a rising edge ramps linearly over ``rise_s``, a
falling one over ``fall_s``; a ramp of length ``r`` and step ``s`` holds back the area ``s
r / 2`` (only its area matters to the filter, so any edge shape enters through the linear
ramp of equal area). Equal ramps delay the whole waveform by ``r / 2``: linear, no
distortion. Unequal ones add ``(fall_s - rise_s) / 2`` times the step's size at every edge,
which depends on how often the data switch: for a single-bit stream (levels +-1, steps of
2) over a stretch that starts and ends at one level, the summed error of the frame means is
``-(rise_s - fall_s) / T`` times the number of rising edges, a nonlinear function of the
signal [3]_ [4]_. Return-to-zero coding puts every frame's level in its first half and 0 in
its second, so every frame has the same edges (each of ``N`` unit elements of size ``a``
goes out of 0 and back): the edge error is the constant ``N a (fall_s - rise_s) / (2 T)``
in every frame mean, an offset, and the distortion vanishes at the cost of a gain of 1/2
(calibrated out) and twice the edges.

PWM (:meth:`EdgeJitter.process_waveform` on a waveform of several ticks a frame): every
level change between two segments is an edge on the tick clock, displaced by the same law
in ticks; the area it moves stays inside the tick after it (late) or before it (early),
whose level is set to its exact mean. That tick is split off its segment: a pulse's two
edges move nearly equal and opposite areas, and spreading them over segments of unequal
length would misplace them by a good part of a frame, an error of the same order as the
jitter's own effect. Displacements are limited to half a tick.

References
----------
.. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", IEEE/Wiley
   2005, the section on clock jitter in continuous-time converters (from memory): white
   jitter on an NRZ DAC adds the error power ``(sigma / T)^2 E[(y[n] - y[n-1])^2]`` spread
   evenly, so ``1 / OSR`` of it lands in band.
.. [2] J. A. Cherry and W. M. Snelgrove, "Continuous-Time Delta-Sigma Modulators for
   High-Speed A/D Conversion", Kluwer 1999 (from memory).
.. [3] R. Schreier and G. C. Temes, 2005 (as [1]), the section on inter-symbol interference
   of continuous-time DACs and return-to-zero feedback (from memory).
.. [4] R. W. Adams, P. F. Ferguson, A. Ganesan, S. Vincelette, A. Volpe and R. Libert,
   "Theory and Practical Implementation of a Fifth-Order Sigma-Delta A/D Converter", J.
   Audio Eng. Soc. 39(7/8), 1991, and the AES preprint of the same year on inter-symbol
   interference in 1-bit DACs (from memory): the error of unequal edges is proportional to
   the number of transitions, and return-to-zero coding makes it signal independent.
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.stages import _element_kernels as _k

__all__ = ["EdgeJitter", "JitterState", "jitter_in_band_power"]

# the ticks of one- and two-slot frames, broadcast read-only over the frames (no copy)
_ONE_TICKS = np.ones(2, dtype=np.int64)
_ONE_TICKS.setflags(write=False)


@dataclass(frozen=True)
class JitterState:
    """Between blocks: frames done, the frame held back, the random generator's state.

    ``generator`` is the splitmix64 state (a 64-bit unsigned integer) of the white jitter's
    normal draws (:func:`~audiodsm.stages._element_kernels.normal_draws`).
    """

    frames: int
    held: tuple
    generator: int


class EdgeJitter:
    """Random and sinusoidal jitter, unequal edges and return-to-zero coding on an output.

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
        The output before the first frame (the held-back frame at start; PDM / NRZ).
    rise_s, fall_s : float, keyword-only
        Durations of the linear ramp of a rising and of a falling edge, seconds (PDM, NRZ,
        RZ); each below half a slot (a frame, or half a frame with return to zero).
    return_to_zero : bool, keyword-only
        Every frame's level in its first half, 0 in its second.
    top_level : float, keyword-only
        ``N a``: the level of the top code, all unit elements at ``+a`` (RZ's edge parts).
    ticks_per_frame : int, keyword-only
        1 for PDM and NRZ; a PWM waveform's ticks a frame for :meth:`process_waveform` on
        PWM (the displacements then must stay below half a tick, and no ramps).
    """

    def __init__(
        self,
        frame_rate_hz,
        *,
        rms_s=0.0,
        sine_peak_s=0.0,
        sine_hz=0.0,
        seed=0,
        rest_level=0.0,
        rise_s=0.0,
        fall_s=0.0,
        return_to_zero=False,
        top_level=1.0,
        ticks_per_frame=1,
    ):
        self.frame_rate_hz = float(frame_rate_hz)
        if not (math.isfinite(self.frame_rate_hz) and self.frame_rate_hz > 0):
            raise ParameterError("frame_rate_hz", frame_rate_hz, "a rate above 0 Hz")
        checked = (
            ("rms_s", rms_s),
            ("sine_peak_s", sine_peak_s),
            ("sine_hz", sine_hz),
            ("rise_s", rise_s),
            ("fall_s", fall_s),
        )
        for name, value in checked:
            if not (math.isfinite(value) and value >= 0.0):
                raise ParameterError(name, value, "a number of at least 0")
        self.ticks_per_frame = int(ticks_per_frame)
        self.return_to_zero = bool(return_to_zero)
        if self.ticks_per_frame < 1:
            raise ParameterError("ticks_per_frame", ticks_per_frame, "an integer of at least 1")
        pwm = self.ticks_per_frame > 1
        if pwm and (rise_s > 0.0 or fall_s > 0.0 or self.return_to_zero):
            raise ParameterError(
                "rise_s/fall_s/return_to_zero", "set on a PWM waveform", "PDM or NRZ only"
            )
        self.slots = 2 if self.return_to_zero else 1
        self._slot_rate = self.frame_rate_hz * (self.ticks_per_frame if pwm else self.slots)
        slot = 1.0 / self._slot_rate
        where = "a PWM tick" if pwm else "the output period"
        if not pwm and self.slots == 2:
            where = "the output period's return-to-zero half"
        if 10.0 * rms_s + sine_peak_s >= 0.5 * slot:
            raise ParameterError(
                "jitter",
                f"10 x {rms_s!r} s rms + {sine_peak_s!r} s peak",
                f"below half {where}, {0.5 * slot:.4g} s",
            )
        for name, value in (("rise_s", rise_s), ("fall_s", fall_s)):
            if value >= 0.5 * slot:
                raise ParameterError(name, value, f"below half {where}, {0.5 * slot:.4g} s")
        self.rms_s, self.sine_peak_s, self.sine_hz = (
            float(rms_s),
            float(sine_peak_s),
            float(sine_hz),
        )
        self.rise_s, self.fall_s = float(rise_s), float(fall_s)
        self.seed = int(seed)
        self.rest_level = float(rest_level)
        self.top_level = float(top_level)

    def without_random_jitter(self) -> EdgeJitter:
        """The same stage with the white random displacements taken out (``rms_s = 0``).

        Its output, subtracted from this stage's, is the error of the random displacements
        alone (``Chain.process`` keeps it as ``jitter_error``).
        """
        twin = copy.copy(self)
        twin.rms_s = 0.0
        return twin

    @property
    def _plain(self) -> bool:
        """Jitter alone on NRZ / PDM: the original kernel (one slot a frame, no ramps)."""
        return self.slots == 1 and self.rise_s == 0.0 and self.fall_s == 0.0

    def initial_state(self) -> JitterState:
        """Before the first edge: the rest level held, the generator freshly seeded."""
        seeded = np.random.SeedSequence([self.seed, 0x717]).generate_state(1, dtype=np.uint64)
        if self.ticks_per_frame > 1:  # PWM: a rest frame, one segment of the whole frame
            held = (0.0, 0)
        elif self.slots == 2:
            held = (0.0, 0.0, 0.0)
        else:
            held = (self.rest_level, self.rest_level)
        return JitterState(frames=0, held=held, generator=int(seeded[0]))

    def shifts(self, start: int, count: int, state=None) -> np.ndarray:
        """Displacements of edges ``start .. start+count-1`` in slots (clipped to ±1/2).

        The random part is drawn from ``state``'s generator (the initial state's when None),
        as the next block would draw it; the sine is computed exactly at every edge. What
        :meth:`process` applies to PDM / NRZ (whose sine comes from exact anchors by the
        angle sum, within 3e-15 of its peak).
        """
        st = state if state is not None else self.initial_state()
        shift = self._random_shifts(count, np.array([st.generator], dtype=np.uint64))
        if self.sine_peak_s > 0.0:
            n = np.arange(start, start + count, dtype=np.float64)
            cycles = np.mod(n * (self.sine_hz / self._slot_rate), 1.0)
            shift += (self.sine_peak_s * self._slot_rate) * np.sin(2.0 * np.pi * cycles)
        return np.clip(shift, -0.5, 0.5)

    def _random_shifts(self, count, rng):
        """``count`` white displacements in slots, drawn from (and advancing) ``rng``."""
        shift = np.zeros(count)
        if self.rms_s > 0.0:
            _k.normal_draws(rng, self.rms_s * self._slot_rate, shift)
        return shift

    def process(self, levels, state=None):
        """Frame means (or RZ half-frame means) of the impaired output, one frame behind.

        Parameters
        ----------
        levels : ndarray, shape (n,)
            The level of each frame (volts or full-scale units).
        state : JitterState, optional

        Returns
        -------
        means : ndarray, shape (n,), or (n, 2) with return to zero
            ``means[i]`` is the exact mean of frame ``i - 1`` (the first: of the frame held
            back from the previous block, or the rest level); with return to zero the means
            of its two halves.
        state : JitterState
        """
        if self.ticks_per_frame > 1:
            raise ParameterError(
                "levels", "one level a frame", "a PWM waveform (use process_waveform)"
            )
        st = state if state is not None else self.initial_state()
        levels = np.ascontiguousarray(levels, dtype=np.float64)
        rng = np.array([st.generator], dtype=np.uint64)
        shift = self._random_shifts(levels.size * self.slots, rng)
        held = np.array(st.held, dtype=np.float64)
        peak = self.sine_peak_s * self._slot_rate
        ratio = self.sine_hz / self._slot_rate
        if peak != 0.0:  # the sine by anchored rotation, added to the random part
            _k.add_sine_shifts(shift, st.frames * self.slots, peak, ratio)
        if self._plain:
            out = np.empty(levels.size)
            _k.jittered_frame_means(levels, shift, held, out)
        else:
            out = np.empty((levels.size, self.slots))
            _k.edge_slot_means(
                levels,
                shift,
                self.rise_s * self._slot_rate,
                self.fall_s * self._slot_rate,
                self.top_level,
                self.slots == 2,
                held,
                out,
            )
            if self.slots == 1:
                out = out[:, 0]
        new = JitterState(
            frames=st.frames + levels.size,
            held=tuple(float(v) for v in held),
            generator=int(rng[0]),
        )
        return out, new

    def process_waveform(self, waveform, state=None):
        """The impaired output as a waveform, one frame behind (what the chain runs).

        Parameters
        ----------
        waveform : PulseWaveform
            PDM or NRZ (one segment a frame, or the two of return to zero: its levels are
            read from the first) or, with ``ticks_per_frame > 1``, PWM.
        state : JitterState, optional

        Returns
        -------
        waveform : PulseWaveform
            Same frame count; one segment a frame (NRZ, PDM), two (RZ), or, for PWM, three
            pieces per input segment (its first tick, the ticks between, its last tick)
            with the exact mean of every tick.
        state : JitterState
        """
        from audiodsm.stages.output_stage import PulseWaveform

        rate = waveform.frame_rate_hz
        if self.ticks_per_frame == 1:
            means, st = self.process(waveform.levels[:, 0], state)
            means = means.reshape(waveform.n_frames, self.slots)
            ticks = np.broadcast_to(_ONE_TICKS[: self.slots], (waveform.n_frames, self.slots))
            return PulseWaveform._trusted(means, ticks, self.slots, rate), st
        if waveform.ticks_per_frame != self.ticks_per_frame:
            raise ParameterError(
                "waveform.ticks_per_frame", waveform.ticks_per_frame, str(self.ticks_per_frame)
            )
        st = state if state is not None else self.initial_state()
        levels = np.ascontiguousarray(waveform.levels, dtype=np.float64)
        ticks = np.ascontiguousarray(waveform.ticks, dtype=np.int64)
        n, n_seg = levels.shape
        prev, last_j = st.held[0], st.held[1]
        if len(st.held) > 2:
            held_levels = np.array(st.held[2], dtype=np.float64)
            held_ticks = np.array(st.held[3], dtype=np.int64)
        else:  # the rest frame: the whole frame at 0, as first tick, middle, last tick
            held_levels = np.zeros(3 * n_seg)
            held_ticks = np.zeros(3 * n_seg, dtype=np.int64)
            held_ticks[:3] = (1, self.ticks_per_frame - 2, 1)
            last_j = 2
        on = levels[ticks > 0]  # row-major: the segments in time order
        edges = int(np.count_nonzero(np.diff(on, prepend=prev) != 0.0)) if on.size else 0
        rng = np.array([st.generator], dtype=np.uint64)
        shift = self._random_shifts(edges, rng)
        peak = self.sine_peak_s * self._slot_rate
        if peak != 0.0:  # the sine from anchors, added to the random part edge by edge
            _k.add_tick_sine_shifts(
                levels,
                ticks,
                float(prev),
                st.frames,
                self.ticks_per_frame,
                peak,
                self.sine_hz / self.frame_rate_hz,
                shift,
            )
        held = np.array([prev, last_j], dtype=np.float64)
        out_levels = np.empty((n, 3 * n_seg))
        out_ticks = np.empty((n, 3 * n_seg), dtype=np.int64)
        _k.jittered_segments(
            levels, ticks, shift, held_levels, held_ticks, held, out_levels, out_ticks
        )
        new = JitterState(
            frames=st.frames + n,
            held=(
                float(held[0]),
                int(held[1]),
                tuple(float(v) for v in held_levels),
                tuple(int(v) for v in held_ticks),
            ),
            generator=int(rng[0]),
        )
        return PulseWaveform._trusted(out_levels, out_ticks, self.ticks_per_frame, rate), new


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
