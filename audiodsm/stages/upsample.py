"""The interpolation chain: audio at its own rate up to the modulator rate (OSR x rate).

Polyphase half-band FIR stages, the first one carrying the sharp transition band and the later
ones relaxed, a short droop-compensation FIR, then a cheap final stage (sinc^k, linear or hold)
as real DACs build it. The listening decimator, which brings the modulator-rate signal back
down, is :mod:`audiodsm.stages.downsample`; the half-band design both use is in
:mod:`audiodsm.stages.rate_common`.

The :class:`Upsampler` is a streaming object with ``process(x, state=None) -> (y, state)``;
every output sample is summed in a fixed order that does not depend on block boundaries, so
block-wise output equals one-shot output bit for bit. The per-sample loops live in
:mod:`audiodsm.stages._rate_kernels`.
"""

from __future__ import annotations

import functools
import warnings
from dataclasses import dataclass

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
    fir_response,
    refrozen,
)

__all__ = [
    "AUDIO_RATES_HZ",
    "OVERSAMPLING_RATIOS",
    "FINAL_STAGES",
    "UpsamplerDesign",
    "design_upsampler",
    "Upsampler",
    "UpsamplerState",
]

#: Audio rates the interpolation chain accepts, in Hz.
AUDIO_RATES_HZ = (44100.0, 48000.0, 88200.0, 96000.0, 176400.0, 192000.0)
#: Oversampling ratios the interpolation chain reaches.
OVERSAMPLING_RATIOS = (16, 32, 64, 128, 256, 512)
#: Kinds of final interpolation stage.
FINAL_STAGES = ("sinc", "linear", "hold")

# Frequency grid used to check a design: this many points per input-rate interval (fewer,
# down to a quarter, at high OSR so that the whole grid stays near this many points).
_UP_GRID_PER_FS = 4096
_UP_GRID_POINTS = 2**20
_SINC_ORDERS = tuple(range(2, 9))


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
            total *= fir_response(h, freq, 2**j * self.rate_hz)
        total *= fir_response(self.compensator_taps, freq, 2 * self.rate_hz)
        total *= fir_response(self.final_taps / self.final_ratio, freq, self.output_rate_hz)
        return total


def _check_choice(name, value, allowed):
    if value not in allowed:
        raise ParameterError(name, value, "one of " + ", ".join(repr(a) for a in allowed))


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
    # remembered in this process and on disk (audiodsm/disk_cache.py): a later run reads the
    # design back without importing scipy.signal
    from audiodsm import disk_cache

    return refrozen(
        disk_cache.remembered(
            "upsampler-design",
            (
                rate,
                osr,
                pe,
                ripple,
                se,
                atten,
                final_stage,
                sinc_order,
                n_hb,
            ),
            lambda: _design_upsampler_fresh(
                rate, osr, pe, ripple, se, atten, final_stage, sinc_order, n_hb
            ),
            sources=DESIGN_SOURCES,
            valid=lambda d: isinstance(d, UpsamplerDesign),
        )
    )


def _design_upsampler_fresh(rate, osr, pe, ripple, se, atten, final_stage, sinc_order, n_hb):
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
            _rate_kernels.interpolate_cascade(
                frames.T, kinds, ratios, taps, tables, lengths, held, result.T, rest
            )
            new_hist = [_frozen(rest[s, :, : st[2]].copy()) for s, st in enumerate(self._stages)]
        else:
            new_hist = list(state.histories)
        new_state = UpsamplerState(histories=tuple(new_hist), channels=channels, ndim=ndim)
        return _to_frames(result, ndim), new_state
