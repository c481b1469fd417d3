"""``audiodsm measure``: run the test battery on profiles and print their metrics.

The terminal shows one aligned table: a row per metric with its unit, a column per profile;
an invalid reading shows as ``invalid [n]`` with its numbered reason under the table, then
each profile's battery notes. With ``--json``, stdout carries only one JSON object per
profile, one per line::

    {"profile": str, "file": str, "digest": str, "rate_hz": int, "seconds": float,
     "modulator_samples": int, "metrics": {metric name: number | bool | null, ...},
     "validity": {metric name: {"valid": bool, "reason": str}, ...}, "notes": [str, ...]}

An invalid reading is ``null`` in ``metrics`` and ``"valid": false`` with its reason in
``validity``.

The progress bar goes to stderr, so it never mixes with the JSON.
"""

from __future__ import annotations

import json
import sys

import click

from audiodsm.cli._options import scheduler_option, short_plan_option
from audiodsm.errors import EXIT_FAILED

__all__ = ["measure"]


class _Bar:
    """A click progress bar on stderr fed by the battery's progress callback."""

    def __init__(self, label: str, enabled: bool):
        self.enabled = enabled
        self.label = label
        self.bar = None
        self.seen = 0

    def __call__(self, done, total, what):
        if not self.enabled:
            return
        if self.bar is None:
            self.bar = click.progressbar(
                length=total, label=self.label, file=sys.stderr, show_pos=True, width=24
            )
            self.bar.__enter__()
        self.bar.label = f"{self.label}: {what}"
        self.bar.update(done - self.seen)
        self.seen = done

    def close(self):
        if self.bar is not None:
            self.bar.__exit__(None, None, None)
            self.bar = None


@click.command("measure")
@click.argument("profiles", nargs=-1, required=True, type=click.Path())
@click.option("--json", "as_json", is_flag=True, help="One JSON object per profile on stdout.")
@click.option(
    "--jobs",
    type=click.IntRange(min=1),
    default=None,
    help="Worker threads per battery (default: the number of cores).",
)
@click.option(
    "--seed",
    type=click.IntRange(min=0),
    default=0,
    show_default=True,
    help="Mixed into every run's dither seed.",
)
@short_plan_option
@scheduler_option
@click.option(
    "--save-plots",
    "plots_folder",
    type=click.Path(file_okay=False),
    default=None,
    help="Also write each profile's plots (PNG and SVG, the report's plots without limits) "
    "into this folder, named <profile>-<plot>.png/.svg.",
)
@click.option("--no-progress", is_flag=True, help="Do not show the progress bar.")
def measure(profiles, as_json, jobs, seed, short, scheduler, plots_folder, no_progress):
    """Run the test battery on each PROFILE (a file, or a folder of .toml files).

    Each profile's chain is driven with AES17-practice stimuli (997 Hz tones, silence, small
    DC offsets, a multitone, twin tones) at its audio rate, and its reconstructed output is
    measured: dynamic range, THD+N, idle noise and idle tones, maximum stable amplitude,
    frequency response, images, IMD, out-of-band noise, noise modulation, state peaks and,
    for PWM stages, pulse counts and switching rate.

    Several profiles run as tasks on a local Dask cluster of worker processes (or on
    --scheduler's workers); a profile whose battery fails is reported with the cause, the
    others are still measured, and the exit status is then 1.
    """
    from audiodsm.evaluate.battery import BatteryPlan, run_battery
    from audiodsm.evaluate.grade import collect_profiles, measure_on_cluster
    from audiodsm.evaluate.tables import metrics_table

    loaded = collect_profiles(profiles)  # every file checked before any runs
    plan = BatteryPlan.quick() if short else BatteryPlan()
    names, rows, invalid, notes = [], [], [], []
    failed = False
    if len(loaded) > 1 and (scheduler or (jobs or 2) > 1):
        say = None if as_json else (lambda text: click.echo(f"audiodsm: {text}", err=True))
        results = measure_on_cluster(
            loaded, plan=plan, jobs=jobs, seed=seed, scheduler=scheduler, say=say
        )
    else:
        results = [None] * len(loaded)
    for (path, prof), res in zip(loaded, results, strict=True):
        if res is None:
            bar = _Bar(prof.name, enabled=not no_progress)
            try:
                res = run_battery(prof, jobs=jobs, progress=bar, seed=seed, plan=plan)
            finally:
                bar.close()
        if isinstance(res, str):
            click.echo(f"audiodsm: {prof.name} ({path}): {res}", err=True)
            failed = True
            continue
        if plots_folder is not None:
            from audiodsm.evaluate.report import write_profile_plots

            written = write_profile_plots(res.curves, plots_folder, stem=prof.name)
            click.echo(f"{prof.name}: {len(written)} plot files in {plots_folder}", err=True)
        if as_json:
            record = {
                "profile": prof.name,
                "file": str(path),
                "digest": res.digest,
                "rate_hz": res.rate_hz,
                "seconds": round(res.seconds, 3),
                "modulator_samples": int(res.modulator_samples),
                "metrics": res.json_metrics(),
                "validity": res.validity(),
                "notes": list(res.notes),
            }
            click.echo(json.dumps(record))
        else:
            names.append(prof.name)
            rows.append(res.json_metrics())
            invalid.append(dict(res.invalid))
            notes.append(list(res.notes))
            click.echo(
                f"{prof.name}: measured in {res.seconds:.1f} s, "
                f"{res.modulator_samples / 1e6:.1f} M modulator samples simulated ({path})",
                err=True,
            )
    if not as_json:
        click.echo(metrics_table(names, rows, invalid, notes))
    if failed:
        sys.exit(EXIT_FAILED)
