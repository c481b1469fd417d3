"""Noise weightings: the A curve (IEC 61672-1) and the CCIR-RMS curve (ITU-R BS.468-4, AES17).

Each weighting is available two ways:

- as its exact frequency response in dB (:func:`a_weighting_db`, :func:`ccir_weighting_db`,
  :func:`weighting_db`), for weighting spectra bin by bin, and
- as a digital filter for time-domain use at any rate from 44.1 kHz up
  (:func:`weighting_filter`, :func:`apply_weighting`).

How the digital filters are made
--------------------------------
A plain bilinear transform of the analog weighting network squeezes the whole frequency axis
into the band below Nyquist, so at 44.1 and 48 kHz the digital response falls away from the
analog one above about 10 kHz (the A filter would be several dB low at 16-20 kHz). Here each
analog network is split in two:

- the low-frequency poles (below 2 kHz, where the warping is negligible) are mapped by the
  bilinear transform, each pre-warped so that its corner frequency lands exactly; their zeros at
  DC become exact zeros at z = 1;
- the high-frequency poles become digital sections whose poles and zeros are fitted by
  Levenberg-Marquardt least squares (analytic Jacobian) to the analytic curve in dB, on a dense
  grid up to ``min(0.47 * rate, 40 kHz)``. The fit starts from the pre-warped bilinear
  transform, with one to three extra numerator zeros; the best of the three is kept. The poles
  are parameterised inside the stability triangle of each biquad, so the fit cannot return an
  unstable filter. A fit that drifts into a near pole-zero cancellation (a pole with a corner
  below 500 Hz, which would ring for seconds) is refused.

At the six audio rates (44.1 to 192 kHz) the fitted sections are shipped as exact constants
(``_weighting_sections.py``, written by :func:`_shipped_sections_source`): the least-squares fit
is not bit-reproducible from one process to the next (its last bits, about 1e-10 dB in a
reading, move with memory layout), and shipping its result makes every process, a cluster's
workers included, weight with the same bits. Other rates are fitted once per process and
cached. The deviation from the analytic curve up to 20 kHz is at most about 0.012 dB for A and
0.002 dB for CCIR at any rate tried from 44.1 kHz to 6.144 MHz (see ``docs/weighting.md``).
That is far inside the IEC 61672-1 class-1 acceptance limits, which the tests check at the six
audio rates and 768 kHz. The fit is iterative,
so changes at rounding level (another numpy build, say) can move it to a nearby optimum. The
result still stays within the tested 0.1 dB.
"""

from __future__ import annotations

import functools

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.measure.bands import MAX_RATE_HZ, MIN_RATE_HZ, check_rate, run_sos

__all__ = [
    "WEIGHTINGS",
    "MIN_RATE_HZ",
    "MAX_RATE_HZ",
    "a_weighting_db",
    "ccir_weighting_db",
    "bs468_weighting_db",
    "weighting_db",
    "weighting_power_gain",
    "weighting_filter",
    "apply_weighting",
]

#: The weighting kinds understood by :func:`weighting_db`, :func:`weighting_filter` and
#: :func:`apply_weighting`.
WEIGHTINGS = ("unweighted", "a", "ccir")

# IEC 61672-1:2013, Annex E, equations (E.1)-(E.6): pole frequencies of the A network in Hz.
_A_POLES_HZ = (20.598997, 107.65265, 737.86223, 12194.217)
# IEC 61672-1:2013, equation (E.6): A1000, the normalisation constant in dB.
_A1000_DB = -2.000

# ITU-R BS.468-4: the response of the standard's passive weighting network, written as
# R(f) = K f / |D(j f)| with D a sixth-order polynomial in (j f), f in Hz. Coefficients of D in
# ascending powers of (j f); these are the widely published values for the 468 network.
_BS468_DEN = (
    1.0,
    5.559488023498642e-4,
    1.363894795463638e-7,
    2.118150887518656e-11,
    2.043828333606125e-15,
    1.306612257412824e-19,
    4.737338981378384e-24,
)
_BS468_K = 1.246332637532143e-4


def _as_freq(freq_hz, name="freq_hz"):
    f = np.asarray(freq_hz, dtype=np.float64)
    if not np.all(np.isfinite(f)) or np.any(f < 0):
        raise ParameterError(name, freq_hz, "finite frequencies >= 0 Hz")
    return f


def _db(magnitude):
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(magnitude)


def _a_magnitude(f):
    f1, f2, f3, f4 = _A_POLES_HZ
    ff = f * f
    num = (f4 * f4) * ff * ff
    den = (ff + f1 * f1) * np.sqrt(ff + f2 * f2) * np.sqrt(ff + f3 * f3) * (ff + f4 * f4)
    return num / den


def a_weighting_db(freq_hz):
    """A-weighting in dB at the given frequencies, from the analytic curve of IEC 61672-1.

    Parameters
    ----------
    freq_hz : array_like
        Frequencies in Hz (>= 0).

    Returns
    -------
    numpy.ndarray or float
        The A-weighting in dB (0 dB at 1 kHz to within the standard's normalisation;
        ``-inf`` at 0 Hz). Same shape as `freq_hz`.

    Notes
    -----
    ``A(f) = 20 log10[f4^2 f^4 / ((f^2 + f1^2) (f^2 + f2^2)^1/2 (f^2 + f3^2)^1/2 (f^2 + f4^2))]
    - A1000`` with f1 = 20.598997 Hz, f2 = 107.65265 Hz, f3 = 737.86223 Hz, f4 = 12194.217 Hz
    and A1000 = -2.000 dB.

    References
    ----------
    IEC 61672-1:2013, Electroacoustics - Sound level meters - Part 1: Specifications,
    Annex E, equations (E.1) to (E.6).
    """
    f = _as_freq(freq_hz)
    out = _db(_a_magnitude(f)) - _A1000_DB
    return out if out.ndim else float(out)


def _bs468_magnitude(f):
    jf = 1j * f
    den = np.zeros_like(jf)
    for c in reversed(_BS468_DEN):
        den = den * jf + c
    return _BS468_K * f / np.abs(den)


def bs468_weighting_db(freq_hz):
    """The ITU-R BS.468-4 weighting in dB, normalised as the standard does (0 dB at 1 kHz).

    Parameters
    ----------
    freq_hz : array_like
        Frequencies in Hz (>= 0).

    Returns
    -------
    numpy.ndarray or float
        The 468 weighting in dB: 0 dB at 1 kHz, about +12.2 dB at 6.3 kHz, ``-inf`` at 0 Hz.

    Notes
    -----
    The curve is the magnitude response of the standard's passive weighting network, a
    sixth-order all-pole network with one zero at DC: ``R(f) = K f / |D(jf)|``. It is normalised
    here exactly to 0 dB at 1 kHz (the network's own gain at 1 kHz differs from unity by a
    constant).

    References
    ----------
    ITU-R Recommendation BS.468-4 (1986), Measurement of audio-frequency noise voltage level in
    sound broadcasting, clause 1 (weighting network), Table 1 and Figure 1.
    """
    f = _as_freq(freq_hz)
    out = _db(_bs468_magnitude(f)) - _db(_bs468_magnitude(np.float64(1000.0)))
    return out if out.ndim else float(out)


def ccir_weighting_db(freq_hz):
    """The AES17 "CCIR-RMS" weighting in dB: the BS.468-4 curve normalised to 0 dB at 2 kHz.

    Parameters
    ----------
    freq_hz : array_like
        Frequencies in Hz (>= 0).

    Returns
    -------
    numpy.ndarray or float
        The weighting in dB: 0 dB at 2 kHz, about -5.6 dB at 1 kHz and +6.6 dB at 6.3 kHz.

    Notes
    -----
    AES17 uses this curve with an rms detector (not the quasi-peak detector of BS.468-4). The
    curve is :func:`bs468_weighting_db` shifted by its own value at 2 kHz.

    References
    ----------
    AES17-2015, AES standard method for digital audio engineering - Measurement of digital audio
    equipment, clause on noise weighting ("CCIR-RMS").
    ITU-R Recommendation BS.468-4 (1986).
    """
    f = _as_freq(freq_hz)
    out = _db(_bs468_magnitude(f)) - _db(_bs468_magnitude(np.float64(2000.0)))
    return out if out.ndim else float(out)


def _check_kind(kind):
    if not isinstance(kind, str) or kind.lower() not in WEIGHTINGS:
        raise ParameterError("kind", kind, "one of " + ", ".join(repr(k) for k in WEIGHTINGS))
    return kind.lower()


def weighting_db(freq_hz, kind):
    """The named weighting in dB at the given frequencies.

    Parameters
    ----------
    freq_hz : array_like
        Frequencies in Hz (>= 0).
    kind : {"unweighted", "a", "ccir"}
        ``"unweighted"`` gives 0 dB everywhere; ``"a"`` is :func:`a_weighting_db`; ``"ccir"``
        is :func:`ccir_weighting_db` (AES17 CCIR-RMS).

    Returns
    -------
    numpy.ndarray or float
        The weighting in dB, same shape as `freq_hz`.
    """
    kind = _check_kind(kind)
    if kind == "a":
        return a_weighting_db(freq_hz)
    if kind == "ccir":
        return ccir_weighting_db(freq_hz)
    f = _as_freq(freq_hz)
    out = np.zeros_like(f)
    return out if out.ndim else float(out)


# --- digital filter design ---------------------------------------------------------------

_LOW_POLE_LIMIT_HZ = 2000.0


def weighting_power_gain(freq_hz, kind):
    """The named weighting as a power gain, ``10**(weighting_db / 10)``.

    This is the factor each bin of a noise power spectrum is multiplied by to weight it.

    Parameters
    ----------
    freq_hz : array_like
        Frequencies in Hz (>= 0).
    kind : {"unweighted", "a", "ccir"}

    Returns
    -------
    numpy.ndarray
        The power gain at each frequency: 1 everywhere for ``"unweighted"``, 0 where the
        weighting is ``-inf`` dB (at 0 Hz).
    """
    if kind == "unweighted":
        return np.ones_like(np.asarray(freq_hz, dtype=float))
    with np.errstate(divide="ignore", over="ignore"):
        db = np.asarray(weighting_db(freq_hz, kind), dtype=float)
    return np.where(np.isfinite(db), 10.0 ** (db / 10.0), 0.0)


def _analog_network(kind):
    """Analog prototype of a weighting: (number of zeros at DC, pole frequencies in rad/s)."""
    if kind == "a":
        f1, f2, f3, f4 = _A_POLES_HZ
        poles = -2.0 * np.pi * np.array([f1, f1, f2, f3, f4, f4], dtype=complex)
        return 4, poles
    # BS.468: D(jf) polynomial in jf (Hz); roots in the variable s_hz = j f, scaled to rad/s.
    roots_hz = np.roots(np.array(_BS468_DEN[::-1]))
    return 1, 2.0 * np.pi * roots_hz


def _target_db(kind, f):
    return a_weighting_db(f) if kind == "a" else ccir_weighting_db(f)


def _stable_biquad(u, v):
    # any real (u, v) maps inside the stability triangle |a2| < 1, |a1| < 1 + a2; near its
    # edges u and v behave like logarithms of the distance, so the fit stays well scaled
    a2 = np.tanh(u)
    a1 = (1.0 + a2) * np.tanh(v)
    return a1, a2


def _biquad_uv(a1, a2):
    a2 = float(np.clip(a2, -1.0 + 1e-12, 1.0 - 1e-12))
    v = np.arctanh(float(np.clip(a1 / (1.0 + a2), -1.0 + 1e-12, 1.0 - 1e-12)))
    return np.arctanh(a2), v


# The fitted high-frequency part gets this many numerator zeros beyond its pole count; each
# design tries them all and keeps the best. Chosen by trial over rates from 44.1 kHz to
# 6.144 MHz: no single count is best at every rate.
_EXTRA_ZEROS = (1, 2, 3)
_DB_PER_NEPER = 20.0 / np.log(10.0)
# A fitted pole with a corner below this is a near pole-zero cancellation (the fitted part
# models corners of 2 kHz and up); such a fit is refused because it would ring for seconds.
_MIN_FITTED_CORNER_HZ = 500.0


def _initial_numerator(n_zeros):
    """Orders and starting coefficients of the numerator factors of the fitted part.

    Quadratic factors ``(1 + r z^-1)^2`` with r = 1, 0.7, 0.4, ... (a linear factor ``1`` for an
    odd count). The bilinear transform would put every zero at z = -1 (r = 1); spreading the
    starting zeros along the real axis breaks the symmetry between interchangeable factors,
    which otherwise makes the fit land on different optima after rounding-level changes.
    """
    orders = [2] * (n_zeros // 2) + [1] * (n_zeros % 2)
    x0 = []
    for j, order in enumerate(orders):
        r = max(1.0 - 0.3 * j, 0.1)
        x0 += [2.0 * r, r * r] if order == 2 else [0.0]
    return orders, x0


def _fit_high_part(kind, rate, fixed, sections, n_zeros):
    """Fit the high-frequency sections; return (sections, worst in-band error in dB)."""
    from scipy import optimize, signal

    num_orders, x0 = _initial_numerator(n_zeros)
    i_gain = len(x0)
    x0.append(0.0)
    for sec in sections:
        x0 += list(_biquad_uv(sec[4], sec[5]))
    x0 = np.array(x0)
    n_sections = len(sections)

    f_top = min(0.47 * rate, 40000.0)
    grid = np.unique(
        np.concatenate([np.geomspace(10.0, f_top, 300), np.linspace(500.0, f_top, 300)])
    )
    fit_weight = np.where(grid <= 20000.0, 1.0, 0.3)
    in_band = grid <= 20000.0
    _, h_fixed = signal.sosfreqz(fixed, worN=grid, fs=rate)
    target = _target_db(kind, grid) - _db(np.abs(h_fixed))
    z1 = np.exp(-2j * np.pi * grid / rate)
    z2 = z1 * z1

    def factors(x):
        nums, dens = [], []
        i = 0
        for order in num_orders:
            nums.append(np.concatenate([[1.0], x[i : i + order], np.zeros(2 - order)]))
            i += order
        for q in range(n_sections):
            a1, a2 = _stable_biquad(x[i_gain + 1 + 2 * q], x[i_gain + 2 + 2 * q])
            dens.append(np.array([1.0, a1, a2]))
        return nums, dens

    def log_response(x):
        nums, dens = factors(x)
        n_resp = [c[0] + c[1] * z1 + c[2] * z2 for c in nums]
        d_resp = [d[0] + d[1] * z1 + d[2] * z2 for d in dens]
        mag = np.full(grid.shape, x[i_gain])
        for r in n_resp:
            mag += np.log(np.abs(r))
        for r in d_resp:
            mag -= np.log(np.abs(r))
        return mag, n_resp, d_resp

    def residual(x):
        return fit_weight * (_DB_PER_NEPER * log_response(x)[0] - target)

    def jacobian(x):
        # d/dp 20 log10|H| = (20 / ln 10) Re(d ln H / dp), factor by factor
        _, n_resp, d_resp = log_response(x)
        cols = []
        for order, r in zip(num_orders, n_resp, strict=True):
            cols.append((z1 / r).real)
            if order == 2:
                cols.append((z2 / r).real)
        cols.append(np.ones(grid.shape))
        for q, r in enumerate(d_resp):
            u, v = x[i_gain + 1 + 2 * q], x[i_gain + 2 + 2 * q]
            a2 = np.tanh(u)
            tv = np.tanh(v)
            da2_du = 1.0 - a2 * a2
            cols.append(-(((tv * da2_du) * z1 + da2_du * z2) / r).real)
            cols.append(-(((1.0 + a2) * (1.0 - tv * tv) * z1) / r).real)
        return (_DB_PER_NEPER * fit_weight)[:, None] * np.column_stack(cols)

    # a constant offset is free; start the gain where the mean error is zero
    x0[i_gain] = np.mean(target - _DB_PER_NEPER * log_response(x0)[0]) / _DB_PER_NEPER
    fit = optimize.least_squares(
        residual, x0, jac=jacobian, method="lm", xtol=1e-10, ftol=1e-10, max_nfev=400
    )
    x = fit.x
    nums, dens = factors(x)
    min_radius = np.exp(-2.0 * np.pi * _MIN_FITTED_CORNER_HZ / rate)
    radii = [np.max(np.abs(np.roots(d))) for d in dens]
    if max(radii) > min_radius:
        # a pole drifted to a near-cancellation: keep the starting point (the pre-warped
        # bilinear transform of the high poles)
        x = x0
        nums, dens = factors(x)
    worst = float(np.max(np.abs(residual(x)[in_band])))
    # build the sections straight from the fitted factors (rooting the product polynomial
    # would lose the clustered poles at high rates)
    rows = []
    for k in range(max(len(nums), len(dens))):
        b = nums[k] if k < len(nums) else np.array([1.0, 0.0, 0.0])
        a = dens[k] if k < len(dens) else np.array([1.0, 0.0, 0.0])
        rows.append(np.concatenate([b, a]))
    fitted = np.array(rows)
    fitted[0, :3] *= np.exp(x[i_gain])
    return fitted, worst


@functools.lru_cache(maxsize=64)
def _design(kind, rate):
    """The filter of a (kind, rate): the shipped sections at the audio rates, else the fit."""
    from audiodsm.measure._weighting_sections import SHIPPED_SECTIONS

    rows = SHIPPED_SECTIONS.get((kind, float(rate)))
    if rows is None:
        from audiodsm import disk_cache

        # another rate: fitted once, remembered on disk (a later run reads the sections back
        # without importing scipy.signal and without the fit)
        sos = disk_cache.remembered(
            "weighting-sos",
            (str(kind), float(rate)),
            lambda: _fitted_design(kind, rate),
            sources=("measure/weighting.py",),
        )
    else:
        sos = np.array(rows, dtype=np.float64)
    sos.setflags(write=False)
    return sos


def _fitted_design(kind, rate):
    """Design a weighting filter by the fit described in the module notes (not cached)."""
    from scipy import signal

    n_dc, poles = _analog_network(kind)
    is_low = np.abs(poles) < 2.0 * np.pi * _LOW_POLE_LIMIT_HZ
    low, high = poles[is_low], poles[~is_low]

    def prewarp(p):
        # scale each pole so that its corner frequency maps exactly through the bilinear
        # transform (w_digital = 2 fs tan(w_analog T / 2)).
        w = np.abs(p)
        return p / w * 2.0 * rate * np.tan(w / (2.0 * rate))

    # fixed part: the low poles with as many DC zeros, bilinear and pre-warped; the remaining
    # DC zeros stay exact factors (1 - z^-1)
    n_fixed_zeros = min(n_dc, len(low))
    zd, pd, kd = signal.bilinear_zpk(np.zeros(n_fixed_zeros), prewarp(low), 1.0, rate)
    zd = np.concatenate([zd, np.ones(n_dc - n_fixed_zeros)])
    fixed = signal.zpk2sos(zd, pd, kd, pairing="nearest")

    # fitted part: the high poles, starting at their pre-warped bilinear transform, over a
    # numerator with a few more zeros; the best of a few zero counts is kept
    _, ph, _ = signal.bilinear_zpk([], prewarp(high), 1.0, rate)
    sections = signal.zpk2sos([], ph, 1.0, pairing="nearest")
    fits = [_fit_high_part(kind, rate, fixed, sections, len(high) + e) for e in _EXTRA_ZEROS]
    fitted, _ = min(fits, key=lambda item: item[1])
    sos = np.vstack([fixed, fitted])
    # exact normalisation at the reference frequency (1 kHz for A, 2 kHz for CCIR)
    f_ref = 1000.0 if kind == "a" else 2000.0
    _, h_ref = signal.sosfreqz(sos, worN=[f_ref], fs=rate)
    sos[0, :3] *= 10.0 ** (_target_db(kind, np.float64(f_ref)) / 20.0) / np.abs(h_ref[0])
    return sos


def _shipped_sections_source():
    """Source text of ``_weighting_sections.py``: the fit run once at every audio rate.

    Run ``python -c "from audiodsm.measure.weighting import _shipped_sections_source as s;
    print(s(), end='')" > audiodsm/measure/_weighting_sections.py`` to write the table again
    (for example after a change of the fit). Each float is written by ``repr``, which reads
    back to the same double.
    """
    from audiodsm.limits import AUDIO_RATES_HZ

    lines = [
        '"""The A and CCIR weighting filters at the audio rates, fitted once and shipped.',
        "",
        "Written by ``audiodsm.measure.weighting._shipped_sections_source`` (do not edit by",
        "hand). The least-squares fit behind these sections is not bit-reproducible from one",
        "process to the next (its last bits move with memory layout), so the filters the battery",
        "uses are read from here: every process weights with the same bits. Rates not listed",
        "here are fitted when first asked for. tests/test_weighting.py re-runs the fit and checks",
        "these against it and against the IEC 61672-1 / BS.468-4 tolerances.",
        '"""',
        "",
        "# (kind, rate in Hz) -> second-order sections (b0, b1, b2, a0, a1, a2) per row",
        "SHIPPED_SECTIONS = {",
    ]
    for kind in ("a", "ccir"):
        for rate in AUDIO_RATES_HZ:
            sos = _fitted_design(kind, float(rate))
            lines.append(f"    ({kind!r}, {float(rate)!r}): (")
            for row in sos:
                lines.append("        (" + ", ".join(repr(float(v)) for v in row) + "),")
            lines.append("    ),")
    lines.append("}")
    return "\n".join(lines) + "\n"


def weighting_filter(kind, rate_hz):
    """Digital weighting filter as second-order sections.

    Parameters
    ----------
    kind : {"unweighted", "a", "ccir"}
        The weighting. ``"unweighted"`` gives a single pass-through section.
    rate_hz : float
        Sample rate in Hz, from 44.1 kHz to 6.144 MHz.

    Returns
    -------
    numpy.ndarray
        Second-order sections, shape ``(n_sections, 6)``, in the layout of
        :func:`scipy.signal.sosfilt`. A fresh writable copy on every call.

    Raises
    ------
    ParameterError
        For an unknown `kind` or a rate outside the allowed range.

    Notes
    -----
    The low-frequency poles are mapped by the pre-warped bilinear transform. The high-frequency
    part is fitted to the analytic curve in dB by least squares on a grid up to
    ``min(0.47 * rate_hz, 40 kHz)`` (see the module notes). The response is then normalised
    exactly at the curve's reference frequency (1 kHz for A, 2 kHz for CCIR). Up to 20 kHz the
    deviation from the analytic curve stays within about 0.012 dB (A) and 0.002 dB (CCIR),
    inside the IEC 61672-1 class-1 limits. At the audio rates (44.1 to 192 kHz) the sections
    are shipped constants, the same bits in every process; at other rates the first call for a
    (kind, rate) pair fits them (about 0.1 to 2.5 s) and later calls come from a cache.

    References
    ----------
    IEC 61672-1:2013, Annex E (A-weighting network) and Table 3 (acceptance limits).
    ITU-R Recommendation BS.468-4 (1986), Table 1.
    """
    kind = _check_kind(kind)
    rate = check_rate(rate_hz)
    if kind == "unweighted":
        return np.array([[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]])
    return np.array(_design(kind, rate), copy=True)


def apply_weighting(x, *, rate_hz, kind, state=None):
    """Filter a signal through a weighting filter, block by block.

    Parameters
    ----------
    x : array_like
        Signal, shape ``(n,)`` or ``(n, channels)``, full scale ±1.
    rate_hz : float
        Sample rate in Hz.
    kind : {"unweighted", "a", "ccir"}
        The weighting.
    state : SosState or None, optional
        The state returned by the previous call for the previous block, or None to start from
        rest.

    Returns
    -------
    y : numpy.ndarray
        The weighted signal, float64, same shape as `x`.
    state : SosState
        The filter state after the block; pass it with the next block. Processing a signal in
        blocks gives exactly the same samples as one call on the whole signal.

    Raises
    ------
    ParameterError
        On a bad kind or rate, a signal that is not 1-D or 2-D, non-finite samples, or a state
        from a different filter or channel count.
    """
    kind = _check_kind(kind)
    sos = weighting_filter(kind, rate_hz)
    return run_sos(x, sos, state=state, tag=("weighting", kind, float(rate_hz)))
