"""Counting decimators: count a stream's ones over a window, optionally in cascade.

The cheapest way to turn a single-bit stream back into numbers is a counter that adds up the
stream's ones and is read and cleared every N clocks: with N = 64 the result is a count of 0
to 64, a first-order sinc (moving-sum) decimator. Cascading K such sums before reading every
N-th value gives the sinc^K decimator that Hogenauer built from K integrators and K combs
(the "CIC" decimator of chips and test gear). Its response is::

    H(f) = [ sin(pi f N / fs) / (N sin(pi f / fs)) ]^K     (times a linear-phase delay)

* **Droop.** The response falls across the audio band: at 20 kHz with fs = 3.072 MHz and
  N = 64 (output 48 kHz), one stage loses 2.64 dB, three stages 7.92 dB.
* **Aliasing.** After decimation every band ``k fs/N ± f`` folds onto ``f``. The nulls of H
  sit exactly on ``k fs/N`` so the folded bands near them are attenuated, but the edges of
  each band (``k fs/N ± passband``) are only as far down as H there; noise shaped upwards
  by an L-th order loop needs K >= L + 1 for the folded noise not to rise (common practice;
  J. C. Candy, "Decimation for sigma delta modulation", IEEE Trans. Commun. 34(1), 1986,
  cited from memory).

Two ways to run the same filter:

* :meth:`CountingDecimator.count` is the bit-true register model: integer codes in, integer
  counts out, through K integrators and K combs whose registers are ``register_bits`` wide and
  wrap around. Hogenauer's bit growth is K log2 N bits: ``register_bits = input_bits +
  ceil(K log2 N)``.
* :meth:`CountingDecimator.process` takes a signal in full-scale units (any real values) and
  gives the window sums divided by N^K, so DC passes at unity. Each output is the weighted sum
  of its window (the cascade's integer impulse response), summed in one fixed order, so a
  stream cut into blocks gives the same bits as one call. For a ±1 stream the output is
  ``2 count / N^K - 1`` (``count`` the weighted number of ones), exactly for a power-of-two
  N (the sums are whole numbers below 2^53 and the division is by a power of two).

:func:`design_counting_downsampler` and :class:`CountingDownsampler` put a counting stage in
front of the clean listening decimator (:class:`~audiodsm.stages.downsample.Downsampler`) when
the modulator-to-listening ratio is larger than N; the chain uses them for
``listening.decimator = "counting"``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.stages import _counting_kernels
from audiodsm.stages.downsample import (
    Downsampler,
    DownsamplerDesign,
    DownsamplerState,
    _whole_hz,
    design_downsampler,
)
from audiodsm.stages.rate_common import (
    _as_frames,
    _check_state_channels,
    _frozen,
    _to_frames,
)

__all__ = [
    "MAX_COUNTING_STAGES",
    "MAX_COUNTING_LENGTH",
    "counting_response",
    "counting_taps",
    "CountingDecimator",
    "CountingState",
    "CountRegisters",
    "design_counting_downsampler",
    "CountingDownsamplerDesign",
    "CountingDownsampler",
    "CountingDownsamplerState",
]

#: Most cascaded counting stages (K).
MAX_COUNTING_STAGES = 6
#: Longest counting window (N).
MAX_COUNTING_LENGTH = 1024
#: Widest register the integer model runs (int64 arithmetic with room for one carry).
_MAX_REGISTER_BITS = 62
#: Grid points per folded band for the alias figure of a design.
_ALIAS_GRID = 257


def _check_int(name, value, low, high):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ParameterError(name, value, f"an integer from {low} to {high}")
    if not low <= int(value) <= high:
        raise ParameterError(name, value, f"an integer from {low} to {high}")
    return int(value)


def counting_response(freq_hz, *, rate_hz, length, stages=1) -> np.ndarray:
    """Complex response of a K-stage counting (sinc^K, CIC) filter before decimation.

    Parameters
    ----------
    freq_hz : array_like
        Frequencies in Hz.
    rate_hz : float, keyword-only
        Input (counting clock) rate.
    length : int, keyword-only
        Window length N (decimation ratio).
    stages : int, keyword-only
        Number of cascaded stages K.

    Returns
    -------
    numpy.ndarray
        ``[e^{-j pi f (N-1)/fs} sin(pi f N/fs) / (N sin(pi f/fs))]^K``: unity at DC, the
        linear-phase delay of K(N-1)/2 input samples included.

    References
    ----------
    .. [1] E. B. Hogenauer, "An economical class of digital filters for decimation and
       interpolation", IEEE Trans. ASSP 29(2), 1981, eq. (2) and (3) (the system function
       and its magnitude with differential delay 1).
    """
    n = _check_int("length", length, 1, MAX_COUNTING_LENGTH)
    k = _check_int("stages", stages, 1, MAX_COUNTING_STAGES)
    f = np.asarray(freq_hz, dtype=float)
    w = 2.0 * np.pi * f / float(rate_hz)
    from scipy import special

    # scipy's Dirichlet kernel: diric(w, N) = sin(N w / 2) / (N sin(w / 2))
    one = special.diric(w, n) * np.exp(-0.5j * w * (n - 1))
    return one**k


def counting_taps(length, stages=1) -> np.ndarray:
    """The integer impulse response of K cascaded N-sample counters.

    Parameters
    ----------
    length, stages : int
        N and K.

    Returns
    -------
    numpy.ndarray of int64
        The coefficients of ``(1 + z^-1 + ... + z^-(N-1))^K``: ``K (N - 1) + 1`` taps summing
        to ``N^K``.
    """
    n = _check_int("length", length, 1, MAX_COUNTING_LENGTH)
    k = _check_int("stages", stages, 1, MAX_COUNTING_STAGES)
    taps = np.ones(1, dtype=np.int64)
    box = np.ones(n, dtype=np.int64)
    for _ in range(k):
        taps = np.convolve(taps, box)
    return taps


@dataclass(frozen=True, eq=False)
class CountingState:
    """Streaming state of :meth:`CountingDecimator.process`.

    Attributes
    ----------
    history : numpy.ndarray
        The last ``K (N - 1)`` input samples, (channels, K (N - 1)).
    phase : int
        Input samples taken since the last output (0 .. N - 1).
    channels, ndim : int
        Layout of the stream.
    """

    history: np.ndarray
    phase: int
    channels: int
    ndim: int


@dataclass(frozen=True, eq=False)
class CountRegisters:
    """Streaming state of :meth:`CountingDecimator.count`: the hardware registers.

    Attributes
    ----------
    integrators : numpy.ndarray of int64
        The K integrator registers per channel, (channels, K), each modulo
        ``2**register_bits``.
    combs : numpy.ndarray of int64
        The K comb delay registers per channel, (channels, K).
    phase : int
        Input samples taken since the last output (0 .. N - 1).
    channels, ndim : int
        Layout of the stream.
    """

    integrators: np.ndarray
    combs: np.ndarray
    phase: int
    channels: int
    ndim: int


class CountingDecimator:
    """K cascaded counters of N samples, read every N-th sample.

    Parameters
    ----------
    length : int
        Window length N, 2 to :data:`MAX_COUNTING_LENGTH`; also the decimation ratio.
    stages : int, optional
        Number of cascaded counters K, 1 to :data:`MAX_COUNTING_STAGES`.
    input_bits : int, keyword-only, optional
        Width of the input codes for :meth:`count` (1 for a single-bit stream).

    Attributes
    ----------
    taps : numpy.ndarray of int64
        The cascade's impulse response (:func:`counting_taps`).
    max_count : int
        Largest count: ``N^K (2^input_bits - 1)``.
    bit_growth : int
        ``ceil(K log2 N)`` bits (exactly K log2 N for a power-of-two N).
    register_bits : int
        ``input_bits + bit_growth``: every register of :meth:`count` is this wide.
    delay_input_samples : float
        Group delay ``K (N - 1) / 2`` (linear phase).

    Notes
    -----
    Output ``j`` of a stream is the window that ends on input sample ``j N`` (the first
    output comes with the first input sample, the window before it being silence), so
    ``n`` input samples give ``ceil(n / N)`` outputs, like the listening decimator.

    References
    ----------
    .. [1] E. B. Hogenauer, "An economical class of digital filters for decimation and
       interpolation", IEEE Trans. ASSP 29(2), 1981 (structure, response, and the register
       growth ``B_max = ceil(K log2(R M) + B_in - 1)``, the MSB index of a register of
       ``B_in + K log2(R M)`` bits).
    """

    def __init__(self, length, stages=1, *, input_bits=1):
        self.length = _check_int("length", length, 2, MAX_COUNTING_LENGTH)
        self.stages = _check_int("stages", stages, 1, MAX_COUNTING_STAGES)
        self.input_bits = _check_int("input_bits", input_bits, 1, 32)
        self.taps = counting_taps(self.length, self.stages)
        self.taps.setflags(write=False)
        self._taps_float = self.taps.astype(np.float64)
        n, k = self.length, self.stages
        # smallest b with N^K <= 2^b: ceil(K log2 N) computed exactly on integers
        self.bit_growth = int((n**k - 1).bit_length())
        self.register_bits = self.input_bits + self.bit_growth
        self.max_count = n**k * (2**self.input_bits - 1)
        self.delay_input_samples = k * (n - 1) / 2.0
        self._scale = 1.0 / float(n**k)

    def response(self, freq_hz, *, rate_hz) -> np.ndarray:
        """Complex response at ``freq_hz`` for input at ``rate_hz`` (:func:`counting_response`)."""
        return counting_response(freq_hz, rate_hz=rate_hz, length=self.length, stages=self.stages)

    # -- the float path ------------------------------------------------------------------------

    def initial_state(self, channels: int = 1, *, ndim: int = 2) -> CountingState:
        """Silence before the stream, for :meth:`process`."""
        history = _frozen(np.zeros((channels, self.taps.size - 1)))
        return CountingState(history, self.length - 1, channels, ndim)

    def process(self, x, state: CountingState | None = None, *, check_finite: bool = True):
        """Count one block of a signal in full-scale units, normalized to unity DC gain.

        Parameters
        ----------
        x : array_like
            (n,) or (n, channels) at the counting clock rate.
        state : CountingState, optional
            From the previous call; None starts from silence.
        check_finite : bool, keyword-only
            Refuse NaN and Inf samples.

        Returns
        -------
        y : numpy.ndarray
            The window sums this block completes divided by ``N^K``, (m,) or (m, channels).
            For a stream of levels in [-1, 1] with ``M + 1`` evenly spaced levels (codes
            ``c = (level + 1) M / 2``) the output is ``2 count / (M N^K) - 1``, with
            ``count`` what :meth:`count` gives on the codes.
        state : CountingState
        """
        frames, ndim = _as_frames(x, check_finite=check_finite)
        channels = frames.shape[1]
        if state is None:
            state = self.initial_state(channels, ndim=ndim)
        elif not isinstance(state, CountingState) or state.history.shape[1] != self.taps.size - 1:
            raise ParameterError("state", type(state).__name__, "a CountingState of this decimator")
        else:
            _check_state_channels(state, channels, ndim)
        n = frames.shape[0]
        held = state.history.shape[1]
        buf = np.empty((channels, held + n))
        buf[:, :held] = state.history
        buf[:, held:] = frames.T
        n_out = (state.phase + n) // self.length
        out = np.empty((channels, n_out))
        if n_out:
            first = held + self.length - 1 - state.phase
            _counting_kernels.sum_windows(
                buf, self._taps_float, self.length, first, self._scale, out
            )
        new_state = CountingState(
            _frozen(buf[:, buf.shape[1] - held :]),
            (state.phase + n) % self.length,
            channels,
            ndim,
        )
        return _to_frames(np.ascontiguousarray(out.T), ndim), new_state

    # -- the integer register model ------------------------------------------------------------

    def initial_registers(self, channels: int = 1, *, ndim: int = 2) -> CountRegisters:
        """Cleared registers, for :meth:`count`."""
        zeros = np.zeros((channels, self.stages), dtype=np.int64)
        zeros.setflags(write=False)
        return CountRegisters(zeros, zeros, self.length - 1, channels, ndim)

    def count(self, codes, state: CountRegisters | None = None, *, register_bits=None):
        """Count integer codes through the integrator-comb registers (bit-true).

        Parameters
        ----------
        codes : array_like of int
            (n,) or (n, channels) codes from 0 to ``2**input_bits - 1`` (0/1: the stream's
            zeros and ones).
        state : CountRegisters, optional
            From the previous call; None starts with cleared registers.
        register_bits : int, keyword-only, optional
            Register width to model; default :attr:`register_bits`. A narrower register
            shows what overflow does (the counts come out modulo ``2**register_bits``).

        Returns
        -------
        counts : numpy.ndarray of int64
            (m,) or (m, channels), each from 0 to :attr:`max_count` (with the default width).
        state : CountRegisters

        Notes
        -----
        Cleared registers stand for code 0 before the stream, while :meth:`process` starts
        from level 0 (silence); the first K outputs of the two differ, the rest agree.
        """
        arr = np.asarray(codes)
        if arr.ndim not in (1, 2) or (arr.ndim == 2 and arr.shape[1] < 1):
            raise ParameterError(
                "codes", f"array of shape {arr.shape}", "shape (n,) or (n, channels)"
            )
        if arr.size and not np.issubdtype(arr.dtype, np.integer):
            raise ParameterError("codes", f"array of dtype {arr.dtype}", "integer codes")
        top = 2**self.input_bits - 1
        if arr.size and (int(arr.min()) < 0 or int(arr.max()) > top):
            raise ParameterError(
                "codes", f"codes from {int(arr.min())} to {int(arr.max())}", f"codes 0 to {top}"
            )
        bits = self.register_bits if register_bits is None else register_bits
        bits = _check_int("register_bits", bits, 1, _MAX_REGISTER_BITS)
        if self.register_bits > _MAX_REGISTER_BITS and register_bits is None:
            raise ParameterError(
                "register_bits",
                self.register_bits,
                f"at most {_MAX_REGISTER_BITS} (fewer stages, a shorter window, fewer input bits)",
            )
        ndim = arr.ndim
        frames = arr[:, None] if ndim == 1 else arr
        channels = frames.shape[1]
        if state is None:
            state = self.initial_registers(channels, ndim=ndim)
        elif not isinstance(state, CountRegisters) or state.integrators.shape[1] != self.stages:
            raise ParameterError("state", type(state).__name__, "CountRegisters of this decimator")
        else:
            _check_state_channels(state, channels, ndim)
        n = frames.shape[0]
        n_out = (state.phase + n) // self.length
        integrators = np.array(state.integrators, dtype=np.int64, copy=True)
        combs = np.array(state.combs, dtype=np.int64, copy=True)
        out = np.empty((channels, n_out), dtype=np.int64)
        block = np.ascontiguousarray(frames.T, dtype=np.int64)
        _counting_kernels.count_integrate_comb(
            block, self.stages, self.length, (1 << bits) - 1, state.phase, integrators, combs, out
        )
        integrators.setflags(write=False)
        combs.setflags(write=False)
        new_state = CountRegisters(
            integrators, combs, (state.phase + n) % self.length, channels, ndim
        )
        return _to_frames(np.ascontiguousarray(out.T), ndim), new_state


# ---------------------------------------------------------------------------------------------
# A counting stage in front of the listening decimator
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class CountingDownsamplerDesign:
    """A counting stage from ``rate_in_hz`` to ``rate_in_hz / N``, then the clean decimator.

    Attributes
    ----------
    rate_in_hz, rate_out_hz, passband_hz : float
        Rates and the band of interest 0..passband_hz.
    counter : CountingDecimator
        The counting stage.
    rest : DownsamplerDesign
        The half-band (and rational) decimator from the counted rate to ``rate_out_hz``
        (equal rates: it passes the counts through unchanged).
    droop_db : float
        Gain of the counting stage at ``passband_hz`` (negative: the sinc^K droop).
    alias_rejection_db : float
        Smallest attenuation, by the counting stage, of any input frequency that folds into
        0..passband_hz at the counted rate without belonging there (checked on a grid),
        or the rest's alias rejection when that is smaller.
    delay_seconds : float
        Group delay (both parts are linear phase).
    """

    rate_in_hz: float
    rate_out_hz: float
    passband_hz: float
    counter: CountingDecimator
    rest: DownsamplerDesign
    droop_db: float
    alias_rejection_db: float
    delay_seconds: float

    @property
    def counted_rate_hz(self) -> float:
        """Rate after the counting stage, ``rate_in_hz / N``."""
        return self.rate_in_hz / self.counter.length

    @property
    def delay_input_samples(self) -> float:
        """Group delay in input samples."""
        return self.delay_seconds * self.rate_in_hz

    @property
    def delay_output_samples(self) -> float:
        """Group delay in output samples."""
        return self.delay_seconds * self.rate_out_hz

    def response(self, freq_hz) -> np.ndarray:
        """Complex response of the direct path at ``freq_hz`` (below ``rate_out_hz / 2``)."""
        freq = np.atleast_1d(np.asarray(freq_hz, dtype=float))
        return self.counter.response(freq, rate_hz=self.rate_in_hz) * self.rest.response(freq)


def design_counting_downsampler(
    rate_in_hz,
    rate_out_hz,
    *,
    length=64,
    stages=1,
    passband_hz=20000.0,
) -> CountingDownsamplerDesign:
    """A counting decimator by N, followed by the listening decimator when more is needed.

    Parameters
    ----------
    rate_in_hz : float
        Modulator rate (whole hertz).
    rate_out_hz : float
        Listening rate, at most ``rate_in_hz / length``.
    length : int, keyword-only
        Counting window N; ``rate_in_hz`` must be a multiple of it.
    stages : int, keyword-only
        Cascaded counters K.
    passband_hz : float, keyword-only
        Band of interest (for the droop and alias figures, and the clean decimator after).

    Returns
    -------
    CountingDownsamplerDesign

    Raises
    ------
    ParameterError
        A window that does not divide the input rate, or one so long that the counted rate
        falls below the listening rate.

    Notes
    -----
    The counting stage is the point of the choice: it has the droop and aliasing of a cheap
    counting decoder, and nothing corrects them. The clean decimator after it (half-band
    stages and, for 44.1 kHz families, a rational stage; see
    :func:`~audiodsm.stages.upsample.design_downsampler`) only takes the counted rate on to
    the listening rate without adding aliases of its own in the passband. Both have unity
    gain at DC, so a count comes out in full-scale units (a ±1 stream: ``2 count / N^K - 1``).

    References
    ----------
    .. [1] E. B. Hogenauer, "An economical class of digital filters for decimation and
       interpolation", IEEE Trans. ASSP 29(2), 1981.
    """
    rin = _whole_hz("rate_in_hz", rate_in_hz)
    rout = _whole_hz("rate_out_hz", rate_out_hz)
    counter = CountingDecimator(length, stages)
    n = counter.length
    if rin % n:
        raise ParameterError("length", length, f"a divisor of the input rate {rin} Hz")
    mid = rin // n
    if mid < rout:
        raise ParameterError(
            "length",
            length,
            f"at most {rin // rout} (the counted rate {rin} Hz / N must reach {rout} Hz)",
        )
    rest = design_downsampler(mid, rout, passband_hz=passband_hz)
    pb = float(passband_hz)
    droop = float(20.0 * np.log10(abs(counter.response(np.array([pb]), rate_hz=rin)[0])))
    # everything at k*mid +- f (f in 0..passband, k = 1 .. N/2) folds onto f
    f = np.linspace(0.0, pb, _ALIAS_GRID)
    ks = np.arange(1, n // 2 + 1, dtype=float)[:, None] * mid
    folded = np.concatenate([(ks - f).ravel(), (ks + f).ravel()])
    folded = folded[folded <= rin / 2.0]
    worst = float(np.max(np.abs(counter.response(folded, rate_hz=rin))))
    rejection = float("inf") if worst == 0.0 else -20.0 * math.log10(worst)
    rejection = min(rejection, rest.alias_rejection_db)
    delay = counter.delay_input_samples / rin + rest.delay_seconds
    return CountingDownsamplerDesign(
        rate_in_hz=float(rin),
        rate_out_hz=float(rout),
        passband_hz=pb,
        counter=counter,
        rest=rest,
        droop_db=droop,
        alias_rejection_db=rejection,
        delay_seconds=float(delay),
    )


@dataclass(frozen=True, eq=False)
class CountingDownsamplerState:
    """Streaming state of a :class:`CountingDownsampler`: the two parts' states."""

    counter: CountingState
    rest: DownsamplerState


class CountingDownsampler:
    """Streaming counting decimator plus clean decimator, from a design.

    Parameters
    ----------
    design : CountingDownsamplerDesign
        From :func:`design_counting_downsampler`.
    """

    def __init__(self, design: CountingDownsamplerDesign):
        if not isinstance(design, CountingDownsamplerDesign):
            raise ParameterError("design", type(design).__name__, "a CountingDownsamplerDesign")
        self.design = design
        self._rest = Downsampler(design.rest)

    @property
    def delay_output_samples(self) -> float:
        """Group delay in output samples."""
        return self.design.delay_output_samples

    def process(self, x, state=None, *, check_finite: bool = True):
        """Decimate one block (same contract as :meth:`Downsampler.process`).

        Returns
        -------
        y : numpy.ndarray
            The output samples this block completes, (m,) or (m, channels).
        state : CountingDownsamplerState
        """
        if state is not None and not isinstance(state, CountingDownsamplerState):
            raise ParameterError("state", type(state).__name__, "a CountingDownsamplerState")
        counted, c_state = self.design.counter.process(
            x, None if state is None else state.counter, check_finite=check_finite
        )
        y, r_state = self._rest.process(
            counted, None if state is None else state.rest, check_finite=False
        )
        return y, CountingDownsamplerState(c_state, r_state)
