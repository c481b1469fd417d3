"""The render job: play audio files through a profile's chain and write listening files.

For each input file :func:`render_file` writes, into the output folder:

- ``<stem>.<profile>.listen.wav``: the reconstructed, calibrated output at the listening rate
  (24-bit integer or 32-bit float);
- optionally ``<stem>.<profile>.error+<G>dB.wav``: the output minus the time-aligned ideal
  (the input through the same linear filters), raised by G dB;
- optionally the modulator stream: ``<stem>.<profile>.bits`` with its ``.bits.json`` sidecar
  (PDM) or ``<stem>.<profile>.codes.txt`` (NRZ / PWM level codes, one word per line);
- ``<stem>.<profile>.summary.json``: the per-file summary (channels numbered from 1).

Every file is written under a temporary name and renamed only when complete; a failure or
Ctrl-C leaves nothing under a final name. Existing outputs are kept unless asked to replace
them. :func:`render_files` renders several inputs into one folder (``audiodsm render``);
:func:`prepare_output_folder` checks that folder first.
"""

from __future__ import annotations

import json
import math
import os
import re
import time
from contextlib import ExitStack, nullcontext
from pathlib import Path

import numpy as np

from audiodsm.errors import AudiodsmError, AudioFileError, OutputError
from audiodsm.measure.silence import SILENCE_MIN_S, SilenceNoiseMeter, mean_power_dbfs

__all__ = [
    "HEARING_CAUTION",
    "output_names",
    "render_file",
    "render_files",
    "prepare_output_folder",
    "chosen_error_gain_db",
    "summary_text",
]

#: Said (on stderr, or at the end of the demo) whenever listening files are written.
HEARING_CAUTION = (
    "Caution: listening files can be loud. Test tones and amplified error files can damage "
    "hearing and tweeters; start playback at low volume."
)


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


def _dbfs_peak(peak: float) -> float | None:
    return 20.0 * math.log10(peak) if peak > 0 else None


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
    from audiodsm.profile import AUDIO_RATES_HZ
    from audiodsm.profile_text import profile_digest
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
    silence = SilenceNoiseMeter(info.rate_hz, chain.listening_rate_hz, info.channels)
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
                    "channel": c + 1,
                    "rms_dbfs": mean_power_dbfs(float(power[c]) / max(1, n_out)),
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
    from audiodsm.io_files import replace_text_atomically

    if path.exists() and not overwrite:
        raise OutputError(f"{path}: already exists (use --replace to replace it)")
    replace_text_atomically(path, json.dumps(data, indent=2) + "\n")


def _fmt(value, spec=".1f", none="-"):
    return none if value is None else format(value, spec)


def summary_text(summary: dict) -> str:
    """An aligned plain-text table of one file's render summary, for the terminal.

    Parameters
    ----------
    summary : dict
        What :func:`render_file` returned.

    Returns
    -------
    str
        A header (input, output, rates, format, speed, latency), a row per channel (numbered
        from 1), and lines for the other outputs.
    """
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


def chosen_error_gain_db(profile, *, error_file=None, error_gain_db=None) -> float | None:
    """The gain of the error-only file a render writes, or None for no error file.

    Parameters
    ----------
    profile : ChainProfile
    error_file : bool or None, keyword-only
        Write the error-only file (True), don't (False), or let the profile decide (None);
        then a given ``error_gain_db`` asks for the file too.
    error_gain_db : float or None, keyword-only
        The gain in dB; None: the profile's.

    Returns
    -------
    float or None
    """
    if error_file is None:  # not given: the profile decides, and a gain asks for it
        want_error = profile.listening.error_file or error_gain_db is not None
    else:
        want_error = error_file
    if not want_error:
        return None
    return profile.listening.error_gain_db if error_gain_db is None else float(error_gain_db)


def prepare_output_folder(out_dir, inputs) -> Path:
    """Create the output folder of a render and check that the inputs can go into it.

    Parameters
    ----------
    out_dir : path-like
        The folder (created when missing).
    inputs : sequence of path-like
        The audio files to render into it.

    Returns
    -------
    Path
        The folder.

    Raises
    ------
    OutputError
        The folder cannot be created or written, it holds an input, or two inputs have the
        same stem (their outputs would collide).
    """
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
    return out


def render_files(
    inputs,
    profile,
    out_dir,
    *,
    listening_rate_hz=None,
    float_output=None,
    error_gain_db=None,
    stream=False,
    overwrite=False,
    progress=None,
):
    """Render several files into one folder, one after the other; a bad file stops only itself.

    Parameters
    ----------
    inputs : sequence of path-like
        Audio files; none is ever overwritten.
    profile : ChainProfile
    out_dir : path-like
        A folder :func:`prepare_output_folder` accepted.
    listening_rate_hz, float_output, error_gain_db, stream, overwrite : keyword-only
        As for :func:`render_file`.
    progress : callable, optional, keyword-only
        ``progress(input, frames)`` returns a context manager around one file's render that
        gives the per-block callback of :func:`render_file` (a progress bar, say).

    Yields
    ------
    (input, dict or AudiodsmError)
        Each input with its summary, or with the error that stopped it.
    """
    from audiodsm.io import audio_info

    for name in inputs:
        try:
            watch = nullcontext() if progress is None else progress(name, audio_info(name).frames)
            with watch as update:
                summary = render_file(
                    name,
                    profile,
                    out_dir,
                    listening_rate_hz=listening_rate_hz,
                    float_output=float_output,
                    error_gain_db=error_gain_db,
                    stream=stream,
                    overwrite=overwrite,
                    protect=inputs,
                    progress=update,
                )
        except AudiodsmError as exc:
            yield name, exc
            continue
        yield name, summary
