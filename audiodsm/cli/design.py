"""``audiodsm design``: write a profile from loop requirements, or search for the cheapest one.

Without a target the command designs the NTF from the given order, OSR and peak gain, writes
the profile and prints a summary: the linear-model peak SQNR and dynamic range, the NTF's peak
gain, and the maximum stable amplitude found by a short simulation.

With ``--target-dynamic-range DB`` it searches order, OSR, levels and peak gain (the ones not
fixed on the command line) for the cheapest loops predicted to meet the target (cost = clock
rate in MHz x levels x order; see :mod:`audiodsm.evaluate.search`), simulates the best few
through the whole chain, prints them ranked and writes the best one that meets the target.
Exit code 1 when none does.

The profile file is written atomically and never replaces an existing file unless
``--overwrite`` is given.
"""

from __future__ import annotations

import json
import math
import sys
from dataclasses import replace
from pathlib import Path

import click

from audiodsm.cli._table import aligned_lines
from audiodsm.errors import OutputError
from audiodsm.io import refuse_dangling_symlink, replace_text_atomically

__all__ = ["design", "write_text_atomic"]

_WEIGHTING_LABEL = {"unweighted": "unweighted", "a": "A-weighted", "ccir": "CCIR-RMS"}


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


def _base_profile(
    name, order, osr, levels, max_gain, zeros, structure, stage, filt, filter_order, cutoff_hz,
    audio_rate,
):  # fmt: skip
    """A profile from the command-line requirements (everything else at its default)."""
    from audiodsm.profile import profile_from_dict

    data = {
        "name": name,
        "description": "written by audiodsm design",
        "upsampler": {"osr": osr},
        "modulator": {
            "order": order,
            "levels": levels,
            "max_gain": max_gain,
            "optimize_zeros": zeros == "optimized",
            "structure": structure,
        },
        "output": {"kind": stage},
        "reconstruction": {},
        "listening": {"rate_hz": audio_rate},
    }
    if filt == "none":
        data["reconstruction"] = {"kind": "none"}
    elif filt == "lc":
        data["reconstruction"] = {"kind": "lc"}
    else:
        data["reconstruction"] = {
            "kind": "prototype",
            "family": filt,
            "filter_order": filter_order,
            "cutoff_hz": cutoff_hz,
        }
    return profile_from_dict(data, source="command line")


def _summary(profile, *, weighting, samples):
    """Prediction and short-simulation figures of one profile's loop."""
    from audiodsm.evaluate.search import AUDIO_BAND_HZ, predicted_dynamic_range_db
    from audiodsm.stages.chain import Chain
    from audiodsm.stages.modulator import find_stability_limit

    rate = profile.listening.rate_hz
    chain = Chain.from_profile(profile, rate, 1, threads=1)
    mod, osr, ntf = profile.modulator, chain.osr, chain.ntf
    fm = float(chain.modulator_rate_hz)
    scale = float(getattr(chain, "input_scale", 1.0))
    limit = find_stability_limit(chain.modulator, osr=osr, samples=samples)
    amp = float(limit.amplitude)
    return {
        "profile": profile.name,
        "order": mod.order,
        "osr": osr,
        "levels": mod.levels,
        "max_gain": mod.max_gain,
        "modulator_rate_hz": fm,
        "ntf_peak_gain": float(ntf.peak_gain()),
        "predicted_sqnr_db": float(ntf.predicted_sqnr_db(mod.levels, fm / (2 * AUDIO_BAND_HZ[1]))),
        "predicted_dynamic_range_db": predicted_dynamic_range_db(
            ntf, mod.levels, modulator_rate_hz=fm, input_scale=scale, weighting=weighting
        ),
        "weighting": weighting,
        "input_scale": scale,
        "loop_stable_amplitude": amp,
        "max_stable_amplitude_dbfs": (20 * math.log10(amp / scale)) if amp > 0 else None,
    }


def _print_summary(s, path):
    w = _WEIGHTING_LABEL[s["weighting"]]
    rows = [
        ("profile written", str(path), ""),
        ("loop", f"order {s['order']}, {s['levels']} levels, OSR {s['osr']}", ""),
        ("modulator clock", f"{s['modulator_rate_hz'] / 1e6:.4g}", "MHz"),
        ("NTF peak gain", f"{s['ntf_peak_gain']:.3f}", ""),
        ("predicted peak SQNR (20 kHz band)", f"{s['predicted_sqnr_db']:.1f}", "dB"),
        (f"predicted dynamic range ({w})", f"{s['predicted_dynamic_range_db']:.1f}", "dB"),
        ("input scale (headroom at the loop)", f"{s['input_scale']:.3f}", ""),
        ("loop's stable amplitude (simulated)", f"{s['loop_stable_amplitude']:.3f}", "of FS"),
        (
            "max stable amplitude at the input",
            "-"
            if s["max_stable_amplitude_dbfs"] is None
            else f"{s['max_stable_amplitude_dbfs']:.2f}",
            "dBFS",
        ),
    ]
    width = max(len(r[0]) for r in rows)
    for label, value, unit in rows:
        click.echo(f"{label.ljust(width)}  {value} {unit}".rstrip())


def _parse_choices(text, name, kind, allowed):
    """A comma-separated list of numbers, each checked against ``allowed``."""
    from audiodsm.errors import ParameterError

    try:
        values = [kind(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise ParameterError(name, text, f"a comma-separated list of {allowed}") from None
    if not values:
        raise ParameterError(name, text, f"a comma-separated list of {allowed}")
    return values


def _ranked_table(confirmations, target, weighting):
    head = [
        "rank",
        "order",
        "OSR",
        "levels",
        "gain",
        "clock MHz",
        "cost",
        "predicted dB",
        "measured dB",
        "stable to dBFS",
        "verdict",
    ]
    rows = [head]
    for i, c in enumerate(confirmations, 1):
        k = c.candidate
        verdict = (
            f"meets ({-c.shortfall_db:.1f} dB spare)"
            if c.meets_target
            else (
                "unstable"
                if c.max_stable_amplitude_dbfs is None
                else f"short by {c.shortfall_db:.1f} dB"
            )
        )
        rows.append(
            [
                str(i),
                str(k.order),
                str(k.osr),
                str(k.levels),
                f"{k.max_gain:g}",
                f"{k.modulator_rate_hz / 1e6:.4g}",
                f"{k.cost:.1f}",
                f"{k.predicted_dynamic_range_db:.1f}",
                "-"
                if c.measured_dynamic_range_db is None
                else f"{c.measured_dynamic_range_db:.1f}",
                "-"
                if c.max_stable_amplitude_dbfs is None
                else f"{c.max_stable_amplitude_dbfs:.2f}",
                verdict,
            ]
        )
    click.echo(
        f"target: dynamic range {target:g} dB ({_WEIGHTING_LABEL[weighting]}); "
        "cost = modulator clock MHz x levels x order"
    )
    for line in aligned_lines(rows, right=range(len(head) - 1), rule=True):
        click.echo(line)


@click.command("design")
@click.argument("profile_path", type=click.Path(dir_okay=False))
@click.option("--name", default=None, help="Profile name (default: the file name's stem).")
@click.option("--order", type=click.IntRange(1, 8), default=None, help="Loop order [5].")
@click.option(
    "--osr", type=click.Choice(["16", "32", "64", "128", "256", "512"]), default=None,
    help="Oversampling ratio [64].",
)  # fmt: skip
@click.option("--levels", type=click.IntRange(2, 1024), default=None, help="Quantizer levels [2].")
@click.option(
    "--max-gain",
    type=click.FloatRange(1.0, 8.0, min_open=True),
    default=None,
    help="Peak out-of-band NTF gain [1.5].",
)
@click.option(
    "--zeros",
    type=click.Choice(["optimized", "dc"]),
    default="optimized",
    show_default=True,
    help="NTF zeros spread over the band, or all at DC.",
)
@click.option(
    "--structure",
    type=click.Choice(["feedback", "feedforward", "error-feedback"]),
    default="feedback",
    show_default=True,
    help="Loop structure.",
)
@click.option(
    "--output-stage",
    type=click.Choice(["pdm", "nrz", "pwm"]),
    default=None,
    help="Output stage [pdm for 2 levels, else nrz].",
)
@click.option(
    "--filter",
    "filt",
    type=click.Choice(["butterworth", "bessel", "chebyshev1", "lc", "none"]),
    default="butterworth",
    show_default=True,
    help="Reconstruction filter (lc: the default class-D LC values).",
)
@click.option(
    "--filter-order", type=click.IntRange(1, 6), default=3, show_default=True,
    help="Order of a prototype filter.",
)  # fmt: skip
@click.option(
    "--cutoff-hz",
    type=click.FloatRange(20000.0, 1e7),
    default=60000.0,
    show_default=True,
    help="Corner of a prototype filter (Hz).",
)
@click.option(
    "--audio-rate",
    type=click.Choice(["44100", "48000", "88200", "96000", "176400", "192000"]),
    default="48000",
    show_default=True,
    help="Audio rate of the chain (Hz).",
)
@click.option(
    "--target-dynamic-range",
    "target",
    type=click.FloatRange(20.0, 250.0),
    default=None,
    help="Search for the cheapest loop predicted to reach this dynamic range (dB).",
)
@click.option(
    "--weighting",
    type=click.Choice(["a", "unweighted", "ccir"]),
    default="a",
    show_default=True,
    help="Weighting of the dynamic-range target.",
)
@click.option(
    "--level-choices",
    default="2,3,5,9,17,33",
    show_default=True,
    help="Quantizer levels the search may use (unless --levels fixes them).",
)
@click.option(
    "--confirm",
    "confirm_count",
    type=click.IntRange(1, 20),
    default=3,
    show_default=True,
    help="How many of the cheapest predicted loops to simulate.",
)
@click.option("--jobs", type=click.IntRange(min=1), default=None, help="Worker threads.")
@click.option("--overwrite", is_flag=True, help="Replace PROFILE_PATH if it exists.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as one JSON object.")
def design(
    profile_path, name, order, osr, levels, max_gain, zeros, structure, output_stage, filt,
    filter_order, cutoff_hz, audio_rate, target, weighting, level_choices, confirm_count, jobs,
    overwrite, as_json,
):  # fmt: skip
    """Write a chain profile to PROFILE_PATH from loop requirements.

    Options left out take the values in brackets; with --target-dynamic-range the loop
    settings left out are searched instead.
    """
    from audiodsm.errors import ParameterError
    from audiodsm.profile import profile_to_toml

    path = Path(profile_path)
    if path.exists() and not overwrite:
        raise OutputError(f"{path}: already exists (pass --overwrite to replace it)")
    name = name or path.stem or "designed"
    rate = int(audio_rate)

    def stage_for(lv):
        if output_stage is not None:
            if output_stage == "pdm" and lv != 2:
                raise ParameterError("--output-stage", "pdm", f"nrz or pwm for {lv} levels")
            return output_stage
        return "pdm" if lv == 2 else "nrz"

    def build(order_, osr_, levels_, gain_):
        return _base_profile(
            name, order_, osr_, levels_, gain_, zeros, structure, stage_for(levels_), filt,
            filter_order, cutoff_hz, rate,
        )  # fmt: skip

    if target is None:
        prof = build(order or 5, int(osr or 64), levels or 2, max_gain or 1.5)
        summary = _summary(prof, weighting=weighting, samples=16384)
        write_text_atomic(path, profile_to_toml(prof), overwrite=overwrite)
        if as_json:
            click.echo(json.dumps({"file": str(path), **summary}))
        else:
            _print_summary(summary, path)
        return

    from audiodsm.evaluate.search import (
        DEFAULT_MULTIBIT_GAINS,
        DEFAULT_ORDERS,
        DEFAULT_OSRS,
        confirm_candidates,
        search_designs,
    )

    level_grid = [levels] if levels else _parse_choices(level_choices, "--level-choices", int, "")
    for lv in level_grid:
        if not 2 <= lv <= 1024:
            raise ParameterError("--level-choices", level_choices, "levels from 2 to 1024")
    if output_stage == "pdm":
        level_grid = [2]
    candidates = search_designs(
        target,
        rate_hz=rate,
        weighting=weighting,
        orders=[order] if order else DEFAULT_ORDERS,
        osrs=[int(osr)] if osr else DEFAULT_OSRS,
        levels=level_grid,
        gains=[max_gain] if max_gain else DEFAULT_MULTIBIT_GAINS,
        optimize_zeros=zeros == "optimized",
        limit=confirm_count,
    )
    if not candidates:
        msg = f"no loop on the search grid is predicted to reach {target:g} dB"
        if as_json:
            click.echo(json.dumps({"file": None, "target_db": target, "candidates": []}))
        click.echo(f"audiodsm: {msg}", err=True)
        sys.exit(1)
    base = build(candidates[0].order, candidates[0].osr, candidates[0].levels, 1.5)

    def note(done, total, what):
        if not as_json:
            click.echo(f"simulated {done}/{total}: {what}", err=True)

    # every candidate keeps the base's chain settings; its output stage follows its levels
    confirmed = []
    for cand in candidates:
        b = replace(base, output=replace(base.output, kind=stage_for(cand.levels)))
        confirmed.extend(
            confirm_candidates([cand], b, target, weighting=weighting, jobs=jobs, progress=None)
        )
        note(len(confirmed), len(candidates), confirmed[-1].profile.name)
    confirmed.sort(
        key=lambda c: (not c.meets_target, c.candidate.cost if c.meets_target else c.shortfall_db)
    )
    best = confirmed[0] if confirmed[0].meets_target else None
    written = None
    if best is not None:
        prof = replace(best.profile, name=name)
        written = write_text_atomic(path, profile_to_toml(prof), overwrite=overwrite)
    if as_json:
        record = {
            "file": None if written is None else str(written),
            "target_db": target,
            "weighting": weighting,
            "cost_model": "modulator clock MHz x levels x order",
            "candidates": [
                {
                    "order": c.candidate.order,
                    "osr": c.candidate.osr,
                    "levels": c.candidate.levels,
                    "max_gain": c.candidate.max_gain,
                    "modulator_rate_hz": c.candidate.modulator_rate_hz,
                    "cost": c.candidate.cost,
                    "predicted_dynamic_range_db": c.candidate.predicted_dynamic_range_db,
                    "measured_dynamic_range_db": c.measured_dynamic_range_db,
                    "max_stable_amplitude_dbfs": c.max_stable_amplitude_dbfs,
                    "meets_target": c.meets_target,
                }
                for c in confirmed
            ],
        }
        click.echo(json.dumps(record))
    else:
        _ranked_table(confirmed, target, weighting)
        if written is not None:
            click.echo(f"profile written: {written}")
    if best is None:
        click.echo(
            f"audiodsm: none of the {len(confirmed)} simulated loops reached {target:g} dB",
            err=True,
        )
        sys.exit(1)
