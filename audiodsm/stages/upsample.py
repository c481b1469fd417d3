"""Rate conversion around the modulator: the interpolation chain and the listening decimator.

The interpolation chain takes audio at its own rate up to the modulator rate (OSR x rate):
polyphase half-band FIR stages, the first one carrying the sharp transition band and the later
ones relaxed, a short droop-compensation FIR, then a cheap final stage (sinc^k, linear or hold)
as real DACs build it. The listening decimator brings the modulator-rate signal (with its large
shaped noise above the audio band) back down to an audio rate through half-band decimators and,
when another rate is asked for, a final rational polyphase stage.

Both are streaming objects with ``process(x, state=None) -> (y, state)``; every output sample
is summed in a fixed order that does not depend on block boundaries, so block-wise output
equals one-shot output bit for bit. The per-sample loops live in :mod:`audiodsm.stages._kernels`.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
from scipy import optimize, signal

from audiodsm.errors import ParameterError
from audiodsm.stages import _kernels

__all__ = [
    "AUDIO_RATES_HZ",
    "OVERSAMPLING_RATIOS",
    "FINAL_STAGES",
    "UpsamplerDesign",
    "design_upsampler",
    "Upsampler",
    "UpsamplerState",
    "DownsamplerDesign",
    "design_downsampler",
    "Downsampler",
    "DownsamplerState",
]

#: Audio rates the interpolation chain accepts, in Hz.
AUDIO_RATES_HZ = (44100.0, 48000.0, 88200.0, 96000.0, 176400.0, 192000.0)
#: Oversampling ratios the interpolation chain reaches.
OVERSAMPLING_RATIOS = (16, 32, 64, 128, 256, 512)
#: Kinds of final interpolation stage.
FINAL_STAGES = ("sinc", "linear", "hold")

# Each half-band or anti-alias stage is designed this much beyond the asked attenuation, so
# that the product of stages (and the compensator's small gain) still meets it.
_DESIGN_MARGIN_DB = 3.0
# Frequency grid used to check a design: this many points per input-rate interval (fewer,
# down to a quarter, at high OSR so that the whole grid stays near this many points).
_UP_GRID_PER_FS = 4096
_UP_GRID_POINTS = 2**20
# Frequency-grid step for checking a decimator, at most this many hertz.
_DOWN_GRID_STEP_HZ = 25.0
_SINC_ORDERS = tuple(range(2, 9))
_MAX_RATIONAL_UP = 1024
# Remez designs the half-bands whose dense-phase band is at least this wide (cycles/sample);
# narrower ones make scipy's Remez exchange diverge, and a linear programme is used instead.
_REMEZ_MIN_BAND = 0.1


# ---------------------------------------------------------------------------------------------
# Half-band design
# ---------------------------------------------------------------------------------------------


def _type2_amplitude(g: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """Zero-phase amplitude of an even-length symmetric FIR ``g`` at ``theta`` cycles/sample."""
    k = g.size // 2
    offsets = k - 0.5 - np.arange(k)
    return 2.0 * np.cos(2.0 * np.pi * np.outer(theta, offsets)) @ g[:k]


def _halfband_from_kaiser(two_k: int, beta: float) -> np.ndarray:
    """Dense-phase taps ``g`` (length 2K) of a Kaiser-window half-band."""
    n_taps = 2 * two_k - 1
    n = np.arange(n_taps) - (two_k - 1)
    h = 0.5 * np.sinc(n / 2.0) * signal.windows.kaiser(n_taps, beta)
    return 2.0 * h[0::2]


def _halfband_minimax(two_k: int, pass_frac: float) -> np.ndarray | None:
    """Dense-phase taps of the minimax (Chebyshev) half-band of length 4K - 1, or None.

    Solved as a linear programme on a grid of the dense phase's passband: minimise d subject
    to ``|A(theta_i) - 1| <= d``, where A is the Type II amplitude of ``g``. (Rescaling the
    result to unity at DC would double its error; the DC gain stays 1 within ``d``.)
    """
    k = two_k // 2
    theta = np.linspace(0.0, 2.0 * pass_frac, 16 * k + 100)
    offsets = k - 0.5 - np.arange(k)
    basis = 2.0 * np.cos(2.0 * np.pi * np.outer(theta, offsets))
    n = theta.size
    cost = np.zeros(k + 1)
    cost[-1] = 1.0
    ones = np.ones((n, 1))
    a_ub = np.block([[basis, -ones], [-basis, -ones]])
    b_ub = np.concatenate([np.ones(n), -np.ones(n)])
    res = optimize.linprog(
        cost,
        A_ub=a_ub,
        b_ub=b_ub,
        bounds=[(None, None)] * k + [(0.0, None)],
        method="highs",
        options={"primal_feasibility_tolerance": 1e-10, "dual_feasibility_tolerance": 1e-10},
    )
    if res.status != 0 or not np.all(np.isfinite(res.x)):
        return None  # pragma: no cover - HiGHS failure; the Kaiser design takes over
    half = res.x[:k]
    return np.concatenate([half, half[::-1]])


def _halfband_error(g: np.ndarray, pass_frac: float) -> float:
    """Largest pass (and, by symmetry, stop) error of the half-band made from ``g``."""
    theta = np.linspace(0.0, 2.0 * pass_frac, 2000)
    return 0.5 * float(np.max(np.abs(_type2_amplitude(g, theta) - 1.0)))


@functools.lru_cache(maxsize=512)
def _halfband(pass_frac: float, max_error: float) -> np.ndarray:
    """Shortest half-band FIR whose pass and stop errors are both within ``max_error``.

    Parameters
    ----------
    pass_frac : float
        Passband edge as a fraction of the half-band's (higher) rate, below 0.25; the
        stopband starts at ``0.5 - pass_frac``.
    max_error : float
        Largest allowed deviation of the amplitude from 1 in the passband and from 0 in the
        stopband.

    Returns
    -------
    numpy.ndarray
        ``g``, the 2K taps of the dense phase (symmetric, summing to 1 within ``max_error``).
        The full half-band
        of length 4K - 1 is ``h[2m] = g[m] / 2``, centre tap ``h[2K-1] = 1/2``, all other odd
        taps zero; its amplitude is ``(1 + G(2f)) / 2``.

    Notes
    -----
    ``g`` is a one-band Type II lowpass over ``[0, 2 pass_frac]``; its Type II symmetry makes
    the half-band's stopband error equal its passband error, so one minimax fit of ``g``
    gives the optimal half-band. Where that band is at least 0.1 cycles/sample wide the fit
    is scipy's Parks-McClellan (Remez) exchange. For narrower bands (the late interpolation
    and early decimation stages) Remez does not converge in double precision, and the fit is
    a linear programme on a dense grid instead (same optimum). Either way the DC gain is 1
    within ``max_error``. The shortest K is found by bisection below the
    length a Kaiser-window half-band needs; the Kaiser design is kept if neither fit does
    better.

    References
    ----------
    .. [1] P. P. Vaidyanathan and T. Q. Nguyen, "A 'trick' for the design of FIR half-band
       filters," IEEE Trans. Circuits Syst., vol. 34, no. 3, pp. 297-300, 1987.
    .. [2] J. H. McClellan, T. W. Parks and L. R. Rabiner, "A computer program for designing
       optimum FIR linear phase digital filters," IEEE Trans. Audio Electroacoust., vol. 21,
       no. 6, 1973.
    .. [3] L. R. Rabiner, "Linear program design of finite impulse response (FIR) digital
       filters," IEEE Trans. Audio Electroacoust., vol. 20, no. 4, pp. 280-288, 1972.
    .. [4] J. F. Kaiser, "Nonrecursive digital filter design using the I0-sinh window
       function," Proc. IEEE ISCAS, 1974.
    """
    atten = -20.0 * math.log10(max_error)
    beta = float(signal.kaiser_beta(atten))
    kaiser = None
    k_hi = 1
    while kaiser is None:
        g = _halfband_from_kaiser(2 * k_hi, beta)
        g = g / g.sum()
        if _halfband_error(g, pass_frac) <= max_error:
            kaiser = g
        elif k_hi > 4000:  # pragma: no cover - outside every supported spec
            raise RuntimeError(f"no half-band found for pass_frac={pass_frac}")
        else:
            k_hi = k_hi + 1 if k_hi < 8 else int(k_hi * 1.25)
    best, lo, hi = kaiser, 0, k_hi  # invariant: K = hi works, K = lo does not
    while hi - lo > 1:
        mid = (lo + hi) // 2
        g = None
        if 2.0 * pass_frac >= _REMEZ_MIN_BAND:
            try:
                g = signal.remez(2 * mid, [0.0, 2.0 * pass_frac], [1.0], fs=1.0, maxiter=100)
            except ValueError:  # "failure to converge" at extreme specs
                g = None
        if g is None or not np.all(np.isfinite(g)):
            g = _halfband_minimax(2 * mid, pass_frac)
        if g is not None and _halfband_error(g, pass_frac) <= max_error:
            best, hi = g, mid
        else:
            lo = mid
    best = 0.5 * (best + best[::-1])  # exact symmetry for the paired kernels
    best.setflags(write=False)
    return best


def _halfband_full(g: np.ndarray) -> np.ndarray:
    """The full half-band impulse response (unit DC gain) from its dense phase ``g``."""
    two_k = g.size
    h = np.zeros(2 * two_k - 1)
    h[0::2] = 0.5 * g
    h[two_k - 1] = 0.5
    return h


# ---------------------------------------------------------------------------------------------
# Interpolation chain design
# ---------------------------------------------------------------------------------------------


def _sinc_kernel(ratio: int, order: int) -> np.ndarray:
    """Interpolation kernel of a sinc^order (order-fold moving average) stage, gain ``ratio``.

    The convolution of ``order`` boxcars of length ``ratio`` divided by ``ratio**(order-1)``;
    with a power-of-two ratio every tap is exact in binary floating point.
    """
    kernel = np.ones(1)
    for _ in range(order):
        kernel = np.convolve(kernel, np.ones(ratio))
    return kernel / float(ratio) ** (order - 1)


def _sinc_magnitude(freq: np.ndarray, rate_out: float, ratio: int, order: int) -> np.ndarray:
    """|H| of the sinc^order interpolator of ``ratio`` at ``freq`` (output rate ``rate_out``)."""
    u = np.asarray(freq, dtype=float) / rate_out
    den = ratio * np.sin(np.pi * u)
    num = np.sin(np.pi * ratio * u)
    with np.errstate(invalid="ignore", divide="ignore"):
        base = np.where(np.abs(den) < 1e-300, 1.0, num / np.where(den == 0.0, 1.0, den))
    return np.abs(base) ** order


def _fit_compensator(
    target_freq: np.ndarray, target_gain: np.ndarray, rate: float, half: int
) -> np.ndarray:
    """Symmetric FIR of length 2*half+1 at ``rate`` whose amplitude fits ``target_gain``.

    Weighted least squares on a cosine basis over the target band, re-weighted (Lawson's
    method) towards the minimax fit. Outside the band the amplitude is left free: for the
    smooth inverse droops it fits it stays within about +1 dB, and the design's final check
    on the whole chain covers it.
    """
    basis = np.cos(2.0 * np.pi * np.outer(target_freq / rate, np.arange(half + 1)))
    basis[:, 1:] *= 2.0
    weight = np.ones(target_freq.size)
    coef = np.zeros(half + 1)
    for _ in range(12):
        sw = np.sqrt(weight)
        coef, *_ = np.linalg.lstsq(basis * sw[:, None], target_gain * sw, rcond=None)
        err = np.abs(basis @ coef - target_gain)
        weight *= err / max(err.max(), 1e-300) + 1e-3
        weight /= weight.mean()
    return np.concatenate([coef[:0:-1], coef])


@dataclass(frozen=True, eq=False)
class UpsamplerDesign:
    """A designed interpolation chain from ``rate_hz`` to ``osr * rate_hz``.

    Attributes
    ----------
    rate_hz, osr : float, int
        Input rate and overall interpolation ratio.
    passband_edge, passband_ripple_db, stopband_edge, stopband_atten_db : float
        The spec it was designed to (edges as fractions of ``rate_hz``).
    halfband_taps : tuple of numpy.ndarray
        Full impulse response of each half-band stage (unit DC gain, odd length), first
        stage first; stage j runs at ``2**j * rate_hz``.
    compensator_taps : numpy.ndarray
        Droop-compensation FIR (odd length, DC gain 1 within its fit) at ``2 * rate_hz``,
        after stage 1.
    final_stage : str
        ``"sinc"``, ``"linear"`` or ``"hold"``.
    final_order : int
        Order k of the final sinc^k stage (linear is 2, hold is 1).
    final_ratio : int
        Interpolation ratio of the final stage.
    final_taps : numpy.ndarray
        Final stage's interpolation kernel (gain ``final_ratio``).
    passband_deviation_db : float
        Largest |gain| deviation from 0 dB of the whole chain over 0..passband_edge, as
        designed (checked on a dense frequency grid).
    image_rejection_db : float
        Smallest attenuation of the whole chain from ``stopband_edge`` to the output Nyquist
        frequency, as designed.
    final_droop_db : float
        Gain of the final stage alone at the passband edge (negative; compensated by the
        compensator).
    final_image_levels_db : numpy.ndarray
        For m = 1 .. final_ratio // 2, the largest gain of the final stage alone over the
        image band ``m * 2**h * rate_hz +/- passband_edge * rate_hz``.
    multiplies_per_input_sample : float
        Multiplications the implementation performs per input sample and channel.
    delay_input_samples : float
        Group delay of the chain in input samples (every stage is linear phase).
    meets_spec : bool
        Whether the designed response meets both the ripple and the stopband spec.
    """

    rate_hz: float
    osr: int
    passband_edge: float
    passband_ripple_db: float
    stopband_edge: float
    stopband_atten_db: float
    halfband_taps: tuple
    compensator_taps: np.ndarray
    final_stage: str
    final_order: int
    final_ratio: int
    final_taps: np.ndarray
    passband_deviation_db: float
    image_rejection_db: float
    final_droop_db: float
    final_image_levels_db: np.ndarray
    multiplies_per_input_sample: float
    delay_input_samples: float
    meets_spec: bool

    @property
    def output_rate_hz(self) -> float:
        """Output rate, ``osr * rate_hz``."""
        return self.osr * self.rate_hz

    @property
    def delay_output_samples(self) -> float:
        """Group delay of the chain in output samples."""
        return self.delay_input_samples * self.osr

    def response(self, freq_hz) -> np.ndarray:
        """Complex frequency response of the whole chain.

        Parameters
        ----------
        freq_hz : array_like
            Frequencies in Hz, from 0 to the output Nyquist frequency.

        Returns
        -------
        numpy.ndarray
            Complex gain at each frequency (1 means the input level is kept), including the
            linear-phase delay of every stage.
        """
        freq = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        total = np.ones(freq.shape, dtype=complex)
        for j, h in enumerate(self.halfband_taps, start=1):
            total *= signal.freqz(h, worN=freq, fs=2**j * self.rate_hz)[1]
        total *= signal.freqz(self.compensator_taps, worN=freq, fs=2 * self.rate_hz)[1]
        total *= signal.freqz(
            self.final_taps / self.final_ratio, worN=freq, fs=self.output_rate_hz
        )[1]
        return total


def _check_choice(name, value, allowed):
    if value not in allowed:
        raise ParameterError(name, value, "one of " + ", ".join(repr(a) for a in allowed))


def _check_range(name, value, low, high, *, low_open=False, high_open=False):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ParameterError(name, value, f"a number from {low} to {high}") from None
    bad_low = v <= low if low_open else v < low
    bad_high = v >= high if high_open else v > high
    if not math.isfinite(v) or bad_low or bad_high:
        lo = "(" if low_open else "["
        hi = ")" if high_open else "]"
        raise ParameterError(name, value, f"a number in {lo}{low}, {high}{hi}")
    return v


def design_upsampler(
    rate_hz: float,
    osr: int,
    *,
    passband_edge: float = 0.4535,
    passband_ripple_db: float = 0.005,
    stopband_edge: float = 0.5465,
    stopband_atten_db: float = 100.0,
    final_stage: str = "sinc",
    sinc_order: int | None = None,
    halfband_stages: int | None = None,
) -> UpsamplerDesign:
    """Design a multi-stage interpolation chain from an audio rate to ``osr * rate_hz``.

    Parameters
    ----------
    rate_hz : float
        Input (audio) rate: 44100, 48000, 88200, 96000, 176400 or 192000 Hz.
    osr : int
        Oversampling ratio: 16, 32, 64, 128, 256 or 512.
    passband_edge : float, optional
        Upper edge of the flat band, as a fraction of ``rate_hz`` (0 < edge < 0.5).
    passband_ripple_db : float, optional
        Allowed deviation from 0 dB over the passband (+/- this many dB).
    stopband_edge : float, optional
        Fraction of ``rate_hz`` from which every image must be attenuated (0.5 < edge < 1).
    stopband_atten_db : float, optional
        Attenuation required from ``stopband_edge`` up to the output Nyquist frequency.
    final_stage : {"sinc", "linear", "hold"}, optional
        The cheap last stage: a sinc^k (k-fold moving average), linear interpolation (sinc^2)
        or a sample-and-hold (sinc^1).
    sinc_order : int, optional
        Order k of a ``"sinc"`` final stage, 2..8. By default the cheapest order that meets
        the spec is chosen.
    halfband_stages : int, optional
        Number of half-band (x2) stages before the final stage, 1 .. log2(osr) - 1. By default
        the cheapest count that meets the spec is chosen. Given explicitly, the spec is not
        enforced on the final stage's images (a hold, say, leaves images near -20 dB): the
        cheapest sinc order that meets it is taken if one does, else the order with the
        highest image rejection, and the design reports what it reaches in
        ``image_rejection_db`` and ``meets_spec``.

    Returns
    -------
    UpsamplerDesign

    Raises
    ------
    ParameterError
        For a rate or OSR outside the supported sets or an out-of-range spec.

    Warns
    -----
    RuntimeWarning
        When the stage count is left to the design and no count meets the spec with this
        final stage (a hold or linear final stage at 100 dB, say): the design with the
        highest image rejection is returned, with ``meets_spec`` False.

    Notes
    -----
    Stage 1 (rate_hz -> 2 rate_hz) is a half-band with its transition band centred on
    rate_hz / 2, from ``max(passband_edge, 1 - stopband_edge)`` to its mirror image. Stage
    j > 1 only has to remove the images of 0 .. stopband_edge * rate_hz around
    2**(j-1) * rate_hz, so its transition band is wide and it is short. A symmetric FIR at
    2 rate_hz, fitted to the inverse of the final stage's droop, flattens the passband. Each
    half-band keeps pass and stop errors within the stricter of the attenuation spec (plus a
    3 dB margin) and a quarter of the ripple budget shared between stages. The designed
    response is then checked on a grid of 4096 points per ``rate_hz`` (2048 at OSR 512) up
    to the output Nyquist frequency.

    References
    ----------
    .. [1] P. P. Vaidyanathan and T. Q. Nguyen, "A 'trick' for the design of FIR half-band
       filters," IEEE Trans. Circuits Syst., vol. 34, no. 3, 1987.
    .. [2] R. E. Crochiere and L. R. Rabiner, "Multirate Digital Signal Processing,"
       Prentice-Hall, 1983, ch. 5 (multistage interpolation).
    .. [3] E. B. Hogenauer, "An economical class of digital filters for decimation and
       interpolation," IEEE Trans. ASSP, vol. 29, no. 2, 1981 (sinc^k stages).
    """
    try:
        rate = float(rate_hz)
    except (TypeError, ValueError):
        rate = None
    if rate not in AUDIO_RATES_HZ:
        raise ParameterError(
            "rate_hz", rate_hz, "one of " + ", ".join(f"{r:g}" for r in AUDIO_RATES_HZ) + " Hz"
        )
    if (
        isinstance(osr, bool)
        or not isinstance(osr, int | np.integer)
        or osr not in (OVERSAMPLING_RATIOS)
    ):
        raise ParameterError(
            "osr", osr, "a power of two: " + ", ".join(str(o) for o in OVERSAMPLING_RATIOS)
        )
    pe = _check_range("passband_edge", passband_edge, 0.0, 0.5, low_open=True, high_open=True)
    se = _check_range("stopband_edge", stopband_edge, 0.5, 1.0, low_open=True, high_open=True)
    ripple = _check_range("passband_ripple_db", passband_ripple_db, 0.0, 1.0, low_open=True)
    atten = _check_range("stopband_atten_db", stopband_atten_db, 20.0, 160.0)
    _check_choice("final_stage", final_stage, FINAL_STAGES)
    n_total = int(osr).bit_length() - 1
    if sinc_order is not None:
        if final_stage != "sinc":
            raise ParameterError("sinc_order", sinc_order, "no value unless final_stage is 'sinc'")
        _check_choice("sinc_order", sinc_order, _SINC_ORDERS)
    if halfband_stages is not None:
        _check_choice("halfband_stages", halfband_stages, tuple(range(1, n_total)))
    design = _design_upsampler_cached(
        rate,
        int(osr),
        pe,
        ripple,
        se,
        atten,
        final_stage,
        None if sinc_order is None else int(sinc_order),
        None if halfband_stages is None else int(halfband_stages),
    )
    if not design.meets_spec and halfband_stages is None:
        warnings.warn(
            f"design_upsampler: final_stage={final_stage!r} at osr={osr} reaches "
            f"{design.image_rejection_db:.1f} dB image rejection and "
            f"{design.passband_deviation_db:.4f} dB passband deviation, short of the spec "
            f"({stopband_atten_db:g} dB, {passband_ripple_db:g} dB); using the best it can do "
            f"({len(design.halfband_taps)} half-band stages)",
            RuntimeWarning,
            stacklevel=2,
        )
    return design


@functools.lru_cache(maxsize=64)
def _design_upsampler_cached(rate, osr, pe, ripple, se, atten, final_stage, sinc_order, n_hb):
    n_total = osr.bit_length() - 1
    if final_stage == "hold":
        orders = (1,)
    elif final_stage == "linear":
        orders = (2,)
    else:
        orders = _SINC_ORDERS if sinc_order is None else (sinc_order,)
    counts = range(1, n_total) if n_hb is None else (n_hb,)
    enforce = n_hb is None

    ripple_lin = 10.0 ** (ripple / 20.0) - 1.0
    candidates = []
    for h in counts:
        max_error = min(10.0 ** (-(atten + _DESIGN_MARGIN_DB) / 20.0), ripple_lin / (4 * h))
        first = max(pe, 1.0 - se) / 2.0
        gs = [_halfband(first, max_error)]
        gs += [_halfband(se / 2**j, max_error) for j in range(2, h + 1)]
        hb_cost = sum(g.size // 2 * 2 ** (j - 1) for j, g in enumerate(gs, start=1))
        ratio = osr >> h
        for k in orders:
            kernel = _sinc_kernel(ratio, k)
            final_cost = 0 if k == 1 else np.count_nonzero(kernel) * 2**h
            # necessary condition, cheap: the final stage alone at the nearest image edge
            worst = _sinc_magnitude(np.array([2**h * rate - pe * rate]), osr * rate, ratio, k)[0]
            plausible = worst <= 10.0 ** (-atten / 20.0)
            candidates.append((hb_cost + final_cost, h, k, tuple(gs), kernel, plausible))
    candidates.sort(key=lambda c: (c[0], c[1], c[2]))

    fallbacks = []
    for _cost, h, k, gs, kernel, plausible in candidates:
        if enforce and not plausible:
            continue
        design = _build_upsampler(rate, osr, pe, ripple, se, atten, final_stage, h, k, gs, kernel)
        if design.meets_spec:
            return design
        fallbacks.append(design)
    if enforce:  # nothing plausible: build the rest, to return the best this kind can do
        for _cost, h, k, gs, kernel, plausible in candidates:
            if not plausible:
                fallbacks.append(
                    _build_upsampler(
                        rate, osr, pe, ripple, se, atten, final_stage, h, k, gs, kernel
                    )
                )
    # the highest image rejection; among equals the cheapest (candidates are in cost order)
    return max(fallbacks, key=lambda d: d.image_rejection_db)


def _build_upsampler(rate, osr, pe, ripple, se, atten, final_stage, h, k, gs, kernel):
    ratio = osr >> h
    rate_final_in = 2**h * rate
    rate_out = osr * rate
    # droop compensation at 2 * rate, fitted to 1 / |final stage|; lengthened until its
    # residual is a quarter of the ripple budget or stops improving
    pass_f = np.linspace(0.0, pe * rate, 240)
    target = 1.0 / _sinc_magnitude(pass_f, rate_out, ratio, k)
    comp, best_err, prev_err = np.ones(1), np.inf, np.inf
    for half in range(0, 32):
        trial = _fit_compensator(pass_f, target, 2.0 * rate, half)
        amp = (
            np.cos(2.0 * np.pi * np.outer(pass_f / (2.0 * rate), np.arange(trial.size) - half))
            @ trial
        )
        err = float(np.max(np.abs(20.0 * np.log10(np.abs(amp) / target))))
        if err < best_err:
            comp, best_err = trial, err
        if err <= ripple / 4.0 or (half >= 8 and err > 0.97 * prev_err):
            break
        prev_err = err
    comp.setflags(write=False)

    # the designed response on a grid: each stage on its own period, tiled
    per_fs = max(_UP_GRID_PER_FS // 4, min(_UP_GRID_PER_FS, _UP_GRID_POINTS // osr))
    step = rate / per_fs
    n_grid = osr * per_fs // 2 + 1
    idx = np.arange(n_grid)
    mag = _sinc_magnitude(idx * step, rate_out, ratio, k)
    full_hbs = []
    for j, g in enumerate(gs, start=1):
        hfull = _halfband_full(g)
        hfull.setflags(write=False)
        full_hbs.append(hfull)
        period = 2**j * per_fs
        mag *= np.abs(np.fft.fft(hfull, n=period))[idx % period]
    period = 2 * per_fs
    mag *= np.abs(np.fft.fft(comp, n=period))[idx % period]
    freq = idx * step
    with np.errstate(divide="ignore"):
        db = 20.0 * np.log10(mag)
    passband = freq <= pe * rate
    stopband = freq >= se * rate
    deviation = float(np.max(np.abs(db[passband])))
    rejection = float(-np.max(db[stopband]))

    final_only = 20.0 * np.log10(np.maximum(_sinc_magnitude(freq, rate_out, ratio, k), 1e-300))
    images = []
    for m in range(1, ratio // 2 + 1):
        band = np.abs(freq - m * rate_final_in) <= pe * rate
        images.append(float(np.max(final_only[band])))
    droop = float(20.0 * np.log10(_sinc_magnitude(np.array([pe * rate]), rate_out, ratio, k)[0]))

    hb_mults = sum(g.size // 2 * 2 ** (j - 1) for j, g in enumerate(gs, start=1))
    comp_mults = comp.size * 2 if comp.size > 1 else 0
    final_mults = 0 if k == 1 else int(np.count_nonzero(kernel)) * 2**h
    delay = sum((g.size - 1) / 2**j for j, g in enumerate(gs, start=1))
    delay += (comp.size - 1) / 2 / 2.0
    delay += k * (ratio - 1) / 2 / osr
    kernel = np.array(kernel)
    kernel.setflags(write=False)
    image_levels = np.array(images)
    image_levels.setflags(write=False)
    return UpsamplerDesign(
        rate_hz=rate,
        osr=osr,
        passband_edge=pe,
        passband_ripple_db=ripple,
        stopband_edge=se,
        stopband_atten_db=atten,
        halfband_taps=tuple(full_hbs),
        compensator_taps=comp,
        final_stage=final_stage,
        final_order=k,
        final_ratio=ratio,
        final_taps=kernel,
        passband_deviation_db=deviation,
        image_rejection_db=rejection,
        final_droop_db=droop,
        final_image_levels_db=image_levels,
        multiplies_per_input_sample=float(hb_mults + comp_mults + final_mults),
        delay_input_samples=float(delay),
        meets_spec=bool(deviation <= ripple and rejection >= atten),
    )


# ---------------------------------------------------------------------------------------------
# Streaming helpers
# ---------------------------------------------------------------------------------------------


def _as_frames(x, name="x", *, check_finite=True):
    """Validate a (n,) or (n, channels) signal; return it as float64 (n, channels) and ndim."""
    arr = np.asarray(x)
    if arr.ndim not in (1, 2) or (arr.ndim == 2 and arr.shape[1] < 1):
        raise ParameterError(name, f"array of shape {arr.shape}", "shape (n,) or (n, channels)")
    if not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
        raise ParameterError(name, f"array of dtype {arr.dtype}", "real numbers")
    arr = arr.astype(np.float64, copy=False)
    # one pass: a NaN or Inf anywhere makes the sum non-finite (so does an overflow, which
    # only values near 1e308 can cause: also not a signal)
    if check_finite and not math.isfinite(float(np.sum(arr))):
        raise ParameterError(name, "an array holding NaN or Inf", "finite samples")
    return (arr[:, None] if arr.ndim == 1 else arr), arr.ndim


def _with_history(held: np.ndarray, frames: np.ndarray) -> np.ndarray:
    """(channels, h + n) contiguous buffer: ``held`` then the (n, channels) ``frames``."""
    h = held.shape[1]
    buf = np.empty((frames.shape[1], h + frames.shape[0]))
    buf[:, :h] = held
    buf[:, h:] = frames.T
    return buf


def _to_frames(frames: np.ndarray, ndim: int) -> np.ndarray:
    """A fresh (n, channels) C-contiguous array back in the caller's layout (no copy)."""
    return frames.reshape(-1) if ndim == 1 else frames


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, dtype=np.float64, copy=True)
    a.setflags(write=False)
    return a


def _check_state_channels(state, channels, ndim):
    if state.channels != channels or state.ndim != ndim:
        raise ParameterError(
            "state",
            f"state for {state.channels} channel(s), ndim {state.ndim}",
            f"state from a signal with {channels} channel(s), ndim {ndim}",
        )


def _phase_table(taps: np.ndarray, ratio: int):
    """Split ``taps`` into ``ratio`` phases: (ratio, P) table and the used length of each."""
    n_phase = -(-taps.size // ratio)
    table = np.zeros((ratio, n_phase))
    lengths = np.zeros(ratio, dtype=np.int64)
    for p in range(ratio):
        part = taps[p::ratio]
        table[p, : part.size] = part
        nz = np.nonzero(part)[0]
        lengths[p] = 0 if nz.size == 0 else nz[-1] + 1
    return table, lengths


# ---------------------------------------------------------------------------------------------
# Upsampler
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class UpsamplerState:
    """Streaming state of an :class:`Upsampler`: each stage's input history.

    Attributes
    ----------
    histories : tuple of numpy.ndarray
        For each stage, the last input samples it needs, shape (channels, length).
    channels : int
        Channel count of the stream.
    ndim : int
        1 for a (n,) stream, 2 for (n, channels).
    """

    histories: tuple
    channels: int
    ndim: int


class Upsampler:
    """Streaming interpolation chain built from an :class:`UpsamplerDesign`.

    Parameters
    ----------
    design : UpsamplerDesign
        From :func:`design_upsampler`.

    Notes
    -----
    Half-band stages compute only their dense phase (with paired symmetric taps); the other
    phase is a copy. The compensator and sinc^k stages run as polyphase FIRs that skip the
    zero taps; a hold stage repeats samples. Nothing multiplies an inserted zero.
    """

    def __init__(self, design: UpsamplerDesign):
        if not isinstance(design, UpsamplerDesign):
            raise ParameterError("design", type(design).__name__, "an UpsamplerDesign")
        self.design = design
        stages = []
        for hfull in design.halfband_taps:
            g = np.ascontiguousarray(2.0 * hfull[0::2])
            stages.append(("halfband", g, g.size - 1))
        comp_table, comp_len = _phase_table(np.asarray(design.compensator_taps), 1)
        # the compensator runs right after stage 1
        stages.insert(1, ("fir", (comp_table, comp_len), comp_table.shape[1] - 1))
        if design.final_order == 1:
            stages.append(("hold", design.final_ratio, 0))
        else:
            table, lengths = _phase_table(np.asarray(design.final_taps), design.final_ratio)
            stages.append(("fir", (table, lengths), table.shape[1] - 1))
        self._stages = stages
        # the same stages as flat tables for the one-pass compiled cascade
        n_st = len(stages)
        kinds = np.zeros(n_st, dtype=np.int64)
        ratios = np.ones(n_st, dtype=np.int64)
        taps = np.zeros(n_st, dtype=np.int64)
        shapes = []
        for s, (kind, data, _hist) in enumerate(stages):
            if kind == "halfband":
                kinds[s], ratios[s], taps[s] = 0, 2, data.size
                shapes.append((1, data.size))
            elif kind == "fir":
                kinds[s], ratios[s], taps[s] = 1, data[0].shape[0], data[0].shape[1]
                shapes.append(data[0].shape)
            else:
                kinds[s], ratios[s], taps[s] = 2, data, 0
                shapes.append((1, 1))
        tables = np.zeros((n_st, max(r for r, _ in shapes), max(m for _, m in shapes)))
        lengths = np.zeros((n_st, tables.shape[1]), dtype=np.int64)
        for s, (kind, data, _hist) in enumerate(stages):
            if kind == "halfband":
                tables[s, 0, : data.size] = data
            elif kind == "fir":
                tables[s, : data[0].shape[0], : data[0].shape[1]] = data[0]
                lengths[s, : data[0].shape[0]] = data[1]
        self._cascade = (kinds, ratios, taps, tables, lengths)
        self._total_ratio = int(np.prod(ratios))

    @property
    def delay_input_samples(self) -> float:
        """Group delay in input samples (see :class:`UpsamplerDesign`)."""
        return self.design.delay_input_samples

    @property
    def delay_output_samples(self) -> float:
        """Group delay in output samples."""
        return self.design.delay_output_samples

    def initial_state(self, channels: int = 1, *, ndim: int = 2) -> UpsamplerState:
        """Zero history for a stream of ``channels`` channels."""
        hist = tuple(_frozen(np.zeros((channels, s[2]))) for s in self._stages)
        return UpsamplerState(histories=hist, channels=channels, ndim=ndim)

    def process(self, x, state: UpsamplerState | None = None):
        """Interpolate one block.

        Parameters
        ----------
        x : array_like
            Block of shape (n,) or (n, channels) at the input rate.
        state : UpsamplerState, optional
            State returned by the previous call; None starts from silence.

        Returns
        -------
        y : numpy.ndarray
            Shape (n * osr,) or (n * osr, channels) at the output rate.
        state : UpsamplerState
            State to pass with the next block.
        """
        frames, ndim = _as_frames(x)
        n, channels = frames.shape
        if state is None:
            state = self.initial_state(channels, ndim=ndim)
        elif not isinstance(state, UpsamplerState) or len(state.histories) != len(self._stages):
            raise ParameterError("state", type(state).__name__, "an UpsamplerState of this chain")
        else:
            _check_state_channels(state, channels, ndim)
        n_st = len(self._stages)
        width = max(1, max(h.shape[1] for h in state.histories))
        held = np.zeros((n_st, channels, width))
        for s, h in enumerate(state.histories):
            held[s, :, : h.shape[1]] = h
        rest = np.empty((n_st, channels, width))
        # the caller's (n * osr, channels) layout is written directly, through its transpose
        result = np.empty((n * self._total_ratio, channels))
        if n:
            kinds, ratios, taps, tables, lengths = self._cascade
            _kernels.interpolate_cascade(
                frames.T, kinds, ratios, taps, tables, lengths, held, result.T, rest
            )
            new_hist = [_frozen(rest[s, :, : st[2]].copy()) for s, st in enumerate(self._stages)]
        else:
            new_hist = list(state.histories)
        new_state = UpsamplerState(histories=tuple(new_hist), channels=channels, ndim=ndim)
        return _to_frames(result, ndim), new_state


# ---------------------------------------------------------------------------------------------
# Downsampler (listening decimator)
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class DownsamplerDesign:
    """A designed decimator from ``rate_in_hz`` to ``rate_out_hz``.

    Attributes
    ----------
    rate_in_hz, rate_out_hz, passband_hz : float
        Rates and the protected band 0..passband_hz.
    passband_ripple_db, alias_atten_db : float
        The spec it was designed to.
    halfband_taps : tuple of numpy.ndarray
        Full impulse response (unit DC gain) of each half-band decimator, first stage first;
        stage j takes ``rate_in_hz / 2**(j-1)`` to half that.
    rational_up, rational_down : int
        L and M of the final rational stage (1, 1 when there is none).
    rational_taps : numpy.ndarray
        The rational stage's FIR at ``rational_up`` times its input rate, with gain
        ``rational_up`` (empty when there is none).
    passband_deviation_db : float
        Largest |gain| deviation from 0 dB over 0..passband_hz, as designed.
    alias_rejection_db : float
        Smallest attenuation of any input frequency that lands in 0..passband_hz at the
        output without belonging there (aliases and rational-stage images), as designed on a
        grid of at most 25 Hz.
    delay_seconds : float
        Group delay (every stage is linear phase).
    multiplies_per_output_sample : float
        Multiplications per output sample and channel.
    meets_spec : bool
        Whether both the ripple and the alias spec are met.
    """

    rate_in_hz: float
    rate_out_hz: float
    passband_hz: float
    passband_ripple_db: float
    alias_atten_db: float
    halfband_taps: tuple
    rational_up: int
    rational_down: int
    rational_taps: np.ndarray
    passband_deviation_db: float
    alias_rejection_db: float
    delay_seconds: float
    multiplies_per_output_sample: float
    meets_spec: bool

    @property
    def delay_input_samples(self) -> float:
        """Group delay in input samples."""
        return self.delay_seconds * self.rate_in_hz

    @property
    def delay_output_samples(self) -> float:
        """Group delay in output samples."""
        return self.delay_seconds * self.rate_out_hz

    @property
    def rational_rate_hz(self) -> float:
        """Input rate of the rational stage (the output rate of the last half-band)."""
        return self.rate_in_hz / 2 ** len(self.halfband_taps)

    def response(self, freq_hz) -> np.ndarray:
        """Complex response of the direct path (not the aliases) at ``freq_hz``.

        Parameters
        ----------
        freq_hz : array_like
            Frequencies in Hz below ``rate_out_hz / 2``.

        Returns
        -------
        numpy.ndarray
            Complex gain of a tone at each frequency, input to output, including delay.
        """
        freq = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        total = np.ones(freq.shape, dtype=complex)
        for j, h in enumerate(self.halfband_taps):
            total *= signal.freqz(h, worN=freq, fs=self.rate_in_hz / 2**j)[1]
        if self.rational_taps.size:
            fu = self.rational_up * self.rational_rate_hz
            total *= signal.freqz(self.rational_taps / self.rational_up, worN=freq, fs=fu)[1]
        return total


def _whole_hz(name, value):
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = float("nan")
    if not math.isfinite(v) or v <= 0 or v != round(v) or v > 1e9:
        raise ParameterError(name, value, "a whole number of hertz from 1 to 1e9")
    return int(round(v))


def design_downsampler(
    rate_in_hz: float,
    rate_out_hz: float,
    *,
    passband_hz: float = 20000.0,
    passband_ripple_db: float = 0.01,
    alias_atten_db: float = 110.0,
) -> DownsamplerDesign:
    """Design the listening decimator from the modulator rate down to an audio rate.

    Parameters
    ----------
    rate_in_hz : float
        Input rate (a whole number of hertz), e.g. 3072000 for 64 x 48 kHz.
    rate_out_hz : float
        Output rate, at most ``rate_in_hz``. When the ratio is not a power of two, the
        half-band stages are followed by one rational polyphase stage.
    passband_hz : float, optional
        The band to keep flat and free of aliases; below ``rate_out_hz / 2``.
    passband_ripple_db : float, optional
        Allowed deviation from 0 dB over 0..passband_hz.
    alias_atten_db : float, optional
        Required attenuation of everything that would land in 0..passband_hz at the output
        (aliases of out-of-band noise and, in a rational stage, images).

    Returns
    -------
    DownsamplerDesign

    Raises
    ------
    ParameterError
        For rates that are not whole hertz, an output rate above the input rate, a passband
        at or above the output Nyquist frequency, or a rational ratio whose L exceeds 1024.

    Warns
    -----
    RuntimeWarning
        If the finished design misses the spec (only at extreme specs, e.g. 180 dB, where
        double-precision filter design runs out); ``meets_spec`` is then False.

    Notes
    -----
    Half-band stage j (input rate R) must only stop what folds into 0..passband_hz, i.e. the
    band R/2 - passband_hz .. R/2; its passband edge is passband_hz, so the first stages are
    a few taps long and the last one carries the sharp transition. Frequencies between the
    passband and the output Nyquist frequency are not protected: they land above
    passband_hz. The rational stage is a Kaiser-window lowpass at L times its input rate, with
    the stopband from min(rate_out, its input rate) - passband_hz. Each stage's DC gain is 1
    within its ripple (a few parts in a million at the default spec).

    References
    ----------
    .. [1] R. E. Crochiere and L. R. Rabiner, "Interpolation and decimation of digital
       signals - a tutorial review," Proc. IEEE, vol. 69, no. 3, 1981.
    .. [2] P. P. Vaidyanathan and T. Q. Nguyen, "A 'trick' for the design of FIR half-band
       filters," IEEE Trans. Circuits Syst., vol. 34, no. 3, 1987.
    .. [3] J. F. Kaiser, "Nonrecursive digital filter design using the I0-sinh window
       function," Proc. IEEE ISCAS, 1974 (window and length formulas).
    """
    rin = _whole_hz("rate_in_hz", rate_in_hz)
    rout = _whole_hz("rate_out_hz", rate_out_hz)
    if rout > rin:
        raise ParameterError("rate_out_hz", rate_out_hz, f"at most rate_in_hz={rin}")
    pb = _check_range("passband_hz", passband_hz, 0.0, rout / 2.0, low_open=True, high_open=True)
    ripple = _check_range("passband_ripple_db", passband_ripple_db, 0.0, 1.0, low_open=True)
    atten = _check_range("alias_atten_db", alias_atten_db, 20.0, 180.0)
    if rin % rout == 0:
        ratio = rin // rout
        n_hb = (ratio & -ratio).bit_length() - 1
        mid = rin >> n_hb
        up, down = 1, ratio >> n_hb
    else:
        n_hb = 0
        while rin % (2 ** (n_hb + 1)) == 0 and rin // 2 ** (n_hb + 1) >= rout:
            n_hb += 1
        mid = rin >> n_hb
        frac = Fraction(rout, mid)
        up, down = frac.numerator, frac.denominator
        if up > _MAX_RATIONAL_UP:
            raise ParameterError(
                "rate_out_hz",
                rate_out_hz,
                f"a rate whose ratio to {mid} Hz reduces to L/M with L <= {_MAX_RATIONAL_UP}",
            )
    design = _design_downsampler_cached(rin, rout, pb, ripple, atten, n_hb, mid, up, down)
    if not design.meets_spec:
        warnings.warn(
            f"design_downsampler: {rin} Hz -> {rout} Hz reaches "
            f"{design.alias_rejection_db:.1f} dB alias rejection and "
            f"{design.passband_deviation_db:.5f} dB passband deviation, short of the spec "
            f"({atten:g} dB, {ripple:g} dB)",
            RuntimeWarning,
            stacklevel=2,
        )
    return design


@functools.lru_cache(maxsize=64)
def _design_downsampler_cached(rin, rout, pb, ripple, atten, n_hb, mid, up, down):
    ripple_lin = 10.0 ** (ripple / 20.0) - 1.0
    n_stages = n_hb + (1 if down > 1 or up > 1 else 0)
    max_error = min(
        10.0 ** (-(atten + _DESIGN_MARGIN_DB) / 20.0), ripple_lin / (4 * max(n_stages, 1))
    )
    hbs = []
    for j in range(n_hb):
        rate_j = rin / 2**j
        hfull = _halfband_full(_halfband(pb / rate_j, max_error))
        hfull.setflags(write=False)
        hbs.append(hfull)
    if up == 1 and down == 1:
        return _finish_downsampler(rin, rout, pb, ripple, atten, hbs, mid, up, down, np.zeros(0))
    # the Kaiser length formula is approximate: lengthen until the measured design meets it
    fu = up * mid
    stop = min(rout, mid) - pb
    a_design = -20.0 * math.log10(max_error)
    design = None
    for extra_db in (0.0, 2.0, 4.0, 8.0):
        numtaps, beta = signal.kaiserord(a_design + extra_db, (stop - pb) / (fu / 2.0))
        numtaps += 1 - numtaps % 2  # odd: integer delay at the design rate
        rat = up * signal.firwin(numtaps, (pb + stop) / 2.0, window=("kaiser", beta), fs=fu)
        design = _finish_downsampler(rin, rout, pb, ripple, atten, hbs, mid, up, down, rat)
        if design.meets_spec:
            break
    return design


def _finish_downsampler(rin, rout, pb, ripple, atten, hbs, mid, up, down, rat):
    """Check a decimator design on a frequency grid and wrap it up."""
    fu = up * mid if rat.size else mid
    rat.setflags(write=False)

    # the design on a grid of `step` Hz: every stage rate is a multiple of it
    base = math.gcd(mid, rout)
    step = base / math.ceil(base / _DOWN_GRID_STEP_HZ)
    n_in = int(round(rin / 2 / step)) + 1
    freq_idx = np.arange(n_in)
    chain = np.ones(n_in)
    for j, h in enumerate(hbs):
        period = int(round(rin / 2**j / step))
        chain *= np.abs(np.fft.fft(h, n=period))[freq_idx % period]
    # where each input frequency sits at the rational stage's input (folded into 0..mid/2)
    mid_period = int(round(mid / step))
    g_idx = freq_idx % mid_period
    g_idx = np.minimum(g_idx, mid_period - g_idx)
    out_period = int(round(rout / step))
    pb_idx = pb / step

    def lands_in_band(idx):
        folded = idx % out_period
        return np.minimum(folded, out_period - folded) <= pb_idx + 1e-9

    n_mid = mid_period // 2 + 1
    g_all = np.arange(n_mid)
    if rat.size:
        fu_period = int(round(fu / step))
        hr = np.abs(np.fft.fft(rat / up, n=max(fu_period, rat.size)))
        if hr.size != fu_period:  # pragma: no cover - filter longer than the grid period
            hr = np.abs(np.fft.fft(rat / up, n=fu_period))
        main = hr[g_all] * lands_in_band(g_all)
        leak = np.zeros(n_mid)
        for kk in range(-up, up + 1):
            for sign in (1, -1):
                u = sign * g_all + kk * mid_period
                # k = 0 is the direct line (its mirror -g is the same line seen from below)
                ok = (u >= 0) & (u <= fu_period // 2) & (kk != 0)
                ok &= lands_in_band(u)
                val = np.where(ok, hr[np.clip(u, 0, fu_period - 1)], 0.0)
                leak = np.maximum(leak, val)
    else:
        main = lands_in_band(g_all).astype(float)
        leak = np.zeros(n_mid)
    genuine = freq_idx <= pb_idx + 1e-9
    level = chain * np.maximum(np.where(genuine, 0.0, main[g_idx]), leak[g_idx])
    worst = float(np.max(level))
    rejection = float("inf") if worst == 0.0 else -20.0 * math.log10(worst)
    passband = chain[genuine] * (main[g_idx[genuine]] if rat.size else 1.0)
    deviation = float(np.max(np.abs(20.0 * np.log10(passband))))

    delay = sum((h.size - 1) / 2 / (rin / 2**j) for j, h in enumerate(hbs))
    if rat.size:
        delay += (rat.size - 1) / 2 / fu
    mults = 0.0
    for j, h in enumerate(hbs):
        k = (h.size + 1) // 4
        mults += (k + 1) * rout / (rin / 2 ** (j + 1))
    if rat.size:
        mults += np.count_nonzero(rat) / up
    return DownsamplerDesign(
        rate_in_hz=float(rin),
        rate_out_hz=float(rout),
        passband_hz=pb,
        passband_ripple_db=ripple,
        alias_atten_db=atten,
        halfband_taps=tuple(hbs),
        rational_up=up,
        rational_down=down,
        rational_taps=rat,
        passband_deviation_db=deviation,
        alias_rejection_db=rejection,
        delay_seconds=float(delay),
        multiplies_per_output_sample=float(mults),
        meets_spec=bool(deviation <= ripple and rejection >= atten),
    )


@dataclass(frozen=True, eq=False)
class DownsamplerState:
    """Streaming state of a :class:`Downsampler`.

    Attributes
    ----------
    buffers : tuple of numpy.ndarray
        For each half-band stage, the input samples not yet consumed, (channels, length);
        then, when there is a rational stage, its input history.
    next_time : int
        Time of the rational stage's next output, in 1/L input samples from the next block's
        first sample.
    channels : int
        Channel count of the stream.
    ndim : int
        1 for a (n,) stream, 2 for (n, channels).
    """

    buffers: tuple
    next_time: int
    channels: int
    ndim: int


class Downsampler:
    """Streaming listening decimator built from a :class:`DownsamplerDesign`.

    Parameters
    ----------
    design : DownsamplerDesign
        From :func:`design_downsampler`.
    """

    def __init__(self, design: DownsamplerDesign):
        if not isinstance(design, DownsamplerDesign):
            raise ParameterError("design", type(design).__name__, "a DownsamplerDesign")
        self.design = design
        self._halves = [
            np.ascontiguousarray(h[0 : (h.size + 1) // 2 : 2]) for h in design.halfband_taps
        ]
        n_half = [h.size for h in self._halves]
        self._n_half = np.array(n_half, dtype=np.int64)
        self._n_taps = [4 * k - 1 for k in n_half]
        self._half_table = np.zeros((len(n_half), max(n_half, default=1)))
        for s, h in enumerate(self._halves):
            self._half_table[s, : h.size] = h
        if design.rational_taps.size:
            table, lengths = _phase_table(np.asarray(design.rational_taps), design.rational_up)
            self._rational = (np.ascontiguousarray(table), lengths)
        else:
            self._rational = None

    @property
    def delay_output_samples(self) -> float:
        """Group delay in output samples."""
        return self.design.delay_output_samples

    def initial_state(self, channels: int = 1, *, ndim: int = 2) -> DownsamplerState:
        """Zero history for a stream of ``channels`` channels."""
        bufs = [_frozen(np.zeros((channels, 4 * half.size - 2))) for half in self._halves]
        if self._rational is not None:
            bufs.append(_frozen(np.zeros((channels, self._rational[0].shape[1] - 1))))
        return DownsamplerState(buffers=tuple(bufs), next_time=0, channels=channels, ndim=ndim)

    def _run_halfbands(self, block, helds, new_bufs):
        """All half-band stages in one compiled pass; appends each stage's leftover samples."""
        channels = block.shape[0]
        n_in = block.shape[1]
        lens = []
        rests = []
        for taps, held in zip(self._n_taps, helds, strict=True):
            length = held.shape[1] + n_in
            n_out = (length - taps) // 2 + 1 if length >= taps else 0
            lens.append(held.shape[1])
            rests.append(length - 2 * n_out)
            n_in = n_out
        held_all = np.zeros((len(helds), channels, max(max(lens), 1)))
        for s, held in enumerate(helds):
            held_all[s, :, : held.shape[1]] = held
        rest_all = np.empty((len(helds), channels, max(max(rests), 1)))
        out = np.empty((channels, n_in))
        _kernels.decimate_halfband_cascade(
            block, self._half_table, self._n_half, held_all, np.array(lens), out, rest_all
        )
        for s, r in enumerate(rests):
            new_bufs.append(_frozen(rest_all[s, :, :r].copy()))
        return out

    def process(self, x, state: DownsamplerState | None = None, *, check_finite: bool = True):
        """Decimate one block.

        Parameters
        ----------
        x : array_like
            Block of shape (n,) or (n, channels) at ``rate_in_hz``.
        state : DownsamplerState, optional
            State returned by the previous call; None starts from silence.
        check_finite : bool, keyword-only
            Refuse NaN and Inf samples (one pass over the block). The chain, whose analog
            filter output is finite by construction, turns it off.

        Returns
        -------
        y : numpy.ndarray
            The output samples this block completes, (m,) or (m, channels); m varies by
            block but the concatenation over blocks equals a one-shot run.
        state : DownsamplerState
            State to pass with the next block.
        """
        frames, ndim = _as_frames(x, check_finite=check_finite)
        channels = frames.shape[1]
        n_buf = len(self._halves) + (self._rational is not None)
        if state is None:
            state = self.initial_state(channels, ndim=ndim)
        elif not isinstance(state, DownsamplerState) or len(state.buffers) != n_buf:
            raise ParameterError("state", type(state).__name__, "a DownsamplerState of this chain")
        else:
            _check_state_channels(state, channels, ndim)
        new_bufs = []
        cur = None  # (channels, n) between stages
        if self._halves:
            cur = self._run_halfbands(frames.T, state.buffers[: len(self._halves)], new_bufs)
        next_time = state.next_time
        if self._rational is not None:
            table, lengths = self._rational
            up, down = self.design.rational_up, self.design.rational_down
            held = state.buffers[-1]
            buf = _with_history(held, frames) if cur is None else np.concatenate([held, cur], 1)
            n = buf.shape[1] - held.shape[1]
            span = n * up - next_time
            n_out = -(-span // down) if span > 0 else 0
            out = np.empty((channels, n_out))
            if n_out:
                _kernels.resample_rational(buf, table, lengths, next_time, down, out)
            next_time = next_time + n_out * down - n * up
            new_bufs.append(_frozen(buf[:, buf.shape[1] - held.shape[1] :]))
            cur = out
        new_state = DownsamplerState(
            buffers=tuple(new_bufs), next_time=int(next_time), channels=channels, ndim=ndim
        )
        if cur is None:  # equal rates: nothing to filter
            return _to_frames(frames.copy(), ndim), new_state
        return _to_frames(np.ascontiguousarray(cur.T), ndim), new_state
