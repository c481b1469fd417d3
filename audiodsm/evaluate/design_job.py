"""The design job behind ``audiodsm design``: loop requirements in, a profile file out.

Without a dynamic-range target the job designs the NTF from the given order, OSR and
out-of-band gain, writes the profile and returns a summary: the linear-model peak SQNR and
dynamic range, the NTF's out-of-band gain, and the maximum stable amplitude found by a short
simulation.

With a target it searches order, OSR, levels and out-of-band gain (the ones the request leaves
open) for the cheapest loops predicted to meet it
(:func:`~audiodsm.evaluate.search.search_designs`), simulates the best few through the whole
chain (:func:`~audiodsm.evaluate.search.confirm_candidates`), ranks them and writes the best one
that meets the target.

The profile file is written atomically and never replaces an existing file unless the request
says so.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

from audiodsm.errors import OutputError, ParameterError
from audiodsm.evaluate.search import DEFAULT_LEVELS
from audiodsm.io_files import refuse_dangling_symlink, replace_text_atomically
from audiodsm.limits import LEVELS_RANGE
from audiodsm.profile import ChainProfile, ReconstructionSettings, profile_from_dict
from audiodsm.profile_text import profile_to_toml

__all__ = [
    "DesignOutcome",
    "DesignRequest",
    "design_summary",
    "run_design_job",
    "write_text_atomic",
]

#: Cost model of the search, as the job reports it.
COST_MODEL = "modulator clock MHz x levels x order"


def write_text_atomic(path, text: str, *, overwrite: bool = False) -> Path:
    """Write a text file through a temporary file in the same folder and a rename.

    Parameters
    ----------
    path : str or Path
    text : str
    overwrite : bool, keyword-only
        Replace an existing file (otherwise an existing file is an error).

    Returns
    -------
    Path

    Raises
    ------
    OutputError
        The folder is missing, or the file (or a dangling symlink) exists and ``overwrite``
        is False.
    StorageError
        The file cannot be written (read-only folder, disk full, name too long).

    References
    ----------
    .. [1] IEEE Std 1003.1 (POSIX), ``rename()``: replacing the target is atomic within one
       file system (from memory).
    """
    p = Path(path)
    folder = p.parent if str(p.parent) else Path(".")
    if not folder.is_dir():
        raise OutputError(f"{p}: folder {str(folder)!r} does not exist")
    if p.exists() and not overwrite:
        raise OutputError(f"{p}: already exists (pass --overwrite to replace it)")
    if p.exists() and p.is_dir():
        raise OutputError(f"{p}: is a folder; expected a profile file name")
    refuse_dangling_symlink(p, replace=overwrite)
    replace_text_atomically(p, text)  # StorageError (exit 3) names the path and the cause
    return p


@dataclass(frozen=True)
class DesignRequest:
    """What ``audiodsm design`` was asked for.

    Loop settings left as None take the profile defaults in a plain design and are searched
    when ``target_db`` is given.

    Attributes
    ----------
    path : Path
        Profile file to write.
    name : str or None
        Profile name (default: the file name's stem).
    order, osr, levels : int or None
    out_of_band_gain : float or None
    zero_layout : {"spread", "dc"}
    structure : str
    output_stage : {"pdm", "nrz", "pwm"} or None
        None: PDM for two levels, NRZ otherwise.
    reconstruction_filter : {"butterworth", "bessel", "chebyshev1", "lc", "none"}
    filter_order : int
    cutoff_hz : float
    audio_rate_hz : int
    target_db : float or None
        Dynamic-range target of a search (None: design the given loop).
    weighting : {"a", "unweighted", "ccir"}
    level_choices : sequence of int
        Quantizer levels the search may use (unless ``levels`` fixes them).
    confirm_count : int
        How many of the cheapest predicted loops to simulate.
    jobs : int or None
        Worker threads of the simulation.
    overwrite : bool
        Replace ``path`` if it exists.
    """

    path: Path
    name: str | None = None
    order: int | None = None
    osr: int | None = None
    levels: int | None = None
    out_of_band_gain: float | None = None
    zero_layout: str = "spread"
    structure: str = "feedback"
    output_stage: str | None = None
    reconstruction_filter: str = "butterworth"
    filter_order: int = ReconstructionSettings.filter_order
    cutoff_hz: float = ReconstructionSettings.cutoff_hz
    audio_rate_hz: int = 48000
    target_db: float | None = None
    weighting: str = "a"
    level_choices: Sequence[int] = DEFAULT_LEVELS
    confirm_count: int = 3
    jobs: int | None = None
    overwrite: bool = False


@dataclass(frozen=True)
class DesignOutcome:
    """What the design job did.

    Attributes
    ----------
    written : Path or None
        The profile file written (None when a search found no loop meeting the target).
    record : dict
        The result as plain values (what ``design --json`` prints).
    summary : dict or None
        Plain design: the figures of :func:`design_summary`.
    confirmations : list of Confirmation
        Search: the simulated candidates, ranked.
    failure : str or None
        Why a search wrote nothing (no loop predicted or none confirmed); None on success.
    """

    written: Path | None
    record: dict
    summary: dict | None = None
    confirmations: list = field(default_factory=list)
    failure: str | None = None


def _stage_for(request: DesignRequest, levels: int) -> str:
    if request.output_stage is not None:
        if request.output_stage == "pdm" and levels != 2:
            raise ParameterError("output_stage", "pdm", f"nrz or pwm for {levels} levels")
        return request.output_stage
    return "pdm" if levels == 2 else "nrz"


def _profile_for(request: DesignRequest, name: str, loop: dict) -> ChainProfile:
    """A profile from the request (everything not given at its profile default).

    ``loop`` holds the modulator/upsampler keys that are set (order, osr, levels, gain).
    """
    keys = ("order", "levels", "out_of_band_gain")
    modulator = {k: v for k, v in loop.items() if k in keys and v}
    modulator.update(zero_layout=request.zero_layout, structure=request.structure)
    filt = request.reconstruction_filter
    if filt in ("none", "lc"):
        reconstruction = {"kind": filt}
    else:
        reconstruction = {
            "kind": "prototype",
            "family": filt,
            "filter_order": request.filter_order,
            "cutoff_hz": request.cutoff_hz,
        }
    levels = modulator.get("levels", ChainProfile().modulator.levels)
    data = {
        "name": name,
        "description": "written by audiodsm design",
        "upsampler": {"osr": loop["osr"]} if loop.get("osr") else {},
        "modulator": modulator,
        "output": {"kind": _stage_for(request, levels)},
        "reconstruction": reconstruction,
        "listening": {"rate_hz": request.audio_rate_hz},
    }
    return profile_from_dict(data, source="design request")


def design_summary(profile: ChainProfile, *, weighting: str, run_samples: int) -> dict:
    """Prediction and short-simulation figures of one profile's loop.

    Parameters
    ----------
    profile : ChainProfile
    weighting : {"a", "unweighted", "ccir"}, keyword-only
        Weighting of the predicted dynamic range.
    run_samples : int, keyword-only
        Samples per run of the stability probe.

    Returns
    -------
    dict
        ``profile``, ``order``, ``osr``, ``levels``, ``out_of_band_gain``,
        ``modulator_rate_hz``, ``ntf_out_of_band_gain``, ``linear_sqnr_db`` (0 dBFS sine,
        20 kHz band), ``predicted_dynamic_range_db``, ``weighting``, ``input_scale``,
        ``loop_stable_amplitude`` and ``max_stable_amplitude_dbfs`` (at the chain input).

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE Press / Wiley, 2005, ch. 2 and 4 (linear-model SQNR; stable amplitude by
       simulation).
    """
    from audiodsm.evaluate.search import AUDIO_BAND_HZ, predicted_dynamic_range_db
    from audiodsm.stages.chain import Chain

    rate = profile.listening.rate_hz
    chain = Chain.from_profile(profile, rate, 1, threads=1)
    mod, osr, ntf = profile.modulator, chain.osr, chain.ntf
    fm = float(chain.modulator_rate_hz)
    scale = float(getattr(chain, "input_scale", 1.0))
    amp = float(chain.modulator.probe_stability(osr=osr, run_samples=run_samples).stable_amplitude)
    return {
        "profile": profile.name,
        "order": mod.order,
        "osr": osr,
        "levels": mod.levels,
        "out_of_band_gain": mod.out_of_band_gain,
        "modulator_rate_hz": fm,
        "ntf_out_of_band_gain": float(ntf.out_of_band_gain()),
        "linear_sqnr_db": float(
            ntf.linear_sqnr_db(levels=mod.levels, osr=fm / (2 * AUDIO_BAND_HZ[1]))
        ),
        "predicted_dynamic_range_db": predicted_dynamic_range_db(
            ntf, mod.levels, modulator_rate_hz=fm, input_scale=scale, weighting=weighting
        ),
        "weighting": weighting,
        "input_scale": scale,
        "loop_stable_amplitude": amp,
        "max_stable_amplitude_dbfs": (20 * math.log10(amp / scale)) if amp > 0 else None,
    }


def _confirmation_record(c) -> dict:
    k = c.candidate
    return {
        "order": k.order,
        "osr": k.osr,
        "levels": k.levels,
        "out_of_band_gain": k.out_of_band_gain,
        "modulator_rate_hz": k.modulator_rate_hz,
        "cost": k.cost,
        "predicted_dynamic_range_db": k.predicted_dynamic_range_db,
        "measured_dynamic_range_db": c.measured_dynamic_range_db,
        "max_stable_amplitude_dbfs": c.max_stable_amplitude_dbfs,
        "meets_target": c.meets_target,
    }


def run_design_job(
    request: DesignRequest, *, progress: Callable[[int, int, str], None] | None = None
) -> DesignOutcome:
    """Design or search a loop as ``request`` asks and write its profile.

    Parameters
    ----------
    request : DesignRequest
    progress : callable, optional, keyword-only
        ``progress(done, total, profile_name)`` after each simulated search candidate.

    Returns
    -------
    DesignOutcome

    Raises
    ------
    OutputError
        The profile file exists and ``request.overwrite`` is False, or it cannot be written.
    ParameterError, ProfileError
        Settings out of range or inconsistent (e.g. PDM output with more than two levels).

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters",
       IEEE Press / Wiley, 2005, ch. 4 (NTF design and the no-overload test of the search).
    """
    from audiodsm.evaluate.search import (
        DEFAULT_MULTIBIT_GAINS,
        DEFAULT_ORDERS,
        DEFAULT_OSRS,
        confirm_candidates,
        search_designs,
    )

    path = Path(request.path)
    if path.exists() and not request.overwrite:
        raise OutputError(f"{path}: already exists (pass --overwrite to replace it)")
    name = request.name or path.stem or "designed"
    loop = {
        "order": request.order,
        "osr": request.osr,
        "levels": request.levels,
        "out_of_band_gain": request.out_of_band_gain,
    }

    if request.target_db is None:
        prof = _profile_for(request, name, loop)
        summary = design_summary(prof, weighting=request.weighting, run_samples=16384)
        written = write_text_atomic(path, profile_to_toml(prof), overwrite=request.overwrite)
        return DesignOutcome(written, {"file": str(written), **summary}, summary=summary)

    low, high = LEVELS_RANGE
    level_grid = [request.levels] if request.levels else list(request.level_choices)
    if not level_grid or any(not low <= lv <= high for lv in level_grid):
        raise ParameterError("level_choices", level_grid, f"levels from {low} to {high}")
    if request.output_stage == "pdm":
        level_grid = [2]
    target = request.target_db
    candidates = search_designs(
        target,
        rate_hz=request.audio_rate_hz,
        weighting=request.weighting,
        orders=[request.order] if request.order else DEFAULT_ORDERS,
        osrs=[request.osr] if request.osr else DEFAULT_OSRS,
        levels=level_grid,
        gains=[request.out_of_band_gain] if request.out_of_band_gain else DEFAULT_MULTIBIT_GAINS,
        zero_layout=request.zero_layout,
        limit=request.confirm_count,
    )
    if not candidates:
        return DesignOutcome(
            None,
            {"file": None, "target_db": target, "candidates": []},
            failure=f"no loop on the search grid is predicted to reach {target:g} dB",
        )
    first = candidates[0]
    base = _profile_for(
        request, name, {"order": first.order, "osr": first.osr, "levels": first.levels}
    )
    # every candidate keeps the base's chain settings; its output stage follows its levels
    confirmed = []
    for cand in candidates:
        b = replace(base, output=replace(base.output, kind=_stage_for(request, cand.levels)))
        confirmed.extend(
            confirm_candidates([cand], b, target, weighting=request.weighting, jobs=request.jobs)
        )
        if progress is not None:
            progress(len(confirmed), len(candidates), confirmed[-1].profile.name)
    confirmed.sort(
        key=lambda c: (not c.meets_target, c.candidate.cost if c.meets_target else c.shortfall_db)
    )
    best = confirmed[0] if confirmed[0].meets_target else None
    written = None
    if best is not None:
        prof = replace(best.profile, name=name)
        written = write_text_atomic(path, profile_to_toml(prof), overwrite=request.overwrite)
    record = {
        "file": None if written is None else str(written),
        "target_db": target,
        "weighting": request.weighting,
        "cost_model": COST_MODEL,
        "candidates": [_confirmation_record(c) for c in confirmed],
    }
    failure = None
    if best is None:
        failure = f"none of the {len(confirmed)} simulated loops reached {target:g} dB"
    return DesignOutcome(written, record, confirmations=confirmed, failure=failure)
