"""Design search: the cheapest loops predicted to meet a dynamic-range target.

The prediction is the linear (white-noise) model of the loop: quantization noise of power
Delta^2/12 per sample, Delta = 2 / (levels - 1), shaped by the NTF, integrated over the audio
band (20 Hz .. 20 kHz), optionally weighted, and referred to the chain's input through the
chain's input scale (the headroom the chain gives the loop and its calibration divides out).
Dynamic range is full scale over that noise, as AES17 defines it with its -60 dBFS method.

Cost model (a rule of this project, stated so it can be argued with): the relative cost of a
loop is its clock rate in MHz times its quantizer levels times its order,
``cost = modulator_rate_MHz * levels * order``. Clock rate stands for power and timing margin,
levels for the number of DAC elements or PWM counter steps, order for the number of
integrators and coefficients.

The search enumerates order, OSR, levels and out-of-band NTF gain, designs each NTF with
:meth:`~audiodsm.design.ntf.NoiseTransfer.designed`, keeps the combinations predicted to meet
the target, and ranks them by cost. Single-bit loops are held to the out-of-band gain of Lee's
rule (1.5, common practice), and high-order single-bit loops are known to fall short of the
linear model, which is why the best few are confirmed by simulation (:func:`confirm_candidates`).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.limits import ORDER_RANGE, OSR_CHOICES, TARGET_DYNAMIC_RANGE_DB
from audiodsm.profile import ChainProfile

__all__ = [
    "AUDIO_BAND_HZ",
    "Candidate",
    "Confirmation",
    "loop_cost",
    "predicted_dynamic_range_db",
    "candidate_profile",
    "impulse_l1_norm",
    "search_designs",
    "confirm_candidates",
]

#: The measurement band of the prediction (AES17: 20 Hz high-pass, 20 kHz low-pass).
AUDIO_BAND_HZ = (20.0, 20000.0)

#: Search grid defaults.
DEFAULT_ORDERS = tuple(range(ORDER_RANGE[0], ORDER_RANGE[1] + 1))
DEFAULT_OSRS = OSR_CHOICES
DEFAULT_LEVELS = (2, 3, 5, 9, 17, 33)
DEFAULT_MULTIBIT_GAINS = (1.5, 2.0, 3.0)
#: Lee's rule, common practice for single-bit loops.
SINGLE_BIT_GAIN = 1.5

_DR_KEY = {
    "unweighted": "dynamic_range_db",
    "a": "dynamic_range_db_a",
    "ccir": "dynamic_range_db_ccir",
}


@dataclass(frozen=True)
class Candidate:
    """One loop of the search with its prediction and cost.

    Attributes
    ----------
    order, osr, levels : int
    out_of_band_gain : float
        Out-of-band NTF gain it was designed for.
    modulator_rate_hz : float
    input_scale : float
        Loop input for a full-scale chain input (the chain's automatic headroom).
    predicted_dynamic_range_db : float
        Linear-model dynamic range referred to the chain input, with the search's weighting.
    linear_sqnr_db : float
        Linear-model peak SQNR of the loop itself (0 dBFS sine at the loop, 20 kHz band).
    achieved_out_of_band_gain : float
        Out-of-band NTF gain the design reached.
    cost : float
        ``modulator_rate_MHz * levels * order``.
    """

    order: int
    osr: int
    levels: int
    out_of_band_gain: float
    modulator_rate_hz: float
    input_scale: float
    predicted_dynamic_range_db: float
    linear_sqnr_db: float
    achieved_out_of_band_gain: float
    cost: float


def loop_cost(order: int, levels: int, *, modulator_rate_hz: float) -> float:
    """Relative cost of a loop: clock rate in MHz x quantizer levels x order.

    Parameters
    ----------
    order : int
    levels : int
    modulator_rate_hz : float, keyword-only

    Returns
    -------
    float
    """
    return modulator_rate_hz / 1e6 * levels * order


def predicted_dynamic_range_db(
    ntf,
    levels: int,
    *,
    modulator_rate_hz: float,
    input_scale: float = 1.0,
    dither_lsb: float = 0.0,
    weighting: str = "unweighted",
    band_hz=AUDIO_BAND_HZ,
    points: int = 4001,
) -> float:
    """Linear-model dynamic range of a loop in a chain, in dB.

    Parameters
    ----------
    ntf : NoiseTransfer
    levels : int
        Quantizer levels; the step is ``Delta = 2 / (levels - 1)``.
    modulator_rate_hz : float, keyword-only
    input_scale : float, keyword-only
        Loop input for a full-scale chain input; the noise referred to the chain input is the
        loop's noise divided by it.
    dither_lsb : float, keyword-only
        Peak of the loop's TPDF dither in quantizer steps: it adds ``(D Delta)^2 / 6`` to the
        quantizer's ``Delta^2 / 12`` and is shaped by the NTF alike (Lipshitz, Wannamaker &
        Vanderkooy, JAES 40(5), 1992).
    weighting : {"unweighted", "a", "ccir"}, keyword-only
    band_hz : (float, float), keyword-only
        Measurement band.
    points : int, keyword-only
        Simpson-rule points over the band, spaced evenly in log frequency.

    Returns
    -------
    float
        ``10 log10(0.5 / N)`` with ``N = (Delta^2/12) (2/fs) int |NTF|^2 W^2 df / input_scale^2``
        (0.5 is the power of a 0 dBFS sine).

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE/Wiley 2005, ch. 2 and 4 (linear model: white quantization noise Delta^2/12
       shaped by the NTF).
    .. [2] AES17-2015, dynamic range (full scale over the band-limited, weighted noise).
    """
    from scipy.integrate import simpson

    if isinstance(levels, bool) or not isinstance(levels, (int, np.integer)) or levels < 2:
        raise ParameterError("levels", levels, "an integer >= 2")
    if not (math.isfinite(modulator_rate_hz) and modulator_rate_hz > 2 * band_hz[1]):
        raise ParameterError(
            "modulator_rate_hz", modulator_rate_hz, f"a rate above {2 * band_hz[1]:g} Hz"
        )
    if not (0.0 < input_scale <= 1.0):
        raise ParameterError("input_scale", input_scale, "a number in (0, 1]")
    if not (math.isfinite(dither_lsb) and dither_lsb >= 0.0):
        raise ParameterError("dither_lsb", dither_lsb, "a finite number >= 0")
    lo, hi = band_hz
    logf = np.linspace(math.log(lo), math.log(hi), points)
    f = np.exp(logf)
    from audiodsm.measure.weighting import weighting_power_gain

    mag2 = np.abs(ntf.response(f / modulator_rate_hz)) ** 2 * weighting_power_gain(f, weighting)
    # integrate over f on a log grid: df = f dlogf
    gain = float(simpson(mag2 * f, x=logf)) * 2.0 / modulator_rate_hz
    step = 2.0 / (levels - 1)
    noise = (step**2 / 12.0 + (dither_lsb * step) ** 2 / 6.0) * gain / input_scale**2
    return 10.0 * math.log10(0.5 / noise)


def _input_scale(ntf, levels, dither_lsb=0.0):
    from audiodsm.stages.chain_build import auto_input_scale

    return float(auto_input_scale(ntf, levels, dither_lsb))


def candidate_profile(base: ChainProfile, candidate: Candidate, *, name=None) -> ChainProfile:
    """The base profile with the candidate's order, OSR, levels and out-of-band gain.

    Parameters
    ----------
    base : ChainProfile
        Everything else (structure, output stage, reconstruction filter, ...).
    candidate : Candidate
    name : str, optional
        Profile name; default one made from the candidate.

    Returns
    -------
    ChainProfile
    """
    mod = replace(
        base.modulator,
        order=candidate.order,
        levels=candidate.levels,
        out_of_band_gain=candidate.out_of_band_gain,
        zeros=(),
        poles=(),
    )
    up = replace(base.upsampler, osr=candidate.osr)
    label = name or (
        f"order{candidate.order}-osr{candidate.osr}-{candidate.levels}level"
        f"-gain{candidate.out_of_band_gain:g}"
    )
    return replace(base, name=label, modulator=mod, upsampler=up)


def impulse_l1_norm(ntf, *, samples: int = 1 << 14) -> float:
    """Sum of the magnitudes of the NTF's impulse response, ``||h||_1``.

    Parameters
    ----------
    ntf : NoiseTransfer
    samples : int, keyword-only
        Length of the impulse response summed (the tail of a stable NTF decays).

    Returns
    -------
    float
    """
    from scipy.signal import lfilter

    b, a = ntf.polynomials()
    impulse = np.zeros(samples)
    impulse[0] = 1.0
    return float(np.abs(lfilter(b, a, impulse)).sum())


def _guaranteed_stable(ntf, levels, dither_lsb=0.0) -> bool:
    """Multi-bit no-overload test: the input bound, dither subtracted, is >= 0.5 of full scale.

    Schreier & Temes 2005, ch. 4: a loop with M + 1 levels never overloads while
    ``max|u| <= M + 2 - ||h||_1`` (step 2); a dither of peak D steps, shaped by the NTF, takes
    ``2 D ||h||_1`` more (:func:`~audiodsm.stages.chain_build.no_overload_input_bound`).
    Demanding at least half of full scale matches the chain's automatic input scale. Single-bit
    loops have no such guarantee (always False).
    """
    from audiodsm.stages.chain_build import no_overload_input_bound

    if levels - 1 < 2:
        return False
    return no_overload_input_bound(ntf, levels, dither_lsb) >= 0.5


def search_designs(
    target_db: float,
    *,
    rate_hz: float,
    weighting: str = "a",
    orders: Sequence[int] = DEFAULT_ORDERS,
    osrs: Sequence[int] = DEFAULT_OSRS,
    levels: Sequence[int] = DEFAULT_LEVELS,
    gains: Sequence[float] = DEFAULT_MULTIBIT_GAINS,
    zero_layout: str = "spread",
    margin_db: float = 0.0,
    limit: int = 10,
    dither_lsb: float = 0.0,
) -> list[Candidate]:
    """The cheapest loops on the grid predicted to meet a dynamic-range target.

    The grid is walked in order of cost, designing each NTF only when its turn comes, until
    ``limit`` loops meet the target. A multi-bit loop must also pass the no-overload test
    ``(M + 2 - ||h||_1) / M >= 0.5``; a single-bit loop is held to an out-of-band NTF gain of 1.5
    (Lee's rule, common practice) and left to the simulation to confirm.

    Parameters
    ----------
    target_db : float
        Wanted dynamic range (dB, with ``weighting``).
    rate_hz : float, keyword-only
        Audio rate; the modulator runs at ``osr * rate_hz``.
    weighting : {"unweighted", "a", "ccir"}, keyword-only
    orders, osrs, levels : sequences of int, keyword-only
        The grid.
    gains : sequence of float, keyword-only
        Out-of-band NTF gains tried for multi-bit loops (single-bit loops use 1.5).
    zero_layout : {"spread", "dc"}, keyword-only
        Where the designed NTFs put their zeros (see
        :meth:`~audiodsm.design.ntf.NoiseTransfer.designed`).
    margin_db : float, keyword-only
        Extra prediction margin demanded above the target.
    limit : int, keyword-only
        How many passing loops to return at most.
    dither_lsb : float, keyword-only
        TPDF dither peak (quantizer steps) of the loops: it enters the predictions' noise
        power and takes headroom from the no-overload test.

    Returns
    -------
    list of Candidate
        Sorted by cost, then by predicted dynamic range (higher first).

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE/Wiley 2005, ch. 4 (NTF design; multi-bit stability criterion).
    .. [2] K. C.-H. Chao, S. Nadeem, W. L. Lee and C. G. Sodini, IEEE Trans. Circuits Syst.
       37(3), 1990 (out-of-band NTF gain of single-bit loops).
    """
    from audiodsm.design.ntf import NoiseTransfer

    low, high = TARGET_DYNAMIC_RANGE_DB
    if not math.isfinite(target_db) or not low <= target_db <= high:
        raise ParameterError("target_db", target_db, f"a dynamic range from {low:g} to {high:g} dB")
    if weighting not in _DR_KEY:
        raise ParameterError("weighting", weighting, "one of " + ", ".join(_DR_KEY))
    grid = set()
    for order in orders:
        for osr in osrs:
            for lv in levels:
                for g in (SINGLE_BIT_GAIN,) if lv == 2 else tuple(gains):
                    grid.add((int(order), int(osr), int(lv), float(g)))
    if not grid:
        raise ParameterError("orders, osrs, levels", (orders, osrs, levels), "a non-empty grid")

    def cost_of(item):
        order, osr, lv, g = item
        return (loop_cost(order, lv, modulator_rate_hz=osr * float(rate_hz)), order, osr, g)

    designs = {}
    out = []
    for order, osr, lv, g in sorted(grid, key=cost_of):
        if len(out) >= limit:
            break
        key = (order, osr, g)
        if key not in designs:
            try:
                # zeros for the band the chain will place them in (the profile's default
                # modulator.zero_band_edge_hz, capped at half the audio rate), so the prediction
                # is of the loop the written profile runs
                edge_hz = ChainProfile().modulator.zero_band_edge_hz
                edge = edge_hz / (osr * float(rate_hz)) if edge_hz < 0.5 * rate_hz else None
                designs[key] = NoiseTransfer.designed(
                    order,
                    osr=osr,
                    out_of_band_gain=g,
                    zero_layout=zero_layout,
                    zero_band_edge=edge,
                )
            except ParameterError:
                designs[key] = None  # this gain is out of reach for the order and OSR
        ntf = designs[key]
        if ntf is None or (lv > 2 and not _guaranteed_stable(ntf, lv, dither_lsb)):
            continue
        fm = float(osr) * float(rate_hz)
        scale = _input_scale(ntf, lv, dither_lsb)
        dr = predicted_dynamic_range_db(
            ntf,
            lv,
            modulator_rate_hz=fm,
            input_scale=scale,
            dither_lsb=dither_lsb,
            weighting=weighting,
        )
        if dr < target_db + margin_db:
            continue
        out.append(
            Candidate(
                order=order,
                osr=osr,
                levels=lv,
                out_of_band_gain=g,
                modulator_rate_hz=fm,
                input_scale=scale,
                predicted_dynamic_range_db=dr,
                linear_sqnr_db=ntf.linear_sqnr_db(
                    levels=lv, osr=fm / (2.0 * AUDIO_BAND_HZ[1]), dither_lsb=dither_lsb
                ),
                achieved_out_of_band_gain=float(ntf.out_of_band_gain()),
                cost=loop_cost(order, lv, modulator_rate_hz=fm),
            )
        )
    out.sort(key=lambda c: (c.cost, -c.predicted_dynamic_range_db))
    return out


@dataclass(frozen=True)
class Confirmation:
    """A candidate after simulation.

    Attributes
    ----------
    candidate : Candidate
    profile : ChainProfile
    measured_dynamic_range_db : float or None
        From the battery's dynamic-range test with the search's weighting (None when the
        loop could not pass a -60 dBFS tone).
    max_stable_amplitude_dbfs : float or None
    meets_target : bool
    shortfall_db : float
        ``target - measured`` (negative: margin to spare).
    """

    candidate: Candidate
    profile: ChainProfile
    measured_dynamic_range_db: float | None
    max_stable_amplitude_dbfs: float | None
    meets_target: bool
    shortfall_db: float


def confirm_candidates(
    candidates: Sequence[Candidate],
    base: ChainProfile,
    target_db: float,
    *,
    weighting: str = "a",
    jobs: int | None = None,
    seed: int = 0,
    progress: Callable[[int, int, str], None] | None = None,
) -> list[Confirmation]:
    """Simulate candidates through the whole chain and rank them.

    Each candidate's profile runs the battery's ``dynamic_range`` and ``stability`` tests.
    A candidate meets the target when its measured dynamic range reaches it and its loop is
    stable for some input.

    Parameters
    ----------
    candidates : sequence of Candidate
    base : ChainProfile
        Settings other than the loop (see :func:`candidate_profile`).
    target_db : float
    weighting : {"unweighted", "a", "ccir"}, keyword-only
    jobs, seed : keyword-only
        Passed to :func:`~audiodsm.evaluate.battery.run_battery`.
    progress : callable, optional, keyword-only
        ``progress(done, total, label)`` after each candidate.

    Returns
    -------
    list of Confirmation
        Those meeting the target first, by cost; then the others by shortfall.
    """
    from audiodsm.evaluate.battery import run_battery

    out = []
    for i, cand in enumerate(candidates):
        prof = candidate_profile(base, cand)
        res = run_battery(prof, jobs=jobs, seed=seed, tests=("dynamic_range", "stability"))
        dr = res.metrics.get(_DR_KEY[weighting])
        msa = res.metrics.get("max_stable_amplitude_dbfs")
        msa = None if msa is None or not math.isfinite(msa) else float(msa)
        ok = dr is not None and msa is not None and dr >= target_db
        short = (target_db - dr) if dr is not None else math.inf
        out.append(Confirmation(cand, prof, dr, msa, bool(ok), float(short)))
        if progress is not None:
            progress(i + 1, len(candidates), prof.name)
    out.sort(
        key=lambda c: (not c.meets_target, c.candidate.cost if c.meets_target else c.shortfall_db)
    )
    return out
