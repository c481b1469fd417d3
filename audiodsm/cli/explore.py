"""``audiodsm explore``: grade a design space and keep the front of cost against spec margin."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from audiodsm.cli._options import parts_option, scheduler_option, short_plan_option
from audiodsm.errors import EXIT_OK, exit_code_for_signal

__all__ = ["explore"]


@click.command("explore")
@click.argument("space_path", metavar="SPACE", type=click.Path())
@click.argument("spec_path", metavar="SPEC", type=click.Path())
@click.option(
    "--out",
    "out_dir",
    type=click.Path(file_okay=False),
    default="exploration",
    show_default=True,
    help="Folder for the front's profiles, the plot and the report.",
)
@click.option("--jobs", type=click.IntRange(1, 256), default=None, help="Cores (default: all).")
@click.option(
    "--cache",
    "cache_dir",
    type=click.Path(file_okay=False),
    default=None,
    help="Folder of cached battery results (default: the grade cache).",
)
@short_plan_option
@scheduler_option
@parts_option
@click.option("--no-progress", is_flag=True, help="Do not show the progress bar.")
def explore(space_path, spec_path, out_dir, jobs, cache_dir, short, scheduler, parts, no_progress):
    """Explore the design SPACE (a TOML space file) against the SPEC sheet.

    Every combination of the space's settings is predicted with the linear model (dither
    included); those within the space's prune_slack_db of the spec's dynamic-range target run
    the battery on the cluster (finished batteries come from the cache), and the candidates
    no other beats on both cost and worst margin form the front. Its profiles are written
    as TOML under OUT/front/, with OUT/front.png and OUT/exploration.html. Exit status: 0
    when done, 2 on a bad space file (unknown keys, empty ranges, more candidates than its
    candidate_limit) or an unusable --scheduler, 130 when interrupted (run again to resume).
    A survivor with random impairments runs N parts (--parts N, or the space's fixed key
    impairments.parts) and is graded over them, as grade does.
    """
    from audiodsm.cli.grade import _Bar
    from audiodsm.evaluate.battery import BatteryPlan
    from audiodsm.evaluate.explore import (
        enumerate_candidates,
        explore_space,
        load_space,
        write_exploration,
    )
    from audiodsm.evaluate.grade import default_cache_dir
    from audiodsm.evaluate.parts import check_parts
    from audiodsm.spec import load_spec

    if parts is not None:
        check_parts(parts, name="--parts")
    space = load_space(space_path)
    spec = load_spec(spec_path)
    count = len(enumerate_candidates(space))  # refuses an oversized space before any work
    click.echo(f"audiodsm: {space.name}: {count} candidates", err=True)
    bar = _Bar(not no_progress)
    try:
        result = explore_space(
            space,
            spec,
            cache_dir=Path(cache_dir) if cache_dir else default_cache_dir(),
            plan=BatteryPlan.quick() if short else None,
            jobs=jobs,
            scheduler=scheduler,
            parts=parts,
            progress=bar,
            say=lambda text: click.echo(f"audiodsm: {text}", err=True),
        )
    finally:
        bar.close()
    batch = result.batch
    if batch.interrupted:
        click.echo(f"interrupted: {len(batch.grades)} batteries kept; run again to resume")
        sys.exit(exit_code_for_signal(batch.stop_signal))
    written = write_exploration(result, out_dir)
    graded = sum(c.grade is not None for c in result.candidates)
    click.echo(f"{count} candidates, {count - graded} pruned, {graded} graded, "
               f"{len(result.front)} on the front")  # fmt: skip
    for i in result.front:
        c = result.candidates[i]
        click.echo(f"  {c.profile.name:40s} cost {c.cost:9.1f}  worst margin "
                   f"{c.grade.ranking_margin or 0.0:+7.2f} dB")  # fmt: skip
    click.echo(f"report: {written['report']}")
    sys.exit(EXIT_OK)
