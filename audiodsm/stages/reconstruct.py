"""Reconstruction-filter model: analog filters driven exactly by piecewise-constant waveforms.

An :class:`~audiodsm.stages.filter_design.AnalogFilter` is a continuous-time state-space model
``x' = A x + B u``, ``y = C x + D u`` (time in seconds, ``u`` and ``y`` in volts or full-scale
units); :mod:`audiodsm.stages.filter_design` builds it from an analog prototype, from the
components of a class-D LC filter, or from your own matrices.

:func:`filter_waveform` runs a :class:`~audiodsm.stages.output_stage.PulseWaveform` through
the filter and returns the mean of the output over every frame (never a point sample, which
would fold a PWM carrier's ripple and sidebands into the audio band). It is exact for the
piecewise-constant input (zero-order-hold-exact discretization on the waveform's tick grid),
not an approximation: for a segment of ``k`` ticks holding ``u``,
``x <- expm(A k dt) x + (int_0^{k dt} expm(A s) ds) B u``, and the output's integral over
the segment comes from the same augmented matrix exponential. A
:class:`~audiodsm.stages.filter_design.SemiDigitalFir` can sit in front of the analog filter,
applied to the bitstream.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.stages import _waveform_kernels
from audiodsm.stages import output_stage as _out
from audiodsm.stages.filter_design import AnalogFilter
from audiodsm.stages.output_stage import PulseWaveform, PwmStats

__all__ = [
    "FilterState",
    "filter_waveform",
    "filter_waveform_ticks",
    "filter_waveform_power",
    "DeadTimeState",
    "filter_pwm_with_dead_time",
    "RippleReport",
    "out_of_band_ripple",
    "waveform_ripple",
    "FilterReport",
    "filter_report",
]


# ---------------------------------------------------------------------------------------------
# Exact simulation
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Model:
    """The filter in the coordinates used for simulation.

    ``modal``: block-diagonal real form (``n_real`` 1x1 blocks, then 2x2 blocks for complex
    pairs), used whenever the eigenvectors are well conditioned; otherwise the filter's own
    coordinates.
    """

    a: np.ndarray
    b: np.ndarray
    c: np.ndarray
    d: float
    modal: bool
    n_real: int
    key: bytes
    to_physical: np.ndarray  # x_filter = to_physical @ coords


_MODELS: dict[bytes, _Model] = {}
_TABLES: dict[tuple, tuple] = {}
_POWER_TABLES: dict[tuple, np.ndarray] = {}
#: The modal loop's coefficient arrays per (model, tick length), made once (not per block).
_MODAL: dict[tuple, tuple] = {}


def _model(filt: AnalogFilter) -> _Model:
    key = filt._key
    model = _MODELS.get(key)
    if model is None:
        if len(_MODELS) > 64:
            _MODELS.clear()
        model = _MODELS[key] = _build_model(filt, key)
    return model


def _build_model(filt: AnalogFilter, key: bytes) -> _Model:
    a, b, c, d = filt.a, filt.b[:, 0], filt.c[0], float(filt.d[0, 0])
    m = a.shape[0]
    w, v = np.linalg.eig(a)
    scale = max(np.max(np.abs(w)), 1e-300)
    is_real = np.abs(w.imag) <= 1e-12 * scale
    upper = w.imag > 1e-12 * scale
    ok = np.linalg.cond(v) < 1e8 and 2 * int(upper.sum()) + int(is_real.sum()) == m
    if not ok:
        return _Model(a.copy(), b.copy(), c.copy(), d, False, 0, key, np.eye(m))
    reals = np.flatnonzero(is_real)
    pairs = np.flatnonzero(upper)
    cols, blocks = [], []
    for i in reals:
        vec = v[:, i].real
        cols.append(vec / np.linalg.norm(vec))
        blocks.append(np.array([[w[i].real]]))
    for i in pairs:
        vec = v[:, i] / np.linalg.norm(v[:, i])
        # x = 2 Re(vec * (p + j q)) = (2 Re vec) p - (2 Im vec) q
        cols.extend([2 * vec.real, -2 * vec.imag])
        sig, om = w[i].real, w[i].imag
        blocks.append(np.array([[sig, -om], [om, sig]]))
    t = np.column_stack(cols)
    am = np.zeros((m, m))  # the blocks on the diagonal (what scipy.linalg.block_diag builds)
    at = 0
    for block in blocks:
        size = block.shape[0]
        am[at : at + size, at : at + size] = block
        at += size
    bm = np.linalg.solve(t, b)
    cm = c @ t
    return _Model(am, bm, cm, d, True, len(reals), key, t)


#: Largest ``ticks_per_frame`` for which all segment lengths 0..F are tabulated and cached;
#: finer grids get the matrices of the lengths present in each block only.
_FULL_TABLE_MAX = 4096


def _expm_tables(model: _Model, dt: float, lengths: np.ndarray, frame_ticks: int):
    """``Phi(k)``, ``Gamma(k)``, frame-mean weights ``wx(k)``, ``wu(k)`` for the given lengths.

    ZOH-exact, one augmented matrix exponential per segment length.

    The augmented state ``[x; xi; u]`` with ``x' = A x + B u``, ``xi' = x``, ``u' = 0`` has
    ``M = [[A, 0, B], [I, 0, 0], [0, 0, 0]]``, and ``expm(M h)`` holds, for a segment of
    length ``h`` starting at ``xi = 0``: ``Phi = expm(A h)`` and ``Gamma = int_0^h expm(A s)
    ds B`` (the state update), ``Psi = int_0^h Phi(s) ds`` and ``Lambda = int_0^h Gamma(s)
    ds`` (the state's integral over the segment). The output's integral over the segment is
    ``C (Psi x0 + Lambda u) + D u h``; divided by the frame length ``frame_ticks dt`` it is
    the segment's share of the frame mean: ``wx = C Psi / (F dt)``, ``wu = (C Lambda + D h) /
    (F dt)``.
    """
    m = model.a.shape[0]
    aug = np.zeros((2 * m + 1, 2 * m + 1))
    aug[:m, :m] = model.a
    aug[:m, 2 * m] = model.b
    aug[m : 2 * m, :m] = np.eye(m)
    h = lengths.astype(np.float64) * dt
    import scipy.linalg

    big = scipy.linalg.expm(aug[None, :, :] * h[:, None, None])
    phis = np.ascontiguousarray(big[:, :m, :m])
    gammas = np.ascontiguousarray(big[:, :m, 2 * m])
    psis = big[:, m : 2 * m, :m]
    lams = big[:, m : 2 * m, 2 * m]
    frame_s = frame_ticks * dt
    wx = np.ascontiguousarray((psis.transpose(0, 2, 1) @ model.c) / frame_s)
    wu = np.ascontiguousarray((lams @ model.c + model.d * h) / frame_s)
    if model.modal:  # enforce the exact block structure (kernels rely on it)
        mask = (np.abs(model.a) > 0) | np.eye(m, dtype=bool)
        phis[:, ~mask] = 0.0
        for r in range(model.n_real, m, 2):
            phis[:, r + 1, r + 1] = phis[:, r, r]
            phis[:, r, r + 1] = -phis[:, r + 1, r]
    return phis, gammas, wx, wu


def _remembered(kind, key, compute):
    """``compute()``, or its value from an earlier run (on disk: audiodsm/disk_cache.py).

    The tables cost one matrix exponential per segment length, and ``scipy.linalg``'s import;
    a later run reads them back.
    """
    from audiodsm import disk_cache

    return disk_cache.remembered(
        kind, key, compute, sources=("stages/reconstruct.py", "stages/filter_design.py")
    )


def _tables(model: _Model, dt: float, frame_ticks: int):
    """``Phi(k)``, ``Gamma(k)``, ``wx(k)``, ``wu(k)`` for every k = 0..frame_ticks, cached."""
    tkey = (model.key, dt, frame_ticks)
    hit = _TABLES.get(tkey)
    if hit is not None:
        return hit
    tables = _remembered(
        "filter-tables",
        tkey,
        lambda: _expm_tables(model, dt, np.arange(frame_ticks + 1), frame_ticks),
    )
    if len(_TABLES) > 64:
        _TABLES.clear()
    _TABLES[tkey] = tables
    return tables


def _power_tables(model: _Model, dt: float, frame_ticks: int) -> np.ndarray:
    """``Q(k)`` for every k = 0..frame_ticks: a segment's share of the frame's mean square.

    With ``z = [x0; u]`` at the segment start, the output over the segment is
    ``y(t) = H expm(F t) z`` with ``F = [[A, B], [0, 0]]`` and ``H = [C, D]``, so its squared
    integral is ``z' (int_0^h expm(F' t) H' H expm(F t) dt) z``. The integral is Van Loan's:
    with ``expm([[-F', H' H], [0, F]] h) = [[E11, E12], [0, E22]]`` it equals ``E22' E12``.
    Divided by the frame length. Cached like the other tables.
    """
    tkey = (model.key, dt, frame_ticks)
    hit = _POWER_TABLES.get(tkey)
    if hit is not None:
        return hit
    q = _remembered(
        "filter-power-tables",
        tkey,
        lambda: _power_matrices(model, dt, np.arange(frame_ticks + 1), frame_ticks),
    )
    if len(_POWER_TABLES) > 64:
        _POWER_TABLES.clear()
    _POWER_TABLES[tkey] = q
    return q


def _power_matrices(model: _Model, dt: float, lengths: np.ndarray, frame_ticks: int):
    """``Q(k)`` of :func:`_power_tables` for the given segment lengths (not cached)."""
    m = model.a.shape[0]
    f = np.zeros((m + 1, m + 1))
    f[:m, :m] = model.a
    f[:m, m] = model.b
    h = np.append(model.c, model.d)[None, :]
    big = np.zeros((2 * (m + 1), 2 * (m + 1)))
    big[: m + 1, : m + 1] = -f.T
    big[: m + 1, m + 1 :] = h.T @ h
    big[m + 1 :, m + 1 :] = f
    h_s = lengths.astype(np.float64) * dt
    import scipy.linalg

    e = scipy.linalg.expm(big[None, :, :] * h_s[:, None, None])
    e12 = e[:, : m + 1, m + 1 :]
    e22 = e[:, m + 1 :, m + 1 :]
    q = e22.transpose(0, 2, 1) @ e12 / (frame_ticks * dt)
    return np.ascontiguousarray(0.5 * (q + q.transpose(0, 2, 1)))  # symmetric to rounding


@dataclass(frozen=True, eq=False)
class FilterState:
    """Streaming state of :func:`filter_waveform` (a value).

    Attributes
    ----------
    coords : ndarray
        The filter state in the simulation's internal coordinates (a modal form when the
        filter allows one); use :meth:`physical` for the filter's own state vector.
    filter_key : bytes
        Identifies the filter the state belongs to.
    """

    coords: np.ndarray
    filter_key: bytes

    def physical(self, filt: AnalogFilter) -> np.ndarray:
        """The state in the coordinates of ``filt.a`` (e.g. inductor current, capacitor V)."""
        model = _model(filt)
        if self.filter_key != model.key:
            raise ParameterError("filt", filt.description, "the filter this state belongs to")
        return model.to_physical @ self.coords


def _check_state(state, model, m) -> np.ndarray:
    if state is None:
        return np.zeros(m)
    if not isinstance(state, FilterState) or state.filter_key != model.key:
        raise ParameterError(
            "state", type(state).__name__, "None or the FilterState returned for this filter"
        )
    return np.array(state.coords, dtype=np.float64)


def _new_state(x, model) -> FilterState:
    x = x.copy()
    x.setflags(write=False)
    return FilterState(x, model.key)


def filter_waveform(
    filt: AnalogFilter, waveform: PulseWaveform, state: FilterState | None = None
) -> tuple[np.ndarray, FilterState]:
    """The mean of the filter's output over every frame, exact for the piecewise-constant input.

    Parameters
    ----------
    filt : AnalogFilter
        The reconstruction filter.
    waveform : PulseWaveform
        The output stage's waveform (levels in volts or full-scale units).
    state : FilterState or None
        From the previous block; None starts at rest (all states zero).

    Returns
    -------
    y : ndarray, shape (n_frames,)
        The mean of ``C x(t) + D u(t)`` over every frame (its integral over the frame divided
        by the frame length), one value per modulator clock. Never a point sample: content
        that moves inside a frame (a PWM carrier's ripple) is averaged, not aliased.
    state : FilterState
        To pass with the next block; block by block equals one call, bit for bit.

    Notes
    -----
    For a segment of ``k`` ticks (``dt = 1 / (frame_rate_hz * ticks_per_frame)``) holding
    ``u``: ``x <- Phi(k) x + Gamma(k) u`` with ``Phi(k) = expm(A k dt)`` and
    ``Gamma(k) = int_0^{k dt} expm(A s) ds B``, and the output's integral over the segment is
    ``C (Psi(k) x + Lambda(k) u) + D u k dt`` with ``Psi(k) = int_0^{k dt} Phi(s) ds`` and
    ``Lambda(k) = int_0^{k dt} Gamma(s) ds``. All four come from one matrix exponential of
    the augmented matrix ``[[A, 0, B], [I, 0, 0], [0, 0, 0]] k dt`` (state, state integral,
    held input) and are precomputed for k = 0..ticks_per_frame (above 4096 ticks a frame: for
    the lengths present in each block). One-segment waveforms (PDM, NRZ) take a faster loop
    over the modal form.

    The frame mean is the analog output seen through a boxcar one frame long and then
    sampled: the boxcar's response ``sinc(f / frame_rate_hz)`` is zero at every multiple of
    the frame (carrier) rate, so a PWM carrier's steady ripple averages out exactly, and
    content near ``k frame_rate_hz + f`` reaches ``f`` only scaled by about
    ``f / (k frame_rate_hz)`` (instead of in full, as a point sample would take it). In band
    the boxcar droops by ``sinc(f / frame_rate_hz)`` (-0.01 dB at 20 kHz for 768 kHz).

    References
    ----------
    .. [1] G. F. Franklin, J. D. Powell and M. L. Workman, "Digital Control of Dynamic
       Systems", 3rd ed., Addison-Wesley, 1998, sec. 4.3 (zero-order-hold equivalent).
    .. [2] C. Van Loan, "Computing integrals involving the matrix exponential", IEEE Trans.
       Automatic Control 23(3), 1978 (the augmented-matrix exponential).
    """
    if not isinstance(filt, AnalogFilter):
        raise ParameterError("filt", type(filt).__name__, "an AnalogFilter")
    if not isinstance(waveform, PulseWaveform):
        raise ParameterError("waveform", type(waveform).__name__, "a PulseWaveform")
    model = _model(filt)
    m = model.a.shape[0]
    x = _check_state(state, model, m)
    tpf = waveform.ticks_per_frame
    dt = 1.0 / (waveform.frame_rate_hz * tpf)
    n = waveform.n_frames
    y = np.empty(n)
    if tpf <= _FULL_TABLE_MAX:
        phis, gammas, wx, wu = _tables(model, dt, tpf)
        index = waveform.ticks
    else:  # tabulate only the lengths present; index 0 stays the empty segment
        lengths = np.unique(np.concatenate([[0], waveform.ticks.ravel()]))
        phis, gammas, wx, wu = _expm_tables(model, dt, lengths, tpf)
        index = np.searchsorted(lengths, waveform.ticks)
    if waveform.n_segments == 1 and tpf == 1 and model.modal:
        coeffs = _MODAL.get((model.key, dt))
        if coeffs is None:
            coeffs = _modal_coefficients(model, phis, gammas, wx, wu)
            if len(_MODAL) > 64:
                _MODAL.clear()
            _MODAL[(model.key, dt)] = coeffs
        _run_modal(waveform.levels[:, 0], coeffs, x, y)
    else:
        _waveform_kernels.frame_means_segments(waveform.levels, index, phis, gammas, wx, wu, x, y)
    return y, _new_state(x, model)


def _modal_coefficients(model, phis, gammas, wx, wu):
    """The one-tick tables split into the modal loop's real modes and pairs (never written)."""
    nr = model.n_real
    m = phis.shape[1]
    phi1, gam1, w1 = phis[1], gammas[1], wx[1]
    idx = np.arange(nr, m, 2)
    arrays = (
        np.ascontiguousarray(np.diag(phi1)[:nr]),  # real_phi
        np.ascontiguousarray(gam1[:nr]),  # real_gamma
        np.ascontiguousarray(w1[:nr]),  # real_w
        np.ascontiguousarray(np.stack([phi1[idx, idx], phi1[idx + 1, idx]], axis=1)),
        np.ascontiguousarray(gam1[nr:].reshape(-1, 2)),  # pair_gamma
        np.ascontiguousarray(w1[nr:].reshape(-1, 2)),  # pair_w
    )
    return (nr, *arrays, float(wu[1]))  # the same arrays (and flags) the loop always got


def _run_modal(u, coeffs, x, y):
    nr, real_phi, real_gamma, real_w, pair_phi, pair_gamma, pair_w, w_u = coeffs
    xr = np.ascontiguousarray(x[:nr])
    xp = np.ascontiguousarray(x[nr:].reshape(-1, 2))
    u = np.ascontiguousarray(u)
    n_pairs = xp.shape[0]
    if nr == 0 and n_pairs == 1:
        _waveform_kernels.frame_means_modal_pair(u, pair_phi, pair_gamma, pair_w, w_u, xp, y)
    elif nr == 1 and n_pairs == 1:
        _waveform_kernels.frame_means_modal_real_pair(
            u, real_phi, real_gamma, real_w, pair_phi, pair_gamma, pair_w, w_u, xr, xp, y
        )
    else:
        _waveform_kernels.frame_means_modal(
            u, real_phi, real_gamma, real_w, pair_phi, pair_gamma, pair_w, w_u, xr, xp, y
        )
    x[:nr] = xr
    x[nr:] = xp.ravel()


def filter_waveform_ticks(
    filt: AnalogFilter, waveform: PulseWaveform, state: FilterState | None = None
) -> tuple[np.ndarray, FilterState]:
    """Like :func:`filter_waveform`, but the mean over every tick.

    For plots and ripple readings of short stretches: the output has
    ``n_frames * ticks_per_frame`` samples at ``waveform.tick_rate_hz``; the mean of every
    ``ticks_per_frame`` consecutive values is the per-frame output (to rounding). Same state
    type as :func:`filter_waveform`.
    """
    if not isinstance(waveform, PulseWaveform):
        raise ParameterError("waveform", type(waveform).__name__, "a PulseWaveform")
    fine = waveform.tick_samples()[:, None]
    per_tick = PulseWaveform(fine, np.ones(fine.shape, np.int64), 1, waveform.tick_rate_hz)
    return filter_waveform(filt, per_tick, state)


def filter_waveform_power(
    filt: AnalogFilter, waveform: PulseWaveform, state: FilterState | None = None
) -> tuple[np.ndarray, np.ndarray, FilterState]:
    """Like :func:`filter_waveform`, and also the mean square of the output over every frame.

    Returns
    -------
    means : ndarray, shape (n_frames,)
        Exactly the values :func:`filter_waveform` returns.
    mean_squares : ndarray, shape (n_frames,)
        ``(1 / T) int y(t)^2 dt`` over every frame, exact for the piecewise-constant input
        (:func:`_power_tables`). ``mean_squares - means**2`` is the power of what moves inside
        each frame, which the frame means cannot carry: a PWM carrier's ripple after the
        filter.
    state : FilterState

    References
    ----------
    .. [1] C. Van Loan, "Computing integrals involving the matrix exponential", IEEE Trans.
       Automatic Control 23(3), 1978.
    """
    if not isinstance(filt, AnalogFilter):
        raise ParameterError("filt", type(filt).__name__, "an AnalogFilter")
    if not isinstance(waveform, PulseWaveform):
        raise ParameterError("waveform", type(waveform).__name__, "a PulseWaveform")
    tpf = waveform.ticks_per_frame
    model = _model(filt)
    x = _check_state(state, model, model.a.shape[0])
    dt = 1.0 / (waveform.frame_rate_hz * tpf)
    if tpf <= _FULL_TABLE_MAX:
        phis, gammas, wx, wu = _tables(model, dt, tpf)
        qs = _power_tables(model, dt, tpf)
        index = waveform.ticks
    else:  # as filter_waveform: only the lengths present, index 0 the empty segment
        lengths = np.unique(np.concatenate([[0], waveform.ticks.ravel()]))
        phis, gammas, wx, wu = _expm_tables(model, dt, lengths, tpf)
        qs = _power_matrices(model, dt, lengths, tpf)
        index = np.searchsorted(lengths, waveform.ticks)
    y = np.empty(waveform.n_frames)
    power = np.empty(waveform.n_frames)
    _waveform_kernels.frame_power_segments(
        waveform.levels, index, phis, gammas, wx, wu, qs, x, y, power
    )
    return y, power, _new_state(x, model)


# ---------------------------------------------------------------------------------------------
# PWM whose dead time follows the load current: output stage and filter in one loop
# ---------------------------------------------------------------------------------------------

#: Most ticks a PWM frame may have when the dead time follows the load current (the filter
#: matrices are tabulated for every segment length up to the frame).
DEAD_TIME_MAX_FRAME_TICKS = 1 << 16


@dataclass(frozen=True, eq=False)
class DeadTimeState:
    """Streaming state of :func:`filter_pwm_with_dead_time` (a value).

    Attributes
    ----------
    filter : FilterState
        The filter's state (its inductor current decides the dead intervals).
    command, dead_left, dead_level, leg_level : tuple of int
        Per leg: the commanded level at the end of the last frame, the ticks of a dead
        interval still to run at the next frame's start, that interval's level, and the
        leg's actual level.
    totals : PwmStats
        Counts over everything processed so far.
    """

    filter: FilterState
    command: tuple
    dead_left: tuple
    dead_level: tuple
    leg_level: tuple
    totals: PwmStats


def filter_pwm_with_dead_time(
    filt: AnalogFilter,
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
    state: DeadTimeState | None = None,
    switched=None,
    supply_ripple: float = 0.0,
    supply_ripple_hz: float = 0.0,
) -> tuple[np.ndarray, np.ndarray, PwmStats, DeadTimeState]:
    """PWM with dead time that follows the load current, through the filter: frame means.

    The PWM settings are those of :func:`~audiodsm.stages.output_stage.pwm_waveform`. Dead
    time is modelled as in a real bridge leg: after every change of a leg's command both of
    its switches are off for ``dead_time_ticks`` and the freewheeling diode that conducts the
    inductor current sets the leg's voltage: the low rail when the current flows out of the
    leg into the filter (``i > 0``), the high rail when it flows back in (``i < 0``). So a
    rising edge is late by the dead time when ``i > 0`` and a falling edge when ``i < 0``:
    per frame the leg loses or gains ``dead_time_ticks`` of high time, an error of
    ``-sign(i) * (leg step) * t_d / T`` in its mean. The current comes from the filter's
    state at the start of each dead interval (leg A's is state ``filt.current_index``; leg B
    of a full bridge carries its negative), so the output stage and the filter run in one
    compiled loop, frame by frame.

    Parameters
    ----------
    filt : AnalogFilter
        A filter with an inductor-current state (``current_index``), e.g. :func:`lc_filter`.
    y : ndarray, shape (n,)
        Modulator output, one channel.
    frame_rate_hz, levels, counter_steps, mode, carrier, bridge, tick_subdivision,
    dead_time_ticks, min_pulse_ticks, min_pulse_action, supply_volts
        As in :func:`~audiodsm.stages.output_stage.pwm_waveform`.
    state : DeadTimeState or None
        From the previous block; None starts at rest with every leg low.
    switched : SwitchedLcFilter or None
        The switches' on-resistance as part of the filter
        (:class:`~audiodsm.stages.power_stage.SwitchedLcFilter`): each segment runs through
        the filter of the switches that conduct in it (during a dead interval: the switch on
        the rail the diode connects). ``filt`` is then its ``average`` filter. None: ``filt``
        alone.
    supply_ripple, supply_ripple_hz : float
        A sinusoidal ripple on the supply, ``V (1 + m sin(2 pi f_r t))`` (``m`` below 1), as
        in :func:`~audiodsm.stages.supply.apply_supply_ripple`: every segment's level is its
        exact mean over the segment; the ripple's time origin is the first frame ever
        processed (the frames counted in ``state``). 0: a steady supply.

    Returns
    -------
    means : ndarray, shape (n,)
        The filter output's mean over every frame (as :func:`filter_waveform`).
    mean_squares : ndarray, shape (n,)
        Its mean square over every frame (as :func:`filter_waveform_power`).
    stats : PwmStats
        Counts for this block (``pulses_lost_to_dead_time``: command changes that fell inside
        a dead interval, i.e. pulses shorter than the dead time).
    state : DeadTimeState
        To pass with the next block; block by block equals one call, bit for bit.

    Notes
    -----
    The level of a dead interval is decided once, from the current at its start; a current
    that reverses inside the interval does not flip it (the dead time is far shorter than the
    filter's period). With the current exactly zero the leg keeps its level. With
    ``dead_time_ticks = 0`` the output equals :func:`filter_waveform` of
    :func:`~audiodsm.stages.output_stage.pwm_waveform` to rounding.

    References
    ----------
    .. [1] N. Mohan, T. M. Undeland and W. P. Robbins, "Power Electronics: Converters,
       Applications, and Design", 3rd ed., Wiley, 2003 (effect of blanking time on the
       inverter output voltage: a square-wave error in phase with the load current).
    """
    if not isinstance(filt, AnalogFilter):
        raise ParameterError("filt", type(filt).__name__, "an AnalogFilter")
    if filt.current_index is None:
        raise ParameterError(
            "filt", filt.description, "a filter with an inductor current state (an LC filter)"
        )
    plan = _out.pwm_switching_plan(
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
    if plan.frame > DEAD_TIME_MAX_FRAME_TICKS:
        raise ParameterError(
            "ticks_per_frame",
            plan.frame,
            f"at most {DEAD_TIME_MAX_FRAME_TICKS} when the dead time follows the load current",
        )
    model = _model(filt) if switched is None else switched.model
    m = model.a.shape[0]
    n_legs = plan.n_legs
    if state is None:
        zeros = (0,) * n_legs
        x = np.zeros(m)
        per_leg = [zeros, zeros, zeros, zeros]
        totals = _out._zero_stats(n_legs)
    else:
        if not isinstance(state, DeadTimeState) or len(state.command) != n_legs:
            raise ParameterError(
                "state", type(state).__name__, f"None or a DeadTimeState for {n_legs} leg(s)"
            )
        x = _check_state(state.filter, model, m)
        per_leg = [state.command, state.dead_left, state.dead_level, state.leg_level]
        totals = state.totals
    command, dead_left, dead_level, leg_level = (np.array(v, dtype=np.int64) for v in per_leg)
    dt = 1.0 / (plan.rate * plan.frame)
    if switched is None:
        phis, gammas, wx, wu = (t[None] for t in _tables(model, dt, plan.frame))
        qs = _power_tables(model, dt, plan.frame)[None]
        current_w = np.ascontiguousarray(model.to_physical[filt.current_index])
    else:  # one set of tables per switch configuration, in the filter's own coordinates
        phis, gammas, wx, wu, qs = switched.tables(dt, plan.frame)
        current_w = np.zeros(m)
        current_w[filt.current_index] = 1.0
    means = np.empty(plan.n)
    power = np.empty(plan.n)
    counts = np.zeros(3, dtype=np.int64)
    ripple = float(supply_ripple)
    if not (math.isfinite(ripple) and 0.0 <= ripple < 1.0):
        raise ParameterError(
            "supply_ripple", supply_ripple, "a relative amplitude from 0 to below 1"
        )
    ripple_hz = float(supply_ripple_hz)
    if ripple > 0.0 and not (math.isfinite(ripple_hz) and ripple_hz > 0.0):
        raise ParameterError("supply_ripple_hz", supply_ripple_hz, "a frequency above 0 Hz")
    _waveform_kernels.pwm_dead_time_means(
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
        command,
        dead_left,
        dead_level,
        leg_level,
        phis,
        gammas,
        wx,
        wu,
        qs,
        current_w,
        x,
        means,
        power,
        counts,
        ripple,
        ripple_hz / plan.rate if ripple > 0.0 else 0.0,
        int(totals.frames),
    )
    stats, totals = _out._pwm_counts(
        totals, plan.n, plan.rate, plan.dropped, plan.stretched, counts, n_legs
    )
    new_state = DeadTimeState(
        _new_state(x, model),
        tuple(int(v) for v in command),
        tuple(int(v) for v in dead_left),
        tuple(int(v) for v in dead_level),
        tuple(int(v) for v in leg_level),
        totals,
    )
    return means, power, stats, new_state


# ---------------------------------------------------------------------------------------------
# Reports
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RippleReport:
    """Residual out-of-band content of a reconstructed output.

    Attributes
    ----------
    above_hz : float
        Lower edge of the band measured (up to the Nyquist frequency of the samples).
    rms_volts : float
        RMS of the output's content above ``above_hz``, in the output's units.
    rms_dbfs : float
        The same relative to a full-scale sine of peak ``full_scale_volts`` (AES17: 0 dBFS
        is the rms of a sine whose peak reaches full scale).
    """

    above_hz: float
    rms_volts: float
    rms_dbfs: float


def out_of_band_ripple(
    y, *, rate_hz: float, above_hz: float = 20000.0, full_scale_volts: float = 1.0
) -> RippleReport:
    """RMS of the content of ``y`` above ``above_hz`` (the ripple left by the filter).

    Parameters
    ----------
    y : ndarray, shape (n,)
        The filter output, e.g. from :func:`filter_waveform_ticks` (at the tick rate) or
        :func:`filter_waveform` (frame means: no carrier ripple left, see
        :func:`waveform_ripple`).
    rate_hz : float
        Sample rate of ``y``.
    above_hz : float
        Band edge; the default 20 kHz is the top of the audio band.
    full_scale_volts : float
        Peak of a full-scale sine at the output, for the dBFS value.

    Returns
    -------
    RippleReport

    Notes
    -----
    A Hann-windowed FFT; the power of the bins at and above ``above_hz`` is summed (Parseval,
    corrected for the window's mean square). The window's leakage keeps a strong in-band tone
    from spilling into the band measured beyond its main lobe (a few bins).
    """
    x = np.asarray(y, dtype=np.float64)
    rate = float(rate_hz)
    if x.ndim != 1 or x.size < 16:
        raise ParameterError("y.shape", x.shape, "a one-channel array of at least 16 samples")
    if not (math.isfinite(rate) and rate > 0):
        raise ParameterError("rate_hz", rate_hz, "a finite number > 0")
    if not (0 < above_hz < rate / 2):
        raise ParameterError("above_hz", above_hz, f"a frequency between 0 and {rate / 2:g}")
    n = x.size
    win = np.hanning(n)
    spec = np.fft.rfft(x * win)
    power = np.abs(spec) ** 2
    power[1 : (n + 1) // 2] *= 2.0  # one-sided: double all but DC and Nyquist
    freq = np.fft.rfftfreq(n, 1.0 / rate)
    band = freq >= above_hz
    rms = math.sqrt(power[band].sum() / (n * np.sum(win**2)))
    ref = float(full_scale_volts) / math.sqrt(2.0)
    dbfs = 20 * math.log10(rms / ref) if rms > 0 else -math.inf
    return RippleReport(float(above_hz), rms, dbfs)


def waveform_ripple(
    filt: AnalogFilter,
    waveform: PulseWaveform,
    *,
    above_hz: float = 20000.0,
    full_scale_volts: float = 1.0,
    skip_frames: int | None = None,
    state: FilterState | None = None,
) -> RippleReport:
    """Out-of-band ripple left at the filter output by a waveform, seen at every tick.

    The per-frame output of :func:`filter_waveform` carries no PWM carrier ripple (a frame
    mean averages a steady carrier to zero, and the carrier lies above the frame rate's
    Nyquist frequency anyway). This runs :func:`filter_waveform_ticks` (the mean over every
    tick, at the tick rate: the carrier and its harmonics up to half the tick rate are all
    there, each scaled by the tick boxcar's ``sinc(f / tick_rate_hz)``) and measures with
    :func:`out_of_band_ripple`. Meant for short stretches: memory grows with
    ``n_frames * ticks_per_frame``.

    Parameters
    ----------
    filt : AnalogFilter
    waveform : PulseWaveform
    above_hz, full_scale_volts : float
        As in :func:`out_of_band_ripple`.
    skip_frames : int or None
        Frames left out at the start while the filter settles from ``state``. None: 20 time
        constants of the slowest pole, at most half the waveform.
    state : FilterState or None
        Starting state (None: at rest).

    Returns
    -------
    RippleReport
    """
    if not isinstance(waveform, PulseWaveform):
        raise ParameterError("waveform", type(waveform).__name__, "a PulseWaveform")
    if skip_frames is None:
        slowest = float(np.min(np.abs(filt.poles.real)))
        skip = math.ceil(20.0 / max(slowest, 1e-300) * waveform.frame_rate_hz)
        skip_frames = min(skip, waveform.n_frames // 2)
    if isinstance(skip_frames, bool) or not isinstance(skip_frames, int | np.integer):
        raise ParameterError("skip_frames", skip_frames, "None or an integer >= 0")
    if not 0 <= skip_frames <= waveform.n_frames - 16:
        raise ParameterError(
            "skip_frames", skip_frames, f"an integer from 0 to {waveform.n_frames - 16}"
        )
    y, _ = filter_waveform_ticks(filt, waveform, state)
    y = y[skip_frames * waveform.ticks_per_frame :]
    return out_of_band_ripple(
        y, rate_hz=waveform.tick_rate_hz, above_hz=above_hz, full_scale_volts=full_scale_volts
    )


@dataclass(frozen=True)
class FilterReport:
    """The reconstruction filter at a glance.

    Attributes
    ----------
    description : str
    freq_hz, gain_db, phase_deg : ndarray
        The frequency response.
    dc_gain : float
    f0_hz, q : float
        Natural frequency and quality factor of the highest-Q pole.
    """

    description: str
    freq_hz: np.ndarray
    gain_db: np.ndarray
    phase_deg: np.ndarray
    dc_gain: float
    f0_hz: float
    q: float


def filter_report(filt: AnalogFilter, *, freq_hz=None) -> FilterReport:
    """Response, DC gain, ``f0_hz`` and ``q`` of a filter.

    Parameters
    ----------
    filt : AnalogFilter
    freq_hz : array_like, optional
        Where to evaluate; default 200 log-spaced points from 10 Hz to 1 MHz.
    """
    f = np.geomspace(10.0, 1e6, 200) if freq_hz is None else np.asarray(freq_hz, float)
    h = filt.response(f)
    with np.errstate(divide="ignore"):
        gain = 20 * np.log10(np.abs(h))
    return FilterReport(
        filt.description,
        f,
        gain,
        np.degrees(np.unwrap(np.angle(h))),
        filt.dc_gain,
        filt.f0_hz,
        filt.q,
    )
