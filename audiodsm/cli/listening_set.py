"""``audiodsm listening-set``: write a folder of aligned, loudness-matched clips with a page.

The job is :func:`audiodsm.evaluate.listening.make_listening_set`; this module parses the
options, prints the library's alignment and loudness table and says where the page and the key
are.
"""

from __future__ import annotations

import json

import click

__all__ = ["listening_set"]


@click.command("listening-set")
@click.argument("candidates", metavar="CANDIDATE...", nargs=-1, required=True, type=click.Path())
@click.option(
    "-i",
    "--input",
    "inputs",
    multiple=True,
    required=True,
    type=click.Path(dir_okay=False),
    help="Input audio file (repeat for several). With listening files as candidates: one.",
)
@click.option(
    "--out-dir",
    "out_dir",
    required=True,
    type=click.Path(file_okay=False),
    help="The set folder (new or empty); the key is written beside it as <folder>.key.json.",
)
@click.option(
    "--trials", type=int, default=10, show_default=True, help="Blind trials per pair (0: none)."
)
@click.option("--start", "start_s", type=float, default=None, help="Excerpt start (s).")
@click.option("--length", "length_s", type=float, default=None, help="Excerpt length (s).")
@click.option(
    "--renders-dir",
    type=click.Path(file_okay=False),
    default=None,
    help="Where profiles are rendered and renders reused (default: <folder>.renders beside).",
)
@click.option("--seed", type=int, default=None, help="Seed of the trial draw (default: random).")
@click.option("--replace", is_flag=True, help="Replace an old set in the folder (never a key).")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
def listening_set(
    candidates, inputs, out_dir, trials, start_s, length_s, renders_dir, seed, replace, as_json
):
    """Compare CANDIDATE profiles (.toml) or listening files by ear, openly and blind.

    Renders what is missing, aligns every clip with its input to the sample, matches their
    loudness (ITU-R BS.1770-4) downwards within 0.1 LU, and writes a page that opens from the
    file system: open comparison with seamless switching and spectrograms, and blind A/B/X
    trials whose answers are scored by `audiodsm score-answers`.
    """
    from audiodsm.evaluate.listening import PAGE_CAUTION, make_listening_set, set_table

    click.echo(PAGE_CAUTION, err=True)
    summary = make_listening_set(
        candidates,
        inputs,
        out_dir,
        trials_per_pair=trials,
        renders_dir=renders_dir,
        start_s=start_s,
        length_s=length_s,
        seed=seed,
        replace=replace,
        say=lambda line: click.echo(line, err=True),
    )
    if as_json:
        click.echo(json.dumps(summary))
        return
    for line in set_table(summary):
        click.echo(line)
    click.echo(f"{summary['trials']} blind trials over {len(summary['pairs'])} pair(s)")
    click.echo(f"page: {summary['page']}")
    click.echo(f"key (keep it closed until the trials are done): {summary['key']}")
