"""Map a noise transfer function onto a loop of integrators: coefficients, state space, scaling.

Three loop structures are offered (``STRUCTURES``). All three are built from the same chain of
delaying integrators, ``x[0] -> x[1] -> ... -> x[n-1]``, with one integrator per real NTF zero
and a resonator pair of integrators per complex-conjugate zero pair. The structures differ in
where the quantizer output ``v`` re-enters and what drives the quantizer:

``"feedback"``
    ``v`` is fed back to every integrator with its own coefficient ``a[i]``; the quantizer
    reads the last integrator, ``y = x[n-1]``; the input enters the first integrator with gain
    ``b[0]``.
``"feedforward"``
    ``v`` is subtracted at the first integrator only; the quantizer reads a weighted sum of all
    integrator states, ``y = sum(c[i] * x[i])``; the input enters the first integrator. With
    the input feed-in (``input_feed_in=True``) the input also goes straight to the quantizer,
    ``y = u + sum(c[i] * x[i])``, and enters the first integrator with the same weight as the
    fed-back ``v``, so the first integrator integrates ``u - v``: the signal transfer is exactly
    1 and the integrators carry only shaped quantization noise, not the signal (the
    "low-distortion" feedforward loop).
``"error-feedback"``
    The input goes straight to the quantizer, ``y = u + x[n-1]``; the quantization error
    ``e = v - y`` drives the chain through the combination ``t = x[n-1] + e`` (which equals
    ``v - u``), distributed with coefficients ``a[i]``. The signal transfer is exactly 1.

One update rule serves every structure (the compiled kernels and their tests follow it
operation for operation). With ``w`` the fed-back quantity (``v``, or ``t`` for error
feedback), states are updated from the last one down to the first::

    x[i] <- ((d[i] * x[i] + k[i] * x[i-1]) - a[i] * w) - g[i] * x_new[i+1]     (i >= 1)
    x[0] <- ((d[0] * x[0] + b[0] * u)      - a[0] * w) - g[0] * x_new[1]

``d`` is the integrator leak (1 for an ideal integrator), ``k`` the gain from the previous
integrator (1 before scaling), ``g`` the resonator coefficient, non-zero only on the upstream
integrator of a resonator pair, which reads the *updated* downstream state (a lossless
discrete integrator pair, so the pair's poles lie exactly on the unit circle when ``d = 1``).
The open-loop matrix is then block lower-triangular: its eigenvalues, the NTF zeros, are set by
``d``, ``g`` and ``k`` alone. The remaining coefficients (``a`` for feedback and error
feedback, ``c`` for feedforward) enter the closed-loop characteristic polynomial affinely, so
they follow from one small linear solve that matches it to the NTF denominator exactly.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from audiodsm.design.ntf import NoiseTransfer
from audiodsm.errors import ParameterError

__all__ = ["STRUCTURES", "LinearLoop", "LoopRealization"]

STRUCTURES = ("feedback", "feedforward", "error-feedback")


@dataclass(frozen=True, eq=False)
class LinearLoop:
    """The linearized loop, quantizer replaced by additive noise ``e``: ``v = y + e``.

    ``x[n+1] = transition @ x[n] + input_entry * u[n] + feedback_entry * v[n]`` and
    ``y[n] = quantizer_tap @ x[n] + input_direct * u[n]``.

    Attributes
    ----------
    transition : ndarray, shape (n, n)
        Open-loop state-transition matrix of the loop filter.
    input_entry, feedback_entry : ndarray, shape (n,)
        How the input ``u`` and the quantizer output ``v`` enter the states.
    quantizer_tap : ndarray, shape (n,)
        Quantizer-input weights on the states.
    input_direct : float
        Direct path from ``u`` to the quantizer input.

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE Press / Wiley, 2005, ch. 2 and 4 (the linear model: quantizer as additive noise;
       state-space description of the loop filter).
    """

    transition: np.ndarray
    input_entry: np.ndarray
    feedback_entry: np.ndarray
    quantizer_tap: np.ndarray
    input_direct: float

    def closed_transition(self) -> np.ndarray:
        """Transition matrix with the loop closed through the quantizer.

        ``transition + feedback_entry quantizer_tap^T``; its eigenvalues are the NTF poles.
        """
        return self.transition + np.outer(self.feedback_entry, self.quantizer_tap)

    def noise_response(self, freq: np.ndarray) -> np.ndarray:
        """NTF from ``e`` to ``v``, ``1 + c (zI - A_cl)^-1 feedback_entry``, at ``freq``.

        ``c`` is ``quantizer_tap`` and ``A_cl`` the :meth:`closed_transition`.
        """
        return self._response(freq, self.feedback_entry, 1.0)

    def signal_response(self, freq: np.ndarray) -> np.ndarray:
        """STF from ``u`` to ``v``, ``c (zI - A_cl)^-1 b + input_direct``, at ``freq``.

        ``b = input_entry + feedback_entry * input_direct``: closing the loop also routes the
        direct path through the fed-back quantizer output.
        """
        b = self.input_entry + self.feedback_entry * self.input_direct
        return self._response(freq, b, self.input_direct)

    def _response(self, freq, b, direct):
        freq = np.atleast_1d(np.asarray(freq, dtype=float))
        acl = self.closed_transition()
        eye = np.eye(len(self.quantizer_tap))
        out = np.empty(freq.shape, dtype=complex)
        for idx, f in np.ndenumerate(freq):
            z = np.exp(2j * np.pi * f)
            out[idx] = direct + self.quantizer_tap @ np.linalg.solve(z * eye - acl, b)
        return out


@dataclass(frozen=True, eq=False)
class LoopRealization:
    """Coefficients of a loop that realizes a given NTF in one of ``STRUCTURES``.

    All coefficient arrays have one entry per integrator (length ``order``), in chain order
    from the input side. See the module docstring for the update rule they belong to.

    Attributes
    ----------
    ntf : NoiseTransfer
        The design this loop realizes.
    structure : str
        One of ``STRUCTURES``.
    leak : ndarray
        ``d``: integrator leak, 1.0 for an ideal integrator (zero at DC or on the unit circle).
    chain_gain : ndarray
        ``k``: gain from the previous integrator (``k[0]`` unused, kept at 0).
    resonator : ndarray
        ``g``: resonator feedback on the upstream integrator of each pair, 0 elsewhere.
    feedback : ndarray
        ``a``: how the fed-back quantity enters each integrator.
    input_gain : ndarray
        ``b``: how the input enters each integrator (only ``b[0]`` is ever non-zero).
    output_weight : ndarray
        ``c``: quantizer-input weights (``c = (0, ..., 0, 1)`` for feedback and error feedback).
    direct_input : float
        Input straight to the quantizer: 1.0 for error feedback and for a feedforward loop
        with the input feed-in, else 0.0.
    state_scale : ndarray
        Factor each state was divided by in scaling (all ones when unscaled).
    """

    ntf: NoiseTransfer
    structure: str
    leak: np.ndarray
    chain_gain: np.ndarray
    resonator: np.ndarray
    feedback: np.ndarray
    input_gain: np.ndarray
    output_weight: np.ndarray
    direct_input: float
    state_scale: np.ndarray

    @property
    def order(self) -> int:
        """Number of integrators (the NTF order)."""
        return len(self.leak)

    def linearized(self) -> LinearLoop:
        """The linearized loop (quantizer as additive noise) as a :class:`LinearLoop`.

        Built by applying the update rule to unit vectors, so it describes exactly the
        arithmetic the kernels perform.
        """
        n = self.order
        a = np.empty((n, n))
        for j in range(n):
            a[:, j] = self._step(np.eye(n)[j], 0.0, 0.0)
        if self.structure == "error-feedback":
            # the chain is driven by t = v - u
            b_feedback = self._step(np.zeros(n), 0.0, 1.0)
            b_input = -b_feedback
        else:
            b_feedback = self._step(np.zeros(n), 0.0, 1.0)
            b_input = self._step(np.zeros(n), 1.0, 0.0)
        return LinearLoop(
            transition=a,
            input_entry=b_input,
            feedback_entry=b_feedback,
            quantizer_tap=self.output_weight.copy(),
            input_direct=float(self.direct_input),
        )

    def _step(self, x: np.ndarray, u: float, w: float) -> np.ndarray:
        """One update of the linear state recursion (float64, same order as the kernels)."""
        d, k, g, a, b = self.leak, self.chain_gain, self.resonator, self.feedback, self.input_gain
        new = np.array(x, dtype=float)
        n = len(new)
        for i in range(n - 1, -1, -1):
            prev = k[i] * x[i - 1] if i > 0 else b[0] * u
            acc = (d[i] * x[i] + prev) - a[i] * w
            if i + 1 < n:
                acc = acc - g[i] * new[i + 1]
            new[i] = acc
        return new

    def realized_zeros(self) -> np.ndarray:
        """NTF zeros computed from the integrator and resonator coefficients.

        A single integrator has its zero at ``d``; a resonator pair (upstream ``p``, downstream
        ``q = p + 1``) has characteristic polynomial ``z^2 - (2d - m) z + d^2`` with
        ``m = g[p] * k[q]``, whose roots are ``d - m/2 +- j sqrt(m (d - m/4))``.
        """
        zeros = []
        i = 0
        n = self.order
        while i < n:
            if i + 1 < n and self.resonator[i] != 0.0:
                d = self.leak[i]
                m = self.resonator[i] * self.chain_gain[i + 1]
                disc = m * (d - m / 4.0)
                if disc >= 0:
                    im = np.sqrt(disc)
                    zeros += [complex(d - m / 2.0, im), complex(d - m / 2.0, -im)]
                else:
                    re = np.sqrt(-disc)
                    zeros += [d - m / 2.0 + re, d - m / 2.0 - re]
                i += 2
            else:
                zeros.append(complex(self.leak[i]))
                i += 1
        return np.array(zeros, dtype=complex)

    def realized_ntf(self) -> NoiseTransfer:
        """The NTF this loop realizes, computed back from its own coefficients.

        Zeros come from :meth:`realized_zeros` (closed form, so zeros at DC stay exactly at
        ``z = 1``); poles are the eigenvalues of the closed-loop transition matrix of
        :meth:`linearized`.
        """
        acl = self.linearized().closed_transition()
        # eigenvalues of A_cl - I, shifted back: the poles crowd near z = 1, and this keeps
        # their distance to 1 (which sets the in-band gain) accurate
        poles = np.linalg.eigvals(acl - np.eye(self.order)) + 1.0
        return NoiseTransfer(zeros=self.realized_zeros(), poles=poles.astype(complex))

    def rescaled(
        self,
        state_peaks,
        *,
        peak_target: float = 1.0,
        powers_of_two: bool = False,
        include_quantizer_state: bool = False,
    ) -> LoopRealization:
        """Return the loop with each state divided so that its peak becomes ``peak_target``.

        A diagonal similarity transform ``x_s = x / s`` with ``s = state_peaks / peak_target``:
        the NTF and the STF are unchanged. The state read by the quantizer in the feedback and
        error-feedback structures (the last one) is not scaled, since the quantizer fixes its
        size, unless ``include_quantizer_state`` asks for it in a feedback loop.

        Parameters
        ----------
        state_peaks : array_like, shape (order,)
            Observed peak magnitude of every state (as they are in this realization).
        peak_target : float, keyword-only
            The peak each state should have after scaling.
        powers_of_two : bool, keyword-only
            Round every factor up to a power of two,
            ``s = 2**ceil(log2(state_peaks / peak_target))``, so each peak lands in
            ``(peak_target/2, peak_target]``. Multiplying or dividing by a power of two
            is exact in binary floating point (barring overflow and subnormals), and it
            commutes with the rounding of every product and sum of the loop, so the scaled
            loop computes exactly the unscaled states divided by ``s``: its output is the same,
            bit for bit. It is also what a fixed-point loop does with shifts. Without it the
            factors are exact ratios, the peaks land on ``peak_target``, and rounding differs in
            the last bits (a single-bit loop's output can then part from the unscaled one when
            a quantizer input falls within rounding of zero).
        include_quantizer_state : bool, keyword-only
            Scale the quantizer-facing (last) state of a feedback loop too; ``output_weight``
            then carries the factor, so the quantizer input is ``c[-1] * x_s[-1]``. Only a
            single-bit quantizer can run such a loop (its decision is a sign, blind to a
            positive factor; :class:`~audiodsm.stages.modulator.Modulator` refuses more
            levels). Ignored for feedforward loops (their states are all scaled anyway); an
            error-feedback loop cannot have it (its quantizer adds the input to that state).

        Returns
        -------
        LoopRealization
            The scaled loop; ``state_scale`` accumulates the factors.

        References
        ----------
        IEEE Std 754-2019, *Standard for Floating-Point Arithmetic*, clause 4.3 (every
        operation is the exactly rounded result; scaling by a power of two within range is
        exact, so it commutes with rounding). Clause number from memory.
        """
        peaks = np.asarray(state_peaks, dtype=float)
        if peaks.shape != (self.order,) or not np.all(np.isfinite(peaks)) or np.any(peaks <= 0):
            raise ParameterError(
                "state_peaks",
                peaks.tolist(),
                f"{self.order} finite positive numbers, one per state",
            )
        if not (np.isfinite(peak_target) and peak_target > 0):
            raise ParameterError("peak_target", peak_target, "a finite positive number")
        if include_quantizer_state and self.structure == "error-feedback":
            raise ParameterError(
                "include_quantizer_state",
                True,
                "False for an error-feedback loop (or a feedback loop)",
            )
        s = peaks / peak_target
        if powers_of_two:
            s = np.exp2(np.ceil(np.log2(s)))
        if self.structure == "error-feedback" or (
            self.structure == "feedback" and not include_quantizer_state
        ):
            s[-1] = 1.0
        n = self.order
        k = self.chain_gain.copy()
        g = self.resonator.copy()
        for i in range(1, n):
            k[i] = k[i] * s[i - 1] / s[i]
        for i in range(n - 1):
            g[i] = g[i] * s[i + 1] / s[i]
        return replace(
            self,
            chain_gain=k,
            resonator=g,
            feedback=self.feedback / s,
            input_gain=self.input_gain / s,
            output_weight=self.output_weight * s,
            state_scale=self.state_scale * s,
        )

    @property
    def input_feed_in(self) -> bool:
        """True for a feedforward loop whose input also goes straight to the quantizer."""
        return self.structure == "feedforward" and self.direct_input != 0.0

    @classmethod
    def for_ntf(
        cls, ntf: NoiseTransfer, *, structure: str = "feedback", input_feed_in: bool = False
    ) -> LoopRealization:
        """Compute the coefficients of a loop that realizes ``ntf`` exactly.

        Parameters
        ----------
        ntf : NoiseTransfer
            The noise transfer function (order 1..8, causal, poles inside the unit circle).
        structure : str, keyword-only
            One of ``STRUCTURES``: ``"feedback"``, ``"feedforward"`` or ``"error-feedback"``.
        input_feed_in : bool, keyword-only
            Feedforward only: feed the input straight to the quantizer as well
            (``direct_input = 1``, ``input_gain[0] = feedback[0]``), so the signal transfer is
            1 at every frequency and no integrator carries the signal.

        Returns
        -------
        LoopRealization
            Unscaled coefficients. The signal transfer at DC is exactly 1 (the input gain is solved
            for it); for ``"error-feedback"`` and a feedforward loop with the input feed-in the
            signal transfer is 1 at every frequency.

        Notes
        -----
        The zeros fix the open-loop blocks: a real zero ``r`` gives an integrator with leak ``r``;
        a pair ``r exp(+-j theta)`` gives a resonator pair with leak ``r`` and coefficient
        ``g = 4 r sin^2(theta/2)`` (``= 2 r (1 - cos theta)``, written to keep precision for small
        ``theta``). Pairs come first in the chain (lowest frequency first) and real zeros last, so
        that in the feedback structure the quantizer reads a plain integrator. The free
        coefficients then solve ``charpoly(A + b_feedback c^T) = prod(z - poles)``, matched in
        powers of ``z - 1``: a square linear system, since a rank-one update changes the
        determinant affinely.

        References
        ----------
        R. Schreier and G. C. Temes, *Understanding Delta-Sigma Data Converters*, IEEE Press /
        Wiley, 2005, ch. 4 (loop filters with distributed feedback or distributed feedforward and
        resonators; chapter number from memory). The coefficient solve itself is derived here from
        the matrix determinant lemma, not taken from the book.
        """
        if structure not in STRUCTURES:
            raise ParameterError("structure", structure, f"one of {', '.join(STRUCTURES)}")
        if not isinstance(input_feed_in, bool) or (input_feed_in and structure != "feedforward"):
            raise ParameterError(
                "input_feed_in", input_feed_in, "True only with structure 'feedforward', or False"
            )
        if not isinstance(ntf, NoiseTransfer):
            raise ParameterError("ntf", type(ntf).__name__, "a NoiseTransfer")
        n = ntf.order
        if not 1 <= n <= 8 or len(ntf.zeros) != n:
            raise ParameterError(
                "ntf.order", n, "an NTF of order 1 to 8 with as many zeros as poles"
            )
        if abs(ntf.gain - 1.0) > 1e-12:
            raise ParameterError("ntf.gain", ntf.gain, "1.0 (a causal loop has NTF(inf) = 1)")
        poles = np.asarray(ntf.poles, dtype=complex)
        if np.any(np.abs(poles) >= 1.0):
            raise ParameterError("ntf.poles", poles.tolist(), "poles inside the unit circle")

        pairs, reals = _group_zeros(ntf.zeros)
        leak = np.zeros(n)
        k = np.ones(n)
        k[0] = 0.0
        g = np.zeros(n)
        i = 0
        for z, _ in pairs:
            r = abs(z)
            theta = abs(np.angle(z))
            leak[i] = leak[i + 1] = r
            g[i] = 4.0 * r * np.sin(theta / 2.0) ** 2
            i += 2
        for r in reals:
            leak[i] = r
            i += 1

        zeros_b = np.zeros(n)
        base = cls(
            ntf=ntf,
            structure=structure,
            leak=leak,
            chain_gain=k,
            resonator=g,
            feedback=zeros_b.copy(),
            input_gain=zeros_b.copy(),
            output_weight=zeros_b.copy(),
            direct_input=1.0 if structure == "error-feedback" else 0.0,
            state_scale=np.ones(n),
        )
        if structure == "feedforward":
            base = replace(base, feedback=np.eye(n)[0], input_gain=np.eye(n)[0])

            def with_unknowns(vec):
                return replace(base, output_weight=np.asarray(vec, dtype=float))
        else:
            base = replace(base, output_weight=np.eye(n)[n - 1])

            def with_unknowns(vec):
                return replace(base, feedback=np.asarray(vec, dtype=float))

        # Match in powers of (z - 1) rather than z: the loop's poles and zeros crowd around z = 1,
        # where the monomial coefficients cancel badly (the in-band gain, set by prod(1 - poles),
        # would carry a relative error near 1e-7 at order 8).
        target = np.real(np.poly(poles - 1.0))  # monic in w = z - 1, highest power first
        eye = np.eye(n)

        radius = float(np.clip(np.max(np.abs(poles - 1.0)), 0.05, 1.0))

        def shifted_charpoly(vec):
            return _charpoly(with_unknowns(vec).linearized().closed_transition() - eye, radius)

        p0 = shifted_charpoly(np.zeros(n))
        cols = []
        for j in range(n):
            pj = shifted_charpoly(eye[j])
            cols.append(pj[1:] - p0[1:])
        unknowns = np.linalg.solve(np.array(cols).T, target[1:] - p0[1:])
        loop = with_unknowns(unknowns)

        if input_feed_in:
            # x[0] integrates b0 u - a0 v with b0 = a0 = 1: the input cancels the signal part of
            # v, so the states see only shaped noise and v = u + (noise), STF = 1 exactly.
            return replace(loop, direct_input=1.0)
        if structure != "error-feedback":
            if structure == "feedback":
                loop = replace(loop, input_gain=np.eye(n)[0])
            stf_dc = loop.linearized().signal_response(np.array([0.0]))[0].real
            if not np.isfinite(stf_dc) or abs(stf_dc) < 1e-300:
                raise ParameterError(
                    "ntf", "signal transfer 0 at DC", "an NTF this loop can realize"
                )
            loop = replace(loop, input_gain=loop.input_gain / stf_dc)
        return loop


def _charpoly(m: np.ndarray, radius: float = 1.0) -> np.ndarray:
    """Coefficients of det(zI - m), highest power first, by sampling on a circle.

    ``det`` is evaluated (LU) at N > n points z = radius * exp(2j pi j / N) and the polynomial
    recovered with a DFT; this avoids computing eigenvalues of near-defective matrices (a chain
    of ideal integrators has one eigenvalue 1 of multiplicity n). A circle about as wide as the
    eigenvalue cloud keeps the sampled values, and so their rounding, small.
    """
    n = m.shape[0]
    npts = 2 * n + 2
    z = radius * np.exp(2j * np.pi * np.arange(npts) / npts)
    vals = np.array([np.linalg.det(zz * np.eye(n) - m) for zz in z])
    coef = np.fft.fft(vals) / npts / radius ** np.arange(npts)  # coef[k]: coefficient of z^k
    return np.real(coef[: n + 1])[::-1]


def _group_zeros(zeros: np.ndarray) -> tuple[list[tuple[complex, complex]], list[float]]:
    """Split NTF zeros into conjugate pairs and real zeros."""
    zeros = np.asarray(zeros, dtype=complex)
    tol = 1e-9
    real = sorted(float(z.real) for z in zeros if abs(z.imag) <= tol * max(1.0, abs(z)))
    upper = sorted((z for z in zeros if z.imag > tol * max(1.0, abs(z))), key=lambda z: np.angle(z))
    lower = [z for z in zeros if z.imag < -tol * max(1.0, abs(z))]
    if len(upper) != len(lower):
        raise ParameterError("ntf.zeros", zeros.tolist(), "real values or conjugate pairs")
    for zu in upper:
        j = int(np.argmin([abs(zl - np.conj(zu)) for zl in lower]))
        if abs(lower[j] - np.conj(zu)) > 1e-9 * max(1.0, abs(zu)):
            raise ParameterError("ntf.zeros", zeros.tolist(), "real values or conjugate pairs")
        lower.pop(j)
    return [(z, np.conj(z)) for z in upper], real
