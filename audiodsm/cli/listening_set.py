"""``audiodsm listening-set``: write a folder of aligned, loudness-matched clips with a page.

The job is :func:`audiodsm.evaluate.listening.make_listening_set`; this module parses the
options, prints the alignment and loudness table and says where the page and the key are.
"""

from __future__ import annotations

import json

import click

__all__ = ["listening_set"]

#: Printed on stderr every time a set is written.
PAGE_CAUTION = (
    "Caution: turn the volume down before the first playback. Test tones and amplified error "
    "files can be loud and narrow-band; they can damage hearing and tweeters. The page starts "
    "at a low level and plays nothing by itself."
)


def _f(v, spec=".2f"):
    return "-" if v is None else format(v, spec)


def clip_table(summary: dict) -> list[str]:
    """Aligned text lines: per input, each clip's delay, gain, loudness and peak after gain."""
    lines = []
    for inp in summary["inputs"]:
        lines.append(
            f"{inp['input']}: {inp['frames']} frames at {inp['rate_hz']} Hz, loudness matched "
            f"to {inp['target_loudness_lufs']:.2f} LUFS"
            + (
                f" (all lowered {-inp['common_headroom_db']:.2f} dB more to avoid clipping)"
                if inp["common_headroom_db"]
                else ""
            )
        )
        head = ["clip", "kind", "delay ms", "corr", "gain dB", "LUFS before", "LUFS", "peak dBFS"]
        rows = [head]
        for c in inp["clips"]:
            rows.append(
                [
                    c["label"],
                    c["kind"],
                    _f(c["delay_ms"], ".3f"),
                    _f(c["correlation"], ".4f"),
                    _f(c["gain_db"]),
                    _f(c.get("loudness_before_lufs")),
                    _f(c["loudness_lufs"]),
                    _f(c["peak_dbfs"]) + (" CLIPS" if c["clipped_samples"] else ""),
                ]
            )
        widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
        for r in rows:
            cells = [r[0].ljust(widths[0]), r[1].ljust(widths[1])]
            cells += [cell.rjust(w) for cell, w in zip(r[2:], widths[2:], strict=True)]
            lines.append("  " + "  ".join(cells))
    return lines


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
    from audiodsm.evaluate.listening import make_listening_set

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
    for line in clip_table(summary):
        click.echo(line)
    click.echo(f"{summary['trials']} blind trials over {len(summary['pairs'])} pair(s)")
    click.echo(f"page: {summary['page']}")
    click.echo(f"key (keep it closed until the trials are done): {summary['key']}")
