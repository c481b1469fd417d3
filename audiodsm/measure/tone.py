"""Distortion of a single tone: THD+N (AES17), THD, SINAD and ENOB.

Every function takes one channel as a ``(frames,)`` float array (full scale ±1.0) with the
sample rate passed as ``rate_hz=``, and returns a small frozen result (or a float whose unit
is in the function's name).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.measure.residual import (
    _check_weighting,
    read_residual_meter,
    start_residual_meter,
    update_residual_meter,
)
from audiodsm.measure.sine_fit import (
    _check_frequency,
    _check_positive,
    _fit_lines,
    fit_sine,
)
from audiodsm.measure.spectrum import _as_signal, _check_rate

__all__ = [
    "ThdN",
    "thd_plus_noise",
    "HarmonicLevel",
    "Thd",
    "thd",
    "sinad_db",
    "enob_bits",
]


def _lead_frequency(arr, rate, frequency_hz, lead_s):
    if frequency_hz is not None:
        return _check_frequency(frequency_hz, rate)
    lead = max(16, round(_check_positive(lead_s, "lead_s") * rate))
    return fit_sine(arr[:lead], rate_hz=rate).frequency_hz


# ---------------------------------------------------------------------------------------------
# THD+N, THD, SINAD, ENOB
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ThdN:
    """A THD+N ratio (AES17).

    Attributes
    ----------
    ratio_db : float
        ``20 log10(rms(band-limited, weighted residual) / rms(band-limited total))``.
    percent : float
        The same ratio in percent.
    weighting : str
        Weighting applied to the residual (the total is band-limited only).
    fundamental_hz : float
    fundamental_dbfs : float
        Fitted fundamental level.
    total_dbfs : float
        Band-limited level of the whole signal.
    noise_dbfs : float
        Band-limited, weighted residual level (noise plus distortion) in dBFS.
    upper_hz, lower_hz : float or None
    """

    ratio_db: float
    percent: float
    weighting: str
    fundamental_hz: float
    fundamental_dbfs: float
    total_dbfs: float
    noise_dbfs: float
    upper_hz: float | None
    lower_hz: float | None


def thd_plus_noise(
    x,
    *,
    rate_hz,
    weighting="unweighted",
    upper_hz=20000.0,
    lower_hz=20.0,
    frequency_hz=None,
    lead_s=1.0,
    segment_s=1.0,
    settle_s=0.1,
):
    """THD+N ratio of a tone, in dB and percent, following AES17.

    The fundamental's frequency comes from a 4-parameter sine fit on the first ``lead_s``
    seconds (unless given). The fundamental is then removed by 3-parameter fits segment by
    segment, and the ratio is the rms of the band-limited (and weighted) residual over the
    rms of the band-limited total, both after ``settle_s`` seconds. This is the one-shot
    form of the residual meter (:func:`start_residual_meter`).

    Parameters
    ----------
    x : array_like
        One channel holding a single tone.
    rate_hz : float
    weighting : {"unweighted", "a", "ccir"}
        Weighting applied to the residual.
    upper_hz, lower_hz : float or None
        Measurement band (AES17: 20 kHz low-pass, 20 Hz high-pass).
    frequency_hz : float, optional
        The fundamental, when known exactly.
    lead_s, segment_s, settle_s : float
        See above and :func:`start_residual_meter`.

    Returns
    -------
    ThdN

    Notes
    -----
    AES17 removes the fundamental with a notch filter; a least-squares fit removes it with
    far less damage to the noise near the fundamental (three degrees of freedom per
    segment, a bias of about ``-13/segment_frames`` dB). Weighting applies to the residual
    only; the reference is the band-limited, unweighted total, so a weighted THD+N ratio
    does not depend on the weighting's gain at the test frequency.

    References
    ----------
    .. [1] AES17-2015, THD+N ratio and measurement band (clauses 6.3 and 5.2.5, from memory).
    .. [2] IEEE Std 1057-2017, 3- and 4-parameter sine fits.
    """
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    kind = _check_weighting(weighting)
    freq = _lead_frequency(arr, rate, frequency_hz, lead_s)
    st = start_residual_meter(
        rate_hz=rate,
        frequency_hz=freq,
        weightings=(kind,),
        upper_hz=upper_hz,
        lower_hz=lower_hz,
        segment_s=segment_s,
        settle_s=settle_s,
    )
    r = read_residual_meter(update_residual_meter(arr, st))
    if r.total_dbfs == -math.inf or r.fundamental_dbfs == -math.inf:
        raise ParameterError("x", "a silent signal", "a signal holding a tone")
    ratio = r.thd_n_db[kind]
    return ThdN(
        ratio_db=ratio,
        percent=100.0 * 10.0 ** (ratio / 20.0),
        weighting=kind,
        fundamental_hz=freq,
        fundamental_dbfs=r.fundamental_dbfs,
        total_dbfs=r.total_dbfs,
        noise_dbfs=r.noise_dbfs[kind],
        upper_hz=upper_hz,
        lower_hz=lower_hz,
    )


@dataclass(frozen=True)
class HarmonicLevel:
    """One harmonic: its order, frequency, and level relative to the fundamental and in dBFS."""

    order: int
    frequency_hz: float
    level_db: float
    level_dbfs: float


@dataclass(frozen=True)
class Thd:
    """Total harmonic distortion from fitted harmonic amplitudes.

    Attributes
    ----------
    ratio_db : float
        ``20 log10(sqrt(sum of harmonic amplitudes squared) / fundamental amplitude)``.
    percent : float
    fundamental_hz, fundamental_dbfs : float
    harmonics : tuple of HarmonicLevel
        The harmonics included (those inside the band and below Nyquist).
    excluded_orders : tuple of int
        Requested orders left out because they lie above ``upper_hz`` or Nyquist.
    """

    ratio_db: float
    percent: float
    fundamental_hz: float
    fundamental_dbfs: float
    harmonics: tuple
    excluded_orders: tuple


def thd(x, *, rate_hz, harmonics=range(2, 11), upper_hz=20000.0, frequency_hz=None):
    """Total harmonic distortion from harmonics of the fitted fundamental.

    The fundamental frequency is found by a 4-parameter sine fit (unless given); then the
    fundamental, DC and every harmonic ``k * f`` inside the band are fitted jointly by least
    squares at their exact frequencies, so each harmonic's amplitude is read without window
    leakage.

    Parameters
    ----------
    x : array_like
        One channel holding a single tone.
    rate_hz : float
    harmonics : iterable of int
        Harmonic orders (>= 2) to include; orders whose frequency is above ``upper_hz`` or
        Nyquist are excluded and listed as such.
    upper_hz : float or None
        Upper band edge (None: Nyquist).
    frequency_hz : float, optional
        The fundamental, when known exactly.

    Returns
    -------
    Thd

    References
    ----------
    .. [1] IEEE Std 1241-2010, total harmonic distortion (clause 9.1, from memory).
    .. [2] AES17-2015, harmonic distortion measured within the 20 kHz band (from memory).
    """
    arr = _as_signal(x)
    rate = _check_rate(rate_hz)
    orders = [int(k) for k in harmonics]
    if not orders or any(k < 2 for k in orders):
        raise ParameterError("harmonics", harmonics, "harmonic orders of 2 or more")
    fit = fit_sine(arr, rate_hz=rate, frequency_hz=frequency_hz)
    f0 = fit.frequency_hz
    top = rate / 2 if upper_hz is None else min(float(upper_hz), rate / 2)
    used = [k for k in orders if k * f0 < top]
    excluded = tuple(k for k in orders if k not in used)
    amps, _ = _fit_lines(arr, [f0] + [k * f0 for k in used], rate)
    a1 = abs(amps[0])
    levels = []
    for k, amp in zip(used, amps[1:], strict=True):
        rel = 20.0 * math.log10(abs(amp) / a1) if abs(amp) > 0 else -math.inf
        levels.append(HarmonicLevel(k, k * f0, rel, 20.0 * math.log10(max(abs(amp), 1e-300))))
    total = math.sqrt(float(np.sum(np.abs(amps[1:]) ** 2)))
    ratio = 20.0 * math.log10(total / a1) if total > 0 else -math.inf
    return Thd(
        ratio_db=ratio,
        percent=100.0 * total / a1,
        fundamental_hz=f0,
        fundamental_dbfs=20.0 * math.log10(a1),
        harmonics=tuple(levels),
        excluded_orders=excluded,
    )


def sinad_db(x, *, rate_hz, frequency_hz=None):
    """Signal to noise-and-distortion ratio over the full Nyquist band, in dB.

    ``10 log10((A**2 / 2) / mean(residual**2))`` with ``A`` and the residual from a
    4-parameter sine fit.

    References
    ----------
    .. [1] IEEE Std 1241-2010, SINAD (clause 9.2, from memory).
    """
    fit = fit_sine(x, rate_hz=rate_hz, frequency_hz=frequency_hz)
    if fit.residual_rms == 0:
        return math.inf
    return 10.0 * math.log10((fit.amplitude**2 / 2.0) / fit.residual_rms**2)


def enob_bits(x, *, rate_hz, frequency_hz=None, full_scale_range=2.0):
    """Effective number of bits from the rms noise and distortion of a sine fit.

    ``ENOB = log2(FSR / (NAD_rms * sqrt(12)))`` with ``NAD_rms`` the rms residual of a
    4-parameter sine fit and ``FSR`` the full-scale range (2.0 for ±1.0).

    References
    ----------
    .. [1] IEEE Std 1241-2010, effective number of bits (clause 9.3, from memory).
    """
    fsr = _check_positive(full_scale_range, "full_scale_range")
    fit = fit_sine(x, rate_hz=rate_hz, frequency_hz=frequency_hz)
    if fit.residual_rms == 0:
        return math.inf
    return math.log2(fsr / (fit.residual_rms * math.sqrt(12.0)))
