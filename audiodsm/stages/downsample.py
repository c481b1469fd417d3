"""The listening decimator: the modulator-rate signal back down to an audio rate.

The signal, with its large shaped noise above the audio band, goes through half-band
decimators and, when another rate is asked for, a final rational polyphase stage. The
interpolation chain that feeds the modulator is :mod:`audiodsm.stages.upsample`; the
half-band design both use is in :mod:`audiodsm.stages.rate_common`.

The :class:`Downsampler` is a streaming object with ``process(x, state=None) -> (y, state)``;
every output sample is summed in a fixed order that does not depend on block boundaries, so
block-wise output equals one-shot output bit for bit. The per-sample loops live in
:mod:`audiodsm.stages._rate_kernels`.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.stages import _rate_kernels
from audiodsm.stages.rate_common import (
    _DESIGN_MARGIN_DB,
    DESIGN_SOURCES,
    _as_frames,
    _check_range,
    _check_state_channels,
    _frozen,
    _halfband,
    _halfband_full,
    _phase_table,
    _to_frames,
    _with_history,
    fir_response,
    refrozen,
)

__all__ = [
    "DownsamplerDesign",
    "design_downsampler",
    "Downsampler",
    "DownsamplerState",
]

# Frequency-grid step for checking a decimator, at most this many hertz.
_DOWN_GRID_STEP_HZ = 25.0
_MAX_RATIONAL_UP = 1024
#: Attenuation the rational stage gives its images (dB). They are copies of the signal
#: itself, at k x its input rate +- f, and the decimation folds some of them into the audio
#: band, so they form an error floor proportional to the signal: at the 110 dB of the alias
#: spec a -1 dBFS tone from 44.1 kHz x 64 listened at 96 kHz read THD+N -122.8 dB (against
#: -244 dB for the plain half-band path to 44.1 kHz). 160 dB puts that floor below the
#: cleanest chains' own noise; a Kaiser window reaches it in double precision.
RATIONAL_IMAGE_ATTEN_DB = 160.0


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
            total *= fir_response(h, freq, self.rate_in_hz / 2**j)
        if self.rational_taps.size:
            fu = self.rational_up * self.rational_rate_hz
            total *= fir_response(self.rational_taps / self.rational_up, freq, fu)
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
    the stopband from min(rate_out, its input rate) - passband_hz and an attenuation of at least
    :data:`RATIONAL_IMAGE_ATTEN_DB` (its images are copies of the signal, folded in band by
    the decimation: a signal-proportional error floor unless they sit below the chain's
    noise). Each stage's DC gain is 1 within its ripple (a few parts in a million at the
    default spec).

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
    # remembered in this process and on disk (audiodsm/disk_cache.py): a later run reads the
    # design back without importing scipy.signal
    from audiodsm import disk_cache

    return refrozen(
        disk_cache.remembered(
            "downsampler-design",
            (
                rin,
                rout,
                pb,
                ripple,
                atten,
                n_hb,
                mid,
                up,
                down,
            ),
            lambda: _design_downsampler_fresh(rin, rout, pb, ripple, atten, n_hb, mid, up, down),
            sources=DESIGN_SOURCES,
            valid=lambda d: isinstance(d, DownsamplerDesign),
        )
    )


def _design_downsampler_fresh(rin, rout, pb, ripple, atten, n_hb, mid, up, down):
    from scipy import signal

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
    # the images are the signal's own copies: held to RATIONAL_IMAGE_ATTEN_DB, not just the
    # alias spec (which is about out-of-band noise)
    a_design = max(-20.0 * math.log10(max_error), RATIONAL_IMAGE_ATTEN_DB + _DESIGN_MARGIN_DB)
    design = None
    for extra_db in (0.0, 2.0, 4.0, 8.0, 12.0):
        numtaps, beta = signal.kaiserord(a_design + extra_db, (stop - pb) / (fu / 2.0))
        numtaps += 1 - numtaps % 2  # odd: integer delay at the design rate
        rat = up * signal.firwin(numtaps, (pb + stop) / 2.0, window=("kaiser", beta), fs=fu)
        design = _finish_downsampler(rin, rout, pb, ripple, atten, hbs, mid, up, down, rat)
        if design.meets_spec and _stopband_atten_db(rat / up, stop, fu) >= RATIONAL_IMAGE_ATTEN_DB:
            break
    return design


def _stopband_atten_db(taps, stop_hz, rate_hz):
    """Smallest attenuation of ``taps`` from ``stop_hz`` to ``rate_hz / 2`` (dB, FFT grid)."""
    n = 1 << max(16, int(math.ceil(math.log2(8 * taps.size))))
    mag = np.abs(np.fft.rfft(taps, n))
    freq = np.arange(mag.size) * (rate_hz / n)
    # the largest ripple sits right at the edge: look there on a grid 64 times finer
    near = stop_hz + np.linspace(0.0, 64.0 * rate_hz / n, 4097)
    edge = np.abs(np.exp(-2j * np.pi * np.outer(near / rate_hz, np.arange(taps.size))) @ taps)
    worst = max(float(np.max(mag[freq >= stop_hz])), float(np.max(edge)))
    return -20.0 * math.log10(worst)


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
        _rate_kernels.decimate_halfband_cascade(
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
                _rate_kernels.resample_rational(buf, table, lengths, next_time, down, out)
            next_time = next_time + n_out * down - n * up
            new_bufs.append(_frozen(buf[:, buf.shape[1] - held.shape[1] :]))
            cur = out
        new_state = DownsamplerState(
            buffers=tuple(new_bufs), next_time=int(next_time), channels=channels, ndim=ndim
        )
        if cur is None:  # equal rates: nothing to filter
            return _to_frames(frames.copy(), ndim), new_state
        return _to_frames(np.ascontiguousarray(cur.T), ndim), new_state
