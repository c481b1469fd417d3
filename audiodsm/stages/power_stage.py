"""The class-D power stage as built: switches with on-resistance, its load, volts and amperes.

A bridge leg connects its output to a rail through the switch that conducts: the high-side
switch (on-resistance ``R_hs``) when the leg is high, the low-side one (``R_ls``) when it is low.
So the LC filter is driven by the rail voltage through a resistance that depends on the switch
state. :class:`SwitchedLcFilter` holds one filter per state of the legs (the switches'
resistance added to the inductors' series resistance) and runs a PWM waveform through them,
segment by segment, exactly (each segment is zero-order-hold exact for its own filter; the state,
kept in the filter's own coordinates, carries across).

Loop resistance per switch state (the current flows through one switch per leg):

* half bridge (one leg): ``R_hs`` (high) or ``R_ls`` (low);
* full bridge, legs A and B: ``R(A) + R(B)`` with ``R(1) = R_hs``, ``R(0) = R_ls``: ``R_hs +
  R_ls`` while the legs differ, ``2 R_hs`` or ``2 R_ls`` in the zero states of a three-level
  bridge (the current circulates through both high-side or both low-side switches).

In the bridged (BTL) LC form each half carries half of the loop resistance, as in
:func:`~audiodsm.stages.filter_design.lc_filter`. Unequal ``R_hs`` and ``R_ls`` make the
effective source resistance follow the duty cycle: the stage's gain moves with the signal, a
distortion that no calibration removes.

:func:`class_d_readings` gives the stage's figures in volts, amperes and watts for a stretch of
modulator output: the peak load voltage, the peak load and inductor currents, the conduction
loss in the switches (``I^2 R``, averaged) and the power into the load.

References
----------
.. [1] N. Mohan, T. M. Undeland and W. P. Robbins, "Power Electronics: Converters,
   Applications, and Design", 3rd ed., Wiley 2003 (switch conduction losses, ``I^2 R_on``).
.. [2] C. Van Loan, "Computing integrals involving the matrix exponential", IEEE Trans.
   Automatic Control 23(3), 1978 (quadratic integrals of linear systems).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np
import scipy.linalg

from audiodsm.errors import ParameterError
from audiodsm.stages import _waveform_kernels
from audiodsm.stages.filter_design import AnalogFilter, lc_filter_with_load

__all__ = [
    "SwitchedLcFilter",
    "switched_lc_filter",
    "segment_switch_states",
    "filter_switched_waveform",
    "ClassDReadings",
    "class_d_readings",
]


@dataclass(frozen=True, eq=False)
class SwitchedLcFilter:
    """An LC filter whose source resistance follows the conducting switches.

    Build it with :func:`switched_lc_filter`.

    Attributes
    ----------
    filters : tuple of AnalogFilter
        One per switch state: index ``A`` (half bridge) or ``2 A + B`` (full bridge).
    loop_ohm : tuple of float
        The conducting switches' resistance in the current's loop, per switch state.
    average : AnalogFilter
        The filter with each switch at the mean of ``R_hs`` and ``R_ls``: what the chain's
        calibration reads.
    load_current_row : ndarray, shape (m,)
        Load current (A) ``= load_current_row @ x`` for the filter state ``x``.
    half_bridge : bool
    """

    filters: tuple
    loop_ohm: tuple
    average: AnalogFilter
    load_current_row: np.ndarray
    half_bridge: bool

    @cached_property
    def model(self):
        """The simulation model: the filter's own coordinates, keyed by all switch states."""
        from audiodsm.stages.reconstruct import _Model

        key = b"switched" + b"".join(f._key for f in self.filters)
        f0 = self.filters[0]
        m = f0.order
        return _Model(f0.a.copy(), f0.b[:, 0].copy(), f0.c[0].copy(), 0.0, False, 0, key, np.eye(m))

    def tables(self, dt: float, frame_ticks: int):
        """Stacked tables ``(phis, gammas, wx, wu, qs)`` over the switch states (cached)."""
        key = (self.model.key, dt, frame_ticks)
        hit = _TABLES.get(key)
        if hit is not None:
            return hit
        from audiodsm.stages.reconstruct import _expm_tables, _Model, _power_matrices

        lengths = np.arange(frame_ticks + 1)
        parts = []
        for f in self.filters:
            mod = _Model(f.a, f.b[:, 0], f.c[0], float(f.d[0, 0]), False, 0, f._key, None)
            parts.append(
                (
                    *_expm_tables(mod, dt, lengths, frame_ticks),
                    _power_matrices(mod, dt, lengths, frame_ticks),
                )
            )
        out = tuple(np.ascontiguousarray(np.stack(t)) for t in zip(*parts, strict=True))
        if len(_TABLES) > 32:
            _TABLES.clear()
        _TABLES[key] = out
        return out


_TABLES: dict = {}


def _non_negative(name, value) -> float:
    v = float(value) if isinstance(value, int | float | np.number) else math.nan
    if isinstance(value, bool) or not (math.isfinite(v) and v >= 0.0):
        raise ParameterError(name, value, "a finite number >= 0 (ohm)")
    return v


def switched_lc_filter(
    inductance_h: float,
    capacitance_f: float,
    load,
    *,
    series_ohm: float = 0.0,
    bridged: bool = False,
    high_side_ohm: float = 0.0,
    low_side_ohm: float = 0.0,
    half_bridge: bool = False,
) -> SwitchedLcFilter:
    """The LC filter and its load behind switches with on-resistance.

    Parameters
    ----------
    inductance_h, capacitance_f, series_ohm, bridged
        As in :func:`~audiodsm.stages.filter_design.lc_filter`.
    load : float or LoudspeakerLoad
        As in :func:`~audiodsm.stages.filter_design.lc_filter_with_load`.
    high_side_ohm, low_side_ohm : float
        On-resistance of the high-side and the low-side switch of each leg (ohm, >= 0).
    half_bridge : bool
        One leg (a half bridge on split rails) instead of two.

    Returns
    -------
    SwitchedLcFilter
    """
    r_hs = _non_negative("high_side_ohm", high_side_ohm)
    r_ls = _non_negative("low_side_ohm", low_side_ohm)
    rs = _non_negative("series_ohm", series_ohm)
    side = (r_ls, r_hs)  # by leg level
    if half_bridge:
        loops = [side[a] for a in (0, 1)]
        mean_loop = 0.5 * (r_hs + r_ls)
    else:
        loops = [side[a] + side[b] for a in (0, 1) for b in (0, 1)]
        mean_loop = r_hs + r_ls
    share = 0.5 if bridged else 1.0  # bridged: each half carries half the loop

    def build(loop):
        return lc_filter_with_load(
            inductance_h, capacitance_f, load, series_ohm=rs + share * loop, bridged=bridged
        )

    filters = tuple(build(r)[0] for r in loops)
    average, row = build(mean_loop)
    return SwitchedLcFilter(filters, tuple(loops), average, row, bool(half_bridge))


def segment_switch_states(waveform, plan) -> np.ndarray:
    """The switch state of every segment of a PWM waveform made without dead time.

    Parameters
    ----------
    waveform : PulseWaveform
        From :func:`~audiodsm.stages.output_stage.pwm_waveform` (dead time 0), possibly with
        its levels scaled by a rippling supply (the signs stay).
    plan : _PwmPlan
        The plan it was made from (the legs' codes).

    Returns
    -------
    ndarray of int64, shape (n_frames, n_segments)
        ``A`` (half bridge) or ``2 A + B`` (full bridge). A positive level is leg A high (and
        B low), a negative one the reverse; a zero level (three-level bridge) is both legs at
        leg A's command at the segment's middle.
    """
    levels = waveform.levels
    if plan.half_bridge:
        return (levels > 0).astype(np.int64)
    configs = np.where(levels > 0, 2, 1).astype(np.int64)
    zero = levels == 0.0
    if np.any(zero):
        ticks = waveform.ticks
        start = np.cumsum(ticks, axis=1) - ticks
        mid2 = 2 * start + ticks  # twice the middle, in ticks
        h = (plan.codes_a * plan.sub)[:, None]
        if plan.double_edge:
            c = plan.steps * plan.sub
            high = (2 * (c - h) <= mid2) & (mid2 < 2 * (c + h))
        else:
            high = mid2 < 2 * h
        configs = np.where(zero, np.where(high, 3, 0), configs)
    return np.ascontiguousarray(configs)


def filter_switched_waveform(switched: SwitchedLcFilter, waveform, configs, state=None):
    """Frame means and mean squares of the filter output, each segment through its switches' filter.

    Parameters
    ----------
    switched : SwitchedLcFilter
    waveform : PulseWaveform
    configs : ndarray of int64, shape (n_frames, n_segments)
        From :func:`segment_switch_states`.
    state : FilterState or None
        From the previous block (in the filter's own coordinates); None at rest.

    Returns
    -------
    means, mean_squares : ndarray, shape (n_frames,)
    state : FilterState
        Block by block equals one call, bit for bit.
    """
    from audiodsm.stages.reconstruct import _check_state, _new_state

    model = switched.model
    x = _check_state(state, model, model.a.shape[0])
    tpf = waveform.ticks_per_frame
    dt = 1.0 / (waveform.frame_rate_hz * tpf)
    phis, gammas, wx, wu, qs = switched.tables(dt, tpf)
    n = waveform.n_frames
    y = np.empty(n)
    power = np.empty(n)
    _waveform_kernels.frame_power_switched(
        waveform.levels, waveform.ticks, configs, phis, gammas, wx, wu, qs, x, y, power
    )
    return y, power, _new_state(x, model)


@dataclass(frozen=True)
class ClassDReadings:
    """A class-D stage's figures in volts, amperes and watts over a stretch of signal.

    Attributes
    ----------
    output_peak_volts : float
        Largest magnitude of the load voltage.
    load_current_peak_amperes : float
        Largest magnitude of the current into the load.
    inductor_current_peak_amperes : float
        Largest magnitude of the filter inductor's current (load current plus carrier ripple).
    switch_conduction_watts : float
        Mean ``I^2 R`` loss in the conducting switches (all legs).
    load_power_watts : float
        Mean power into the load.
    seconds : float
        Length of the stretch read.
    """

    output_peak_volts: float
    load_current_peak_amperes: float
    inductor_current_peak_amperes: float
    switch_conduction_watts: float
    load_power_watts: float
    seconds: float


def _quadratic_integrals(filt: AnalogFilter, weight: np.ndarray, dt: float, lengths):
    """``int_0^h z' expm(F' t) W expm(F t) z dt`` as matrices, ``F = [[A, B], [0, 0]]``.

    Van Loan's block exponential: with ``expm([[-F', W], [0, F]] h) = [[E11, E12], [0,
    E22]]`` the integral's matrix is ``E22' E12``.
    """
    m = filt.order
    f = np.zeros((m + 1, m + 1))
    f[:m, :m] = filt.a
    f[:m, m] = filt.b[:, 0]
    big = np.zeros((2 * (m + 1), 2 * (m + 1)))
    big[: m + 1, : m + 1] = -f.T
    big[: m + 1, m + 1 :] = weight
    big[m + 1 :, m + 1 :] = f
    h = np.asarray(lengths, dtype=np.float64) * dt
    e = scipy.linalg.expm(big[None, :, :] * h[:, None, None])
    q = e[:, m + 1 :, m + 1 :].transpose(0, 2, 1) @ e[:, : m + 1, m + 1 :]
    return 0.5 * (q + q.transpose(0, 2, 1))


def class_d_readings(
    switched: SwitchedLcFilter, waveform, configs, *, skip_frames: int = 0
) -> ClassDReadings:
    """Volts, amperes and watts of a PWM waveform driving the switched LC filter and its load.

    The filter runs from rest over the whole waveform; the readings cover the frames after
    ``skip_frames``. Peaks are read at every segment boundary (every switching instant, where
    the inductor current turns); the conduction loss and the load power are exact integrals
    over every segment (quadratic forms of the state and the held input, Van Loan 1978).

    Parameters
    ----------
    switched : SwitchedLcFilter
    waveform : PulseWaveform
        The bridge's output in volts.
    configs : ndarray of int64
        The switch state of every segment (:func:`segment_switch_states`).
    skip_frames : int
        Frames left out at the start while the filter settles.

    Returns
    -------
    ClassDReadings
    """
    n, s = waveform.levels.shape
    if not 0 <= skip_frames < n:
        raise ParameterError("skip_frames", skip_frames, f"an integer from 0 to {n - 1}")
    model = switched.model
    m = model.a.shape[0]
    tpf = waveform.ticks_per_frame
    dt = 1.0 / (waveform.frame_rate_hz * tpf)
    phis, gammas = switched.tables(dt, tpf)[:2]
    x = np.zeros(m)
    starts = np.empty((n, s, m))
    _waveform_kernels.segment_starts_switched(
        waveform.levels, waveform.ticks, configs, phis, gammas, x, starts
    )
    ticks = waveform.ticks[skip_frames:]
    levels = waveform.levels[skip_frames:]
    cfg = configs[skip_frames:]
    z = np.concatenate([starts[skip_frames:], levels[..., None]], axis=2)  # (n', s, m + 1)
    live = ticks > 0
    f0 = switched.filters[0]
    current = z[..., f0.current_index][live]
    volts = (z[..., :m] @ f0.c[0])[live]
    load = (z[..., :m] @ switched.load_current_row)[live]
    # exact integrals of i^2 and of y * i_load over every segment
    e_i = np.zeros(m + 1)
    e_i[f0.current_index] = 1.0
    out_row = np.append(f0.c[0], 0.0)
    load_row = np.append(switched.load_current_row, 0.0)
    w_current = np.outer(e_i, e_i)
    w_power = 0.5 * (np.outer(out_row, load_row) + np.outer(load_row, out_row))
    # per switch state and segment length, the sum of z z' over its segments; each
    # integral is then trace(Q S)
    lengths = np.unique(ticks[live])
    index = np.searchsorted(lengths, ticks)
    loss = 0.0
    power = 0.0
    for c, filt in enumerate(switched.filters):
        sel_c = live & (cfg == c)
        if not np.any(sel_c):
            continue
        qi = _quadratic_integrals(filt, w_current, dt, lengths)
        qp = _quadratic_integrals(filt, w_power, dt, lengths)
        zc, kc = z[sel_c], index[sel_c]
        for j in np.unique(kc):
            zj = zc[kc == j]
            sums = zj.T @ zj
            loss += switched.loop_ohm[c] * float(np.sum(qi[j] * sums))
            power += float(np.sum(qp[j] * sums))
    seconds = (n - skip_frames) / waveform.frame_rate_hz
    return ClassDReadings(
        output_peak_volts=float(np.max(np.abs(volts))),
        load_current_peak_amperes=float(np.max(np.abs(load))),
        inductor_current_peak_amperes=float(np.max(np.abs(current))),
        switch_conduction_watts=loss / seconds,
        load_power_watts=power / seconds,
        seconds=seconds,
    )
