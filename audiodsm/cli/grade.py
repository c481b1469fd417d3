"""``audiodsm grade``: run the battery on candidate profiles and grade them against a spec."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import click

from audiodsm.cli._options import parts_option, scheduler_option, short_plan_option
from audiodsm.errors import (
    EXIT_FAILED,
    EXIT_OK,
    EXIT_STORAGE,
    ParameterError,
    StorageError,
    exit_code_for_signal,
)


class _Bar:
    """A plain one-line progress bar on stderr (only when stderr is a terminal)."""

    def __init__(self, enabled: bool):
        self.enabled = enabled and sys.stderr.isatty()
        self.last = ""

    def __call__(self, fraction, label):
        if not self.enabled:
            return
        filled = int(round(30 * fraction))
        text = f"\r[{'=' * filled}{' ' * (30 - filled)}] {100 * fraction:5.1f}%  {label}"[:110]
        sys.stderr.write(text.ljust(len(self.last)))
        sys.stderr.flush()
        self.last = text

    def close(self):
        if self.enabled and self.last:
            sys.stderr.write("\n")
            sys.stderr.flush()


@click.command("grade")
@click.argument("paths", metavar="PROFILE...", nargs=-1, required=True, type=click.Path())
@click.option("--spec", "spec_path", required=True, type=click.Path(), help="Spec sheet (TOML).")
@click.option(
    "--jobs",
    type=int,
    default=None,
    help="Cores to use; profiles run in parallel processes. Default: all cores.",
)
@click.option(
    "--report",
    "report_dir",
    type=click.Path(file_okay=False),
    default=None,
    help="Write the HTML page, JSON and CSV into this folder (created when missing).",
)
@click.option("--json", "as_json", is_flag=True, help="Print the grades as one JSON object.")
@click.option(
    "--cache",
    "cache_dir",
    type=click.Path(file_okay=False),
    default=None,
    help="Folder of cached battery results. Default: $XDG_CACHE_HOME/audiodsm/grades "
    "(~/.cache/audiodsm/grades).",
)
@click.option("--no-cache", is_flag=True, help="Neither read nor write cached results.")
@click.option("--recompute", is_flag=True, help="Run every battery again; refresh the cache.")
@click.option("--seed", type=int, default=0, show_default=True, help="Battery seed.")
@short_plan_option
@scheduler_option
@parts_option
@click.option("--no-progress", is_flag=True, help="Do not show the progress bar.")
def grade(
    paths,
    spec_path,
    jobs,
    report_dir,
    as_json,
    cache_dir,
    no_cache,
    recompute,
    seed,
    short,
    scheduler,
    parts,
    no_progress,
):
    """Grade candidate PROFILE files (or folders of them) against a spec sheet.

    Every profile's chain goes through the test battery; each target of the spec sheet is
    graded pass or fail with a margin in the metric's unit (positive = better than the limit),
    and profiles are ranked by their worst margin. With --short the battery runs its short
    plan, as ``audiodsm measure --short`` does (cached apart from full runs). With --jobs
    above 1 the batteries run on a local Dask cluster that starts and stops by itself; with
    --scheduler (or $AUDIODSM_SCHEDULER) on that scheduler's workers. Exit status: 0
    when every target of every profile passes, 1 when any fails, 2 on bad input or a --scheduler
    that cannot take the batch, 3 when the report cannot be written (the grades are still
    printed), 130 when interrupted by Ctrl-C
    (143 for SIGTERM, 129 for SIGHUP; finished results stay cached; run the same command again
    to resume). A cache that cannot be written only gives a warning. With --parts N (or
    impairments.parts) a profile with random impairments runs N parts, each its own cached
    battery, and each target is graded over the parts (a target's percentile key says what
    share of them must meet it; default all).
    """
    from audiodsm.evaluate.battery import BatteryPlan
    from audiodsm.evaluate.grade import collect_profiles, default_cache_dir, grade_batch
    from audiodsm.evaluate.parts import check_parts
    from audiodsm.evaluate.report import batch_to_dict
    from audiodsm.evaluate.tables import detail_table, spread_tables, summary_table
    from audiodsm.spec import load_spec

    if jobs is not None and not 1 <= jobs <= 256:
        raise ParameterError("--jobs", jobs, "an integer from 1 to 256")
    if parts is not None:
        check_parts(parts, name="--parts")
    spec = load_spec(spec_path)
    profiles = collect_profiles(paths)
    if no_cache:
        cache = None
    else:
        cache = Path(cache_dir) if cache_dir else default_cache_dir()
    protect = [Path(spec_path)] + [p for p, _ in profiles]
    if report_dir is not None:
        from audiodsm.evaluate.report import check_report_dir

        check_report_dir(report_dir, protect=protect)
    bar = _Bar(not no_progress)
    try:
        batch = grade_batch(
            profiles,
            spec,
            jobs=jobs,
            cache_dir=cache,
            recompute=recompute,
            seed=seed,
            battery_options={"plan": BatteryPlan.quick()} if short else None,
            progress=bar,
            scheduler=scheduler,
            parts=parts,
            say=None if as_json else lambda text: click.echo(f"audiodsm: {text}", err=True),
        )
    finally:
        bar.close()

    for text in batch.warnings:
        click.echo(f"audiodsm: warning: {text}", err=True)
    written = {}
    report_failure = None
    if report_dir is not None and batch.grades:
        from audiodsm.evaluate.report import write_report

        try:
            written = write_report(batch, report_dir, protect=protect)
        except StorageError as exc:  # print the grades first, then say what was not written
            report_failure = exc

    if as_json:
        click.echo(json.dumps(batch_to_dict(batch), indent=2))
    else:
        click.echo(f"spec sheet: {spec.name} ({len(spec.targets)} targets) from {spec_path}")
        click.echo("")
        for line in summary_table(batch):
            click.echo(line)
        click.echo("")
        for line in detail_table(batch):
            click.echo(line)
        for line in spread_tables(batch):
            click.echo(line)
        for g in batch.grades:
            if g.failure:
                click.echo(f"{g.name}: {g.failure}")
        if batch.cache_dir:
            click.echo(f"cache: {batch.cache_dir}")
        for kind, path in written.items():
            click.echo(f"report {kind}: {path}")
    if batch.interrupted:
        done = len(batch.grades)
        total = done + len(batch.unfinished)
        click.echo(
            f"interrupted: {done} of {total} profiles finished and kept; run the same command "
            "again to resume",
            err=as_json,  # keep stdout a single JSON document
        )
    if report_failure is not None:
        click.echo(f"audiodsm: error: {report_failure}; report not written", err=True)
        sys.exit(EXIT_STORAGE)
    if batch.interrupted:
        sys.exit(exit_code_for_signal(batch.stop_signal))
    sys.exit(EXIT_OK if batch.passed else EXIT_FAILED)
