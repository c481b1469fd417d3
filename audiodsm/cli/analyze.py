"""``audiodsm analyze FILE...``: measure any audio file the way AES17 measures a converter.

For each file and channel the command finds what the channel holds (tone, twin tone, silence,
program) and measures accordingly (the job is :func:`audiodsm.evaluate.analyze.analyze_file`):
a tone over its settled part unless ``--span`` sets the stretch; channels are numbered from 1.
By default it prints an aligned table per file with units; with ``--json`` it prints exactly
one JSON object per file per line on stdout and nothing else there. A bad file gives one line
on stderr naming the file and the problem; the other files are still measured, and the exit
code is 2 when any file was bad, else 0.
"""

from __future__ import annotations

import json
import sys

import click

from audiodsm.errors import AudiodsmError, AudioFileError

__all__ = ["analyze"]

#: Files longer than this (seconds of audio) get a progress bar on stderr.
PROGRESS_MIN_S = 20.0


# ---------------------------------------------------------------------------------------------
# Command
# ---------------------------------------------------------------------------------------------


@click.command("analyze")
@click.argument("files", nargs=-1, required=True, type=click.Path(dir_okay=True))
@click.option(
    "--json",
    "as_json",
    is_flag=True,
    help="Print one JSON object per file per line on stdout instead of tables.",
)
@click.option(
    "--span",
    "span_text",
    metavar="START:END",
    default=None,
    help="Measure only this stretch of every file, in seconds (either end may be empty; "
    "negative counts from the end; 'all' is the whole file). Default: each tone's settled "
    "part, found automatically; other content whole.",
)
@click.option("--no-progress", is_flag=True, help="Never show a progress bar on stderr.")
def analyze(files, as_json, span_text, no_progress):
    """Measure audio FILES: what each channel holds, THD+N, THD, noise, DR, idle tones.

    Reads WAV (including WAVE_FORMAT_EXTENSIBLE), FLAC and AIFF; 8 to 32-bit integer and
    32/64-bit float; 1 to 8 channels at 44.1 kHz or more. Exit code 0 when every file was
    measured, 2 when any file was bad (the others are still measured).
    """
    # the measurement stack is imported when the command runs, not for ``audiodsm --help``
    from audiodsm.evaluate.analyze import analyze_file, format_table, parse_span
    from audiodsm.io import audio_info

    span_s = None if span_text is None else parse_span(span_text)
    bad = printed = 0
    for path in files:
        try:
            info = audio_info(path)
            show = (not no_progress) and info.duration_s >= PROGRESS_MIN_S
            if show:
                with click.progressbar(
                    length=info.frames, label=f"analyzing {path}", file=sys.stderr
                ) as bar:
                    result = analyze_file(path, span_s=span_s, progress=bar.update)
            else:
                result = analyze_file(path, span_s=span_s)
        except AudioFileError as exc:
            click.echo(f"audiodsm: error: {exc}", err=True)
            bad += 1
            continue
        except AudiodsmError as exc:  # a measurement refused this file's content
            click.echo(f"audiodsm: error: {path}: {exc}", err=True)
            bad += 1
            continue
        if as_json:
            click.echo(json.dumps(result.to_dict(), allow_nan=False))
        else:
            if printed:
                click.echo("")
            click.echo(format_table(result))
        printed += 1
    if bad:
        sys.exit(2)
