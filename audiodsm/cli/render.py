"""``audiodsm render``: play audio files through a profile's chain and write listening files.

For each input file the command writes, into the output folder:

- ``<stem>.<profile>.listen.wav``: the reconstructed, calibrated output at the listening rate
  (24-bit integer or 32-bit float);
- optionally ``<stem>.<profile>.error+<G>dB.wav``: the output minus the time-aligned ideal
  (the input through the same linear filters), raised by G dB;
- optionally the modulator stream: ``<stem>.<profile>.bits`` with its ``.bits.json`` sidecar
  (PDM) or ``<stem>.<profile>.codes.txt`` (NRZ / PWM level codes, one word per line);
- ``<stem>.<profile>.summary.json``: the per-file summary also printed on the terminal.

Every file is written under a temporary name and renamed only when complete; a failure or
Ctrl-C leaves nothing under a final name. Existing outputs are kept unless ``--replace``.
"""

from __future__ import annotations

import json
import math
import os
import re
import sys
import time
from contextlib import ExitStack
from pathlib import Path

import click
import numpy as np

from audiodsm.errors import AudiodsmError, AudioFileError, OutputError

__all__ = ["render", "HEARING_CAUTION", "output_names", "render_file"]

#: Printed (on stderr) whenever listening files are written.
HEARING_CAUTION = (
    "Caution: listening files can be loud. Test tones and amplified error files can damage "
    "hearing and tweeters; start playback at low volume."
)

#: Length of the windows in which the input is checked for silence (seconds).
SILENCE_WINDOW_S = 0.1
#: An input window is silent when no sample exceeds this magnitude (-100 dBFS peak).
SILENCE_PEAK = 1e-5
#: Windows right after sound that are skipped before the noise is measured (decay of the
#: chain's filters and of the program's reverberation tail in the output).
SILENCE_GUARD_WINDOWS = 2
#: Least total silent time for the silence noise level to be reported (seconds).
SILENCE_MIN_S = 0.5


def _safe(text: str) -> str:
    """A file-name-safe form of a profile name."""
    return re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("._") or "profile"


def _gain_text(gain_db: float) -> str:
    return f"{gain_db:g}".replace("-", "minus")


def output_names(input_path, profile, out_dir, *, error_gain_db=None, stream=False) -> dict:
    """The files a render of ``input_path`` writes, by role.

    Parameters
    ----------
    input_path : path-like
    profile : ChainProfile
    out_dir : path-like
    error_gain_db : float or None, keyword-only
        When given, the error-only file is included; its gain is part of its name.
    stream : bool, keyword-only
        Include the modulator-stream export.

    Returns
    -------
    dict
        Role (``"listening"``, ``"error"``, ``"bits"``, ``"bits_sidecar"``, ``"codes"``,
        ``"summary"``) -> Path.
    """
    base = f"{Path(input_path).stem}.{_safe(profile.name)}"
    out = Path(out_dir)
    names = {"listening": out / f"{base}.listen.wav", "summary": out / f"{base}.summary.json"}
    if error_gain_db is not None:
        names["error"] = out / f"{base}.error+{_gain_text(error_gain_db)}dB.wav"
    if stream:
        if profile.output.kind == "pdm":
            names["bits"] = out / f"{base}.bits"
            names["bits_sidecar"] = out / f"{base}.bits.json"
        else:
            names["codes"] = out / f"{base}.codes.txt"
    return names


def _dbfs_rms(power_mean: float) -> float | None:
    """AES17 level: rms relative to a full-scale sine (whose mean power is 1/2)."""
    if power_mean <= 0:
        return None
    return 10.0 * math.log10(2.0 * power_mean)


def _dbfs_peak(peak: float) -> float | None:
    return 20.0 * math.log10(peak) if peak > 0 else None


class _SilenceMeter:
    """A-weighted noise of the output in the input's silent passages (streaming).

    The input is cut into windows of :data:`SILENCE_WINDOW_S`; a window is silent when its
    peak is at most :data:`SILENCE_PEAK`. The output (already time-aligned with the input) is
    band-limited to 20 Hz-20 kHz (AES17 band) and A-weighted (IEC 61672-1); its power is
    summed over the same windows. The level is taken over silent windows that follow at least
    :data:`SILENCE_GUARD_WINDOWS` silent windows, so decays are left out.
    """

    def __init__(self, rate_in, rate_out, channels):
        self.win_in = max(1, round(SILENCE_WINDOW_S * rate_in))
        self.win_out = max(1, round(SILENCE_WINDOW_S * rate_out))
        self.rate_out = rate_out
        self.channels = channels
        self.in_flags: list[bool] = []
        self.in_fill = 0
        self.in_peak = 0.0
        self.out_power: list[np.ndarray] = []
        self.out_acc = np.zeros(channels)
        self.out_fill = 0
        self.band_state = None
        self.weight_state = None

    def feed_input(self, x):
        pos = 0
        n = x.shape[0]
        while pos < n:
            take = min(self.win_in - self.in_fill, n - pos)
            if take:
                self.in_peak = max(self.in_peak, float(np.abs(x[pos : pos + take]).max()))
            pos += take
            self.in_fill += take
            if self.in_fill == self.win_in:
                self.in_flags.append(self.in_peak <= SILENCE_PEAK)
                self.in_fill = 0
                self.in_peak = 0.0

    def feed_output(self, y):
        from audiodsm.measure.bands import band_limit
        from audiodsm.measure.weighting import apply_weighting

        if y.shape[0] == 0:
            return
        yb, self.band_state = band_limit(y, rate_hz=self.rate_out, state=self.band_state)
        yw, self.weight_state = apply_weighting(
            yb, rate_hz=self.rate_out, kind="a", state=self.weight_state
        )
        sq = yw * yw
        pos = 0
        n = sq.shape[0]
        while pos < n:
            take = min(self.win_out - self.out_fill, n - pos)
            self.out_acc += sq[pos : pos + take].sum(axis=0)
            pos += take
            self.out_fill += take
            if self.out_fill == self.win_out:
                self.out_power.append(self.out_acc / self.win_out)
                self.out_acc = np.zeros(self.channels)
                self.out_fill = 0

    def result(self):
        """(silent seconds measured, A-weighted noise dBFS per channel or None)."""
        flags = self.in_flags
        usable = [
            k
            for k in range(min(len(flags), len(self.out_power)))
            if k >= SILENCE_GUARD_WINDOWS and all(flags[k - SILENCE_GUARD_WINDOWS : k + 1])
        ]
        seconds = len(usable) * SILENCE_WINDOW_S
        if seconds < SILENCE_MIN_S:
            return seconds, [None] * self.channels
        power = np.mean([self.out_power[k] for k in usable], axis=0)
        return seconds, [_dbfs_rms(float(p)) for p in power]


def render_file(
    input_path,
    profile,
    out_dir,
    *,
    listening_rate_hz=None,
    float_output=None,
    error_gain_db=None,
    stream=False,
    overwrite=False,
    protect=(),
    progress=None,
) -> dict:
    """Render one file through a profile's chain; return its summary (also written as JSON).

    Parameters
    ----------
    input_path : path-like
        Audio file (WAV, FLAC, AIFF) at one of the supported rates, 1 to 8 channels.
    profile : ChainProfile
    out_dir : path-like
        Existing, writable folder that does not hold the input.
    listening_rate_hz : int, optional
        Default: the profile's listening rate (0 there: the input rate).
    float_output : bool, optional
        32-bit float instead of 24-bit integer; default from the profile.
    error_gain_db : float or None
        Write the error-only file with this gain (dB); None: no error file.
    stream : bool
        Also export the modulator stream.
    overwrite : bool
        Replace existing outputs (never an input).
    protect : sequence of path
        Files never to replace (all inputs of the run).
    progress : callable, optional
        Called with the number of input frames done after each block.

    Returns
    -------
    dict
        The summary (see docs/render.md for its keys).

    Raises
    ------
    AudioFileError, OutputError, ParameterError
        Bad input, an output that exists, or an unwritable folder. Nothing is left under a
        final name.
    """
    from audiodsm.io import audio_info, iter_audio_blocks, open_audio_writer
    from audiodsm.profile import AUDIO_RATES_HZ, profile_digest
    from audiodsm.stages.chain import Chain
    from audiodsm.stages.output_stage import CodeTextWriter, PackedBitsWriter

    path = Path(input_path)
    info = audio_info(path)
    if info.rate_hz not in AUDIO_RATES_HZ:
        raise AudioFileError(
            str(path),
            f"sample rate {info.rate_hz} Hz is not supported; expected one of "
            + ", ".join(str(r) for r in AUDIO_RATES_HZ),
        )
    names = output_names(path, profile, out_dir, error_gain_db=error_gain_db, stream=stream)
    protected = [Path(p) for p in protect] + [path]
    for target in names.values():
        for other in protected:
            if target.exists() and os.path.samefile(target, other):
                raise OutputError(f"{target}: refusing to overwrite an input file")
        if target.exists() and not overwrite:
            raise OutputError(f"{target}: already exists (use --replace to replace it)")
    chain = Chain.from_profile(
        profile, info.rate_hz, info.channels, listening_rate_hz=listening_rate_hz
    )
    if float_output is None:
        float_output = profile.listening.sample_format == "float32"
    subtype = "FLOAT" if float_output else "PCM_24"
    keep = ("listening", "error") if error_gain_db is not None else ("listening",)
    error_scale = 10.0 ** (error_gain_db / 20.0) if error_gain_db is not None else 1.0
    silence = _SilenceMeter(info.rate_hz, chain.listening_rate_hz, info.channels)
    power = np.zeros(info.channels)
    peak = np.zeros(info.channels)
    n_out = 0
    error_clipped = np.zeros(info.channels, dtype=np.int64)
    out_clipped = np.zeros(info.channels, dtype=np.int64)
    refuse = profile.input.over_full_scale == "refuse"
    done = [0]
    started = time.perf_counter()

    def tapped_blocks():
        for block in iter_audio_blocks(path, block_frames=chain.block_frames):
            if refuse:
                over = np.abs(block) > 1.0
                if over.any():
                    frame = done[0] + int(np.argwhere(over)[0][0])
                    raise AudioFileError(
                        str(path),
                        f"sample beyond full scale at frame {frame} "
                        "(the profile sets input.over_full_scale = 'refuse')",
                    )
            silence.feed_input(block)
            yield block
            done[0] += block.shape[0]
            if progress is not None:
                progress(block.shape[0])

    state = None

    def listening_writer(path):
        return open_audio_writer(
            path,
            rate_hz=int(chain.listening_rate_hz),
            channels=info.channels,
            subtype=subtype,
            overwrite=overwrite,
            protect=protected,
        )

    with ExitStack() as stack:
        listen_w = stack.enter_context(listening_writer(names["listening"]))
        error_w = None
        if "error" in names:
            error_w = stack.enter_context(listening_writer(names["error"]))
        stream_w = None
        if "bits" in names:
            stream_w = stack.enter_context(
                PackedBitsWriter(
                    names["bits"],
                    rate_hz=chain.modulator_rate_hz,
                    channels=info.channels,
                    overwrite=overwrite,
                )
            )
        elif "codes" in names:
            stream_w = stack.enter_context(
                CodeTextWriter(
                    names["codes"],
                    levels=profile.modulator.levels,
                    channels=info.channels,
                    overwrite=overwrite,
                )
            )
        run_keep = keep + (("modulator",) if stream_w is not None else ())
        for block, block_state in chain.stream(tapped_blocks(), keep=run_keep):
            state = block_state
            if stream_w is not None and block.modulator is not None:
                stream_w.append(block.modulator)
            y = block.listening
            power += (y * y).sum(axis=0)
            if y.shape[0]:
                peak = np.maximum(peak, np.abs(y).max(axis=0))
            n_out += y.shape[0]
            out_clipped += (np.abs(y) > 1.0).sum(axis=0)
            silence.feed_output(y)
            listen_w.write(y if float_output else np.clip(y, -1.0, 1.0))
            if error_w is not None:
                e = block.error * error_scale
                if not float_output:
                    error_clipped += (np.abs(e) > 1.0).sum(axis=0)
                    e = np.clip(e, -1.0, 1.0)
                error_w.write(e)
        elapsed = time.perf_counter() - started
        stats = state.stats
        silent_s, silence_dbfs = silence.result()
        seconds = info.frames / info.rate_hz
        summary = {
            "input": str(path),
            "profile": profile.name,
            "profile_digest": profile_digest(profile),
            "rate_hz": info.rate_hz,
            "listening_rate_hz": int(chain.listening_rate_hz),
            "modulator_rate_hz": float(chain.modulator_rate_hz),
            "frames": info.frames,
            "duration_s": seconds,
            "latency_s": chain.latency_s,
            "elapsed_s": elapsed,
            "speed_x_realtime": seconds / elapsed if elapsed > 0 else None,
            "sample_format": "float32" if float_output else "int24",
            "outputs": {role: str(p) for role, p in names.items() if role not in ("bits_sidecar",)},
            "error_gain_db": error_gain_db,
            "stage_seconds": {k: round(v, 4) for k, v in chain.stage_seconds.items()},
            "silent_seconds": silent_s,
            "channels": [],
        }
        if "bits_sidecar" in names:
            summary["outputs"]["bits_sidecar"] = str(names["bits_sidecar"])
        switching = stats.switching_rate_hz(info.rate_hz)
        for c in range(info.channels):
            summary["channels"].append(
                {
                    "channel": c,
                    "rms_dbfs": _dbfs_rms(float(power[c]) / max(1, n_out)),
                    "peak_dbfs": _dbfs_peak(float(peak[c])),
                    "input_clipped_samples": int(stats.clipped_samples[c]),
                    "output_clipped_samples": int(out_clipped[c]),
                    "error_clipped_samples": int(error_clipped[c]) if error_w else None,
                    "overload_samples": int(stats.overload_count[c]),
                    "dropped_pulses": int(stats.dropped_pulses[c]),
                    "stretched_pulses": int(stats.stretched_pulses[c]),
                    "switching_rate_hz": float(switching[c]),
                    "state_peak": [float(v) for v in stats.state_peak[c]],
                    "silence_noise_dbfs_a": silence_dbfs[c],
                }
            )
    # the audio files are complete and renamed; the summary goes last
    _write_json_atomic(names["summary"], summary, overwrite=overwrite)
    return summary


def _write_json_atomic(path: Path, data: dict, *, overwrite: bool) -> None:
    from audiodsm.io import replace_text_atomically

    if path.exists() and not overwrite:
        raise OutputError(f"{path}: already exists (use --replace to replace it)")
    replace_text_atomically(path, json.dumps(data, indent=2) + "\n")


def _fmt(value, spec=".1f", none="-"):
    return none if value is None else format(value, spec)


def _table(summary: dict) -> str:
    """An aligned plain-text table of one file's summary."""
    head = (
        f"{summary['input']} -> {summary['outputs']['listening']}\n"
        f"  profile {summary['profile']}, {summary['rate_hz']} Hz in, "
        f"{summary['listening_rate_hz']} Hz out ({summary['sample_format']}), modulator "
        f"{summary['modulator_rate_hz'] / 1e6:.4g} MHz, {summary['duration_s']:.2f} s in "
        f"{summary['elapsed_s']:.2f} s ({_fmt(summary['speed_x_realtime'], '.1f')}x real time), "
        f"latency {summary['latency_s'] * 1e3:.3f} ms"
    )
    cols = [
        ("ch", "channel", "d"),
        ("rms dBFS", "rms_dbfs", ".2f"),
        ("peak dBFS", "peak_dbfs", ".2f"),
        ("silence dBFS(A)", "silence_noise_dbfs_a", ".1f"),
        ("clipped in", "input_clipped_samples", "d"),
        ("clipped out", "output_clipped_samples", "d"),
        ("overloads", "overload_samples", "d"),
        ("dropped", "dropped_pulses", "d"),
        ("stretched", "stretched_pulses", "d"),
        ("switching kHz", "switching_rate_hz", None),
    ]
    rows = [[c[0] for c in cols]]
    for ch in summary["channels"]:
        row = []
        for _, key, spec in cols:
            v = ch[key]
            row.append(_fmt(v / 1e3, ".1f") if spec is None else _fmt(v, spec))
        rows.append(row)
    widths = [max(len(r[i]) for r in rows) for i in range(len(cols))]
    lines = [
        "  " + "  ".join(cell.rjust(w) for cell, w in zip(r, widths, strict=True)) for r in rows
    ]
    tail = []
    if summary["silent_seconds"] < SILENCE_MIN_S:
        tail.append(
            f"  (silence noise not measured: {summary['silent_seconds']:.1f} s of silent input, "
            f"at least {SILENCE_MIN_S:g} s needed)"
        )
    for role, p in summary["outputs"].items():
        if role not in ("listening", "summary"):
            tail.append(f"  {role}: {p}")
    return "\n".join([head, *lines, *tail])


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
    input's silent passages.

    Caution: listening files can be loud. Test tones and amplified error files can damage
    hearing and tweeters; start playback at low volume.
    """
    from audiodsm.errors import ParameterError
    from audiodsm.profile import AUDIO_RATES_HZ, load_profile

    profile = load_profile(profile_path)
    if error_gain is not None and not (math.isfinite(error_gain) and 0 <= error_gain <= 80):
        raise ParameterError("--error-gain", error_gain, "a number of dB from 0 to 80")
    if listen_rate is not None and listen_rate not in AUDIO_RATES_HZ:
        raise ParameterError(
            "--listen-rate", listen_rate, "one of " + ", ".join(map(str, AUDIO_RATES_HZ))
        )
    if error_file is None:  # not given: the profile decides, and --error-gain asks for it
        want_error = profile.listening.error_file or error_gain is not None
    else:
        want_error = error_file
    gain_db = None
    if want_error:
        gain_db = profile.listening.error_gain_db if error_gain is None else float(error_gain)
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the output folder ({exc.strerror})") from None
    if not os.access(out, os.W_OK | os.X_OK):
        raise OutputError(f"{out}: the output folder is not writable")
    seen = {}
    for name in inputs:
        stem = Path(name).stem
        if stem in seen and Path(seen[stem]).resolve() != Path(name).resolve():
            raise OutputError(
                f"{name}: has the same name as {seen[stem]}; their outputs would collide "
                "(render them into different folders)"
            )
        seen.setdefault(stem, name)
    out_real = out.resolve()
    for name in inputs:
        if Path(name).resolve().parent == out_real:
            raise OutputError(
                f"{name}: the output folder holds this input; choose another --out-dir"
            )
    click.echo(HEARING_CAUTION, err=True)
    if gain_db is not None:
        click.echo(
            f"Caution: error-only files are amplified by {gain_db:g} dB; a loud passage in them "
            "can be far above full scale. Turn the volume down before playing them.",
            err=True,
        )
    failures = 0
    for name in inputs:
        try:
            summary = _render_one(
                name,
                profile,
                out,
                listen_rate=listen_rate,
                float32=float32,
                gain_db=gain_db,
                save_stream=save_stream,
                replace=replace,
                protect=inputs,
                show_progress=not no_progress,
            )
        except AudiodsmError as exc:
            click.echo(f"audiodsm: error: {exc}", err=True)
            failures += 1
            continue
        if as_json:
            click.echo(json.dumps(summary))
        else:
            click.echo(_table(summary))
    if failures:
        sys.exit(2)


def _render_one(
    name,
    profile,
    out,
    *,
    listen_rate,
    float32,
    gain_db,
    save_stream,
    replace,
    protect,
    show_progress,
):
    from audiodsm.io import audio_info

    info = audio_info(name)
    bar = _SpeedBar(info.frames, Path(name).name) if show_progress else None
    try:
        return render_file(
            name,
            profile,
            out,
            listening_rate_hz=listen_rate,
            float_output=float32,
            error_gain_db=gain_db,
            stream=save_stream,
            overwrite=replace,
            protect=protect,
            progress=bar.update if bar is not None else None,
        )
    finally:
        if bar is not None:
            bar.close()


class _SpeedBar:
    """A click progress bar on stderr that also shows input samples per second."""

    def __init__(self, frames, label):
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

    def close(self):
        self.bar.__exit__(None, None, None)
