"""What the interpolation chain and the listening decimator share.

Half-band FIR design (both converters are mostly half-band stages), the split of an FIR into
polyphase tables, the checks of numeric options, and the streaming plumbing: a signal in as
(n, channels) frames and back in the caller's layout, frozen state arrays. The converters
themselves are :mod:`audiodsm.stages.upsample` and :mod:`audiodsm.stages.downsample`.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from audiodsm.errors import ParameterError

# scipy.signal and scipy.optimize are imported inside the design functions only: a chain whose
# designs are read back from the disk cache (audiodsm/disk_cache.py) never imports them (about
# a second of CPU for scipy.signal alone).

#: The modules whose code computes the rate converters' designs (stamp of their disk-cache
#: entries, relative to the package folder).
DESIGN_SOURCES = ("stages/rate_common.py", "stages/upsample.py", "stages/downsample.py")

# Each half-band or anti-alias stage is designed this much beyond the asked attenuation, so
# that the product of stages (and the compensator's small gain) still meets it.
_DESIGN_MARGIN_DB = 3.0
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
    from scipy import signal

    n = np.arange(n_taps) - (two_k - 1)
    h = 0.5 * np.sinc(n / 2.0) * signal.windows.kaiser(n_taps, beta)
    return 2.0 * h[0::2]


def _halfband_minimax(two_k: int, pass_frac: float) -> np.ndarray | None:
    """Dense-phase taps of the minimax (Chebyshev) half-band of length 4K - 1, or None.

    Solved as a linear programme on a grid of the dense phase's passband: minimise d subject
    to ``|A(theta_i) - 1| <= d``, where A is the Type II amplitude of ``g``. (Rescaling the
    result to unity at DC would double its error; the DC gain stays 1 within ``d``.)
    """
    from scipy import optimize

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
    from scipy import signal

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
# Checks of numeric options
# ---------------------------------------------------------------------------------------------


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


def fir_response(taps, freq_hz, rate_hz) -> np.ndarray:
    """Complex response of the FIR ``taps`` at ``freq_hz`` for the sample rate ``rate_hz``.

    The numbers of ``scipy.signal.freqz(taps, worN=freq_hz, fs=rate_hz)[1]``, bit for bit
    (the same operations in the same order: Horner's rule in ``exp(-j w)``, divided by the
    denominator 1), with numpy alone, so that a chain built from cached designs does not import
    ``scipy.signal`` for its calibration.

    References
    ----------
    SciPy 1.17 ``scipy.signal.freqz`` for an array ``worN`` (``npp_polyval`` of the numerator
    and of the denominator at ``exp(-1j w)``); a test compares the two.
    """
    b = np.atleast_1d(np.asarray(taps, dtype=np.float64))
    w = np.atleast_1d(np.asarray(freq_hz, dtype=np.float64))
    w = 2 * np.pi * w / float(rate_hz)
    zm1 = np.exp(-1j * w)
    num = np.broadcast_to(np.asarray(b[-1], dtype=np.complex128), zm1.shape)
    for i in range(2, b.shape[0] + 1):
        num = b[-i] + num * zm1
    den = np.broadcast_to(np.asarray(1.0, dtype=np.complex128), zm1.shape)
    return num / den


def refrozen(design):
    """``design`` (a frozen dataclass read back from the disk cache) with read-only arrays.

    A pickled array comes back writable; the designs hand theirs out read-only.
    """
    for value in vars(design).values():
        for arr in value if isinstance(value, tuple) else (value,):
            if isinstance(arr, np.ndarray):
                arr.setflags(write=False)
    return design


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
