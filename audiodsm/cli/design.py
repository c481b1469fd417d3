"""``audiodsm design``: write a profile from loop requirements, or search for the cheapest one.

The command parses its options into a :class:`~audiodsm.evaluate.design_job.DesignRequest`,
runs :func:`~audiodsm.evaluate.design_job.run_design_job` and prints the outcome (a summary,
or the ranked search candidates). Exit code 1 when a search finds no loop meeting the target.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import click

from audiodsm.evaluate.tables import aligned_lines
from audiodsm.limits import (
    AUDIO_RATES_HZ,
    CUTOFF_HZ_RANGE,
    FILTER_ORDER_RANGE,
    LEVELS_RANGE,
    ORDER_RANGE,
    OSR_CHOICES,
    OUT_OF_BAND_GAIN_RANGE,
    TARGET_DYNAMIC_RANGE_DB,
    ZERO_LAYOUTS,
)
from audiodsm.profile import ModulatorSettings, ReconstructionSettings, UpsamplerSettings

__all__ = ["design"]

_WEIGHTING_LABEL = {"unweighted": "unweighted", "a": "A-weighted", "ccir": "CCIR-RMS"}


def _print_summary(s, path):
    w = _WEIGHTING_LABEL[s["weighting"]]
    msa = s["max_stable_amplitude_dbfs"]
    rows = [
        ("profile written", str(path), ""),
        ("loop", f"order {s['order']}, {s['levels']} levels, OSR {s['osr']}", ""),
        ("modulator clock", f"{s['modulator_rate_hz'] / 1e6:.4g}", "MHz"),
        ("NTF out-of-band gain", f"{s['ntf_out_of_band_gain']:.3f}", ""),
        ("linear-model peak SQNR (20 kHz band)", f"{s['linear_sqnr_db']:.1f}", "dB"),
        (f"predicted dynamic range ({w})", f"{s['predicted_dynamic_range_db']:.1f}", "dB"),
        ("input scale (headroom at the loop)", f"{s['input_scale']:.3f}", ""),
        ("loop's stable amplitude (simulated)", f"{s['loop_stable_amplitude']:.3f}", "of FS"),
        ("max stable amplitude at the input", "-" if msa is None else f"{msa:.2f}", "dBFS"),
    ]
    width = max(len(r[0]) for r in rows)
    for label, value, unit in rows:
        click.echo(f"{label.ljust(width)}  {value} {unit}".rstrip())


def _dash(value, fmt):
    return "-" if value is None else format(value, fmt)


def _ranked_table(confirmations, target, weighting):
    head = ["rank", "order", "OSR", "levels", "gain", "clock MHz", "cost", "predicted dB",
            "measured dB", "stable to dBFS", "verdict"]  # fmt: skip
    rows = [head]
    for i, c in enumerate(confirmations, 1):
        k = c.candidate
        if c.meets_target:
            verdict = f"meets ({-c.shortfall_db:.1f} dB spare)"
        elif c.max_stable_amplitude_dbfs is None:
            verdict = "unstable"
        else:
            verdict = f"short by {c.shortfall_db:.1f} dB"
        rows.append(
            [str(i), str(k.order), str(k.osr), str(k.levels), f"{k.out_of_band_gain:g}",
             f"{k.modulator_rate_hz / 1e6:.4g}", f"{k.cost:.1f}",
             f"{k.predicted_dynamic_range_db:.1f}", _dash(c.measured_dynamic_range_db, ".1f"),
             _dash(c.max_stable_amplitude_dbfs, ".2f"), verdict]
        )  # fmt: skip
    click.echo(
        f"target: dynamic range {target:g} dB ({_WEIGHTING_LABEL[weighting]}); "
        "cost = modulator clock MHz x levels x order"
    )
    for line in aligned_lines(rows, right=range(len(head) - 1), rule=True):
        click.echo(line)


def _parse_levels(text):
    """The comma-separated ``--level-choices`` as integers."""
    from audiodsm.errors import ParameterError

    try:
        values = tuple(int(v) for v in text.split(",") if v.strip())
    except ValueError:
        values = ()
    if not values:
        raise ParameterError("--level-choices", text, "a comma-separated list of integers")
    return values


@click.command("design")
@click.argument("profile_path", type=click.Path(dir_okay=False))
@click.option("--name", default=None, help="Profile name (default: the file name's stem).")
@click.option(
    "--order",
    type=click.IntRange(*ORDER_RANGE),
    default=None,
    help=f"Loop order [{ModulatorSettings.order}].",
)
@click.option(
    "--osr",
    type=click.Choice([str(v) for v in OSR_CHOICES]),
    default=None,
    help=f"Oversampling ratio [{UpsamplerSettings.osr}].",
)
@click.option(
    "--levels",
    type=click.IntRange(*LEVELS_RANGE),
    default=None,
    help=f"Quantizer levels [{ModulatorSettings.levels}].",
)
@click.option(
    "--out-of-band-gain",
    type=click.FloatRange(*OUT_OF_BAND_GAIN_RANGE, min_open=True),
    default=None,
    help=f"Largest out-of-band NTF gain [{ModulatorSettings.out_of_band_gain}].",
)
@click.option(
    "--zero-layout",
    type=click.Choice(ZERO_LAYOUTS),
    default=ModulatorSettings.zero_layout,
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
    "--filter-order",
    type=click.IntRange(*FILTER_ORDER_RANGE),
    default=ReconstructionSettings.filter_order,
    show_default=True,
    help="Order of a prototype filter.",
)
@click.option(
    "--cutoff-hz",
    type=click.FloatRange(*CUTOFF_HZ_RANGE),
    default=ReconstructionSettings.cutoff_hz,
    show_default=True,
    help="Corner of a prototype filter (Hz).",
)
@click.option(
    "--audio-rate",
    type=click.Choice([str(r) for r in AUDIO_RATES_HZ]),
    default="48000",
    show_default=True,
    help="Audio rate of the chain (Hz).",
)
@click.option(
    "--target-dynamic-range",
    "target",
    type=click.FloatRange(*TARGET_DYNAMIC_RANGE_DB),
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
    profile_path, name, order, osr, levels, out_of_band_gain, zero_layout, structure,
    output_stage, filt, filter_order, cutoff_hz, audio_rate, target, weighting, level_choices,
    confirm_count, jobs, overwrite, as_json,
):  # fmt: skip
    """Write a chain profile to PROFILE_PATH from loop requirements.

    Options left out take the values in brackets; with --target-dynamic-range the loop
    settings left out are searched instead.
    """
    from audiodsm.errors import ParameterError
    from audiodsm.evaluate.design_job import DesignRequest, run_design_job

    if target is None and output_stage == "pdm" and levels not in (None, 2):
        raise ParameterError("--output-stage", "pdm", f"nrz or pwm for {levels} levels")
    request = DesignRequest(
        path=Path(profile_path), name=name, order=order, osr=int(osr) if osr else None,
        levels=levels, out_of_band_gain=out_of_band_gain, zero_layout=zero_layout,
        structure=structure, output_stage=output_stage, reconstruction_filter=filt,
        filter_order=filter_order, cutoff_hz=cutoff_hz, audio_rate_hz=int(audio_rate),
        target_db=target, weighting=weighting, level_choices=_parse_levels(level_choices),
        confirm_count=confirm_count, jobs=jobs, overwrite=overwrite,
    )  # fmt: skip

    def note(done, total, what):
        if not as_json:
            click.echo(f"simulated {done}/{total}: {what}", err=True)

    outcome = run_design_job(request, progress=note)
    if as_json:
        click.echo(json.dumps(outcome.record))
    elif outcome.summary is not None:
        _print_summary(outcome.summary, outcome.written)
    elif outcome.confirmations:
        _ranked_table(outcome.confirmations, target, weighting)
        if outcome.written is not None:
            click.echo(f"profile written: {outcome.written}")
    if outcome.failure is not None:
        click.echo(f"audiodsm: {outcome.failure}", err=True)
        sys.exit(1)
