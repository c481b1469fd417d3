"""``audiodsm render``: play audio files through a profile's chain and write listening files.

The job itself (output names, the streamed render, the summary) lives in
:mod:`audiodsm.evaluate.render`; this module parses the options, shows a progress bar and the
cautions on stderr (once the first listening file is written), and prints each file's summary
(a table, or one JSON object per line). Channels are numbered from 1. An output folder this
run created is removed again when nothing was written into it. Exit codes: 2 when an input or
an output was refused, 3 when an output could not be written (the message names the path and
the cause).
"""

from __future__ import annotations

import json
import math
import sys
import time
from pathlib import Path

import click

from audiodsm.cli import one_line
from audiodsm.errors import EXIT_OK, EXIT_STORAGE, EXIT_USAGE, AudiodsmError, StorageError

__all__ = ["render"]


@click.command("render")
@click.argument("profile_path", metavar="PROFILE", type=click.Path(dir_okay=False))
@click.argument("inputs", metavar="INPUT...", nargs=-1, required=True, type=click.Path())
@click.option(
    "--out-dir",
    "out_dir",
    required=True,
    type=click.Path(file_okay=False),
    help="Folder for the outputs (created if missing); it may not hold an input.",
)
@click.option(
    "--listen-rate",
    "listen_rate",
    type=int,
    default=None,
    help="Sample rate of the listening files (Hz); default: the profile's, else the input's.",
)
@click.option(
    "--float32/--int24",
    "float32",
    default=None,
    help="Listening files as 32-bit float or 24-bit integer (default: the profile's).",
)
@click.option(
    "--save-stream",
    is_flag=True,
    help="Also save the modulator stream: packed bits + JSON sidecar (PDM) or level codes "
    "as text, one word per line (NRZ, PWM).",
)
@click.option(
    "--error-file/--no-error-file",
    "error_file",
    default=None,
    help="Also write the error-only file: output minus the time-aligned ideal, amplified "
    "(default: the profile's).",
)
@click.option(
    "--error-gain",
    "error_gain",
    type=float,
    default=None,
    help="Gain of the error-only file in dB (default: the profile's); it is in the file name. "
    "Implies --error-file unless --no-error-file is given.",
)
@click.option("--replace", is_flag=True, help="Replace outputs that already exist.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON summary per file.")
@click.option("--no-progress", is_flag=True, help="Do not show the progress bar.")
def render(
    profile_path,
    inputs,
    out_dir,
    listen_rate,
    float32,
    save_stream,
    error_file,
    error_gain,
    replace,
    as_json,
    no_progress,
):
    """Play INPUT files through the chain of PROFILE and write listening files to --out-dir.

    Each input gives a calibrated listening WAV (a -1 dBFS 997 Hz tone in comes out at
    -1 dBFS), optionally an amplified error-only WAV and the modulator stream, and a summary:
    rms and peak per channel, clip/overload/pulse counts, and the A-weighted noise in the
    input's silent passages. A file given twice is rendered once. Exit code 2 when an
    input or an output is refused, 3 when an output could not be written.

    Caution: listening files can be loud. Test tones and amplified error files can damage
    hearing and tweeters; start playback at low volume.
    """
    from audiodsm.errors import ParameterError
    from audiodsm.evaluate.render import (
        chosen_error_gain_db,
        distinct_inputs,
        prepare_output_folder,
        render_files,
        summary_text,
    )
    from audiodsm.profile import AUDIO_RATES_HZ, load_profile

    profile = load_profile(profile_path)
    if error_gain is not None and not (math.isfinite(error_gain) and 0 <= error_gain <= 80):
        raise ParameterError("--error-gain", error_gain, "a number of dB from 0 to 80")
    if listen_rate is not None and listen_rate not in AUDIO_RATES_HZ:
        raise ParameterError(
            "--listen-rate", listen_rate, "one of " + ", ".join(map(str, AUDIO_RATES_HZ))
        )
    gain_db = chosen_error_gain_db(profile, error_file=error_file, error_gain_db=error_gain)
    inputs, repeats = distinct_inputs(inputs)
    for name, first in repeats:
        click.echo(f"audiodsm: note: {name} is the same file as {first}; rendered once", err=True)
    made = []  # folders this run created: removed again if nothing is written into them
    written = 0
    exit_code = EXIT_OK
    try:
        out = prepare_output_folder(out_dir, inputs, made=made)
        from audiodsm.stages.loop_cache import compiled_loops_missing

        if compiled_loops_missing():
            click.echo(
                "audiodsm: compiling loops, once (the first run of a fresh checkout takes about "
                "15 s longer; later runs load them)",
                err=True,
            )
        for _name, outcome in render_files(
            inputs,
            profile,
            out,
            listening_rate_hz=listen_rate,
            float_output=float32,
            error_gain_db=gain_db,
            stream=save_stream,
            overwrite=replace,
            progress=None if no_progress else _SpeedBar,
        ):
            if isinstance(outcome, AudiodsmError):
                click.echo(f"audiodsm: error: {one_line(outcome)}", err=True)
                # an output that could not be written outranks a refused input
                storage = isinstance(outcome, StorageError)
                exit_code = max(exit_code, EXIT_STORAGE if storage else EXIT_USAGE)
                continue
            written += 1
            if written == 1:  # the cautions go with the first listening file
                _cautions(gain_db)
            click.echo(json.dumps(outcome) if as_json else summary_text(outcome))
    finally:
        if not written:
            for folder in reversed(made):  # innermost first; a folder not empty stays
                try:
                    folder.rmdir()
                except OSError:
                    break
    if exit_code != EXIT_OK:
        sys.exit(exit_code)


def _cautions(gain_db) -> None:
    """The hearing caution, and the error-only file's gain when one is written (stderr)."""
    from audiodsm.evaluate.render import HEARING_CAUTION

    click.echo(HEARING_CAUTION, err=True)
    if gain_db is not None:
        click.echo(
            f"Caution: error-only files are amplified by {gain_db:g} dB; a loud passage in them "
            "can be far above full scale. Turn the volume down before playing them.",
            err=True,
        )


class _SpeedBar:
    """A click progress bar on stderr that also shows input samples per second."""

    def __init__(self, path, frames):
        label = Path(path).name
        self.started = time.perf_counter()
        self.done = 0
        self.bar = click.progressbar(
            length=frames,
            label=label,
            file=sys.stderr,
            show_eta=True,
            item_show_func=self._speed,
        )
        self.bar.__enter__()

    def _speed(self, _item) -> str:
        elapsed = time.perf_counter() - self.started
        if elapsed <= 0 or not self.done:
            return ""
        return f"{self.done / elapsed / 1e3:.0f} k samples/s"

    def update(self, n):
        self.done += n
        self.bar.update(n, current_item=self.done)

    def __enter__(self):
        return self.update

    def __exit__(self, *exc):
        self.bar.__exit__(None, None, None)
        return False
