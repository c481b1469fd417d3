"""``audiodsm measure``: run the test battery on profiles and print their metrics.

The terminal shows one aligned table: a row per metric with its unit, a column per profile;
an invalid reading shows as ``invalid [n]`` with its numbered reason under the table, then
each profile's battery notes. With ``--json``, stdout carries only one JSON object per
profile, one per line::

    {"profile": str, "file": str, "digest": str, "rate_hz": int, "seconds": float,
     "modulator_samples": int, "metrics": {metric name: number | bool | null, ...},
     "validity": {metric name: {"valid": bool, "reason": str}, ...}, "notes": [str, ...]}

An invalid reading is ``null`` in ``metrics`` and ``"valid": false`` with its reason in
``validity``. A profile run as several parts (``--parts N`` or ``impairments.parts``, only
where it has random impairments) reports part 0 (the profile as written) in those keys and adds
``"parts": {"count": N, "seeds": [int, ...], "percentiles": [5, 95], "spread": {metric:
{"parts", "readings", "min", "p5", "median", "p95", "max"}}, "per_part": [{"part": k, "seed":
int, "metrics": {...}, "validity": {...}}, ...]}``; the terminal adds a spread table per such
profile.

The progress bar goes to stderr, so it never mixes with the JSON.
"""

from __future__ import annotations

import json
import sys

import click

from audiodsm.cli._options import parts_option, scheduler_option, short_plan_option
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
@parts_option
@click.option(
    "--save-plots",
    "plots_folder",
    type=click.Path(file_okay=False),
    default=None,
    help="Also write each profile's plots (PNG and SVG, the report's plots without limits) "
    "into this folder, named <profile>-<plot>.png/.svg.",
)
@click.option("--no-progress", is_flag=True, help="Do not show the progress bar.")
def measure(profiles, as_json, jobs, seed, short, scheduler, parts, plots_folder, no_progress):
    """Run the test battery on each PROFILE (a file, or a folder of .toml files).

    Each profile's chain is driven with AES17-practice stimuli (997 Hz tones, silence, small
    DC offsets, a multitone, twin tones) at its audio rate, and its reconstructed output is
    measured: dynamic range, THD+N, idle noise and idle tones, maximum stable amplitude,
    frequency response, images, IMD, out-of-band noise, noise modulation, state peaks and,
    for PWM stages, pulse counts and switching rate.

    Several profiles run as tasks on a local Dask cluster of worker processes (or on
    --scheduler's workers); a profile whose battery fails is reported with the cause, the
    others are still measured, and the exit status is then 1. With --parts N (or the
    profile's impairments.parts) a profile with random impairments runs N parts, each with
    its own seed (one battery, one task each), and each metric's spread over the parts is
    shown.
    """
    from audiodsm.evaluate.battery import BatteryPlan
    from audiodsm.evaluate.grade import collect_profiles
    from audiodsm.evaluate.measure_batch import measure_on_cluster, measure_part
    from audiodsm.evaluate.parts import (
        SPREAD_PERCENTILES,
        PartReading,
        check_parts,
        metric_spread,
        part_seed_of,
        parts_to_run,
        spread_rows,
    )
    from audiodsm.evaluate.tables import aligned_lines, metrics_table

    if parts is not None:
        check_parts(parts, name="--parts")
    loaded = collect_profiles(profiles)  # every file checked before any runs
    plan = BatteryPlan.quick() if short else BatteryPlan()
    units = [(i, k) for i, (_, p) in enumerate(loaded) for k in range(parts_to_run(p, parts))]
    names, rows, invalid, notes, spreads = [], [], [], [], []
    failed = False
    if len(units) > 1 and (scheduler or (jobs or 2) > 1):
        say = None if as_json else (lambda text: click.echo(f"audiodsm: {text}", err=True))
        results = measure_on_cluster(
            [loaded[i] for i, _ in units],
            plan=plan,
            jobs=jobs,
            seed=seed,
            scheduler=scheduler,
            say=say,
            parts=[k for _, k in units],
        )
    else:
        results = [None] * len(units)
    for u, (i, k) in enumerate(units):
        if results[u] is None:
            prof = loaded[i][1]
            label = prof.name if k == 0 else f"{prof.name} part {k}"
            bar = _Bar(label, enabled=not no_progress)
            try:
                results[u] = measure_part(prof, jobs, seed, plan, k, progress=bar)
            finally:
                bar.close()
    by_profile: dict[int, list] = {}
    for u, (i, k) in enumerate(units):
        by_profile.setdefault(i, []).append((k, results[u]))
    for i, (path, prof) in enumerate(loaded):
        mine = by_profile[i]
        broken = [(k, r) for k, r in mine if isinstance(r, str)]
        if broken:
            k, text = broken[0]
            where = "" if len(mine) == 1 else f" part {k}"
            click.echo(f"audiodsm: {prof.name}{where} ({path}): {text}", err=True)
            failed = True
            continue
        res = mine[0][1]
        readings = [
            PartReading(k, part_seed_of(prof.impairments.part_seed, k), r.metrics, dict(r.invalid))
            for k, r in mine
        ]
        spread = metric_spread(readings) if len(mine) > 1 else {}
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
                "modulator_samples": int(getattr(res, "modulator_samples", 0)),
                "metrics": res.json_metrics(),
                "validity": res.validity(),
                "notes": list(res.notes),
            }
            if spread:
                record["parts"] = {
                    "count": len(mine),
                    "seeds": [p.seed for p in readings],
                    "percentiles": list(SPREAD_PERCENTILES),
                    "spread": spread,
                    "per_part": [
                        {
                            "part": k,
                            "seed": p.seed,
                            "metrics": r.json_metrics(),
                            "validity": r.validity(),
                        }
                        for (k, r), p in zip(mine, readings, strict=True)
                    ],
                }
            click.echo(json.dumps(record))
        else:
            names.append(prof.name)
            rows.append(res.json_metrics())
            invalid.append(dict(res.invalid))
            notes.append(list(res.notes))
            if spread:
                spreads.append((prof.name, len(mine), spread))
            seconds = sum(r.seconds for _, r in mine)
            samples = sum(getattr(r, "modulator_samples", 0) for _, r in mine)
            what = "" if len(mine) == 1 else f" ({len(mine)} parts)"
            click.echo(
                f"{prof.name}: measured{what} in {seconds:.1f} s, "
                f"{samples / 1e6:.1f} M modulator samples simulated ({path})",
                err=True,
            )
    if not as_json:
        click.echo(metrics_table(names, rows, invalid, notes))
        for name, count, spread in spreads:
            click.echo("")
            click.echo(f"{name}: spread over {count} parts (the column above is part 0)")
            table = spread_rows(spread)
            click.echo("\n".join(aligned_lines(table, right=range(2, len(table[0])), rule=True)))
    if failed:
        sys.exit(EXIT_FAILED)
