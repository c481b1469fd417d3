"""Reconstruction-filter design: analog filters and the semi-digital FIR in front of them.

An :class:`AnalogFilter` is a continuous-time state-space model ``x' = A x + B u``,
``y = C x + D u`` (time in seconds, ``u`` and ``y`` in volts or full-scale units). It comes
from an analog prototype (:func:`analog_prototype`: Butterworth, Bessel, Chebyshev I), from
the components of a class-D LC filter (:func:`lc_filter`), or from your own matrices. A
:class:`SemiDigitalFir` (:func:`semi_digital_fir`) can sit in front of the analog filter,
applied to the bitstream. :mod:`audiodsm.stages.reconstruct` runs waveforms through them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.stages.output_stage import PulseWaveform

__all__ = [
    "AnalogFilter",
    "analog_prototype",
    "lc_filter",
    "LoudspeakerLoad",
    "lc_filter_with_load",
    "SemiDigitalFir",
    "semi_digital_fir",
    "PROTOTYPE_KINDS",
]


PROTOTYPE_KINDS = ("butterworth", "bessel", "chebyshev1")


def _as_matrix(value, name, shape) -> np.ndarray:
    arr = np.array(value, dtype=np.float64, ndmin=2)
    if arr.shape != shape:
        raise ParameterError(f"{name}.shape", arr.shape, f"shape {shape}")
    if not np.all(np.isfinite(arr)):
        raise ParameterError(name, "NaN or Inf", "finite values")
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, eq=False)
class AnalogFilter:
    """A continuous-time single-input single-output filter in state-space form.

    ``x' = a x + b u``, ``y = c x + d u``; time in seconds.

    Parameters
    ----------
    a : ndarray, shape (m, m)
    b : ndarray, shape (m, 1)
    c : ndarray, shape (1, m)
    d : ndarray, shape (1, 1)
    description : str
        Plain words for reports, e.g. ``"3rd-order Butterworth, 60000 Hz"``.
    current_index : int or None
        Which state is the current in the inductor the bridge leg drives (leg A's, for a
        bridged load), if the filter has one: :func:`lc_filter` sets 0. The dead-time model
        (:func:`filter_pwm_with_dead_time`) reads the leg current from it.
    """

    a: np.ndarray
    b: np.ndarray
    c: np.ndarray
    d: np.ndarray
    description: str = "state-space filter"
    current_index: int | None = None

    def __post_init__(self):
        a = np.array(self.a, dtype=np.float64, ndmin=2)
        m = a.shape[0]
        if a.ndim != 2 or a.shape != (m, m) or m < 1:
            raise ParameterError("a.shape", a.shape, "a square matrix (m, m) with m >= 1")
        object.__setattr__(self, "a", _as_matrix(a, "a", (m, m)))
        object.__setattr__(self, "b", _as_matrix(np.reshape(self.b, (-1, 1)), "b", (m, 1)))
        object.__setattr__(self, "c", _as_matrix(np.reshape(self.c, (1, -1)), "c", (1, m)))
        object.__setattr__(self, "d", _as_matrix(np.reshape(self.d, (1, 1)), "d", (1, 1)))
        idx = self.current_index
        if idx is not None and (
            isinstance(idx, bool) or not isinstance(idx, int | np.integer) or not 0 <= idx < m
        ):
            raise ParameterError("current_index", idx, f"None or an integer from 0 to {m - 1}")

    @property
    def order(self) -> int:
        """Number of states."""
        return self.a.shape[0]

    @property
    def poles(self) -> np.ndarray:
        """Poles in rad/s (eigenvalues of ``a``)."""
        return np.linalg.eigvals(self.a)

    def response(self, freq_hz) -> np.ndarray:
        """Complex frequency response ``C (j w I - A)^-1 B + D`` at ``freq_hz``."""
        f = np.asarray(freq_hz, dtype=np.float64)
        s = 2j * np.pi * f.ravel()
        eye = np.eye(self.order)
        mats = s[:, None, None] * eye - self.a
        x = np.linalg.solve(mats, np.broadcast_to(self.b, (s.size, self.order, 1)))
        h = (self.c @ x)[:, 0, 0] + self.d[0, 0]
        return h.reshape(f.shape)

    @property
    def dc_gain(self) -> float:
        """Gain at 0 Hz, ``D - C A^-1 B``."""
        return float(self.d[0, 0] - (self.c @ np.linalg.solve(self.a, self.b))[0, 0])

    def _dominant_pole(self) -> complex:
        p = self.poles
        q = np.abs(p) / (2.0 * np.maximum(np.abs(p.real), 1e-300))
        best = np.flatnonzero(q >= q.max() * (1 - 1e-9))
        return p[best[np.argmin(np.abs(p[best]))]]

    @property
    def f0_hz(self) -> float:
        """Natural frequency ``|p| / (2 pi)`` of the highest-Q pole (lowest if tied).

        For a second-order low-pass this is the textbook ``f0 = 1 / (2 pi sqrt(LC))``.
        """
        return float(abs(self._dominant_pole()) / (2 * math.pi))

    @property
    def q(self) -> float:
        """Quality factor ``|p| / (2 |Re p|)`` of the highest-Q pole (0.5 for a real pole)."""
        p = self._dominant_pole()
        return float(abs(p) / (2 * abs(p.real)))

    @property
    def _key(self) -> bytes:
        return b"".join(m.tobytes() for m in (self.a, self.b, self.c, self.d))


def _ordinal(n: int) -> str:
    return {1: "1st", 2: "2nd", 3: "3rd"}.get(n, f"{n}th")


def analog_prototype(
    kind: str = "butterworth", *, order: int, cutoff_hz: float, ripple_db: float = 0.5
) -> AnalogFilter:
    """An analog low-pass prototype as a state-space :class:`AnalogFilter` (unity DC gain).

    Parameters
    ----------
    kind : {"butterworth", "bessel", "chebyshev1"}
        Family.
    order : int
        1 to 6.
    cutoff_hz : float
        Corner frequency. Butterworth and Bessel: the -3 dB frequency (Bessel normalised with
        ``norm="mag"``). Chebyshev I: the edge of the ripple band, where the gain last equals
        ``-ripple_db``.
    ripple_db : float
        Passband ripple of the Chebyshev I filter (0.01 to 3 dB); ignored otherwise.

    Returns
    -------
    AnalogFilter
        Peak passband gain 0 dB. A Chebyshev I filter ripples between 0 dB and
        ``-ripple_db``; at even orders its DC gain is ``-ripple_db`` (see ``dc_gain``).

    Notes
    -----
    The prototype is designed at 1 rad/s with :func:`scipy.signal.butter`,
    :func:`scipy.signal.bessel` or :func:`scipy.signal.cheby1` (``analog=True``), converted
    with :func:`scipy.signal.zpk2ss`, and scaled in time (``A, B`` times ``2 pi cutoff_hz``),
    which keeps the matrices well conditioned at any corner frequency.

    References
    ----------
    .. [1] SciPy ``scipy.signal`` filter design (Butterworth, Bessel, Chebyshev I).
    """
    if kind not in PROTOTYPE_KINDS:
        raise ParameterError("kind", kind, "one of " + ", ".join(map(repr, PROTOTYPE_KINDS)))
    if isinstance(order, bool) or not isinstance(order, int | np.integer) or not 1 <= order <= 6:
        raise ParameterError("order", order, "an integer from 1 to 6")
    fc = float(cutoff_hz) if isinstance(cutoff_hz, int | float | np.number) else float("nan")
    if not (math.isfinite(fc) and fc > 0):
        raise ParameterError("cutoff_hz", cutoff_hz, "a finite number > 0")
    rip = None
    if kind == "butterworth":
        text = f"{_ordinal(order)}-order Butterworth, {fc:g} Hz"
    elif kind == "bessel":
        text = f"{_ordinal(order)}-order Bessel, {fc:g} Hz (-3 dB)"
    else:
        rip = float(ripple_db) if isinstance(ripple_db, int | float | np.number) else math.nan
        if not (math.isfinite(rip) and 0.01 <= rip <= 3.0):
            raise ParameterError("ripple_db", ripple_db, "a number from 0.01 to 3")
        text = f"{_ordinal(order)}-order Chebyshev I, {rip:g} dB ripple, {fc:g} Hz"
    from audiodsm import disk_cache

    # remembered on disk: a later run reads the matrices back without importing scipy.signal
    a, b, c, d = disk_cache.remembered(
        "analog-prototype",
        (kind, int(order), rip),
        lambda: _unit_prototype(kind, int(order), rip),
        sources=("stages/filter_design.py",),
    )
    w = 2 * math.pi * fc
    return AnalogFilter(a * w, b * w, c, d, description=text)


def _unit_prototype(kind, order, ripple_db):
    """State-space matrices ``(a, b, c, d)`` of the prototype at 1 rad/s (scipy.signal)."""
    import scipy.signal

    if kind == "butterworth":
        z, p, k = scipy.signal.butter(order, 1.0, analog=True, output="zpk")
    elif kind == "bessel":
        z, p, k = scipy.signal.bessel(order, 1.0, analog=True, output="zpk", norm="mag")
    else:
        z, p, k = scipy.signal.cheby1(order, ripple_db, 1.0, analog=True, output="zpk")
    return scipy.signal.zpk2ss(z, p, k)


def lc_filter(
    inductance_h: float,
    capacitance_f: float,
    load_ohm: float,
    *,
    series_ohm: float = 0.0,
    bridged: bool = False,
) -> AnalogFilter:
    """The second-order LC low-pass of a class-D output, derived from its circuit.

    Single-ended: the bridge output drives a series resistance ``Rs`` and inductor ``L`` into
    a node with capacitor ``C`` and load ``R`` to ground. With the inductor current ``i`` and
    the capacitor voltage ``v`` as states:

        L di/dt = u - Rs i - v
        C dv/dt = i - v / R,        y = v

    so ``H(s) = 1 / (L C s^2 + (L / R + Rs C) s + 1 + Rs / R)``; with ``Rs = 0`` this has
    ``f0 = 1 / (2 pi sqrt(L C))`` and ``Q = R sqrt(C / L)``.

    Bridged (BTL): each half of the bridge has its own ``L`` (with ``Rs``) and its own ``C``
    to ground, and the load ``R`` sits between the two outputs. The halves are driven with
    ``+u/2`` and ``-u/2``, so the load's midpoint stays at 0 V and each half sees ``R / 2``
    to ground. The differential output ``y`` (the load voltage) then follows the
    single-ended equations with ``R`` replaced by ``R / 2``: same ``f0``, ``Q = (R / 2)
    sqrt(C / L)``, DC gain ``R / (R + 2 Rs)``. The states are one half's inductor current and
    the load voltage. (A single capacitor ``Cd`` across the load acts like ``C = 2 Cd`` per
    half here.)

    Parameters
    ----------
    inductance_h : float
        L per half, in henry.
    capacitance_f : float
        C per half, in farad.
    load_ohm : float
        The load resistance R.
    series_ohm : float
        Series resistance of each inductor (0 for ideal parts).
    bridged : bool
        Bridged load as above instead of single-ended.

    Returns
    -------
    AnalogFilter
        Input: the bridge's (differential) output voltage; output: the load voltage.

    References
    ----------
    .. [1] The series RLC low-pass with resistive load: standard circuit analysis (e.g. any
       circuits text's second-order low-pass section); ``f0 = 1 / (2 pi sqrt(LC))``,
       ``Q = R sqrt(C / L)``.
    """
    values = {}
    for name, value, low in (
        ("inductance_h", inductance_h, 0.0),
        ("capacitance_f", capacitance_f, 0.0),
        ("load_ohm", load_ohm, 0.0),
    ):
        v = float(value) if isinstance(value, int | float | np.number) else math.nan
        if not (math.isfinite(v) and v > low):
            raise ParameterError(name, value, "a finite number > 0")
        values[name] = v
    rs = float(series_ohm) if isinstance(series_ohm, int | float | np.number) else math.nan
    if not (math.isfinite(rs) and rs >= 0):
        raise ParameterError("series_ohm", series_ohm, "a finite number >= 0")
    ind, cap, r = values["inductance_h"], values["capacitance_f"], values["load_ohm"]
    if bridged:
        # half circuit: input u/2, states (i, v_half), load R/2; output y = 2 v_half.
        # Written with the load voltage y as the second state (v_half = y / 2):
        #   L di/dt = u/2 - Rs i - y/2
        #   (C/2) dy/dt = i - (y/2) / (R/2)   =>   C dy/dt = 2 i - 2 y / R
        a = [[-rs / ind, -0.5 / ind], [2.0 / cap, -2.0 / (r * cap)]]
        b = [0.5 / ind, 0.0]
        text = f"bridged LC, L={ind:g} H, C={cap:g} F, R={r:g} ohm"
    else:
        a = [[-rs / ind, -1.0 / ind], [1.0 / cap, -1.0 / (r * cap)]]
        b = [1.0 / ind, 0.0]
        text = f"LC, L={ind:g} H, C={cap:g} F, R={r:g} ohm"
    if rs:
        text += f", Rs={rs:g} ohm"
    return AnalogFilter(
        np.array(a), np.array(b), np.array([0.0, 1.0]), 0.0, description=text, current_index=0
    )


# ---------------------------------------------------------------------------------------------
# A loudspeaker as the load of the LC filter
# ---------------------------------------------------------------------------------------------


def _positive(name, value) -> float:
    v = float(value) if isinstance(value, int | float | np.number) else math.nan
    if isinstance(value, bool) or not (math.isfinite(v) and v > 0.0):
        raise ParameterError(name, value, "a finite number > 0")
    return v


@dataclass(frozen=True)
class LoudspeakerLoad:
    """A moving-coil loudspeaker as an electrical load (its usual Thiele-Small equivalent).

    The voice coil's resistance ``Re`` and inductance ``Le`` in series with a parallel
    ``Res``, ``Lces``, ``Cmes`` circuit: the cone's mass, suspension compliance and mechanical
    losses seen from the coil's terminals. The parallel parts follow from the resonance
    ``fs`` and the mechanical and electrical quality factors (``ws = 2 pi fs``):

        Cmes = Qes / (ws Re),   Lces = 1 / (ws^2 Cmes),   Res = Re Qms / Qes

    so at ``fs`` the parallel circuit is the pure resistance ``Res`` and the load impedance is
    ``Re + Res + j ws Le``.

    Parameters
    ----------
    coil_ohm : float
        Voice-coil resistance ``Re`` (ohm).
    coil_inductance_h : float
        Voice-coil inductance ``Le`` (H).
    resonance_hz : float
        Free-air resonance ``fs`` (Hz).
    mechanical_q, electrical_q : float
        ``Qms`` and ``Qes``.

    References
    ----------
    .. [1] R. H. Small, "Direct-Radiator Loudspeaker System Analysis", J. Audio Eng. Soc.
       20(5), 1972 (the electrical equivalent circuit and the relations of Res, Lces, Cmes to
       fs, Qms, Qes; from memory).
    .. [2] L. L. Beranek, "Acoustics", McGraw-Hill 1954, ch. 7 (the mobility analogy).
    """

    coil_ohm: float
    coil_inductance_h: float
    resonance_hz: float
    mechanical_q: float
    electrical_q: float

    def __post_init__(self):
        for name in (
            "coil_ohm",
            "coil_inductance_h",
            "resonance_hz",
            "mechanical_q",
            "electrical_q",
        ):
            object.__setattr__(self, name, _positive(name, getattr(self, name)))

    @property
    def parallel_capacitance_f(self) -> float:
        """``Cmes = Qes / (2 pi fs Re)`` (F): the moving mass."""
        return self.electrical_q / (2.0 * math.pi * self.resonance_hz * self.coil_ohm)

    @property
    def parallel_inductance_h(self) -> float:
        """``Lces = 1 / ((2 pi fs)^2 Cmes)`` (H): the suspension's compliance."""
        ws = 2.0 * math.pi * self.resonance_hz
        return 1.0 / (ws * ws * self.parallel_capacitance_f)

    @property
    def parallel_ohm(self) -> float:
        """``Res = Re Qms / Qes`` (ohm): the mechanical losses."""
        return self.coil_ohm * self.mechanical_q / self.electrical_q

    def impedance(self, freq_hz) -> np.ndarray:
        """Complex impedance at ``freq_hz``.

        ``Re + j w Le + 1 / (1 / Res + 1 / (j w Lces) + j w Cmes)`` (``Re`` alone at 0 Hz).
        """
        f = np.asarray(freq_hz, dtype=np.float64)
        jw = 2j * np.pi * f
        with np.errstate(divide="ignore", invalid="ignore"):
            admittance = (
                1.0 / self.parallel_ohm
                + 1.0 / (jw * self.parallel_inductance_h)
                + jw * self.parallel_capacitance_f
            )
            motion = np.where(f == 0.0, 0.0, 1.0 / admittance)
        return self.coil_ohm + jw * self.coil_inductance_h + motion


def lc_filter_with_load(
    inductance_h: float,
    capacitance_f: float,
    load,
    *,
    series_ohm: float = 0.0,
    bridged: bool = False,
) -> tuple[AnalogFilter, np.ndarray]:
    """The LC low-pass of :func:`lc_filter` into a resistor or a loudspeaker, and its load current.

    With a resistor (``load`` a number) the filter is :func:`lc_filter`'s. With a
    :class:`LoudspeakerLoad` three states follow the filter's two (inductor current ``i``,
    load voltage ``y``): the coil current ``ie``, the voltage ``vm`` across the parallel
    circuit and the current ``ic`` in ``Lces``:

        Le die/dt = y - Re ie - vm
        Cmes dvm/dt = ie - vm / Res - ic
        Lces dic/dt = vm

    and the capacitor node loses ``ie`` instead of ``y / R`` (single-ended ``C dy/dt = i -
    ie``; bridged, each half's capacitor sees the load between the halves, ``C dy/dt = 2 i - 2
    ie``, as in :func:`lc_filter`).

    Parameters
    ----------
    inductance_h, capacitance_f : float
        As in :func:`lc_filter`.
    load : float or LoudspeakerLoad
        A resistance (ohm) or a loudspeaker.
    series_ohm : float
        Series resistance in each inductor's path (the inductor's own, plus the conducting
        switches' share when the caller adds it).
    bridged : bool
        As in :func:`lc_filter`.

    Returns
    -------
    filt : AnalogFilter
        Input the bridge's output voltage, output the load voltage; ``current_index`` 0.
    load_current_row : ndarray, shape (m,)
        The load current (A) is ``load_current_row @ x`` for the filter's own state ``x``.

    References
    ----------
    .. [1] R. H. Small, J. Audio Eng. Soc. 20(5), 1972 (the loudspeaker's electrical
       equivalent; from memory).
    """
    if not isinstance(load, LoudspeakerLoad):
        filt = lc_filter(inductance_h, capacitance_f, load, series_ohm=series_ohm, bridged=bridged)
        return filt, np.array([0.0, 1.0 / float(load)])
    ind = _positive("inductance_h", inductance_h)
    cap = _positive("capacitance_f", capacitance_f)
    rs = float(series_ohm) if isinstance(series_ohm, int | float | np.number) else math.nan
    if not (math.isfinite(rs) and rs >= 0):
        raise ParameterError("series_ohm", series_ohm, "a finite number >= 0")
    sp = load
    le, re_ = sp.coil_inductance_h, sp.coil_ohm
    cm, lc_, res = sp.parallel_capacitance_f, sp.parallel_inductance_h, sp.parallel_ohm
    a = np.zeros((5, 5))
    b = np.zeros(5)
    if bridged:
        a[0, 0], a[0, 1], b[0] = -rs / ind, -0.5 / ind, 0.5 / ind
        a[1, 0], a[1, 2] = 2.0 / cap, -2.0 / cap
        text = f"bridged LC, L={ind:g} H, C={cap:g} F"
    else:
        a[0, 0], a[0, 1], b[0] = -rs / ind, -1.0 / ind, 1.0 / ind
        a[1, 0], a[1, 2] = 1.0 / cap, -1.0 / cap
        text = f"LC, L={ind:g} H, C={cap:g} F"
    a[2, 1], a[2, 2], a[2, 3] = 1.0 / le, -re_ / le, -1.0 / le
    a[3, 2], a[3, 3], a[3, 4] = 1.0 / cm, -1.0 / (res * cm), -1.0 / cm
    a[4, 3] = 1.0 / lc_
    text += (
        f", loudspeaker Re={re_:g} ohm, Le={le:g} H, fs={sp.resonance_hz:g} Hz, "
        f"Qms={sp.mechanical_q:g}, Qes={sp.electrical_q:g}"
    )
    if rs:
        text += f", Rs={rs:g} ohm"
    c = np.array([0.0, 1.0, 0.0, 0.0, 0.0])
    filt = AnalogFilter(a, b, c, 0.0, description=text, current_index=0)
    return filt, np.array([0.0, 0.0, 1.0, 0.0, 0.0])


# ---------------------------------------------------------------------------------------------
# Semi-digital FIR on the bitstream
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class SemiDigitalFir:
    """A semi-digital FIR DAC: delayed copies of the bitstream, weighted and summed.

    Each frame's output is ``sum_k taps[k] * level[n - k]`` (analog sum of ``len(taps)``
    one-frame-delayed copies), still piecewise constant per frame. Works on one-segment
    waveforms (PDM, NRZ). The DC gain is ``sum(taps)``; normalise the taps if you want unity.

    Parameters
    ----------
    taps : ndarray
        The weights, at least one, finite, with a non-zero sum.
    """

    taps: np.ndarray

    def __post_init__(self):
        t = np.array(self.taps, dtype=np.float64, ndmin=1)
        if t.ndim != 1 or t.size < 1 or t.size > 4096:
            raise ParameterError("taps", t.shape, "a list of 1 to 4096 numbers")
        if not np.all(np.isfinite(t)) or t.sum() == 0.0:
            raise ParameterError("taps", t.tolist()[:8], "finite numbers with a non-zero sum")
        t.setflags(write=False)
        object.__setattr__(self, "taps", t)

    def response(self, freq_hz, *, frame_rate_hz: float) -> np.ndarray:
        """Complex response ``sum_k taps[k] exp(-j 2 pi f k / frame_rate_hz)``."""
        f = np.asarray(freq_hz, dtype=np.float64)
        k = np.arange(self.taps.size)
        return np.exp(-2j * np.pi * f[..., None] * k / frame_rate_hz) @ self.taps

    def process(
        self, waveform: PulseWaveform, state: np.ndarray | None = None
    ) -> tuple[PulseWaveform, np.ndarray]:
        """Filter a one-segment waveform; block by block equals one call, bit for bit.

        Parameters
        ----------
        waveform : PulseWaveform
            With ``ticks_per_frame == 1``.
        state : ndarray or None
            The last ``len(taps) - 1`` input levels (oldest first); None means zeros.

        Returns
        -------
        waveform : PulseWaveform
            The summed output, same frame rate.
        state : ndarray
            To pass with the next block.
        """
        if not isinstance(waveform, PulseWaveform) or waveform.ticks_per_frame != 1:
            tpf = getattr(waveform, "ticks_per_frame", None)
            raise ParameterError("waveform.ticks_per_frame", tpf, "1 (a PDM or NRZ waveform)")
        hist_len = self.taps.size - 1
        if state is None:
            state = np.zeros(hist_len)
        state = np.asarray(state, dtype=np.float64)
        if state.shape != (hist_len,):
            raise ParameterError("state.shape", state.shape, f"({hist_len},)")
        u = waveform.levels[:, 0]
        full = np.concatenate([state, u])
        n = u.size
        out = np.zeros(n)
        for k, tap in enumerate(self.taps):  # fixed summation order: bit-exact in blocks
            out += tap * full[hist_len - k : hist_len - k + n]
        new_state = full[full.size - hist_len :].copy() if hist_len else np.zeros(0)
        result = PulseWaveform(out[:, None], waveform.ticks, 1, waveform.frame_rate_hz)
        return result, new_state


def semi_digital_fir(taps) -> SemiDigitalFir:
    """A :class:`SemiDigitalFir` from its taps (applied to the bitstream before the filter)."""
    return SemiDigitalFir(taps)
