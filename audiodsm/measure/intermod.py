"""Twin-tone intermodulation: SMPTE and difference-frequency IMD.

Both take one channel holding the twin tone as a ``(frames,)`` float array (full scale
±1.0) with the sample rate passed as ``rate_hz=``, and fit every product at its exact
frequency.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.measure.sine_fit import (
    _check_frequency,
    _fit_lines,
    _fold,
    _settle_frames,
)
from audiodsm.measure.spectrum import _as_signal, _check_rate

__all__ = [
    "IntermodProduct",
    "Intermodulation",
    "imd_smpte",
    "imd_difference_frequency",
]


# ---------------------------------------------------------------------------------------------
# Intermodulation
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class IntermodProduct:
    """One intermodulation product: its name, frequency and level relative to the reference."""

    name: str
    frequency_hz: float
    level_db: float


@dataclass(frozen=True)
class Intermodulation:
    """A twin-tone intermodulation measurement.

    Attributes
    ----------
    method : str
        ``"smpte"`` or ``"difference-frequency"``.
    ratio_db, percent : float
        The total: rss of the second- and third-order parts.
    second_order_db, third_order_db : float
        The second- and third-order parts alone (see the measuring function).
    products : tuple of IntermodProduct
        Each product's level relative to the reference amplitude.
    f1_hz, f2_hz : float
    f1_dbfs, f2_dbfs : float
        Fitted amplitude of each tone as the level of a sine of that amplitude.
    peak_dbfs : float
        ``20 log10(U1 + U2)``: the combined peak of the two tones relative to full scale.
    convention : str
        How the ratio and the levels are defined.
    """

    method: str
    ratio_db: float
    percent: float
    second_order_db: float
    third_order_db: float
    products: tuple
    f1_hz: float
    f2_hz: float
    f1_dbfs: float
    f2_dbfs: float
    peak_dbfs: float
    convention: str


def _db(ratio):
    return 20.0 * math.log10(ratio) if ratio > 0 else -math.inf


def _intermod_lines(f1, f2, rate, extra):
    """Folded frequencies of every product |m f1 + n f2| with 1 <= |m|+|n| <= 3, plus extra."""
    lines = []
    for m in range(-3, 4):
        for k in range(-3, 4):
            if 1 <= abs(m) + abs(k) <= 3:
                lines.append(_fold(m * f1 + k * f2, rate))
    lines.extend(_fold(f, rate) for f in extra)
    out = []
    for f in sorted(lines):
        if f > 1e-9 * rate and not any(abs(f - g) < 1e-6 for g in out):
            out.append(f)
    return out


def _line_amplitudes(arr, rate, f1, f2, wanted):
    lines = _intermod_lines(f1, f2, rate, wanted)
    amps, _ = _fit_lines(arr, lines, rate)

    def amp(f):
        g = _fold(f, rate)
        i = int(np.argmin([abs(g - h) for h in lines]))
        return float(abs(amps[i]))

    return amp


def _twin_capture(x, rate_hz, f1_hz, f2_hz, settle_s):
    """A twin-tone capture checked and trimmed: ``(samples after settle_s, rate, f1, f2)``."""
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    arr = arr[_settle_frames(settle_s, rate) :]
    f1 = _check_frequency(f1_hz, rate, "f1_hz")
    f2 = _check_frequency(f2_hz, rate, "f2_hz")
    if not f1 < f2:
        raise ParameterError("f1_hz, f2_hz", (f1_hz, f2_hz), "f1_hz < f2_hz")
    # the fit separates lines 1/T apart; ask for a few times that
    if len(arr) * min(f1, f2 - f1) / rate < 4:
        raise ParameterError("x", f"{len(arr)} frames", "a record of at least 4 cycles of f1")
    return arr, rate, f1, f2


def imd_smpte(x, *, rate_hz, f1_hz=60.0, f2_hz=7000.0, orders=(1, 2, 3), settle_s=0.0):
    """SMPTE intermodulation distortion (60 Hz + 7 kHz at 4:1).

    The sidebands ``f2 ± n f1`` are fitted at their exact frequencies (jointly with both tones
    and every product up to third order); the two sidebands of each order ``n`` are added
    linearly, the orders are combined as the root of the sum of squares, and the result is
    relative to the amplitude of the f2 tone. ``second_order_db`` is the ``n = 1`` pair,
    ``third_order_db`` the ``n = 2`` pair.

    Parameters
    ----------
    x : array_like
        One channel holding the twin tone.
    rate_hz : float
    f1_hz, f2_hz : float
        The low and the high tone.
    orders : sequence of int
        Sideband orders ``n`` to include.
    settle_s : float
        Seconds skipped at the start.

    Returns
    -------
    Intermodulation

    References
    ----------
    .. [1] SMPTE RP 120, measurement of intermodulation distortion (60 Hz and 7 kHz, 4:1),
       and IEC 60268-3, modulation distortion (from memory).
    """
    arr, rate, f1, f2 = _twin_capture(x, rate_hz, f1_hz, f2_hz, settle_s)
    ords = [int(n) for n in orders]
    if not ords or any(n < 1 for n in ords):
        raise ParameterError("orders", orders, "sideband orders of 1 or more")
    wanted = [f2 + s * n * f1 for n in ords for s in (-1, 1)]
    amp = _line_amplitudes(arr, rate, f1, f2, wanted)
    u1, u2 = amp(f1), amp(f2)
    products, per_order = [], {}
    for n in ords:
        lo, hi = amp(f2 - n * f1), amp(f2 + n * f1)
        per_order[n] = (lo + hi) / u2
        products.append(IntermodProduct(f"f2-{n}f1", f2 - n * f1, _db(lo / u2)))
        products.append(IntermodProduct(f"f2+{n}f1", f2 + n * f1, _db(hi / u2)))
    total = math.sqrt(sum(v * v for v in per_order.values()))
    return Intermodulation(
        method="smpte",
        ratio_db=_db(total),
        percent=100.0 * total,
        second_order_db=_db(per_order.get(1, 0.0)),
        third_order_db=_db(per_order.get(2, 0.0)),
        products=tuple(products),
        f1_hz=f1,
        f2_hz=f2,
        f1_dbfs=_db(u1),
        f2_dbfs=_db(u2),
        peak_dbfs=_db(u1 + u2),
        convention=(
            "sidebands f2±n*f1 of each order added linearly, orders combined rms, relative to "
            "the f2 amplitude; peak_dbfs is the combined peak U1+U2 relative to full scale"
        ),
    )


def imd_difference_frequency(x, *, rate_hz, f1_hz=19000.0, f2_hz=20000.0, settle_s=0.0):
    """Difference-frequency distortion (19 kHz + 20 kHz at 1:1).

    The second-order product at ``f2 - f1`` and the third-order products at ``2 f1 - f2``
    and ``2 f2 - f1`` are fitted at their exact frequencies; ``second_order_db`` is
    ``U(f2-f1) / (2 U(f2))``, ``third_order_db`` is ``(U(2f1-f2) + U(2f2-f1)) / (2 U(f2))``,
    and the total is their rss. A product above Nyquist is left out (and not listed).

    Parameters
    ----------
    x : array_like
        One channel holding the twin tone.
    rate_hz : float
    f1_hz, f2_hz : float
    settle_s : float
        Seconds skipped at the start.

    Returns
    -------
    Intermodulation

    References
    ----------
    .. [1] IEC 60268-3, difference-frequency distortion, products expressed relative to
       twice the amplitude of f2 (from memory).
    """
    arr, rate, f1, f2 = _twin_capture(x, rate_hz, f1_hz, f2_hz, settle_s)
    nyq = rate / 2
    cands = [("f2-f1", f2 - f1, 2), ("2f1-f2", 2 * f1 - f2, 3), ("2f2-f1", 2 * f2 - f1, 3)]
    cands = [c for c in cands if 0 < c[1] < nyq]
    amp = _line_amplitudes(arr, rate, f1, f2, [c[1] for c in cands])
    u1, u2 = amp(f1), amp(f2)
    ref = 2.0 * u2
    d2 = sum(amp(f) for _, f, order in cands if order == 2) / ref
    d3 = sum(amp(f) for _, f, order in cands if order == 3) / ref
    total = math.hypot(d2, d3)
    return Intermodulation(
        method="difference-frequency",
        ratio_db=_db(total),
        percent=100.0 * total,
        second_order_db=_db(d2),
        third_order_db=_db(d3),
        products=tuple(IntermodProduct(name, f, _db(amp(f) / ref)) for name, f, _ in cands),
        f1_hz=f1,
        f2_hz=f2,
        f1_dbfs=_db(u1),
        f2_dbfs=_db(u2),
        peak_dbfs=_db(u1 + u2),
        convention=(
            "products relative to 2*U(f2) (the sum of the two equal tone amplitudes); third-"
            "order products added linearly; peak_dbfs is the combined peak U1+U2"
        ),
    )
