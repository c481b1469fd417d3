"""The render job: play audio files through a profile's chain and write listening files.

For each input file :func:`render_file` writes, into the output folder:

- ``<stem>.<profile>.listen.wav``: the reconstructed, calibrated output at the listening rate
  (24-bit integer or 32-bit float);
- optionally ``<stem>.<profile>.error+<G>dB.wav``: the output minus the time-aligned ideal
  (the input through the same linear filters), raised by G dB;
- optionally the modulator stream: ``<stem>.<profile>.bits`` with its ``.bits.json`` sidecar
  (PDM) or ``<stem>.<profile>.codes.txt`` (NRZ / PWM level codes, one word per line);
- ``<stem>.<profile>.summary.json``: the per-file summary (channels numbered from 1).

The outputs of one input are one set (:class:`audiodsm.io_files.OutputSet`): each file is
written under a temporary name, and all of them are renamed together once the summary is
written, so a failure or Ctrl-C at any point (a full disk while writing the summary included)
leaves nothing under a final name. Existing outputs, dangling symlinks among them, are kept
unless asked to replace them. Names too long for the file system are shortened with a digest
(:func:`audiodsm.io_files.fit_file_name`). :func:`render_files` renders several inputs into one
folder (``audiodsm render``), each distinct file once (:func:`distinct_inputs`);
:func:`prepare_output_folder` checks that folder first, comparing folders by device and inode.
"""

from __future__ import annotations

import errno
import json
import math
import os
import queue
import re
import threading
import time
from contextlib import ExitStack, closing, nullcontext
from pathlib import Path

import numpy as np

from audiodsm.errors import AudiodsmError, AudioFileError, OutputError
from audiodsm.measure.silence import SILENCE_MIN_S, SilenceNoiseMeter, mean_power_dbfs

__all__ = [
    "HEARING_CAUTION",
    "output_names",
    "render_file",
    "render_files",
    "distinct_inputs",
    "prepare_output_folder",
    "chosen_error_gain_db",
    "summary_text",
]

#: Said (on stderr, or at the end of the demo) once a listening file has been written.
HEARING_CAUTION = (
    "Caution: listening files can be loud. Test tones and amplified error files can damage "
    "hearing and tweeters; start playback at low volume."
)


def _safe(text: str) -> str:
    """A file-name-safe form of a profile name."""
    return re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("._") or "profile"


def _gain_text(gain_db: float) -> str:
    return f"{gain_db:g}".replace("-", "minus")


# Room kept after ``<stem>.<profile>`` for the longest role suffix: ".error+<gain>dB.wav" with
# the longest gain ``:g`` writes ("minus1.23457e-300") is 30 bytes; the others are shorter.
_ROLE_SUFFIX_BYTES = 32


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

    Notes
    -----
    The names share the base ``<input stem>.<profile name>``. A base too long for every name
    built on it to fit the file system (with room for the temporary name wrapped around it
    while it is written) keeps its start and gets ``-`` and 16 hex digits of the SHA-256 of
    the whole base (:func:`audiodsm.io_files.fit_file_name`), so long names that differ anywhere
    stay apart and the same input and profile always get the same names.
    """
    from audiodsm.io_files import MAX_OUTPUT_NAME_BYTES, fit_file_name

    base = f"{Path(input_path).stem}.{_safe(profile.name)}"
    base = fit_file_name(base, max_bytes=MAX_OUTPUT_NAME_BYTES - _ROLE_SUFFIX_BYTES)
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


def _computed_ahead(items, depth: int = 2):
    """Yield the items of the iterator ``items``, computed in a helper thread ahead of use.

    At most ``depth`` items wait. An exception raised by ``items`` is raised here, in the
    caller's thread, when its turn comes; when the caller stops early (an error, Ctrl-C) the
    helper stops after the item it is computing and is waited for, so nothing runs on after
    the caller has returned.
    """
    done = object()
    waiting = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def offer(entry) -> bool:
        while not stop.is_set():
            try:
                waiting.put(entry, timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def produce():
        try:
            for item in items:
                if not offer((item, None)):
                    return
            offer((done, None))
        except BaseException as exc:  # handed to the caller, raised there
            offer((done, exc))
        finally:
            close = getattr(items, "close", None)
            if close is not None:
                close()

    helper = threading.Thread(target=produce, name="audiodsm-render-ahead", daemon=True)
    helper.start()
    try:
        while True:
            item, exc = waiting.get()
            if item is done:
                if exc is not None:
                    raise exc
                return
            yield item
    finally:
        stop.set()
        helper.join()


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
        Bad input, or an output that exists (a dangling symlink included). Nothing is left
        under a final name.
    StorageError
        An output could not be written (full disk, read-only folder); the message names the
        file and the cause. Nothing of this input is left under a final name, so a rerun
        starts clean.
    """
    from audiodsm.io import audio_info, iter_audio_blocks, open_audio_writer
    from audiodsm.io_files import OutputSet, refuse_dangling_symlink, same_file
    from audiodsm.profile import AUDIO_RATES_HZ
    from audiodsm.profile_text import profile_digest
    from audiodsm.stages.chain import Chain
    from audiodsm.stages.stream_export import CodeTextWriter, PackedBitsWriter

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
            if same_file(target, other):
                raise OutputError(f"{target}: refusing to overwrite an input file")
        refuse_dangling_symlink(target, replace=overwrite)
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
            silence.feed_input(block)  # its input half only: feed_output runs in the caller
            yield block
            done[0] += block.shape[0]

    state = None

    def listening_writer(path):
        return open_audio_writer(
            path,
            rate_hz=int(chain.listening_rate_hz),
            channels=info.channels,
            subtype=subtype,
            overwrite=overwrite,
            protect=protected,
            output_set=outputs,
        )

    # one set: the audio files wait under their temporary names until the summary is written
    with OutputSet() as outputs, ExitStack() as stack:
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
                    output_set=outputs,
                )
            )
        elif "codes" in names:
            stream_w = stack.enter_context(
                CodeTextWriter(
                    names["codes"],
                    levels=profile.modulator.levels,
                    channels=info.channels,
                    overwrite=overwrite,
                    output_set=outputs,
                )
            )
        run_keep = keep + (("modulator",) if stream_w is not None else ())
        # the chain (with the input's reading) runs a block ahead in a helper thread while
        # this one writes the last block's outputs: same blocks, same order, same numbers
        produced = ((b, st, done[0]) for b, st in chain.stream(tapped_blocks(), keep=run_keep))
        reported = 0
        # closed on the way out (an error or Ctrl-C below): the helper stops and is joined
        # before the writers and the output set clean up
        ahead = stack.enter_context(closing(_computed_ahead(produced)))
        for block, block_state, read in ahead:
            if progress is not None and read > reported:
                progress(read - reported)
                reported = read
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
        stack.close()  # the audio files are complete (still under their temporary names)
        outputs.add_text(
            names["summary"], json.dumps(summary, indent=2) + "\n", overwrite=overwrite
        )
    # leaving the block renamed the whole set, or (on any failure) removed it
    return summary


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


def distinct_inputs(inputs) -> tuple[list, list]:
    """The inputs with every repeat of the same file left out, and the repeats.

    The same file given twice, by the same path or another (``./a.wav`` and ``a.wav``, a
    symlink, a bind mount), is rendered once: a second render would only find the first one's
    outputs in its way. Files are compared by device and inode
    (:func:`audiodsm.io_files.same_file`); paths that do not exist, by their absolute text.

    Parameters
    ----------
    inputs : sequence of path-like

    Returns
    -------
    distinct : list
        The inputs in the order given, each file at its first mention.
    repeats : list of (input, earlier input)
        Each input left out, with the earlier mention of the same file.
    """
    from audiodsm.io_files import same_file

    distinct, repeats = [], []
    for name in inputs:
        first = next(
            (
                seen
                for seen in distinct
                if same_file(seen, name)
                or os.path.abspath(os.fspath(seen)) == os.path.abspath(os.fspath(name))
            ),
            None,
        )
        if first is None:
            distinct.append(name)
        else:
            repeats.append((name, first))
    return distinct, repeats


# mkdir failures that are a wrong path (a file in the way, a symlink loop), not a refused write
_NOT_A_FOLDER_ERRNOS = {errno.ENOTDIR, errno.EEXIST, errno.ELOOP}


def _why_not_writable(folder) -> int:
    """The errno of a folder ``os.access`` says cannot be written: read-only file system or not."""
    try:
        read_only = bool(os.statvfs(folder).f_flag & os.ST_RDONLY)
    except (OSError, AttributeError):  # no statvfs (Windows)
        read_only = False
    return errno.EROFS if read_only else errno.EACCES


def prepare_output_folder(out_dir, inputs, *, made=None) -> Path:
    """Create the output folder of a render and check that the inputs can go into it.

    Temporary files that a killed earlier run left in the folder (their writer no longer
    runs) are removed (:func:`audiodsm.io_files.remove_stale_temp_files`).

    Parameters
    ----------
    out_dir : path-like
        The folder (created when missing, with its missing parents).
    inputs : sequence of path-like
        The audio files to render into it (repeats of one file are fine, see
        :func:`distinct_inputs`).
    made : list, optional, keyword-only
        Receives the folders this call created, outermost first, so that a caller that ends
        up writing nothing can remove them again.

    Returns
    -------
    Path
        The folder.

    Raises
    ------
    OutputError
        A file is in the way of the folder, the folder holds an input (compared by device and
        inode, so another path to it, a symlink or a bind mount, is no way around), or two
        different inputs have the same stem (their outputs would collide).
    StorageError
        The folder cannot be created or written: read-only, no permission, disk full.
    """
    from audiodsm.errors import StorageError
    from audiodsm.io_files import remove_stale_temp_files, same_file

    out = Path(out_dir)
    distinct, _ = distinct_inputs(inputs)
    seen = {}
    for name in distinct:
        stem = Path(name).stem
        if stem in seen:
            raise OutputError(
                f"{name}: has the same name as {seen[stem]}; their outputs would collide "
                "(render them into different folders)"
            )
        seen[stem] = name
    missing, walk = [], out
    while not os.path.lexists(walk) and walk != walk.parent:
        missing.append(walk)
        walk = walk.parent
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        if exc.errno in _NOT_A_FOLDER_ERRNOS:
            raise OutputError(f"{out}: cannot create the output folder ({exc.strerror})") from None
        raise StorageError(out, exc) from None
    finally:
        if made is not None:
            made.extend(p for p in reversed(missing) if p.is_dir())
    for name in distinct:
        # the folder of the name given and, for a symlink, of the file it points to
        folders = {Path(name).parent, Path(os.path.realpath(name)).parent}
        if any(same_file(folder, out) for folder in folders):
            raise OutputError(
                f"{name}: the output folder holds this input; choose another --out-dir"
            )
    if not os.access(out, os.W_OK | os.X_OK):  # a read-only mount refuses even root here
        raise StorageError(out, os.strerror(_why_not_writable(out)))
    remove_stale_temp_files(out)
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
        Audio files; none is ever overwritten. A file given more than once is rendered once
        (:func:`distinct_inputs`).
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

    distinct, _ = distinct_inputs(inputs)
    for name in distinct:
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
