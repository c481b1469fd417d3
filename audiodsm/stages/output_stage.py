"""Output stages: the modulator's levels as a piecewise-constant waveform.

The output stage turns the modulator output ``y`` (full-scale units, levels evenly spaced in
[-1, 1], one channel at a time) into what a power stage or DAC would drive: a
:class:`PulseWaveform`. Every modulator sample becomes one *frame*; every frame is a fixed
number of constant *segments* whose durations are whole *ticks* of a clock that runs
``ticks_per_frame`` times faster than the frame rate. The reconstruction filter
(:func:`audiodsm.stages.reconstruct.filter_waveform`) is exact for such waveforms.

Three stages are offered:

- :func:`pdm_waveform`: the single-bit stream (one segment per frame);
- :func:`nrz_waveform`: a multi-level DAC holding each level for one frame;
- :func:`pwm_waveform`: class-D pulse-width modulation on a counter clock, with dead time,
  minimum pulse width and supply scaling.

Writing the stream to disk (packed bits, one word per line) is in
:mod:`audiodsm.stages.stream_export`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.stages import _waveform_kernels

__all__ = [
    "PulseWaveform",
    "pdm_waveform",
    "nrz_waveform",
    "return_to_zero_waveform",
    "pwm_waveform",
    "PwmStats",
    "PwmState",
    "level_codes",
]

# Tolerance when checking that a value sits on a level grid: the modulator computes levels
# as  -1 + 2 k / (levels - 1), which is exact to a few ulp.
_GRID_TOL = 1e-9


# ---------------------------------------------------------------------------------------------
# The waveform handed to the reconstruction filter
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class PulseWaveform:
    """A piecewise-constant waveform on a tick grid, one frame per modulator sample.

    Parameters
    ----------
    levels : ndarray, shape (n_frames, n_segments), float64
        The value held during each segment (volts, or full-scale units).
    ticks : ndarray, shape (n_frames, n_segments), int64
        The duration of each segment in ticks; zero-length segments are allowed. Every row
        sums to ``ticks_per_frame``.
    ticks_per_frame : int
        Ticks in one frame; 1 for PDM and NRZ.
    frame_rate_hz : float
        Frames per second (the modulator rate). One tick lasts
        ``1 / (frame_rate_hz * ticks_per_frame)`` seconds.
    """

    levels: np.ndarray
    ticks: np.ndarray
    ticks_per_frame: int
    frame_rate_hz: float

    def __post_init__(self):
        levels = np.ascontiguousarray(self.levels, dtype=np.float64)
        ticks = np.ascontiguousarray(self.ticks, dtype=np.int64)
        if levels.ndim != 2 or levels.shape != ticks.shape:
            raise ParameterError(
                "levels/ticks",
                (levels.shape, ticks.shape),
                "two arrays of the same shape (n_frames, n_segments)",
            )
        tpf = int(self.ticks_per_frame)
        if tpf < 1 or tpf != self.ticks_per_frame:
            raise ParameterError("ticks_per_frame", self.ticks_per_frame, "an integer >= 1")
        rate = float(self.frame_rate_hz)
        if not (math.isfinite(rate) and rate > 0):
            raise ParameterError("frame_rate_hz", self.frame_rate_hz, "a finite number > 0")
        if ticks.size and (ticks.min() < 0 or np.any(ticks.sum(axis=1) != tpf)):
            expected = f"non-negative durations summing to {tpf} in every row"
            raise ParameterError("ticks", "a row with another sum or a negative", expected)
        if not np.all(np.isfinite(levels)):
            raise ParameterError("levels", "NaN or Inf", "finite values")
        levels = levels.view()  # read-only views: the caller's arrays keep their flags
        ticks = ticks.view()
        levels.setflags(write=False)
        ticks.setflags(write=False)
        object.__setattr__(self, "levels", levels)
        object.__setattr__(self, "ticks", ticks)
        object.__setattr__(self, "ticks_per_frame", tpf)
        object.__setattr__(self, "frame_rate_hz", rate)

    @classmethod
    def _trusted(cls, levels, ticks, ticks_per_frame, frame_rate_hz) -> PulseWaveform:
        """Build without the checks, for stage code that constructs valid arrays itself."""
        self = object.__new__(cls)
        levels.setflags(write=False)
        object.__setattr__(self, "levels", levels)
        object.__setattr__(self, "ticks", ticks)
        object.__setattr__(self, "ticks_per_frame", int(ticks_per_frame))
        object.__setattr__(self, "frame_rate_hz", float(frame_rate_hz))
        return self

    @property
    def n_frames(self) -> int:
        """Number of frames (modulator samples)."""
        return self.levels.shape[0]

    @property
    def n_segments(self) -> int:
        """Segments per frame."""
        return self.levels.shape[1]

    @property
    def tick_rate_hz(self) -> float:
        """Ticks per second: ``frame_rate_hz * ticks_per_frame``."""
        return self.frame_rate_hz * self.ticks_per_frame

    def tick_samples(self) -> np.ndarray:
        """The waveform's value during every tick, shape ``(n_frames * ticks_per_frame,)``.

        Meant for plots and checks of short stretches; memory grows with ``ticks_per_frame``.
        """
        return np.repeat(self.levels.ravel(), self.ticks.ravel())

    def frame_means(self) -> np.ndarray:
        """The mean value of every frame (the waveform's area per frame over its length)."""
        return (self.levels * self.ticks).sum(axis=1) / self.ticks_per_frame


def _as_channel(y, name="y") -> np.ndarray:
    arr = np.asarray(y, dtype=np.float64)
    if arr.ndim != 1:
        raise ParameterError(f"{name}.shape", arr.shape, "a one-channel array of shape (n,)")
    if not np.all(np.isfinite(arr)):
        raise ParameterError(name, "NaN or Inf", "finite values")
    return arr


def _check_rate(frame_rate_hz) -> float:
    try:
        rate = float(frame_rate_hz)
    except (TypeError, ValueError):
        rate = float("nan")
    if not (math.isfinite(rate) and rate > 0):
        raise ParameterError("frame_rate_hz", frame_rate_hz, "a finite number > 0")
    return rate


def _check_levels(levels) -> int:
    if isinstance(levels, bool) or not isinstance(levels, int | np.integer) or levels < 2:
        raise ParameterError("levels", levels, "an integer >= 2")
    return int(levels)


def level_codes(y, *, levels: int) -> np.ndarray:
    """Integer codes 0 .. levels-1 of values on the evenly spaced grid in [-1, 1].

    Code 0 is -1.0 (bottom), code ``levels - 1`` is +1.0 (top); code k is
    ``-1 + 2 k / (levels - 1)``.

    Parameters
    ----------
    y : array_like
        Values on the grid, any shape.
    levels : int
        Number of levels (>= 2).

    Returns
    -------
    ndarray of int64
        The codes, same shape as ``y``.

    Raises
    ------
    ParameterError
        If a value is off the grid or outside [-1, 1].
    """
    n = _check_levels(levels)
    arr = np.asarray(y, dtype=np.float64)
    pos = (arr + 1.0) * 0.5 * (n - 1)
    codes = np.rint(pos)
    if arr.size:
        bad = ~np.isfinite(pos) | (np.abs(pos - codes) > _GRID_TOL * (n - 1)) | (codes < 0)
        bad |= codes > n - 1
        if np.any(bad):
            first = arr.ravel()[np.flatnonzero(bad.ravel())[0]]
            raise ParameterError(
                "y", float(first), f"values on the {n}-level grid -1 + 2k/{n - 1} in [-1, 1]"
            )
    return codes.astype(np.int64)


# ---------------------------------------------------------------------------------------------
# PDM and multi-level NRZ
# ---------------------------------------------------------------------------------------------


def pdm_waveform(
    y, *, frame_rate_hz: float, full_scale_volts: float = 1.0, validate: bool = True
) -> PulseWaveform:
    """The single-bit stream as a waveform: +/- ``full_scale_volts`` held for one frame.

    Parameters
    ----------
    y : ndarray, shape (n,)
        Modulator output, every value -1.0 or +1.0.
    frame_rate_hz : float
        The modulator rate.
    full_scale_volts : float, optional
        The voltage of a 1 bit; a 0 bit is its negative.
    validate : bool, optional
        Check that every value is -1.0 or +1.0 and copy ``y`` (default). ``False`` is for a
        caller that holds a single-bit loop's own output: it skips the check, and with
        ``full_scale_volts = 1`` the waveform shares ``y``'s memory (a read-only view), so the
        caller must not change ``y`` afterwards. The chain uses it at the modulator rate.

    Returns
    -------
    PulseWaveform
        One segment per frame, ``ticks_per_frame = 1``.
    """
    arr = np.ascontiguousarray(y, dtype=np.float64)
    if arr.ndim != 1:
        raise ParameterError("y.shape", arr.shape, "a one-channel array of shape (n,)")
    rate = _check_rate(frame_rate_hz)
    volts = _check_volts(full_scale_volts, "full_scale_volts")
    if not validate:
        levels = (arr * volts if volts != 1.0 else arr).reshape(-1, 1)  # a view of its own
        return PulseWaveform._trusted(levels, _ONE_TICK[: arr.size], 1, rate)
    if not np.all(np.abs(arr) == 1.0):  # also rejects NaN
        bad = arr[np.flatnonzero(np.abs(arr) != 1.0)[0]]
        raise ParameterError("y", float(bad), "-1.0 or +1.0 (a single-bit stream)")
    levels = (arr * volts if volts != 1.0 else arr.copy()).reshape(-1, 1)
    return PulseWaveform._trusted(levels, _ONE_TICK[: arr.size], 1, rate)


# a shared read-only column of ones: the ticks of every one-segment frame
_ONE_TICK = np.broadcast_to(np.ones((1, 1), dtype=np.int64), (1 << 40, 1))


def _check_volts(value, name) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = float("nan")
    if not (math.isfinite(v) and v > 0):
        raise ParameterError(name, value, "a finite number > 0")
    return v


def nrz_waveform(
    y,
    *,
    levels: int,
    frame_rate_hz: float,
    lsb_volts: float | None = None,
    validate: bool = True,
) -> PulseWaveform:
    """A multi-level DAC: each level held for one frame (non-return-to-zero).

    Parameters
    ----------
    y : ndarray, shape (n,)
        Modulator output on the ``levels``-level grid in [-1, 1].
    levels : int
        Number of quantizer levels (from the modulator).
    frame_rate_hz : float
        The modulator rate.
    lsb_volts : float or None, optional
        Voltage of one step between adjacent levels. The DAC's output is the centred code times
        the LSB, ``(k - (levels - 1) / 2) * lsb_volts``, i.e. ``y * (levels - 1) / 2 *
        lsb_volts``. None keeps full-scale units (an LSB of ``2 / (levels - 1)``).
    validate : bool, optional
        Check that every value is finite and on the grid (default). ``False`` is for a caller
        that holds a quantizer's own output (the chain, at the modulator rate): the codes are
        rounded the same way and give the same levels, without the checks' passes over the
        block.

    Returns
    -------
    PulseWaveform
        One segment per frame, ``ticks_per_frame = 1``.
    """
    rate = _check_rate(frame_rate_hz)
    n = _check_levels(levels)
    if validate:
        arr = _as_channel(y)
        codes = level_codes(arr, levels=n)
    else:  # level_codes' rounding; integers held exactly as floats, so the same levels
        arr = np.asarray(y, dtype=np.float64)
        codes = np.rint((arr + 1.0) * 0.5 * (n - 1))
    lsb = 2.0 / (n - 1) if lsb_volts is None else _check_volts(lsb_volts, "lsb_volts")
    out = (codes - (n - 1) / 2.0) * lsb
    return PulseWaveform._trusted(out.reshape(-1, 1), _ONE_TICK[: arr.size], 1, rate)


def return_to_zero_waveform(waveform: PulseWaveform) -> PulseWaveform:
    """Return-to-zero coding of a PDM or NRZ waveform: each level for half a frame, then 0.

    Every frame gets the same edges whatever the data (out of 0 and back), so unequal rising
    and falling edges make a constant error instead of a signal-dependent one (see
    :mod:`audiodsm.stages.jitter`); the frame mean, and so the gain, is halved.

    Parameters
    ----------
    waveform : PulseWaveform
        One segment a frame (``ticks_per_frame = 1``).

    Returns
    -------
    PulseWaveform
        Two segments a frame, ``[level, 0]``, one tick each (``ticks_per_frame = 2``).

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", IEEE/Wiley
       2005, the section on inter-symbol interference and return-to-zero DACs (from memory).
    """
    if not isinstance(waveform, PulseWaveform) or waveform.ticks_per_frame != 1:
        tpf = getattr(waveform, "ticks_per_frame", None)
        raise ParameterError("waveform.ticks_per_frame", tpf, "1 (a PDM or NRZ waveform)")
    n = waveform.n_frames
    levels = np.zeros((n, 2))
    levels[:, 0] = waveform.levels[:, 0]
    ticks = np.ones((n, 2), dtype=np.int64)
    return PulseWaveform._trusted(levels, ticks, 2, waveform.frame_rate_hz)


# ---------------------------------------------------------------------------------------------
# PWM
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PwmStats:
    """Counts from one call of :func:`pwm_waveform` (or, in ``PwmState.totals``, a stream).

    Attributes
    ----------
    frames : int
        Frames produced.
    dropped_pulses : int
        Pulses (high or low) shorter than the minimum width that were removed.
    stretched_pulses : int
        Pulses shorter than the minimum width that were widened to it.
    pulses_lost_to_dead_time : int
        Nonzero high pulses that the rising-edge delay swallowed completely.
    transitions : tuple of int
        Level changes of each bridge leg (leg A first; leg B only for a full bridge).
    switching_events_per_s : tuple of float
        ``transitions`` per second of output, per leg.
    """

    frames: int
    dropped_pulses: int
    stretched_pulses: int
    pulses_lost_to_dead_time: int
    transitions: tuple
    switching_events_per_s: tuple


@dataclass(frozen=True)
class PwmState:
    """Streaming state of :func:`pwm_waveform` (a value; pass it back with the next block).

    Attributes
    ----------
    high_run : tuple of int
        Per leg, how long (in ticks, capped at the dead time) the leg's commanded signal had
        been high at the end of the last frame; 0 when it ended low.
    last_level : tuple of bool
        Per leg, the leg's actual level at the end of the last frame.
    totals : PwmStats
        Counts over everything processed so far.
    """

    high_run: tuple
    last_level: tuple
    totals: PwmStats


_MODES = ("two-level", "three-level")
_CARRIERS = ("trailing", "double-edge")
_BRIDGES = ("full", "half")
_ACTIONS = ("drop", "stretch")


def _check_int(value, name, lo, hi=None) -> int:
    ok = isinstance(value, int | np.integer) and not isinstance(value, bool)
    if not ok or value < lo or (hi is not None and value > hi):
        allowed = f"an integer >= {lo}" if hi is None else f"an integer from {lo} to {hi}"
        raise ParameterError(name, value, allowed)
    return int(value)


def _check_choice(value, name, choices) -> str:
    if value not in choices:
        raise ParameterError(name, value, "one of " + ", ".join(repr(c) for c in choices))
    return value


def _pwm_codes(arr, levels, counter_steps):
    """Counter codes 0..N for the duty (1 + y) / 2, and N."""
    if levels is None and counter_steps is None:
        raise ParameterError("levels/counter_steps", None, "levels or counter_steps (or both)")
    if levels is not None:
        n_levels = _check_levels(levels)
        codes = level_codes(arr, levels=n_levels)
        if counter_steps is None:
            return codes, n_levels - 1
        steps = _check_int(counter_steps, "counter_steps", 1)
        if steps % (n_levels - 1):
            raise ParameterError(
                "counter_steps",
                counter_steps,
                f"a multiple of levels - 1 = {n_levels - 1} so every level is an exact width",
            )
        return codes * (steps // (n_levels - 1)), steps
    steps = _check_int(counter_steps, "counter_steps", 1)
    if arr.size and (arr.min() < -1.0 - _GRID_TOL or arr.max() > 1.0 + _GRID_TOL):
        bad = arr[np.argmax(np.abs(arr))]
        raise ParameterError("y", float(bad), "values within [-1, 1]")
    codes = np.rint((np.clip(arr, -1.0, 1.0) + 1.0) * 0.5 * steps).astype(np.int64)
    return codes, steps


def _apply_min_pulse(codes, steps, unit, min_ticks, action):
    """Per frame: a high time or a low time shorter than ``min_ticks`` is dropped or stretched.

    ``unit`` is the ticks per counter code (1 or 2 for the carrier, times the subdivision).
    Returns the new codes and the counts (dropped, stretched).
    """
    if min_ticks <= 0:
        return codes, 0, 0
    k_min = -(-min_ticks // unit)  # smallest code whose width reaches min_ticks
    high_short = (codes > 0) & (codes * unit < min_ticks)
    low_short = (codes < steps) & ((steps - codes) * unit < min_ticks)
    out = codes.copy()
    if action == "drop":
        out[high_short] = 0
        out[low_short] = steps
        return out, int(high_short.sum() + low_short.sum()), 0
    out[high_short] = k_min
    out[low_short] = steps - k_min
    return out, 0, int(high_short.sum() + low_short.sum())


@dataclass(frozen=True)
class _PwmPlan:
    """Validated PWM settings and the per-frame counter codes of both legs."""

    n: int
    rate: float
    n_legs: int
    steps: int
    sub: int
    frame: int
    dead: int
    volts: float
    invert_b: bool
    double_edge: bool
    half_bridge: bool
    codes_a: np.ndarray
    codes_b: np.ndarray
    dropped: int
    stretched: int


def pwm_switching_plan(
    y,
    frame_rate_hz,
    levels,
    counter_steps,
    mode,
    carrier,
    bridge,
    tick_subdivision,
    dead_time_ticks,
    min_pulse_ticks,
    min_pulse_action,
    supply_volts,
) -> _PwmPlan:
    """Check the PWM settings (as documented in :func:`pwm_waveform`) and make the leg codes.

    The plan (each leg's on-time code per frame, the frame's ticks, the dead time, which legs
    are inverted) is what :func:`pwm_waveform` draws and what the power stage needs to know
    which switches conduct in each segment
    (:func:`audiodsm.stages.power_stage.segment_switch_states`).
    """
    arr = _as_channel(y)
    rate = _check_rate(frame_rate_hz)
    mode = _check_choice(mode, "mode", _MODES)
    carrier = _check_choice(carrier, "carrier", _CARRIERS)
    bridge = _check_choice(bridge, "bridge", _BRIDGES)
    action = _check_choice(min_pulse_action, "min_pulse_action", _ACTIONS)
    if mode == "three-level" and bridge != "full":
        raise ParameterError("bridge", bridge, "'full' for three-level modulation")
    sub = _check_int(tick_subdivision, "tick_subdivision", 1)
    volts = _check_volts(supply_volts, "supply_volts")
    codes, steps = _pwm_codes(arr, levels, counter_steps)
    unit = sub * (1 if carrier == "trailing" else 2)
    frame = steps * unit
    dead = _check_int(dead_time_ticks, "dead_time_ticks", 0, frame)
    min_ticks = _check_int(min_pulse_ticks, "min_pulse_ticks", 0, frame // 2)
    n_legs = 2 if bridge == "full" else 1
    codes, dropped, stretched = _apply_min_pulse(codes, steps, unit, min_ticks, action)
    # leg commands: A follows the codes; B is A's complement (two-level full bridge) or runs
    # on the mirrored code N - k (three-level)
    codes_b = codes if n_legs == 1 or mode == "two-level" else steps - codes
    return _PwmPlan(
        n=arr.size,
        rate=rate,
        n_legs=n_legs,
        steps=steps,
        sub=sub,
        frame=frame,
        dead=dead,
        volts=volts,
        invert_b=mode == "two-level",  # leg B is leg A's complement in a two-level full bridge
        double_edge=carrier == "double-edge",
        half_bridge=n_legs == 1,
        codes_a=np.ascontiguousarray(codes, dtype=np.int64),
        codes_b=np.ascontiguousarray(codes_b, dtype=np.int64),
        dropped=dropped,
        stretched=stretched,
    )


def pwm_waveform(
    y,
    *,
    frame_rate_hz: float,
    levels: int | None = None,
    counter_steps: int | None = None,
    mode: str = "two-level",
    carrier: str = "trailing",
    bridge: str = "full",
    tick_subdivision: int = 1,
    dead_time_ticks: int = 0,
    min_pulse_ticks: int = 0,
    min_pulse_action: str = "drop",
    supply_volts: float = 1.0,
    state: PwmState | None = None,
) -> tuple[PulseWaveform, PwmStats, PwmState]:
    """Class-D pulse-width modulation on a counter clock, exact at tick resolution.

    Each modulator sample becomes one PWM frame whose leg duty is ``(1 + y) / 2``, quantized
    to ``N`` counter steps, ``N = levels - 1`` (every level an exact width) or
    ``counter_steps``.

    Parameters
    ----------
    y : ndarray, shape (n,)
        Modulator output in full-scale units, one channel.
    frame_rate_hz : float
        The PWM frame rate, equal to the modulator rate.
    levels : int, optional
        Modulator levels: ``y`` must lie on this grid. Without ``counter_steps`` the counter
        has ``levels - 1`` steps; with it, ``counter_steps`` must be a multiple of
        ``levels - 1``.
    counter_steps : int, optional
        Counter steps per frame. Alone (without ``levels``), ``y`` in [-1, 1] is rounded to
        the nearest of the ``counter_steps + 1`` widths (plain rounding, not noise-shaped).
    mode : {"two-level", "three-level"}
        Two-level: the output swings between -V and +V. Three-level ("BD"): leg A takes duty
        ``(1 + y) / 2`` and leg B ``(1 - y) / 2``; the differential output takes -V, 0, +V and
        the odd carrier groups cancel (double-edge carrier). Needs ``bridge="full"``.
    carrier : {"trailing", "double-edge"}
        Trailing edge: a sawtooth counter, the pulse starts at the frame start, ``N`` ticks a
        frame. Double-edge: a symmetric up-down counter, the pulse is centred, ``2 N`` ticks a
        frame (the counter clock runs at ``2 N`` times the frame rate).
    bridge : {"full", "half"}
        Two-level only. "full": a full bridge with complementary legs ("AD"), output
        ``V (A - B)``. "half": one half bridge on split rails +-V, output ``V (2 A - 1)``.
        Without dead time both give the same waveform.
    tick_subdivision : int
        Ticks per counter step; > 1 gives a finer grid for dead time and minimum pulse width.
    dead_time_ticks : int
        Every rising edge of every leg is delayed by this many ticks (the switch turns on only
        after its command has been high that long; a shorter pulse vanishes). During the delay
        the leg is low: the waveform of a bridge whose leg currents always flow out of the legs.
        For dead time that follows the real load current use
        :func:`audiodsm.stages.reconstruct.filter_pwm_with_dead_time` (the chain does). At most
        the frame length.
    min_pulse_ticks : int
        Shortest pulse the power stage makes, in ticks. Applied per frame and leg command to
        the high time and to the low time within the frame, before dead time. At most half
        the frame.
    min_pulse_action : {"drop", "stretch"}
        A short pulse is removed (the leg stays low or high all frame) or widened to the
        smallest counter width that reaches ``min_pulse_ticks``.
    supply_volts : float
        V: the supply voltage the bridge switches.
    state : PwmState or None
        Streaming state from the previous block; None starts with every leg low.

    Returns
    -------
    waveform : PulseWaveform
        The differential output voltage, ``ticks_per_frame = N * tick_subdivision`` (trailing)
        or ``2 * N * tick_subdivision`` (double-edge). Segments come from the legs' edges and
        may have zero length.
    stats : PwmStats
        Counts for this block.
    state : PwmState
        State to pass with the next block (carries running totals).

    Notes
    -----
    The frame mean is ``y * supply_volts`` exactly when there is no dead time and no pulse
    was dropped or stretched. Dead time here is a plain turn-on delay of each leg; in a real
    bridge the leg during the dead interval follows the load current's direction, which
    needs the filter's state: :func:`audiodsm.stages.reconstruct.filter_pwm_with_dead_time`
    models that (see docs/outputs.md).

    References
    ----------
    .. [1] H. S. Black, "Modulation Theory", Van Nostrand, 1953 (uniformly sampled PWM and its
       baseband harmonics).
    .. [2] Z. Song and D. V. Sarwate, "The frequency spectrum of pulse width modulated signals",
       IEEE Trans. Signal Processing, 2003.
    """
    plan = pwm_switching_plan(
        y,
        frame_rate_hz,
        levels,
        counter_steps,
        mode,
        carrier,
        bridge,
        tick_subdivision,
        dead_time_ticks,
        min_pulse_ticks,
        min_pulse_action,
        supply_volts,
    )
    n_legs, n, rate, frame = plan.n_legs, plan.n, plan.rate, plan.frame
    if state is None:
        state = PwmState((0,) * n_legs, (False,) * n_legs, _zero_stats(n_legs))
    elif not isinstance(state, PwmState) or len(state.high_run) != n_legs:
        raise ParameterError("state", type(state).__name__, f"a PwmState for {n_legs} leg(s)")
    seg = 1 + 4 * n_legs
    out = np.empty((n, seg))
    ticks = np.empty((n, seg), dtype=np.int64)
    run = np.array(state.high_run, dtype=np.int64)
    last = np.array(state.last_level, dtype=np.int64)
    counts = np.zeros(3, dtype=np.int64)
    _waveform_kernels.pwm_segments(
        plan.codes_a,
        plan.codes_b,
        n_legs,
        plan.invert_b,
        plan.double_edge,
        plan.steps,
        plan.sub,
        plan.dead,
        plan.volts,
        plan.half_bridge,
        run,
        last,
        out,
        ticks,
        counts,
    )
    dropped, stretched = plan.dropped, plan.stretched
    waveform = PulseWaveform._trusted(out, ticks, frame, rate)
    runs = [int(r) for r in run]
    last = [bool(v) for v in last]
    stats, totals = _pwm_counts(state.totals, n, rate, dropped, stretched, counts, n_legs)
    return waveform, stats, PwmState(tuple(runs), tuple(last), totals)


def _pwm_counts(tot, n, rate, dropped, stretched, counts, n_legs):
    """The block's :class:`PwmStats` and the running totals, from the kernel's counts.

    ``counts`` holds ``[lost to dead time, transitions of leg A, transitions of leg B]``.
    """
    lost = int(counts[0])
    transitions = [int(c) for c in counts[1 : 1 + n_legs]]
    seconds = n / rate
    per_s = tuple((t / seconds) if n else 0.0 for t in transitions)
    stats = PwmStats(n, dropped, stretched, lost, tuple(transitions), per_s)
    total_frames = tot.frames + n
    total_trans = tuple(a + b for a, b in zip(tot.transitions, transitions, strict=True))
    total_s = total_frames / rate
    totals = PwmStats(
        total_frames,
        tot.dropped_pulses + dropped,
        tot.stretched_pulses + stretched,
        tot.pulses_lost_to_dead_time + lost,
        total_trans,
        tuple((t / total_s) if total_frames else 0.0 for t in total_trans),
    )
    return stats, totals


def _zero_stats(n_legs: int) -> PwmStats:
    return PwmStats(0, 0, 0, 0, (0,) * n_legs, (0.0,) * n_legs)
