"""Noise transfer functions (NTFs) of delta-sigma loops: design and evaluation.

An NTF is kept as zeros and poles in the z-plane. A causal loop has NTF(z -> inf) = 1, so
numerator and denominator are both monic in z and the zpk gain is 1.

Two ways to get one:

- :meth:`NoiseTransfer.designed` designs a low-pass-band NTF from an order, an oversampling
  ratio and a bound on the out-of-band gain (Lee's rule). Zeros sit at DC or spread over the
  band at the optimal positions (roots of the Legendre polynomial of the order, scaled to the
  band edge); the poles are a maximally flat (Butterworth-type) high-pass set whose cutoff is
  searched so that the largest gain equals the bound.
- :meth:`NoiseTransfer.from_roots` checks a user's zeros and poles (causal, stable, real
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

from audiodsm.errors import ParameterError
from audiodsm.limits import DESIGN_OSR_RANGE, ORDER_RANGE, ZERO_LAYOUTS

__all__ = ["NoiseTransfer"]

MIN_ORDER, MAX_ORDER = ORDER_RANGE
MIN_OSR, MAX_OSR = DESIGN_OSR_RANGE
_ORDER_EXPECTED = f"an integer from {MIN_ORDER} to {MAX_ORDER}"
_LAYOUT_EXPECTED = " or ".join(repr(v) for v in ZERO_LAYOUTS)

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

    Build one with :meth:`designed` or :meth:`from_roots`; constructing it directly skips
    the checks those make.

    Parameters
    ----------
    zeros, poles : array_like of complex
        Same count (the loop order); complex values come in conjugate pairs.
    gain : float
        The zpk gain; 1.0 for a causal loop (H(inf) = 1).
    osr : float or None
        Oversampling ratio the design was made for (None for a user NTF).
    out_of_band_gain_target : float or None
        Out-of-band gain the design was asked for (None for a user NTF).
    zero_layout : str or None
        ``"spread"`` (zeros at the optimal in-band positions) or ``"dc"`` (all at DC) for a
        design; None for a user NTF.
    zero_band_edge : float or None
        Band edge (cycles per sample) the spread zeros were placed for; None for a user NTF.

    Notes
    -----
    The arrays are stored read-only. Equality is identity (``eq=False``), so instances are
    hashable and never compare arrays element-wise by accident.
    """

    zeros: np.ndarray
    poles: np.ndarray
    gain: float = 1.0
    osr: float | None = None
    out_of_band_gain_target: float | None = None
    zero_layout: str | None = None
    zero_band_edge: float | None = None

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

    def largest_gain(self, *, refine: bool = True) -> tuple[float, float]:
        """Largest magnitude of the response over 0..0.5 and the frequency where it occurs.

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

        References
        ----------
        .. [1] R. P. Brent, "Algorithms for Minimization without Derivatives", Prentice-Hall,
           1973, ch. 5 (the bounded one-dimensional search, as in
           :func:`scipy.optimize.minimize_scalar`).
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
        from scipy import optimize  # imported where a refined peak is asked for

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

    def out_of_band_gain(self) -> float:
        """Largest magnitude max |H(e^{jw})| over the whole band 0..0.5 (linear).

        For a noise-shaping NTF this maximum lies out of band; Lee's rule bounds it. See
        :meth:`largest_gain` for the method; it also returns the frequency.

        References
        ----------
        .. [1] K. C.-H. Chao, S. Nadeem, W. L. Lee and C. G. Sodini, "A higher order topology
           for interpolative modulators for oversampling A/D converters", IEEE Trans. Circuits
           Syst. 37(3), 1990 (the bound on the NTF's out-of-band gain).
        """
        return self.largest_gain()[0]

    def in_band_noise_fraction(self, osr: float) -> float:
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

    def linear_sqnr_db(
        self, *, levels: int, osr: float, level_dbfs: float = 0.0, dither_lsb: float = 0.0
    ) -> float:
        """Signal-to-quantization-noise ratio in the band, from the linear white-noise model.

        Parameters
        ----------
        levels : int
            Quantizer levels (2 = single bit), evenly spaced over [-1, 1], so the step is
            Delta = 2 / (levels - 1).
        osr : float
            Oversampling ratio (>= 1); the band is 0..0.5/osr.
        level_dbfs : float
            Sine level in dBFS (<= 0); 0 dBFS is a sine of peak 1.0.
        dither_lsb : float
            Peak of the TPDF dither added before the quantizer, in steps (>= 0). TPDF dither of
            peak ``D`` steps has power ``(D Delta)^2 / 6`` [2]_ and enters the loop where the
            quantization error does, so the NTF shapes it alike: ``D = 1`` (2 LSB
            peak-to-peak) adds Delta^2/6 to Delta^2/12, 10 log10(3) = 4.77 dB more noise.

        Returns
        -------
        float
            10 log10(signal power / in-band noise power) in dB, with signal power A^2/2 and
            noise power (Delta^2/12 + (D Delta)^2/6) * :meth:`in_band_noise_fraction`.

        Notes
        -----
        The model treats the quantization error as white and independent of the input. It
        ignores overload: high-order single-bit loops become unstable well below 0 dBFS, so
        their real peak SQNR is lower.

        References
        ----------
        .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
           IEEE Press / Wiley, 2005, ch. 2 and 4 (peak SQNR of an ideal modulator).
        .. [2] S. P. Lipshitz, R. A. Wannamaker and J. Vanderkooy, "Quantization and dither: a
           theoretical survey", J. Audio Eng. Soc. 40(5), 1992 (TPDF dither power).
        """
        levels = _check_int("levels", levels, low=2, high=None, expected="an integer >= 2")
        level_dbfs = _check_real(
            "level_dbfs", level_dbfs, high=0.0, expected="a finite number <= 0"
        )
        dither_lsb = _check_real("dither_lsb", dither_lsb, low=0.0, expected="a finite number >= 0")
        amplitude = 10.0 ** (level_dbfs / 20.0)
        step = 2.0 / (levels - 1)
        error_power = step**2 / 12.0 + (dither_lsb * step) ** 2 / 6.0
        noise = error_power * self.in_band_noise_fraction(osr)
        return 10.0 * math.log10(0.5 * amplitude**2 / noise)

    def notch_frequencies(self, *, osr: float | None = None) -> np.ndarray:
        """Frequencies of the zeros (the noise notches) on or above the real axis, ascending.

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

        References
        ----------
        .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
           IEEE Press / Wiley, 2005, ch. 4 (zero positions normalized to the band edge).
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
            ``out_of_band_gain_target``, ``zero_layout``, ``zero_band_edge``. :meth:`from_dict`
            reads it back.
        """
        out = {
            "order": self.order,
            "zeros": [[float(v.real), float(v.imag)] for v in self.zeros],
            "poles": [[float(v.real), float(v.imag)] for v in self.poles],
            "gain": self.gain,
        }
        for key in ("osr", "out_of_band_gain_target", "zero_layout", "zero_band_edge"):
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
            ``out_of_band_gain_target``, ``zero_layout`` and ``zero_band_edge``.

        Raises
        ------
        ParameterError
            On a missing or unknown key, a malformed value, or an NTF that fails the checks
            of :meth:`from_roots`.
        """
        if not isinstance(data, dict):
            raise ParameterError("data", type(data).__name__, "a dict from NoiseTransfer.to_dict")
        allowed = {
            "order",
            "zeros",
            "poles",
            "gain",
            "osr",
            "out_of_band_gain_target",
            "zero_layout",
            "zero_band_edge",
        }
        unknown = sorted(set(data) - allowed)
        if unknown:
            raise ParameterError("data", unknown[0], f"keys among {sorted(allowed)}")
        for key in ("zeros", "poles"):
            if key not in data:
                raise ParameterError(key, None, "a list of [real, imag] pairs (key missing)")
        zeros = _complex_list(data["zeros"], "zeros")
        poles = _complex_list(data["poles"], "poles")
        ntf = cls.from_roots(zeros=zeros, poles=poles, gain=data.get("gain", 1.0))
        if "order" in data and data["order"] != ntf.order:
            raise ParameterError("order", data["order"], f"{ntf.order}, the number of poles")
        extra = {}
        if data.get("osr") is not None:
            extra["osr"] = _check_real("osr", data["osr"], low=1.0, expected="a number >= 1")
        target = data.get("out_of_band_gain_target")
        if target is not None:
            extra["out_of_band_gain_target"] = _check_real(
                "out_of_band_gain_target", target, low=1.0, low_open=True, expected="a number > 1"
            )
        layout = data.get("zero_layout")
        if layout is not None:
            if layout not in ZERO_LAYOUTS:
                raise ParameterError("zero_layout", layout, _LAYOUT_EXPECTED)
            extra["zero_layout"] = layout
        edge = data.get("zero_band_edge")
        if edge is not None:
            extra["zero_band_edge"] = _check_real(
                "zero_band_edge", edge, low=0.0, low_open=True, high=0.5, expected="0 < edge <= 0.5"
            )
        return cls(ntf.zeros, ntf.poles, ntf.gain, **extra)

    # -----------------------------------------------------------------------------------------
    # constructors

    @classmethod
    def from_roots(cls, *, zeros, poles, gain: float = 1.0) -> NoiseTransfer:
        """Check a user-given NTF and wrap it as a :class:`NoiseTransfer`.

        Parameters
        ----------
        zeros, poles : array_like of complex, keyword-only
            Roots in the z-plane, as many zeros as poles (1 to 8 of each). Complex roots must
            come in conjugate pairs (to 1e-9 relative; they are then made exactly conjugate).
        gain : float, keyword-only
            The zpk gain. A causal delta-sigma loop needs NTF(z -> inf) = gain = 1.

        Returns
        -------
        NoiseTransfer
            With ``osr``, ``out_of_band_gain_target`` and ``zero_layout`` left as None.

        Raises
        ------
        ParameterError
            Non-finite or non-1-D roots; unequal counts or an order outside 1..8 (the NTF would
            not be causal with NTF(inf) = 1, or not realizable here); gain != 1; a pole on or
            outside the unit circle; roots not in conjugate pairs.

        References
        ----------
        .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
           IEEE Press / Wiley, 2005, ch. 4 (realizability: a causal loop has NTF(inf) = 1).
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
        return cls(zeros, poles, 1.0)

    @staticmethod
    def spread_zero_fractions(order: int) -> np.ndarray:
        """Optimal in-band NTF zero frequencies for an order, as fractions of the band edge.

        Minimizing the in-band integral of prod(w^2 - w_i^2) over the band (the small-angle
        form of the in-band noise power) gives the roots of the Legendre polynomial of the
        order.

        Parameters
        ----------
        order : int
            Loop order, 1..8.

        Returns
        -------
        ndarray
            ceil(order/2) non-negative values in [0, 1), ascending; odd orders include 0 (a
            zero at DC).

        References
        ----------
        .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
           IEEE Press / Wiley, 2005, ch. 4 (optimal NTF zeros).
        """
        order = _check_int("order", order, low=MIN_ORDER, high=MAX_ORDER, expected=_ORDER_EXPECTED)
        roots = legendre.legroots([0] * order + [1])
        positive = np.sort(roots[roots > 1e-12].real)
        return np.concatenate([[0.0], positive]) if order % 2 else positive

    @classmethod
    def designed(
        cls,
        order: int,
        *,
        osr: float,
        out_of_band_gain: float = 1.5,
        zero_layout: str = "spread",
        zero_band_edge: float | None = None,
    ) -> NoiseTransfer:
        """Design a low-pass-band NTF with a bounded out-of-band gain.

        Parameters
        ----------
        order : int
            Loop order, 1..8.
        osr : float, keyword-only
            Oversampling ratio, 4..1024; the signal band is 0..0.5/osr.
        out_of_band_gain : float, keyword-only
            Largest gain max |NTF(e^{jw})| of the result (> 1). Lee's rule: about 1.5 for a
            single-bit quantizer (common practice), larger for multi-bit ones.
        zero_layout : {"spread", "dc"}, keyword-only
            Spread the zeros over the band at the optimal positions (``"spread"``, see
            :meth:`spread_zero_fractions`) or put them all at DC (``"dc"``).
        zero_band_edge : float, keyword-only
            Edge of the band the spread zeros are optimized over, in cycles per sample, at most
            the signal band edge 0.5/osr (the default). A product judged over 0..20 kHz whose
            modulator runs faster than 40 kHz x osr gives the 20 kHz edge here, so no zero pair
            lands above the band it is judged in. Ignored for ``zero_layout="dc"``.

        Returns
        -------
        NoiseTransfer
            Causal (NTF(inf) = 1), with ``osr``, ``out_of_band_gain_target``,
            ``zero_layout`` and ``zero_band_edge`` recorded.

        Raises
        ------
        ParameterError
            Order outside 1..8, OSR outside 4..1024, out_of_band_gain <= 1, an unknown
            zero_layout, a zero_band_edge outside (0, 0.5/osr], or a gain this pole family
            cannot reach for the order and OSR (the message gives the reachable range).

        Notes
        -----
        Zeros: all at z = 1, or at exp(+-j 2 pi x_i f_b) (f_b the zero band edge, 0.5/osr by
        default) with x_i the roots of the Legendre
        polynomial of the order (odd orders keep one zero at DC) [1]_.

        Poles: the poles of a digital Butterworth (maximally flat) high-pass of the order,
        whose pre-warped cutoff t = tan(w_c/2) is searched so that the largest gain equals
        ``out_of_band_gain`` [2]_. The search scans t downward on a logarithmic grid from a
        high cutoff (poles near z = -1, large gain) and brackets the first crossing; Brent's
        method then solves it to about 1e-12 in gain. Starting from the high end picks the
        branch whose poles lie well outside the band; with spread zeros the largest gain rises
        again at very low cutoffs (poles close to the in-band zeros).

        References
        ----------
        .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
           IEEE Press / Wiley, 2005, ch. 4 (NTF design, optimal zeros).
        .. [2] K. C.-H. Chao, S. Nadeem, W. L. Lee and C. G. Sodini, "A higher order topology
           for interpolative modulators for oversampling A/D converters", IEEE Trans. Circuits
           Syst. 37(3), 1990 (bound on the out-of-band NTF gain).
        """
        order = _check_int("order", order, low=MIN_ORDER, high=MAX_ORDER, expected=_ORDER_EXPECTED)
        osr = _check_real(
            "osr", osr, low=MIN_OSR, high=MAX_OSR, expected=f"a number from {MIN_OSR} to {MAX_OSR}"
        )
        target = _check_real(
            "out_of_band_gain",
            out_of_band_gain,
            low=1.0,
            low_open=True,
            expected="a finite number > 1",
        )
        if not isinstance(zero_layout, str) or zero_layout not in ZERO_LAYOUTS:
            raise ParameterError("zero_layout", zero_layout, _LAYOUT_EXPECTED)
        edge = None
        if zero_band_edge is not None and zero_band_edge != 0.5 / osr:
            edge = _check_real(
                "zero_band_edge",
                zero_band_edge,
                low=0.0,
                low_open=True,
                high=0.5 / osr,
                expected=f"a frequency above 0 and at most 0.5/osr = {0.5 / osr:.6g} cycles/sample",
            )
        zeros = _zeros_for(order, osr, zero_layout, edge)

        def excess(log_t, refine=True):
            ntf = cls(zeros, _butterworth_highpass_poles(order, math.exp(log_t)))
            return ntf.largest_gain(refine=refine)[0] - target

        # Scan downward with the cheap grid maximum (a lower bound of the largest gain), then
        # confirm the bracket with refined values before solving.
        grid = np.linspace(math.log(_T_HIGH), math.log(_T_LOW), _T_STEPS)
        prev_x, prev_v = grid[0], excess(grid[0])
        if prev_v < 0:
            raise ParameterError(
                "out_of_band_gain",
                target,
                f"at most {prev_v + target:.6g} for order {order} with this pole family",
            )
        lowest = prev_v
        refined = False
        for x in grid[1:]:
            v = excess(x, refine=refined)
            if v <= 0 and not refined:
                v = excess(x)  # confirm with the refined value; keep refining from here on
                refined = True
            lowest = min(lowest, v)
            if v <= 0:
                if v == 0:
                    log_t = x
                else:
                    from scipy import optimize  # imported where a design needs it

                    log_t = optimize.brentq(excess, x, prev_x, xtol=1e-14, rtol=1e-15, maxiter=200)
                poles = _canonical(_butterworth_highpass_poles(order, math.exp(log_t)))
                return cls(
                    _canonical(zeros),
                    poles,
                    1.0,
                    osr=osr,
                    out_of_band_gain_target=target,
                    zero_layout=zero_layout,
                    zero_band_edge=0.5 / osr if edge is None else edge,
                )
            prev_x, prev_v = x, v
        placement = "zeros spread over the band" if zero_layout == "spread" else "zeros at DC"
        raise ParameterError(
            "out_of_band_gain",
            target,
            f"more than {lowest + target:.6g}, the lowest out-of-band gain reachable for order "
            f"{order} at OSR {osr:g} with {placement}",
        )


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
# design helpers


def _zeros_for(order, osr, zero_layout, edge=None):
    """Zeros at DC, or at the Legendre roots scaled to the band edge (cycles/sample).

    ``edge`` None is the signal band edge 0.5/osr (computed as pi/osr radians, as always).
    """
    if zero_layout == "dc":
        return np.ones(order, dtype=complex)
    edge_rad = np.pi / osr if edge is None else 2.0 * np.pi * edge
    pos = NoiseTransfer.spread_zero_fractions(order) * edge_rad  # radians per sample
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
