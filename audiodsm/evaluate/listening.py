"""Listening sets: loudness-matched, time-aligned clips and a browser page to compare them.

:func:`make_listening_set` takes two or more candidates (chain profiles, rendered here, or
listening files already rendered) and one or more input files, and writes a folder holding

- ``clips/<input>/``: the input and every candidate as 32-bit float WAV, time-aligned to the
  sample with the input (cross-correlation) and loudness-matched within
  :data:`LOUDNESS_TOLERANCE_LU` by integrated loudness (ITU-R BS.1770-4), always downwards:
  no clip is made louder than it was, and none louder than the input; each candidate's
  amplified error file (when there is one) with its candidate's gain;
- ``listening.html`` and ``page/``: the self-contained page (HTML, CSS, JavaScript, the clips
  as script files and a spectrogram picture of each), opened straight from the file system;
- ``summary.json``: the alignment, loudness, gains and peaks also printed by the command;

and, beside the folder (never inside it), ``<folder>.key.json``: which clip X is in each
blind trial. The trial clips carry neutral names (``page/trials/t01.js``); nothing in the
folder depends on the key. The key is never overwritten.

Time alignment and loudness live in :mod:`audiodsm.measure.alignment` and
:mod:`audiodsm.measure.loudness`; the scoring of saved answers in
:mod:`audiodsm.evaluate.trial_scores`.
"""

from __future__ import annotations

import base64
import itertools
import json
import math
import os
import re
import secrets
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from audiodsm.errors import AudioFileError, OutputError, ParameterError

__all__ = [
    "LOUDNESS_TOLERANCE_LU",
    "KEY_FORMAT",
    "ANSWERS_FORMAT",
    "PAGE_NAME",
    "ListeningCandidate",
    "key_path_for",
    "render_listening_file",
    "spectrogram_dbfs",
    "answers_check",
    "make_listening_set",
    "set_table",
    "PAGE_CAUTION",
]

#: Largest loudness difference left between matched clips (LU).
LOUDNESS_TOLERANCE_LU = 0.1
#: Format tags written into the key and expected in answers files.
KEY_FORMAT = "audiodsm blind-trial key 1"
ANSWERS_FORMAT = "audiodsm blind-trial answers 1"
#: The page's file name inside the set folder.
PAGE_NAME = "listening.html"
#: Default largest delay searched when aligning a candidate with its input (seconds).
MAX_DELAY_S = 0.5
_TEMPLATES = Path(__file__).resolve().parent / "templates"

#: Printed on stderr every time a set is written.
PAGE_CAUTION = (
    "Caution: turn the volume down before the first playback. Test tones and amplified error "
    "files can be loud and narrow-band; they can damage hearing and tweeters. The page starts "
    "at a low level and plays nothing by itself."
)


@dataclass(frozen=True)
class ListeningCandidate:
    """One thing to compare: a chain profile (rendered on demand) or a listening file.

    Attributes
    ----------
    label : str
        Shown in the page and the reports; unique within a set.
    profile : ChainProfile or None
    listening_path : Path or None
        A listening file already rendered (then exactly one input is allowed).
    error_path : Path or None
        Its amplified error file, when one is known.
    """

    label: str
    profile: object = None
    listening_path: Path | None = None
    error_path: Path | None = None

    @classmethod
    def from_path(cls, path) -> ListeningCandidate:
        """A profile (``.toml``) or a listening file (any audio file)."""
        p = Path(path)
        if p.suffix.lower() == ".toml":
            from audiodsm.profile import load_profile

            prof = load_profile(p)
            return cls(label=prof.name, profile=prof)
        stem = p.name.removesuffix(".wav").removesuffix(".listen")
        errors = sorted(p.parent.glob(f"{stem}.error+*dB.wav")) if stem != p.stem else []
        return cls(label=stem, listening_path=p, error_path=errors[0] if errors else None)


def key_path_for(folder) -> Path:
    """Where the key of the set in ``folder`` lives: ``<folder>.key.json`` beside it."""
    f = Path(folder)
    return f.parent / f"{f.name}.key.json"


def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_-]+", "-", text).strip("-") or "clip"


# ---------------------------------------------------------------------------------------------
# Rendering (the one call into the render library)
# ---------------------------------------------------------------------------------------------


def render_listening_file(profile, input_path, work_dir, *, rate_hz, error_gain_db) -> dict:
    """Render ``input_path`` through ``profile`` into ``work_dir`` unless a matching render exists.

    A render is reused when its summary names the same input and profile digest, the same
    listening rate and error gain, its files exist and it is newer than the input.

    Parameters
    ----------
    profile : ChainProfile
    input_path : path-like
    work_dir : path-like
        Folder for the rendered files (created when missing).
    rate_hz : int
        Listening rate (the input's, so the clips can be compared sample by sample).
    error_gain_db : float
        Gain of the error file.

    Returns
    -------
    dict
        ``{"listening": Path, "error": Path, "reused": bool}``.

    References
    ----------
    .. [1] docs/render.md (the render summary's keys).
    """
    from audiodsm.evaluate.render import output_names, render_file
    from audiodsm.profile_text import profile_digest

    work = Path(work_dir)
    work.mkdir(parents=True, exist_ok=True)
    names = output_names(input_path, profile, work, error_gain_db=error_gain_db)
    inp = Path(input_path).resolve()
    try:
        old = json.loads(names["summary"].read_text(encoding="utf-8"))
        reusable = (
            Path(old["input"]).resolve() == inp
            and old["profile_digest"] == profile_digest(profile)
            and old["listening_rate_hz"] == rate_hz
            and old["error_gain_db"] == error_gain_db
            and names["listening"].is_file()
            and names["error"].is_file()
            and names["summary"].stat().st_mtime >= inp.stat().st_mtime
        )
    except (OSError, ValueError, KeyError, TypeError):
        reusable = False
    if not reusable:
        render_file(
            inp,
            profile,
            work,
            listening_rate_hz=rate_hz,
            float_output=True,
            error_gain_db=error_gain_db,
            overwrite=True,
        )
    return {"listening": names["listening"], "error": names["error"], "reused": reusable}


# ---------------------------------------------------------------------------------------------
# Measurements for the page
# ---------------------------------------------------------------------------------------------


def spectrogram_dbfs(x, *, rate_hz, frame_frames=2048):
    """Short-time spectrum of the channel average, in dBFS per bin.

    Hann window, half overlap; a full-scale sine centred on a bin reads 0 dBFS (AES17 full
    scale, spectrum scaling: the window's sum normalized to one).

    Parameters
    ----------
    x : array_like
        ``(frames,)`` or ``(frames, channels)``.
    rate_hz : float
    frame_frames : int, keyword-only
        Window length.

    Returns
    -------
    times_s, frequency_hz, level_dbfs : numpy.ndarray
        ``level_dbfs`` has shape ``(len(frequency_hz), len(times_s))``, floored at -300.

    References
    ----------
    .. [1] AES17-2020, clause 3.12.1 (full-scale amplitude).
    .. [2] F. J. Harris, "On the use of windows for harmonic analysis with the discrete
       Fourier transform", Proc. IEEE 66(1), 1978 (Hann window, coherent gain).
    """
    from scipy.signal import spectrogram

    a = np.asarray(x, dtype=np.float64)
    mono = a.mean(axis=1) if a.ndim == 2 else a
    n = min(int(frame_frames), mono.shape[0])
    f, t, p = spectrogram(
        mono, fs=rate_hz, window="hann", nperseg=n, noverlap=n // 2, scaling="spectrum"
    )
    return t, f, 10.0 * np.log10(np.maximum(2.0 * p, 1e-30))


def _level_stats(x, rate_hz, *, loudness=True, offset_db=0.0) -> dict:
    from audiodsm.measure.loudness import integrated_loudness_lufs

    a = np.asarray(x, dtype=np.float64)
    power = float(np.mean(a * a)) if a.size else 0.0
    peak = float(np.abs(a).max()) if a.size else 0.0
    return {
        "rms_dbfs": 10.0 * math.log10(2.0 * power) if power > 0 else None,
        "peak_dbfs": 20.0 * math.log10(peak) if peak > 0 else None,
        "loudness_lufs": _finite(
            integrated_loudness_lufs(a * 10 ** (offset_db / 20), rate_hz=rate_hz) - offset_db
        )
        if loudness
        else None,
    }


def _finite(v):
    return v if v is not None and math.isfinite(v) else None


# ---------------------------------------------------------------------------------------------
# Answers check value (shared with the page's JavaScript)
# ---------------------------------------------------------------------------------------------


def answers_check(set_id: str, answers) -> str:
    """The check value a saved answers file carries: CRC-32 of its content, 8 hex digits.

    The text checked is ``set_id`` followed by ``;trial=answer`` for every answer in order;
    the page computes the same value when it offers the file. It catches edits made by hand
    (not a deliberate forgery: the method is in the page).

    Parameters
    ----------
    set_id : str
    answers : sequence of dict
        ``{"trial": str, "answer": "A" or "B"}``.

    Returns
    -------
    str

    References
    ----------
    .. [1] ISO/IEC 3309 / ITU-T V.42, CRC-32 (the polynomial of zlib.crc32).
    """
    import zlib

    text = set_id + "".join(f";{a['trial']}={a['answer']}" for a in answers)
    return f"{zlib.crc32(text.encode('utf-8')) & 0xFFFFFFFF:08x}"


# ---------------------------------------------------------------------------------------------
# Building the set
# ---------------------------------------------------------------------------------------------


def _loudness_offset_db(signals, rate_hz) -> float:
    """0, or the common gain under which quiet material is measured.

    BS.1770 ignores blocks below its absolute gate (-70 LUFS), so a quiet passage (the kind
    that shows a noise shaper's floor) may read -inf. Then every clip is measured raised by
    the same gain (the loudest peak brought to 0 dBFS) and the gain is taken off again: the
    levels stay comparable, only the absolute gate moves down by that gain.
    """
    from audiodsm.measure.loudness import integrated_loudness_lufs

    if all(math.isfinite(integrated_loudness_lufs(s, rate_hz=rate_hz)) for s in signals):
        return 0.0
    peak = max(float(np.abs(s).max()) for s in signals)
    return -20.0 * math.log10(peak) if peak > 0 else 0.0


def _prepare_input(input_path, candidates, renders_dir, max_delay_s, say):
    """Read one input and its candidates (rendering what is missing) and align them."""
    from audiodsm.io import audio_info, read_audio
    from audiodsm.measure.alignment import find_delay, shift_by_frames

    info = audio_info(input_path)
    x, rate = read_audio(input_path)
    sources = []
    for cand in candidates:
        if cand.profile is not None:
            gain = cand.profile.listening.error_gain_db
            files = render_listening_file(
                cand.profile, input_path, renders_dir, rate_hz=rate, error_gain_db=gain
            )
            say(f"{'reused' if files['reused'] else 'rendered'} {cand.label} on {input_path}")
            sources.append((cand, files["listening"], files["error"]))
        else:
            sources.append((cand, cand.listening_path, cand.error_path))
    clips = []
    for cand, lpath, epath in sources:
        y, r = read_audio(lpath)
        if r != rate:
            raise AudioFileError(
                str(lpath), f"sample rate {r} Hz differs from the input's {rate} Hz ({input_path})"
            )
        if y.shape[1] != info.channels:
            raise AudioFileError(
                str(lpath), f"{y.shape[1]} channels; the input {input_path} has {info.channels}"
            )
        est = find_delay(x, y, max_delay_frames=round(max_delay_s * rate))
        e = None
        if epath is not None:
            e, er = read_audio(epath)
            if er != rate or e.shape[1] != info.channels:
                raise AudioFileError(str(epath), "rate or channels differ from its listening file")
        clips.append({"cand": cand, "y": y, "e": e, "delay": est, "path": lpath})
    # the span every aligned clip covers
    start = max([0] + [-c["delay"].delay_frames for c in clips])
    end = min([x.shape[0]] + [c["y"].shape[0] - c["delay"].delay_frames for c in clips])
    if end - start < round(0.4 * rate):
        raise ParameterError(
            "inputs", f"{max(0, end - start)} common frames", "at least 0.4 s shared by all clips"
        )
    n = end - start
    x = x[start:end]
    for c in clips:
        d = c["delay"].delay_frames + start
        c["y"] = shift_by_frames(c["y"], d, n)
        if c["e"] is not None:
            c["e"] = shift_by_frames(c["e"], d, n)
    return {
        "input": Path(input_path),
        "rate_hz": rate,
        "x": x,
        "clips": clips,
        "trimmed": (start, end),
    }


def _match_loudness(prep) -> None:
    """Gains that bring every clip to the quietest one's loudness (never up); checked after."""
    from audiodsm.measure.loudness import gain_to_loudness_db, integrated_loudness_lufs

    rate = prep["rate_hz"]
    signals = [prep["x"]] + [c["y"] for c in prep["clips"]]
    offset_db = _loudness_offset_db(signals, rate)
    scale = 10.0 ** (offset_db / 20.0)
    levels = [integrated_loudness_lufs(s * scale, rate_hz=rate) - offset_db for s in signals]
    if not all(math.isfinite(v) for v in levels):
        raise ParameterError("inputs", f"{prep['input']}: a silent clip", "audible clips")
    target = min(levels)
    gains = [
        min(0.0, gain_to_loudness_db(s * scale, rate_hz=rate, target_lufs=target + offset_db))
        for s in signals
    ]
    peak = max(float(np.abs(s).max()) * 10 ** (g / 20) for s, g in zip(signals, gains, strict=True))
    headroom_db = 0.0
    if peak > 1.0:  # lower every clip together so that none clips
        headroom_db = -20.0 * math.log10(peak)
        gains = [g + headroom_db for g in gains]
        target += headroom_db
    after = [
        integrated_loudness_lufs(s * scale * 10 ** (g / 20), rate_hz=rate) - offset_db
        for s, g in zip(signals, gains, strict=True)
    ]
    spread = max(after) - min(after)
    if spread > LOUDNESS_TOLERANCE_LU:
        raise ParameterError(
            "loudness match", f"{spread:.3f} LU apart", f"within {LOUDNESS_TOLERANCE_LU} LU"
        )
    prep.update(
        gains_db=gains,
        loudness_before=levels,
        target_lufs=target,
        headroom_db=headroom_db,
        loudness_offset_db=offset_db,
    )


def _excerpt(prep, start_s, length_s):
    if start_s is None and length_s is None:
        return
    rate = prep["rate_hz"]
    a = round((start_s or 0.0) * rate)
    n = prep["x"].shape[0]
    b = n if length_s is None else min(n, a + round(length_s * rate))
    if b - a < round(0.4 * rate):
        raise ParameterError("excerpt", f"{(b - a) / rate:.2f} s", "at least 0.4 s inside the clip")
    prep["x"] = prep["x"][a:b]
    for c in prep["clips"]:
        c["y"] = c["y"][a:b]
        if c["e"] is not None:
            c["e"] = c["e"][a:b]


def _wav_bytes(x, rate_hz) -> bytes:
    from audiodsm.io import write_audio_atomic

    with tempfile.TemporaryDirectory() as tmp:
        p = write_audio_atomic(Path(tmp) / "c.wav", x, rate_hz, subtype="FLOAT")
        return p.read_bytes()


def _data_script(name: str, wav: bytes) -> str:
    b64 = base64.b64encode(wav).decode("ascii")
    return (
        "window.audiodsmClipData = window.audiodsmClipData || {};\n"
        f'window.audiodsmClipData["{name}"] = "{b64}";\n'
    )


def _spectrogram_png(x, rate, title) -> bytes:
    from audiodsm.evaluate.plotting import plot_spectrogram
    from audiodsm.evaluate.report import figure_to_png

    t, f, level = spectrogram_dbfs(x, rate_hz=rate)
    return figure_to_png(plot_spectrogram(t, f, level, title=title))


def _write_key_once(key_path: Path, key: dict) -> None:
    """Write the key under its final name only if no file has that name (never replaces)."""
    fd, tmp = tempfile.mkstemp(dir=key_path.parent, prefix=f".{key_path.name}.", suffix=".partial")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(json.dumps(key, indent=2) + "\n")
        os.link(tmp, key_path)  # fails when the key exists: no overwrite, even in a race
    except FileExistsError:
        raise OutputError(f"{key_path}: a key already exists; it is never replaced") from None
    finally:
        Path(tmp).unlink(missing_ok=True)


def make_listening_set(
    candidates,
    inputs,
    folder,
    *,
    trials_per_pair=10,
    renders_dir=None,
    start_s=None,
    length_s=None,
    max_delay_s=MAX_DELAY_S,
    seed=None,
    set_id=None,
    replace=False,
    protect=(),
    say=None,
) -> dict:
    """Write a listening set: aligned, loudness-matched clips, the page and the trial key.

    Parameters
    ----------
    candidates : sequence of ListeningCandidate or path-like
        Two or more; paths are read with :meth:`ListeningCandidate.from_path`.
    inputs : sequence of path-like
        One or more input files; with listening files as candidates, exactly one.
    folder : path-like
        The set folder; it must not exist or be empty (``replace``: an old set is replaced).
    trials_per_pair : int, keyword-only
        Blind trials for each pair of candidates (0: open comparison only).
    renders_dir : path-like, optional, keyword-only
        Where profiles are rendered and renders reused (default ``<folder>.renders`` beside).
    start_s, length_s : float, optional, keyword-only
        Keep only this excerpt of every (aligned) clip.
    max_delay_s : float, keyword-only
        Largest delay searched when aligning.
    seed : int, optional, keyword-only
        Seed of the trial draw (default: fresh randomness). Stored only in the key.
    set_id : str, optional, keyword-only
        Identifier shared by the page, the key and saved answers (default: random).
    replace : bool, keyword-only
        Replace an old set in ``folder`` (the key beside it is still never replaced).
    protect : sequence of path, keyword-only
        Files that must never be written to.
    say : callable, optional, keyword-only
        Receives progress lines.

    Returns
    -------
    dict
        The summary (also ``summary.json`` in the folder) with ``"page"`` and ``"key"`` paths.

    Raises
    ------
    ParameterError, AudioFileError, OutputError, ProfileError
        Fewer than two candidates, duplicate labels, different rates or channel counts, clips
        too short or silent, an existing key or set, an output that would hit an input.

    References
    ----------
    .. [1] ITU-R BS.1770-4 (10/2015), Annex 1 (integrated loudness).
    .. [2] W. A. Munson and M. B. Gardner, "Standardizing auditory tests", J. Acoust. Soc. Am.
       22, 1950, p. 675 (the A/B/X paradigm).
    """
    say = say or (lambda _line: None)
    cands = [
        c if isinstance(c, ListeningCandidate) else ListeningCandidate.from_path(c)
        for c in candidates
    ]
    if len(cands) < 2:
        raise ParameterError("candidates", len(cands), "two or more profiles or listening files")
    labels = [c.label for c in cands]
    if len(set(labels)) != len(labels):
        raise ParameterError("candidates", labels, "distinct names (profile names or file stems)")
    names = ["input"] + [_safe(x) for c in cands for x in (c.label, f"{c.label} error")]
    if len(set(names)) != len(names):
        raise ParameterError(
            "candidates", labels, "names that stay distinct as file names (and not 'input')"
        )
    inputs = [Path(p) for p in inputs]
    if not inputs:
        raise ParameterError("inputs", 0, "one or more input files")
    if len({p.stem for p in inputs}) != len(inputs):
        raise ParameterError("inputs", [p.name for p in inputs], "inputs with distinct names")
    if any(c.profile is None for c in cands) and len(inputs) != 1:
        raise ParameterError("inputs", len(inputs), "exactly one input with listening files")
    if not (isinstance(trials_per_pair, int) and 0 <= trials_per_pair <= 100):
        raise ParameterError("trials_per_pair", trials_per_pair, "an integer from 0 to 100")
    folder = Path(folder)
    key_path = key_path_for(folder)
    if key_path.exists():
        raise OutputError(f"{key_path}: a key already exists; it is never replaced")
    guarded = {Path(p).resolve() for p in [*protect, *inputs]}
    guarded |= {c.listening_path.resolve() for c in cands if c.listening_path is not None}
    if any(folder.resolve() in g.parents for g in guarded):
        raise OutputError(f"{folder}: holds an input; choose another folder")
    if folder.exists() and any(folder.iterdir()):
        if not (replace and (folder / PAGE_NAME).is_file()):
            raise OutputError(f"{folder}: exists and is not empty (use --replace for an old set)")
    renders = Path(renders_dir) if renders_dir else folder.parent / f"{folder.name}.renders"
    folder.parent.mkdir(parents=True, exist_ok=True)

    preps = []
    for inp in inputs:
        prep = _prepare_input(inp, cands, renders, max_delay_s, say)
        _excerpt(prep, start_s, length_s)
        _match_loudness(prep)
        preps.append(prep)

    set_id = set_id or secrets.token_hex(8)
    seed = secrets.randbits(63) if seed is None else int(seed)
    rng = np.random.default_rng(seed)
    tmp = Path(tempfile.mkdtemp(dir=folder.parent, prefix=f".{folder.name}.", suffix=".partial"))
    try:
        summary, manifest, key = _write_folder(tmp, preps, cands, trials_per_pair, rng, set_id)
        key.update({"format": KEY_FORMAT, "set_id": set_id, "seed": seed, "folder": folder.name})
        _write_key_once(key_path, key)
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o777 & ~mask)  # mkdtemp makes it private; a set folder is ordinary
        if folder.exists():
            shutil.rmtree(folder)
        os.rename(tmp, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    summary.update({"page": str(folder / PAGE_NAME), "key": str(key_path)})
    return summary


def _write_folder(tmp: Path, preps, cands, trials_per_pair, rng, set_id):
    from jinja2 import Environment, FileSystemLoader, select_autoescape

    (tmp / "page" / "data").mkdir(parents=True)
    (tmp / "page" / "trials").mkdir()
    (tmp / "page" / "pictures").mkdir()
    for name in ("listening_page.css", "listening_page.js"):
        shutil.copyfile(_TEMPLATES / name, tmp / "page" / name.replace("_page", ""))
    wavs = {}  # clip id -> WAV bytes (for the trials)
    inputs_out, summary_inputs = [], []
    for prep in preps:
        stem = _safe(prep["input"].stem)
        rate = prep["rate_hz"]
        cdir = tmp / "clips" / stem
        cdir.mkdir(parents=True)
        rows = []
        off = prep["loudness_offset_db"]
        entries = [("input", "input", prep["x"], None, None)]
        for c in prep["clips"]:
            entries.append((c["cand"].label, "candidate", c["y"], c["delay"], c["path"]))
        for k, (label, kind, sig, delay, path) in enumerate(entries):
            g = prep["gains_db"][k]
            y = sig * 10.0 ** (g / 20.0)
            rows.append(_clip_row(tmp, stem, label, kind, y, rate, g, delay, path, wavs, off))
            rows[-1]["loudness_before_lufs"] = _finite(prep["loudness_before"][k])
            if kind == "candidate" and prep["clips"][k - 1]["e"] is not None:
                e = prep["clips"][k - 1]["e"] * 10.0 ** (g / 20.0)
                rows.append(
                    _clip_row(
                        tmp, stem, f"{label} error", "error", e, rate, g, delay, None, wavs, off
                    )
                )
        inputs_out.append({"name": prep["input"].name, "id": stem, "clips": rows})
        summary_inputs.append(
            {
                "input": str(prep["input"]),
                "rate_hz": rate,
                "frames": int(prep["x"].shape[0]),
                "target_loudness_lufs": prep["target_lufs"],
                "common_headroom_db": prep["headroom_db"],
                "loudness_measured_raised_db": prep["loudness_offset_db"],
                "clips": rows,
            }
        )
    trials, key_trials = [], []
    pairs = list(itertools.combinations(range(len(cands)), 2))
    number = 0
    for ia, ib in pairs:
        for t in range(trials_per_pair):
            number += 1
            tid = f"t{number:02d}"
            inp = inputs_out[t % len(inputs_out)]
            a_id = f"{inp['id']}--{_safe(cands[ia].label)}"
            b_id = f"{inp['id']}--{_safe(cands[ib].label)}"
            x_is = "A" if rng.integers(2) == 0 else "B"
            (tmp / "page" / "trials" / f"{tid}.js").write_text(
                _data_script(tid, wavs[a_id if x_is == "A" else b_id]), encoding="ascii"
            )
            pair = f"{cands[ia].label} / {cands[ib].label}"
            trials.append(
                {
                    "trial": tid,
                    "pair": pair,
                    "input": inp["name"],
                    "a": a_id,
                    "b": b_id,
                    "a_label": cands[ia].label,
                    "b_label": cands[ib].label,
                }
            )
            key_trials.append({**trials[-1], "x_is": x_is})
    manifest = {
        "set_id": set_id,
        "answers_format": ANSWERS_FORMAT,
        "rate_hz": preps[0]["rate_hz"],
        "inputs": [
            {"name": i["name"], "id": i["id"], "clips": [_page_clip(r) for r in i["clips"]]}
            for i in inputs_out
        ],
        "trials": trials,
    }
    env = Environment(
        loader=FileSystemLoader(str(_TEMPLATES)), autoescape=select_autoescape(["j2", "html"])
    )
    html = env.get_template("listening_page.html.j2").render(
        manifest=manifest, candidates=[c.label for c in cands]
    )
    (tmp / PAGE_NAME).write_text(html, encoding="utf-8")
    summary = {
        "set_id": set_id,
        "candidates": [c.label for c in cands],
        "inputs": summary_inputs,
        "trials": len(trials),
        "pairs": [f"{cands[a].label} / {cands[b].label}" for a, b in pairs],
    }
    (tmp / "summary.json").write_text(json.dumps(summary, indent=2) + "\n", encoding="utf-8")
    return summary, manifest, {"trials": key_trials}


def _clip_row(tmp, stem, label, kind, y, rate, gain_db, delay, path, wavs, offset_db) -> dict:
    cid = f"{stem}--{_safe(label)}"
    wav = _wav_bytes(y, rate)
    wavs[cid] = wav
    (tmp / "clips" / stem / f"{_safe(label)}.wav").write_bytes(wav)
    (tmp / "page" / "data" / f"{cid}.js").write_text(_data_script(cid, wav), encoding="ascii")
    (tmp / "page" / "pictures" / f"{cid}.png").write_bytes(_spectrogram_png(y, rate, label))
    stats = _level_stats(y, rate, loudness=kind != "error", offset_db=offset_db)
    return {
        "id": cid,
        "label": label,
        "kind": kind,
        "source": str(path) if path is not None else None,
        "file": f"clips/{stem}/{_safe(label)}.wav",
        "gain_db": gain_db,
        "delay_frames": delay.delay_frames if delay is not None else 0,
        "delay_ms": 1e3 * delay.delay_frames / rate if delay is not None else 0.0,
        "correlation": delay.correlation if delay is not None else 1.0,
        "clipped_samples": int((np.abs(y) > 1.0).sum()),
        **stats,
    }


def _page_clip(row: dict) -> dict:
    keys = ("id", "label", "kind", "file", "gain_db", "delay_ms", "rms_dbfs", "peak_dbfs")
    return {k: row[k] for k in keys} | {"loudness_lufs": row["loudness_lufs"]}


def _f(v, spec=".2f"):
    return "-" if v is None else format(v, spec)


def set_table(summary: dict) -> list[str]:
    """Aligned text lines: per input, each clip's delay, gain, loudness and peak after gain.

    Parameters
    ----------
    summary : dict
        As returned by :func:`make_listening_set`.

    Returns
    -------
    list of str
    """
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
