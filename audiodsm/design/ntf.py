"""Noise transfer functions (NTFs) of delta-sigma loops: design and evaluation.

An NTF is kept as zeros and poles in the z-plane. A causal loop has NTF(z -> inf) = 1, so
numerator and denominator are both monic in z and the zpk gain is 1.

Two ways to get one:

- :func:`design_ntf` designs a low-pass-band NTF from an order, an oversampling ratio and a
  bound on the peak gain (Lee's rule). Zeros sit at DC or at the optimal in-band positions
  (roots of the Legendre polynomial of the order, scaled to the band edge); the poles are a
  maximally flat (Butterworth-type) high-pass set whose cutoff is searched so that the peak
  gain equals the bound.
- :func:`ntf_from_zeros_poles` checks a user's zeros and poles (causal, stable, real
  coefficients, finite) and wraps them.

Frequencies are in cycles per modulator sample (0 .. 0.5) unless a name says otherwise; the
signal band of a loop run at oversampling ratio ``osr`` is 0 .. 0.5/osr.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass

import numpy as np
from numpy.polynomial import legendre
from scipy import optimize

from audiodsm.errors import ParameterError

__all__ = ["NoiseTransfer", "design_ntf", "ntf_from_zeros_poles", "optimal_zero_positions"]

MIN_ORDER, MAX_ORDER = 1, 8
MIN_OSR, MAX_OSR = 4, 1024

# Gauss-Legendre nodes used by the in-band quadrature: exact for polynomials of degree
# 2 * 48 - 1 = 95 on each piece, far above the degree 4 * 8 = 32 of |numerator|^2 in the band.
_GL_NODES, _GL_WEIGHTS = legendre.leggauss(48)
_MAX_PIECES = 1024
# Dense grid for the peak search, refined locally afterwards.
_PEAK_GRID = np.linspace(0.0, 0.5, 4097)
# Range of the pre-warped cutoff t = tan(w_c / 2) scanned by the pole search.
_T_LOW, _T_HIGH, _T_STEPS = 1e-5, 1e4, 61
# Tolerance used when checking conjugate symmetry and the causal gain of user NTFs.
_SYMMETRY_RTOL = 1e-9


@dataclass(frozen=True, eq=False)
class NoiseTransfer:
    """A noise transfer function H(z) = gain * prod(z - zeros) / prod(z - poles).

    Build one with :func:`design_ntf` or :func:`ntf_from_zeros_poles`; constructing it
    directly skips the checks those functions make.

    Parameters
    ----------
    zeros, poles : array_like of complex
        Same count (the loop order); complex values come in conjugate pairs.
    gain : float
        The zpk gain; 1.0 for a causal loop (H(inf) = 1).
    osr : float or None
        Oversampling ratio the design was made for (None for a user NTF).
    max_gain : float or None
        Requested peak gain of the design (None for a user NTF).
    optimized : bool or None
        Whether the design spread its zeros optimally over the band (None for a user NTF).

    Notes
    -----
    The arrays are stored read-only. Equality is identity (``eq=False``), so instances are
    hashable and never compare arrays element-wise by accident.
    """

    zeros: np.ndarray
    poles: np.ndarray
    gain: float = 1.0
    osr: float | None = None
    max_gain: float | None = None
    optimized: bool | None = None

    def __post_init__(self):
        for name in ("zeros", "poles"):
            arr = np.array(getattr(self, name), dtype=complex).reshape(-1)
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "gain", float(self.gain))

    @property
    def order(self) -> int:
        """Loop order (number of poles)."""
        return len(self.poles)

    def polynomials(self) -> tuple[np.ndarray, np.ndarray]:
        """Numerator and denominator coefficients, highest power of z first (real)."""
        b = self.gain * np.real_if_close(np.poly(self.zeros), tol=1e6)
        a = np.real_if_close(np.poly(self.poles), tol=1e6)
        return np.real(b).astype(float), np.real(a).astype(float)

    def response(self, freq: np.ndarray) -> np.ndarray:
        """Complex response at normalized frequencies ``freq`` (cycles per sample, 0..0.5)."""
        z = np.exp(2j * np.pi * np.asarray(freq, dtype=float))
        num = np.prod(z[..., None] - self.zeros, axis=-1)
        den = np.prod(z[..., None] - self.poles, axis=-1)
        return self.gain * num / den

    def _magnitude(self, freq):
        return np.abs(self.response(freq))

    def peak(self, *, refine: bool = True) -> tuple[float, float]:
        """Peak magnitude of the response over 0..0.5 and the frequency where it occurs.

        Parameters
        ----------
        refine : bool
            Refine the grid maxima (default). Without it the result is the grid maximum,
            a lower bound that is cheaper to get.

        Returns
        -------
        gain : float
            max |H(e^{j 2 pi f})| (linear).
        freq : float
            The frequency of the peak, cycles per sample.

        Notes
        -----
        |H| is evaluated on a dense uniform grid plus the pole angles (where sharp
        resonances sit); the few highest local maxima are then refined by a bounded
        Brent search between their grid neighbours to about 1e-12 in frequency.
        """
        pole_freqs = np.abs(np.angle(self.poles)) / (2 * np.pi)
        grid = np.unique(np.concatenate([_PEAK_GRID, pole_freqs]))
        mag = self._magnitude(grid)
        if not np.all(np.isfinite(mag)):
            return math.inf, float(grid[np.argmax(~np.isfinite(mag))])
        if not refine:
            i = int(np.argmax(mag))
            return float(mag[i]), float(grid[i])
        interior = np.flatnonzero((mag[1:-1] >= mag[:-2]) & (mag[1:-1] >= mag[2:])) + 1
        best_i = int(np.argmax(mag))
        best_gain, best_freq = float(mag[best_i]), float(grid[best_i])
        candidates = interior[np.argsort(mag[interior])[::-1][:4]]
        for i in candidates:
            res = optimize.minimize_scalar(
                lambda f: -self._magnitude(f),
                bounds=(grid[i - 1], grid[i + 1]),
                method="bounded",
                options={"xatol": 1e-13},
            )
            if -res.fun > best_gain:
                best_gain, best_freq = float(-res.fun), float(res.x)
        return best_gain, best_freq

    def peak_gain(self) -> float:
        """Peak magnitude max |H(e^{jw})| over the whole band 0..0.5 (linear).

        See :meth:`peak` for the method; it also returns the peak frequency.
        """
        return self.peak()[0]

    def in_band_noise_gain(self, osr: float) -> float:
        """Fraction of white noise power that the NTF leaves in the band 0..0.5/osr.

        Parameters
        ----------
        osr : float
            Oversampling ratio, >= 1.

        Returns
        -------
        float
            (1/pi) * integral_0^{pi/osr} |H(e^{jw})|^2 dw (linear power ratio).

        Notes
        -----
        Composite Gauss-Legendre quadrature (48 nodes per piece) over equal pieces of each
        stretch between the in-band zero and pole frequencies, so no piece has a zero or a
        resonance inside. The number of pieces starts at 16 per stretch and doubles until
        two successive values agree to 1e-13 relative (at most 1024 pieces).

        References
        ----------
        .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
           IEEE Press / Wiley, 2005, ch. 2 (in-band noise of a noise-shaped quantizer).
        """
        osr = _check_real("osr", osr, low=1.0, expected="a finite number >= 1")
        edge = 0.5 / osr
        marks = np.abs(np.angle(np.concatenate([self.zeros, self.poles]))) / (2 * np.pi)
        cuts = np.unique(np.concatenate([[0.0, edge], marks[(marks > 0) & (marks < edge)]]))
        pieces = 16
        value = self._gauss_legendre_power(cuts, pieces)
        while pieces < _MAX_PIECES:
            pieces *= 2
            finer = self._gauss_legendre_power(cuts, pieces)
            done = abs(finer - value) <= 1e-13 * abs(finer)
            value = finer
            if done:
                break
        # (1/pi) * integral over w = 2 pi f  ->  2 * integral over f.
        return 2.0 * value

    def _gauss_legendre_power(self, cuts, pieces):
        """Integral of |H|^2 df over [cuts[0], cuts[-1]], `pieces` equal parts per stretch."""
        total = 0.0
        for lo, hi in zip(cuts[:-1], cuts[1:], strict=True):
            edges = np.linspace(lo, hi, pieces + 1)
            mid = 0.5 * (edges[1:] + edges[:-1])[:, None]
            half = 0.5 * (edges[1:] - edges[:-1])[:, None]
            f = mid + half * _GL_NODES[None, :]
            total += float(np.sum(half * _GL_WEIGHTS[None, :] * np.abs(self.response(f)) ** 2))
        return total

    def predicted_sqnr_db(self, levels: int, osr: float, amplitude_dbfs: float = 0.0) -> float:
        """Signal-to-quantization-noise ratio in the band, from the linear white-noise model.

        Parameters
        ----------
        levels : int
            Quantizer levels (2 = single bit), evenly spaced over [-1, 1], so the step is
            Delta = 2 / (levels - 1).
        osr : float
            Oversampling ratio (>= 1); the band is 0..0.5/osr.
        amplitude_dbfs : float
            Sine amplitude in dBFS (<= 0); 0 dBFS is a sine of peak 1.0.

        Returns
        -------
        float
            10 log10(signal power / in-band noise power) in dB, with signal power A^2/2 and
            noise power (Delta^2/12) * :meth:`in_band_noise_gain`.

        Notes
        -----
        The model treats the quantization error as white and independent of the input. It
        ignores overload: high-order single-bit loops become unstable well below 0 dBFS, so
        their real peak SQNR is lower.

        References
        ----------
        .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
           IEEE Press / Wiley, 2005, ch. 2 and 4 (peak SQNR of an ideal modulator).
        """
        levels = _check_int("levels", levels, low=2, high=None, expected="an integer >= 2")
        amplitude_dbfs = _check_real(
            "amplitude_dbfs", amplitude_dbfs, high=0.0, expected="a finite number <= 0"
        )
        amplitude = 10.0 ** (amplitude_dbfs / 20.0)
        step = 2.0 / (levels - 1)
        noise = step**2 / 12.0 * self.in_band_noise_gain(osr)
        return 10.0 * math.log10(0.5 * amplitude**2 / noise)

    def zero_frequencies(self, *, osr: float | None = None) -> np.ndarray:
        """Frequencies of the zeros on or above the real axis, ascending.

        Parameters
        ----------
        osr : float, optional
            When given, the frequencies are divided by the band edge 0.5/osr, so 1.0 is the
            band edge (the normalization of the published optimal-zero tables).

        Returns
        -------
        ndarray
            One value per real zero and per conjugate pair, in cycles per sample (or in
            band-edge units when ``osr`` is given).
        """
        upper = self.zeros[self.zeros.imag >= 0]
        freqs = np.sort(np.abs(np.angle(upper))) / (2 * np.pi)
        if osr is None:
            return freqs
        osr = _check_real("osr", osr, low=1.0, expected="a finite number >= 1")
        return freqs / (0.5 / osr)

    def to_dict(self) -> dict:
        """A JSON- and TOML-friendly description: complex values as ``[real, imag]`` pairs.

        Returns
        -------
        dict
            Keys ``order``, ``zeros``, ``poles``, ``gain`` and, for designed NTFs, ``osr``,
            ``max_gain``, ``optimized``. :func:`NoiseTransfer.from_dict` reads it back.
        """
        out = {
            "order": self.order,
            "zeros": [[float(v.real), float(v.imag)] for v in self.zeros],
            "poles": [[float(v.real), float(v.imag)] for v in self.poles],
            "gain": self.gain,
        }
        for key in ("osr", "max_gain", "optimized"):
            value = getattr(self, key)
            if value is not None:
                out[key] = value
        return out

    @classmethod
    def from_dict(cls, data: dict) -> NoiseTransfer:
        """Rebuild an NTF from :meth:`to_dict` output, checking it like user input.

        Parameters
        ----------
        data : dict
            Must hold ``zeros`` and ``poles`` (lists of ``[real, imag]`` pairs or of real
            numbers); may hold ``gain``, ``order`` (checked against the pole count), ``osr``,
            ``max_gain`` and ``optimized``.

        Raises
        ------
        ParameterError
            On a missing or unknown key, a malformed value, or an NTF that fails the checks
            of :func:`ntf_from_zeros_poles`.
        """
        if not isinstance(data, dict):
            raise ParameterError("data", type(data).__name__, "a dict from NoiseTransfer.to_dict")
        allowed = {"order", "zeros", "poles", "gain", "osr", "max_gain", "optimized"}
        unknown = sorted(set(data) - allowed)
        if unknown:
            raise ParameterError("data", unknown[0], f"keys among {sorted(allowed)}")
        for key in ("zeros", "poles"):
            if key not in data:
                raise ParameterError(key, None, "a list of [real, imag] pairs (key missing)")
        zeros = _complex_list(data["zeros"], "zeros")
        poles = _complex_list(data["poles"], "poles")
        ntf = ntf_from_zeros_poles(zeros, poles, gain=data.get("gain", 1.0))
        if "order" in data and data["order"] != ntf.order:
            raise ParameterError("order", data["order"], f"{ntf.order}, the number of poles")
        extra = {}
        if data.get("osr") is not None:
            extra["osr"] = _check_real("osr", data["osr"], low=1.0, expected="a number >= 1")
        if data.get("max_gain") is not None:
            extra["max_gain"] = _check_real(
                "max_gain", data["max_gain"], low=1.0, low_open=True, expected="a number > 1"
            )
        if data.get("optimized") is not None:
            if not isinstance(data["optimized"], bool):
                raise ParameterError("optimized", data["optimized"], "true or false")
            extra["optimized"] = data["optimized"]
        return cls(ntf.zeros, ntf.poles, ntf.gain, **extra)


# ---------------------------------------------------------------------------------------------
# validation helpers


def _check_int(name, value, *, low, high, expected):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise ParameterError(name, value, expected)
    value = int(value)
    if value < low or (high is not None and value > high):
        raise ParameterError(name, value, expected)
    return value


def _check_real(name, value, *, low=None, high=None, expected, low_open=False):
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ParameterError(name, value, expected)
    value = float(value)
    if not math.isfinite(value):
        raise ParameterError(name, value, expected)
    if low is not None and (value < low or (low_open and value == low)):
        raise ParameterError(name, value, expected)
    if high is not None and value > high:
        raise ParameterError(name, value, expected)
    return value


def _complex_list(values, name):
    """Read a list of real numbers or [real, imag] pairs into a complex array."""
    expected = "a list of numbers or [real, imag] pairs"
    if not isinstance(values, list | tuple | np.ndarray):
        raise ParameterError(name, values, expected)
    out = []
    for v in values:
        if isinstance(v, list | tuple) and len(v) == 2:
            re, im = v
        else:
            re, im = v, 0.0
        for part in (re, im):
            if isinstance(part, bool) or not isinstance(part, numbers.Real):
                raise ParameterError(name, v, expected)
        out.append(complex(float(re), float(im)))
    return np.array(out, dtype=complex)


def _as_roots(values, name):
    try:
        arr = np.asarray(values, dtype=complex)
    except (TypeError, ValueError):
        raise ParameterError(name, values, "a 1-D sequence of complex numbers") from None
    if arr.ndim != 1:
        raise ParameterError(name, values, "a 1-D sequence of complex numbers")
    if not np.all(np.isfinite(arr)):
        raise ParameterError(name, arr.tolist(), "finite values (no NaN or infinity)")
    return arr


def _canonical(roots):
    """Roots in a fixed order: by angle magnitude, then radius; the upper member of a pair first."""
    roots = np.asarray(roots, dtype=complex)
    key = np.lexsort((roots.imag < 0, np.abs(roots), np.round(np.abs(np.angle(roots)), 12)))
    return roots[key]


def _symmetrize(roots, name):
    """Return roots as exact conjugate pairs, or raise if they are not conjugate-symmetric."""
    scale = max(1.0, float(np.max(np.abs(roots)))) if len(roots) else 1.0
    tol = _SYMMETRY_RTOL * scale
    real = roots[np.abs(roots.imag) <= tol].real
    upper = list(roots[roots.imag > tol])
    lower = list(roots[roots.imag < -tol])
    pairs = []
    for u in upper:
        j = int(np.argmin([abs(u - np.conj(w)) for w in lower])) if lower else -1
        if j < 0 or abs(u - np.conj(lower[j])) > tol:
            raise ParameterError(
                name, roots.tolist(), "complex values in conjugate pairs (real coefficients)"
            )
        w = lower.pop(j)
        pairs.append(0.5 * (u + np.conj(w)))
    if lower:
        raise ParameterError(
            name, roots.tolist(), "complex values in conjugate pairs (real coefficients)"
        )
    out = [complex(r) for r in real]
    for p in pairs:
        out += [p, np.conj(p)]
    return _canonical(out)


# ---------------------------------------------------------------------------------------------
# public constructors


def ntf_from_zeros_poles(zeros, poles, gain: float = 1.0) -> NoiseTransfer:
    """Check a user-given NTF and wrap it as a :class:`NoiseTransfer`.

    Parameters
    ----------
    zeros, poles : array_like of complex
        Roots in the z-plane, as many zeros as poles (1 to 8 of each). Complex roots must come
        in conjugate pairs (to 1e-9 relative; they are then made exactly conjugate).
    gain : float
        The zpk gain. A causal delta-sigma loop needs NTF(z -> inf) = gain = 1.

    Returns
    -------
    NoiseTransfer
        With ``osr``, ``max_gain`` and ``optimized`` left as None.

    Raises
    ------
    ParameterError
        Non-finite or non-1-D roots; unequal counts or an order outside 1..8 (the NTF would
        not be causal with NTF(inf) = 1, or not realizable here); gain != 1; a pole on or
        outside the unit circle; roots not in conjugate pairs.
    """
    zeros = _as_roots(zeros, "zeros")
    poles = _as_roots(poles, "poles")
    if len(poles) < MIN_ORDER or len(poles) > MAX_ORDER:
        raise ParameterError(
            "poles", poles.tolist(), f"between {MIN_ORDER} and {MAX_ORDER} poles (the order)"
        )
    if len(zeros) != len(poles):
        raise ParameterError(
            "zeros",
            zeros.tolist(),
            f"exactly {len(poles)} zeros, as many as poles (causal, NTF(inf) = 1)",
        )
    gain = _check_real("gain", gain, expected="1.0 (a causal loop has NTF(inf) = 1)")
    if abs(gain - 1.0) > 1e-12:
        raise ParameterError("gain", gain, "1.0 (a causal loop has NTF(inf) = 1)")
    radius = np.abs(poles)
    if np.any(radius >= 1.0):
        bad = poles[np.argmax(radius)]
        raise ParameterError(
            "poles", complex(bad), "all poles strictly inside the unit circle (|p| < 1)"
        )
    zeros = _symmetrize(zeros, "zeros")
    poles = _symmetrize(poles, "poles")
    return NoiseTransfer(zeros, poles, 1.0)


def optimal_zero_positions(order: int) -> np.ndarray:
    """Optimal NTF zero frequencies for a given order, in units of the band edge.

    Minimizing the in-band integral of prod(w^2 - w_i^2) over the band (the small-angle form
    of the in-band noise power) gives the roots of the Legendre polynomial of the order.

    Parameters
    ----------
    order : int
        Loop order, 1..8.

    Returns
    -------
    ndarray
        ceil(order/2) non-negative values in [0, 1), ascending; odd orders include 0 (a zero
        at DC).

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE Press / Wiley, 2005, ch. 4 (optimal NTF zeros).
    """
    order = _check_int(
        "order", order, low=MIN_ORDER, high=MAX_ORDER, expected="an integer from 1 to 8"
    )
    roots = legendre.legroots([0] * order + [1])
    positive = np.sort(roots[roots > 1e-12].real)
    return np.concatenate([[0.0], positive]) if order % 2 else positive


def _zeros_for(order, osr, optimize_zeros):
    if not optimize_zeros:
        return np.ones(order, dtype=complex)
    pos = optimal_zero_positions(order) * np.pi / osr  # radians per sample
    zeros = []
    for w in pos:
        if w == 0.0:
            zeros.append(1.0 + 0j)
        else:
            z = complex(math.cos(w), math.sin(w))
            zeros += [z, z.conjugate()]
    return np.array(zeros, dtype=complex)


def _butterworth_highpass_poles(order, t):
    """Poles of a digital Butterworth high-pass of the order, pre-warped cutoff t = tan(wc/2).

    The analog prototype poles p_k = exp(j pi (2k + N + 1) / (2N)) become high-pass poles
    Omega_c / p_k, and the bilinear transform z = (1 + s/2) / (1 - s/2) with Omega_c = 2 t
    maps them to z_k = (p_k + t) / (p_k - t).
    """
    k = np.arange(order)
    proto = np.exp(1j * np.pi * (2 * k + order + 1) / (2 * order))
    upper = proto[proto.imag > 1e-12]
    out = [(p + t) / (p - t) for p in upper]
    poles = []
    for z in out:
        poles += [z, np.conj(z)]
    if order % 2:
        poles.append(complex((t - 1.0) / (-1.0 - t)))  # p = -1 (the real prototype pole)
    return np.array(poles, dtype=complex)


def design_ntf(
    order: int, osr: float, *, max_gain: float = 1.5, optimize_zeros: bool = True
) -> NoiseTransfer:
    """Design a low-pass-band NTF with a bounded peak gain.

    Parameters
    ----------
    order : int
        Loop order, 1..8.
    osr : float
        Oversampling ratio, 4..1024; the signal band is 0..0.5/osr.
    max_gain : float
        Peak gain max |NTF(e^{jw})| of the result (> 1). Lee's rule: about 1.5 for a
        single-bit quantizer (common practice), larger for multi-bit ones.
    optimize_zeros : bool
        Spread the zeros over the band at the optimal positions (True) or put them all at
        DC (False).

    Returns
    -------
    NoiseTransfer
        Causal (NTF(inf) = 1), with ``osr``, ``max_gain`` and ``optimized`` recorded.

    Raises
    ------
    ParameterError
        Order outside 1..8, OSR outside 4..1024, max_gain <= 1, or a max_gain this pole
        family cannot reach for the order and OSR (the message gives the reachable range).

    Notes
    -----
    Zeros: all at z = 1, or at exp(+-j x_i pi/osr) with x_i the roots of the Legendre
    polynomial of the order (odd orders keep one zero at DC) [1]_.

    Poles: the poles of a digital Butterworth (maximally flat) high-pass of the order, whose
    pre-warped cutoff t = tan(w_c/2) is searched so that the peak gain equals ``max_gain``
    [2]_. The search scans t downward on a logarithmic grid from a high cutoff (poles near
    z = -1, large gain) and brackets the first crossing; Brent's method then solves it to
    about 1e-12 in gain. Starting from the high end picks the branch whose poles lie well
    outside the band; with optimized zeros the peak gain rises again at very low cutoffs
    (poles close to the in-band zeros).

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE Press / Wiley, 2005, ch. 4 (NTF design, optimal zeros).
    .. [2] K. C.-H. Chao, S. Nadeem, W. L. Lee and C. G. Sodini, "A higher order topology for
       interpolative modulators for oversampling A/D converters", IEEE Trans. Circuits Syst.
       37(3), 1990 (peak NTF gain bound).
    """
    order = _check_int(
        "order", order, low=MIN_ORDER, high=MAX_ORDER, expected="an integer from 1 to 8"
    )
    osr = _check_real(
        "osr", osr, low=MIN_OSR, high=MAX_OSR, expected=f"a number from {MIN_OSR} to {MAX_OSR}"
    )
    max_gain = _check_real(
        "max_gain", max_gain, low=1.0, low_open=True, expected="a finite number > 1"
    )
    if not isinstance(optimize_zeros, bool | np.bool_):
        raise ParameterError("optimize_zeros", optimize_zeros, "True or False")
    zeros = _zeros_for(order, osr, bool(optimize_zeros))

    def excess(log_t, refine=True):
        ntf = NoiseTransfer(zeros, _butterworth_highpass_poles(order, math.exp(log_t)))
        return ntf.peak(refine=refine)[0] - max_gain

    # Scan downward with the cheap grid maximum (a lower bound of the peak), then confirm the
    # bracket with refined peaks before solving.
    grid = np.linspace(math.log(_T_HIGH), math.log(_T_LOW), _T_STEPS)
    prev_x, prev_v = grid[0], excess(grid[0])
    if prev_v < 0:
        raise ParameterError(
            "max_gain",
            max_gain,
            f"at most {prev_v + max_gain:.6g} for order {order} with this pole family",
        )
    lowest = prev_v
    refined = False
    for x in grid[1:]:
        v = excess(x, refine=refined)
        if v <= 0 and not refined:
            v = excess(x)  # confirm with the refined peak; keep refining from here on
            refined = True
        lowest = min(lowest, v)
        if v <= 0:
            if v == 0:
                log_t = x
            else:
                log_t = optimize.brentq(excess, x, prev_x, xtol=1e-14, rtol=1e-15, maxiter=200)
            poles = _canonical(_butterworth_highpass_poles(order, math.exp(log_t)))
            return NoiseTransfer(
                _canonical(zeros),
                poles,
                1.0,
                osr=osr,
                max_gain=max_gain,
                optimized=bool(optimize_zeros),
            )
        prev_x, prev_v = x, v
    raise ParameterError(
        "max_gain",
        max_gain,
        f"more than {lowest + max_gain:.6g}, the lowest peak gain reachable for order {order} "
        f"at OSR {osr:g} with {'optimized zeros' if optimize_zeros else 'zeros at DC'}",
    )
