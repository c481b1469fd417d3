"""Grade candidate profiles against a spec sheet, in one batch, with an on-disk cache.

:func:`grade_metrics` compares one profile's battery readings with a spec sheet: for every
target a pass or fail and a margin in the metric's unit, positive when the reading is better
than the limit. A reading the battery called invalid (the loop overloaded, the tone was lost,
the output clipped, the value is impossible) fails its target with the reason. :func:`grade_batch`
runs the test battery on many profiles (in parallel processes), grades each, ranks them by
their worst normalized margin (:func:`rank_grades`) and keeps every finished battery in a
cache keyed by what was computed: (profile content digest, tool version, battery options).
The spec sheet is applied afterwards, so a repeated or interrupted batch resumes without
recomputing, and a changed limit re-grades from the cache. A profile with random impairments
can run as several parts (:mod:`audiodsm.evaluate.parts`): each part is its own battery and
cache entry, and the targets are graded over the parts.

The battery is a parameter: any callable ``battery(profile, *, jobs, progress, seed,
**options)`` returning an object with ``.metrics`` (dict) and ``.curves`` (dict of dicts of
arrays) works; the default is :func:`audiodsm.evaluate.battery.run_battery`.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import signal
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from audiodsm.errors import ParameterError, ProfileError, StorageError
from audiodsm.evaluate._plain import plain_scalar
from audiodsm.evaluate.measure_batch import measure_on_cluster
from audiodsm.io_files import create_temp_file, remove_stale_temp_files
from audiodsm.profile import load_profile
from audiodsm.profile_text import profile_digest
from audiodsm.spec import CONDITIONAL_METRICS, SpecSheet, Target

__all__ = [
    "TargetGrade",
    "ProfileGrade",
    "GradeBatch",
    "GradeCache",
    "default_cache_dir",
    "collect_profiles",
    "grade_metrics",
    "normalized_margin",
    "rank_grades",
    "plan_for_spec",
    "grade_batch",
    "measure_on_cluster",
]

#: Tolerance when matching a target's tone level to a level of the THD+N sweep (dB).
_LEVEL_MATCH_DB = 0.01
#: Version of the cache file layout; part of every cache key. (2: entries carry a checksum;
#: 3: entries carry the battery's invalid readings and are no longer keyed by the spec sheet.)
_CACHE_LAYOUT = 3
#: Units whose margins are compared as they are (dB); see :func:`normalized_margin`.
_LOG_UNITS = ("dB", "dBFS")


@dataclass(frozen=True)
class TargetGrade:
    """One target of a spec sheet, graded.

    Attributes
    ----------
    target : Target
    value : float or None
        The reading; None when there is none (not measured, or the run failed).
    margin : float or None
        ``value - limit`` for ``at_least``, ``limit - value`` for ``at_most``; positive is
        better than the limit. None when there is no reading.
    passed : bool
    reason : str
        Why there is no reading (empty when there is one); ``"invalid: ..."`` when the
        battery called the reading invalid.
    parts_met, parts_needed, parts_total : int or None
        For a profile run as several parts: how many parts met the target, how many had
        to (:func:`~audiodsm.evaluate.parts.parts_needed`) and how many ran; the value is
        then the order statistic :func:`~audiodsm.evaluate.parts.grade_parts` grades.
        None for one part.
    """

    target: Target
    value: float | None
    margin: float | None
    passed: bool
    reason: str = ""
    parts_met: int | None = None
    parts_needed: int | None = None
    parts_total: int | None = None

    @property
    def valid(self) -> bool:
        """True when there is a reading to grade (not missing, not invalid)."""
        return self.value is not None

    @property
    def normalized_margin(self) -> float | None:
        """The margin on the common scale used for ranking (:func:`normalized_margin`)."""
        return normalized_margin(self.target, self.value)


@dataclass(frozen=True)
class ProfileGrade:
    """A profile's grades against a spec sheet.

    Attributes
    ----------
    name : str
        Profile name (made unique within a batch).
    source : str
        The profile file.
    digest : str
        :func:`~audiodsm.profile_text.profile_digest` of the profile.
    lines : tuple of TargetGrade
        One per target, in the spec sheet's order.
    metrics : dict
        The battery's readings (empty when the run failed).
    curves : dict
        The battery's curves (empty when the run failed).
    notes : tuple of str
        The battery's notes on resolution and doubtful readings.
    failure : str
        Why the battery did not finish (empty when it did).
    cached : bool
        True when the battery result came from the cache.
    seconds : float
        Battery wall-clock time (of the original run when cached).
    invalid : dict
        Metric name -> why the battery called its reading invalid.
    parts : tuple of PartReading
        Every part's readings when the profile ran as several parts (empty for one part);
        ``metrics``, ``curves``, ``notes`` and ``invalid`` are then part 0's (the profile as
        written), ``seconds`` the sum and ``cached`` true when every part came from the cache.
    """

    name: str
    source: str
    digest: str
    lines: tuple
    metrics: dict = field(default_factory=dict, repr=False)
    curves: dict = field(default_factory=dict, repr=False)
    notes: tuple = ()
    failure: str = ""
    cached: bool = False
    seconds: float = 0.0
    invalid: dict = field(default_factory=dict, repr=False)
    parts: tuple = field(default=(), repr=False)

    @property
    def spread(self) -> dict:
        """Each metric's distribution over the parts; empty for one part.

        See :func:`audiodsm.evaluate.parts.metric_spread`.
        """
        from audiodsm.evaluate.parts import metric_spread

        return metric_spread(self.parts) if self.parts else {}

    @property
    def passed(self) -> bool:
        """True when the battery finished and every target passed."""
        return not self.failure and all(line.passed for line in self.lines)

    @property
    def worst_margin(self) -> float:
        """The smallest margin over the targets; ``-inf`` when any target has no reading."""
        margins = [line.margin for line in self.lines]
        if self.failure or any(m is None for m in margins):
            return -math.inf
        return min(margins)

    @property
    def ranking_margin(self) -> float | None:
        """The smallest normalized margin (dB); ``-inf`` when any target has no reading.

        None when no target carries a normalized margin (only count targets). See
        :func:`normalized_margin`.
        """
        if self.failure or any(line.margin is None for line in self.lines):
            return -math.inf
        margins = [m for m in (line.normalized_margin for line in self.lines) if m is not None]
        return min(margins) if margins else None

    @property
    def failed_count(self) -> int:
        """Number of targets not met."""
        return sum(not line.passed for line in self.lines)


@dataclass(frozen=True)
class GradeBatch:
    """The outcome of :func:`grade_batch`.

    Attributes
    ----------
    spec : SpecSheet
    grades : tuple of ProfileGrade
        Finished profiles, best worst-margin first (see :func:`rank_grades`).
    unfinished : tuple of str
        Sources of profiles not graded because the batch was interrupted.
    interrupted : bool
        True when Ctrl-C (or SIGTERM, SIGHUP) stopped the batch; the finished results are
        kept (and cached).
    cache_dir : str
        Where the battery results are cached ("" when caching is off).
    warnings : tuple of str
        Things the caller should tell the user: damaged cache entries that were recomputed,
        results that could not be saved to the cache.
    stop_signal : int
        The signal that stopped the batch (2 for Ctrl-C), 0 when it was not stopped.
    """

    spec: SpecSheet
    grades: tuple
    unfinished: tuple = ()
    interrupted: bool = False
    cache_dir: str = ""
    warnings: tuple = ()
    stop_signal: int = 0

    @property
    def passed(self) -> bool:
        """True when every profile was graded and passed every target."""
        return not self.unfinished and all(g.passed for g in self.grades)


# ---------------------------------------------------------------------------------------------
# Grading one profile
# ---------------------------------------------------------------------------------------------


def _reading(target: Target, metrics: dict, curves: dict, invalid: dict):
    """The value a target reads, or (None, reason)."""
    if target.metric in CONDITIONAL_METRICS:
        sweep = curves.get("thd_n_vs_level")
        if not sweep or target.metric not in sweep:
            return None, "no THD+N-versus-level sweep in the battery result"
        levels = np.asarray(sweep["level_dbfs"], dtype=float)
        values = np.asarray(sweep[target.metric], dtype=float)
        hit = np.flatnonzero(np.abs(levels - target.at_level_dbfs) <= _LEVEL_MATCH_DB)
        if hit.size == 0:
            have = ", ".join(f"{v:g}" for v in levels)
            return None, f"level {target.at_level_dbfs:g} dBFS not in the sweep ({have})"
        reasons = sweep.get("invalid_reason")
        if reasons is not None and str(np.asarray(reasons)[hit[0]]):
            return None, "invalid: " + str(np.asarray(reasons)[hit[0]])
        value = float(values[hit[0]])
    else:
        if target.metric in invalid:
            return None, "invalid: " + str(invalid[target.metric])
        if target.metric not in metrics:
            return None, "not measured by the battery"
        value = metrics[target.metric]
        if value is None:
            return None, "no reading (the loop could not be measured; unstable?)"
        value = float(value)
    if not math.isfinite(value):
        return None, f"reading is {value}"
    return value, ""


def grade_metrics(metrics: dict, curves: dict, spec: SpecSheet, invalid=None) -> tuple:
    """Grade one profile's battery readings against a spec sheet.

    Parameters
    ----------
    metrics : dict
        Metric name -> reading (None when the battery has none).
    curves : dict
        The battery's curves; ``curves["thd_n_vs_level"]`` serves the conditional metrics
        (its ``invalid_reason`` array, when present, marks invalid sweep points).
    spec : SpecSheet
    invalid : dict, optional
        Metric name -> why the battery called the reading invalid.

    Returns
    -------
    tuple of TargetGrade
        One per target, in the sheet's order. A target without a valid reading fails, with
        the reason (``"invalid: loop overloaded from -12 dBFS"``).
    """
    invalid = dict(invalid or {})
    out = []
    for target in spec.targets:
        value, reason = _reading(target, metrics, curves, invalid)
        if value is None:
            out.append(TargetGrade(target, None, None, False, reason))
            continue
        margin = target.margin(value)
        out.append(TargetGrade(target, value, margin, margin >= 0.0))
    return tuple(out)


def _failed_lines(spec: SpecSheet, reason: str) -> tuple:
    return tuple(TargetGrade(t, None, None, False, reason) for t in spec.targets)


def normalized_margin(target: Target, value) -> float | None:
    """A target's margin on the one scale the ranking compares: dB.

    The rule:

    * dB and dBFS targets: the margin as it is (a level or ratio margin already is dB);
    * Hz and FS targets: the ratio of limit and reading in dB, ``20 log10(limit / value)``
      for ``at_most`` and ``20 log10(value / limit)`` for ``at_least`` (a reading of 0 under
      an upper limit: ``+inf``); a limit of 0 or below gives no normalized margin;
    * count targets (overloads, dropped pulses): pass or fail only, no normalized margin. A
      count limit of 0 would otherwise pin every passing profile's worst margin at 0.

    Returns
    -------
    float or None
        None when there is no reading or the target carries no normalized margin.
    """
    if value is None:
        return None
    value = float(value)
    unit = target.unit
    if unit in _LOG_UNITS:
        return target.margin(value)
    if unit == "count" or target.limit <= 0.0:
        return None
    if value <= 0.0:
        return math.inf if target.bound == "at_most" else -math.inf
    ratio = target.limit / value if target.bound == "at_most" else value / target.limit
    return 20.0 * math.log10(ratio)


def rank_grades(grades: Sequence[ProfileGrade]) -> tuple:
    """Order profiles best first.

    Passing profiles come first, then the rest; within each group by the worst normalized
    margin (:attr:`ProfileGrade.ranking_margin`, descending; a profile whose targets are all
    counts ranks as 0 dB), then by fewer failed targets, then by name. Normalizing
    (:func:`normalized_margin`) puts every margin in dB, and leaves out the count targets
    that would pin every passing profile's worst margin at exactly 0, so ties are real ties.
    """

    def key(g):
        m = g.ranking_margin
        return (not g.passed, -(0.0 if m is None else m), g.failed_count, g.name)

    return tuple(sorted(grades, key=key))


# ---------------------------------------------------------------------------------------------
# Profiles
# ---------------------------------------------------------------------------------------------


def collect_profiles(paths: Sequence) -> list:
    """Load profiles from files and folders (a folder contributes its ``*.toml`` files).

    Parameters
    ----------
    paths : sequence of path-like

    Returns
    -------
    list of (Path, ChainProfile)
        In the order given, folders sorted by file name, each file once.

    Raises
    ------
    ProfileError
        A path that does not exist, a folder without profiles, or a bad profile.
    """
    files = []
    for p in map(Path, paths):
        if p.is_dir():
            found = sorted(q for q in p.glob("*.toml") if q.is_file())
            if not found:
                raise ProfileError(str(p), "", "folder holds no *.toml profiles")
            files.extend(found)
        elif p.is_file():
            files.append(p)
        else:
            raise ProfileError(str(p), "", "no such file or folder")
    seen, out = set(), []
    for f in files:
        key = f.resolve()
        if key not in seen:
            seen.add(key)
            out.append((f, load_profile(f)))
    return out


def _unique_names(entries) -> list:
    names = [prof.name for _, prof in entries]
    out = []
    for (path, _prof), name in zip(entries, names, strict=True):
        out.append(name if names.count(name) == 1 else f"{name} ({path.stem})")
    return out


# ---------------------------------------------------------------------------------------------
# The cache
# ---------------------------------------------------------------------------------------------


def default_cache_dir() -> Path:
    """The cache folder used when none is given: ``$XDG_CACHE_HOME/audiodsm/grades``.

    Falls back to ``~/.cache/audiodsm/grades`` when ``XDG_CACHE_HOME`` is unset.
    """
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "audiodsm" / "grades"


class GradeCache:
    """Battery results on disk, one file per (profile, tool version, options) key.

    The key holds what the battery computed from, and nothing else: the spec sheet is
    applied to a loaded entry afterwards, so changing a limit re-grades from the cache.

    Each entry is a NumPy ``.npz`` file (no pickled objects): the curves as arrays named
    ``curve/<curve>/<field>``, a JSON text ``meta`` with the metrics, notes and timing, and a
    ``checksum``: the SHA-256 of ``meta`` and of every array's name, dtype, shape and bytes.
    Entries are written to a temporary file in the cache folder and renamed when complete, so
    an interrupted write never leaves a half entry. A damaged entry (unreadable, truncated,
    bit-flipped, missing or mistyped fields, empty metrics, a folder or an empty file in its
    place) is reported by :meth:`load_checked` and counts as missing, so it is recomputed.

    Parameters
    ----------
    directory : path-like
        Created when missing. Hidden temporary files left in it by a killed run are removed.

    Raises
    ------
    StorageError
        The folder cannot be created.
    """

    def __init__(self, directory):
        self.directory = Path(directory)
        if self.directory.exists() and not self.directory.is_dir():
            raise StorageError(self.directory, "is a file, expected a cache folder")
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StorageError(self.directory, exc) from None
        remove_stale_temp_files(self.directory)

    @property
    def writable(self) -> bool:
        """Whether new entries can be stored (the folder is writable by this user)."""
        return os.access(self.directory, os.W_OK)

    @staticmethod
    def key(profile_hash: str, version: str, options: str = "") -> str:
        """The entry name for one combination (64 hex digits)."""
        text = json.dumps([_CACHE_LAYOUT, profile_hash, version, options])
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    def path(self, key: str) -> Path:
        """The file of an entry."""
        return self.directory / f"{key}.npz"

    def load(self, key: str):
        """The stored entry (see :meth:`load_checked`), or None.

        None both when there is no entry and when it is damaged (see :meth:`load_checked`).
        """
        return self.load_checked(key)[0]

    def load_checked(self, key: str) -> tuple:
        """The stored entry and, when it is damaged, what is wrong with it.

        Returns
        -------
        entry : dict or None
            ``{"metrics", "curves", "notes", "seconds", "invalid"}``; None when missing or
            damaged.
        problem : str
            Empty when the entry is fine or missing; otherwise plain words for the damage.
        """
        p = self.path(key)
        if not os.path.lexists(p):
            return None, ""
        if p.is_dir():
            return None, "is a folder, not a cache entry"
        if not p.is_file():
            return None, "is not a regular file"
        try:
            if p.stat().st_size == 0:
                return None, "is empty (0 bytes)"
            with np.load(p, allow_pickle=False) as data:
                names = list(data.files)
                arrays = {name: data[name] for name in names}
        except Exception as exc:  # zip, format, I/O and decoding errors alike
            text = str(exc).splitlines()[0] if str(exc) else ""
            return None, f"unreadable ({type(exc).__name__}{': ' + text if text else ''})"
        try:
            entry = _entry_from_arrays(arrays)
        except _DamagedEntry as exc:
            return None, str(exc)
        return entry, ""

    def discard(self, key: str) -> None:
        """Remove a damaged entry file (best effort; a folder in its place is left alone)."""
        p = self.path(key)
        try:
            if p.is_symlink() or p.is_file():
                p.unlink()
        except OSError:
            pass

    def store(self, key: str, entry: dict) -> Path:
        """Write an entry atomically; return its file.

        Raises
        ------
        StorageError
            The entry cannot be written (disk full, read-only folder, a folder in its place).
        """
        arrays = {}
        for curve, fields in entry["curves"].items():
            if not isinstance(fields, dict):
                fields = {"values": fields}
            for fld, values in fields.items():
                a = np.asarray(values)
                if a.dtype != object:
                    arrays[f"curve/{curve}/{fld}"] = a
        meta = {
            "metrics": {k: plain_scalar(v, repr_other=True) for k, v in entry["metrics"].items()},
            "notes": [str(n) for n in entry["notes"]],
            "seconds": float(entry["seconds"]),
            "invalid": {str(k): str(v) for k, v in entry.get("invalid", {}).items()},
        }
        meta_text = json.dumps(meta)
        buf = io.BytesIO()
        np.savez(
            buf,
            meta=np.array(meta_text),
            checksum=np.array(_entry_checksum(meta_text, arrays)),
            **arrays,
        )
        target = self.path(key)
        fd, tmp = create_temp_file(target)
        try:
            with os.fdopen(fd, "wb") as fh:
                fh.write(buf.getvalue())
            os.replace(tmp, target)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            raise StorageError(target, exc) from None
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        return target


class _DamagedEntry(Exception):
    """A cache entry's content is not what :meth:`GradeCache.store` writes."""


def _entry_checksum(meta_text: str, arrays: dict) -> str:
    """SHA-256 over the meta text and every curve array's name, dtype, shape and bytes."""
    h = hashlib.sha256()
    h.update(meta_text.encode("utf-8"))
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        h.update(json.dumps([name, a.dtype.str, list(a.shape)]).encode("utf-8"))
        h.update(a.tobytes())
    return h.hexdigest()


def _entry_from_arrays(arrays: dict) -> dict:
    """Check a loaded entry field by field and build the dict :meth:`GradeCache.load` gives."""
    for name in ("meta", "checksum"):
        if name not in arrays:
            raise _DamagedEntry(f"missing field {name!r}")
        if arrays[name].shape != () or arrays[name].dtype.kind != "U":
            raise _DamagedEntry(f"field {name!r} is not a text")
    meta_text = str(arrays["meta"])
    curves_raw = {k: v for k, v in arrays.items() if k.startswith("curve/")}
    others = sorted(set(arrays) - set(curves_raw) - {"meta", "checksum"})
    if others:
        raise _DamagedEntry(f"unexpected field {others[0]!r}")
    if str(arrays["checksum"]) != _entry_checksum(meta_text, curves_raw):
        raise _DamagedEntry("checksum does not match the content (damaged)")
    try:
        meta = json.loads(meta_text)
    except ValueError:
        raise _DamagedEntry("field 'meta' is not valid JSON") from None
    if not isinstance(meta, dict):
        raise _DamagedEntry("field 'meta' is not a table")
    metrics, notes, seconds = meta.get("metrics"), meta.get("notes"), meta.get("seconds")
    if not isinstance(metrics, dict) or not metrics:
        raise _DamagedEntry("holds no metrics")
    for k, v in metrics.items():
        if not (v is None or isinstance(v, (bool, int, float, str))):
            raise _DamagedEntry(f"metric {k!r} has a value of type {type(v).__name__}")
    if not isinstance(notes, list) or not all(isinstance(n, str) for n in notes):
        raise _DamagedEntry("field 'notes' is not a list of texts")
    if isinstance(seconds, bool) or not isinstance(seconds, (int, float)):
        raise _DamagedEntry("field 'seconds' is not a number")
    if not (math.isfinite(seconds) and seconds >= 0):
        raise _DamagedEntry(f"field 'seconds' is {seconds!r}")
    invalid = meta.get("invalid", {})
    if not isinstance(invalid, dict) or not all(
        isinstance(k, str) and isinstance(v, str) for k, v in invalid.items()
    ):
        raise _DamagedEntry("field 'invalid' is not a table of texts")
    curves = {}
    for name, a in curves_raw.items():
        parts = name.split("/", 2)
        if len(parts) != 3 or not parts[1] or not parts[2]:
            raise _DamagedEntry(f"curve field {name!r} is not named curve/<curve>/<field>")
        if a.dtype.kind not in "biufU":  # numbers, or texts (the reasons of invalid points)
            raise _DamagedEntry(f"curve field {name!r} does not hold numbers or texts")
        curves.setdefault(parts[1], {})[parts[2]] = a
    return {
        "metrics": metrics,
        "curves": curves,
        "notes": tuple(notes),
        "seconds": float(seconds),
        "invalid": dict(invalid),
    }


# ---------------------------------------------------------------------------------------------
# Running the battery (in this process or in worker processes)
# ---------------------------------------------------------------------------------------------


def _run_one(battery, profile, index, jobs, seed, options, report=None):
    """Run the battery on one profile; never raises an ordinary exception.

    Runs in this process (serial batches) and as the task of a cluster worker.
    """
    start = time.perf_counter()
    try:
        result = battery(profile, jobs=jobs, progress=report, seed=seed, **options)
        metrics = dict(result.metrics)
        curves = {k: dict(v) if isinstance(v, dict) else v for k, v in result.curves.items()}
        notes = tuple(getattr(result, "notes", ()))
        invalid = dict(getattr(result, "invalid", None) or {})
    except Exception as exc:  # a crash fails this profile only
        text = str(exc).splitlines()[0] if str(exc) else ""
        return {"failure": f"battery crashed: {type(exc).__name__}: {text}".rstrip(": ")}
    seconds = float(getattr(result, "seconds", time.perf_counter() - start))
    return {
        "metrics": metrics,
        "curves": curves,
        "notes": notes,
        "seconds": seconds,
        "invalid": invalid,
    }


def _default_battery():
    from audiodsm.evaluate.battery import run_battery

    return run_battery


def plan_for_spec(plan, spec: SpecSheet):
    """The battery plan with every tone level a spec target reads added to its sweep.

    A target such as ``thd_n_db`` at -37.5 dBFS is measured at -37.5 dBFS rather than
    failing after the run for want of that level. Levels the sweep has already leave the
    plan unchanged (and so its cache key).

    Parameters
    ----------
    plan : BatteryPlan or None
        None means the default plan.
    spec : SpecSheet

    Returns
    -------
    BatteryPlan
    """
    from dataclasses import replace

    from audiodsm.evaluate.battery import BatteryPlan

    plan = plan if plan is not None else BatteryPlan()
    have = [float(v) for v in plan.sweep_levels_dbfs]
    extra = []
    for t in spec.targets:
        lv = t.at_level_dbfs
        if lv is None or any(abs(lv - v) <= _LEVEL_MATCH_DB for v in have + extra):
            continue
        extra.append(float(lv))
    if not extra:
        return plan
    levels = tuple(sorted(have + extra, reverse=True))
    return replace(plan, sweep_levels_dbfs=levels)


def grade_batch(
    profiles: Sequence,
    spec: SpecSheet,
    *,
    battery: Callable | None = None,
    jobs: int | None = None,
    cache_dir=None,
    recompute: bool = False,
    seed: int = 0,
    battery_options: dict | None = None,
    progress: Callable[[float, str], None] | None = None,
    scheduler: str | None = None,
    say: Callable[[str], None] | None = None,
    parts: int | None = None,
) -> GradeBatch:
    """Run the battery on every profile, grade each against the spec sheet, rank them.

    Parameters
    ----------
    profiles : sequence of (path, ChainProfile)
        As :func:`collect_profiles` returns them.
    spec : SpecSheet
    battery : callable, optional, keyword-only
        ``battery(profile, *, jobs, progress, seed, **battery_options)`` returning an object
        with ``.metrics`` and ``.curves`` (and optionally ``.notes``, ``.seconds``). Default:
        :func:`audiodsm.evaluate.battery.run_battery`. On a cluster it must be a
        module-level function (it is sent to the workers by reference).
    jobs : int, optional, keyword-only
        Cores to use (default: all). With more than one, the batteries run as tasks on a
        local Dask cluster (:mod:`audiodsm.evaluate.cluster`) of ``min(jobs, profiles to
        run)`` worker processes on 127.0.0.1, each battery with ``jobs // workers`` threads;
        the cluster stops when the batch ends. ``jobs=1`` runs in this process.
    cache_dir : path-like or None, keyword-only
        Cache folder; None turns caching off.
    recompute : bool, keyword-only
        Ignore cached entries (fresh results still replace them).
    seed : int, keyword-only
        Passed to the battery.
    battery_options : dict, optional, keyword-only
        Extra keyword arguments of the battery (e.g. a shorter plan); part of the cache key
        through their ``repr``. With the default battery, a THD+N target at a tone level
        the plan's sweep lacks adds that level to the sweep (:func:`plan_for_spec`), so the
        battery measures at it.
    progress : callable, optional, keyword-only
        Called as ``progress(fraction_done, label)`` as battery runs finish. On a cluster
        the label reads ``"3/24 batteries, 5.2/min, 2 workers"``.
    scheduler : str or None, keyword-only
        ``tcp://host:port`` of an existing Dask scheduler: the batteries run on its workers
        (one thread each) instead of a local cluster, whatever ``jobs`` says.
    say : callable, optional, keyword-only
        Receives one-line notices of a cluster run (where it runs, the dashboard address).
    parts : int or None, keyword-only
        Parts per profile with random impairments (:mod:`audiodsm.evaluate.parts`); None
        takes each profile's ``impairments.parts``. A profile without random draws runs
        once. Each part is one battery (one task on a cluster) cached under its own digest;
        the targets are graded over the parts (:func:`~audiodsm.evaluate.parts.grade_parts`).

    Returns
    -------
    GradeBatch
        Ranked grades. On Ctrl-C (or a :class:`~audiodsm.errors.StopSignal` for SIGTERM and
        SIGHUP) the batch stops, ends its worker processes, keeps what finished (already
        cached) and returns with ``interrupted=True``. A damaged cache entry is recomputed
        and a result the cache cannot store is kept in memory; both come back as
        ``warnings``.

    Raises
    ------
    ParameterError
        A bad ``jobs``, ``seed`` or ``parts``.
    ClusterError
        Before any battery runs: the scheduler cannot be reached, has no workers, or its
        workers run another version of audiodsm.
    """
    from audiodsm import __version__

    if jobs is None:
        jobs = os.cpu_count() or 1
    if isinstance(jobs, bool) or not isinstance(jobs, int) or not 1 <= jobs <= 256:
        raise ParameterError("jobs", jobs, "an integer from 1 to 256")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ParameterError("seed", seed, "a non-negative integer")
    from audiodsm.evaluate.parts import (
        check_parts,
        grade_profile_parts,
        part_profile,
        parts_to_run,
    )

    if parts is not None:
        check_parts(parts)
    options = dict(battery_options or {})
    if battery is None:
        battery = _default_battery()
        options["plan"] = plan_for_spec(options.get("plan"), spec)
    option_text = repr(sorted(options.items()))
    cache = GradeCache(cache_dir) if cache_dir is not None else None

    entries = list(profiles)
    names = _unique_names(entries)
    digests = [profile_digest(prof) for _, prof in entries]
    counts = [parts_to_run(prof, parts) for _, prof in entries]
    # one unit of work per (profile, part): its own battery, its own cache entry
    units = [(i, k) for i, count in enumerate(counts) for k in range(count)]
    keys = [
        GradeCache.key(profile_digest(part_profile(entries[i][1], k)), __version__, option_text)
        for i, k in units
    ]
    labels = [names[i] if counts[i] == 1 else f"{names[i]} part {k}" for i, k in units]
    outcomes: dict[int, dict] = {}
    cached: set[int] = set()
    notices: list[str] = []
    if cache is not None and not recompute:
        for u, key in enumerate(keys):
            entry, problem = cache.load_checked(key)
            if entry is not None:
                outcomes[u] = entry
                cached.add(u)
            elif problem:
                notices.append(
                    f"cache entry {cache.path(key)} for {labels[u]} {problem}; recomputing it"
                )
                cache.discard(key)
    unsaved: list[int] = []
    store_failure: list[str] = []
    if cache is not None and not cache.writable:
        store_failure.append(f"{cache.directory}: the cache folder is not writable")
    todo = [u for u in range(len(units)) if u not in outcomes]
    fractions = {u: 0.0 for u in todo}

    def tick(u, done, total, label):
        if progress is None:
            return
        fractions[u] = max(fractions[u], done / total if total else 1.0)
        progress(sum(fractions.values()) / max(1, len(todo)), f"{labels[u]}: {label}")

    def finish(u, outcome):
        outcomes[u] = outcome
        if cache is not None and "failure" not in outcome:
            if store_failure:
                unsaved.append(u)
            else:
                try:
                    cache.store(keys[u], outcome)
                except OSError as exc:  # keep the result; say so at the end
                    store_failure.append(str(exc))
                    unsaved.append(u)
        if not on_cluster:  # a cluster batch reports tasks done of total itself
            tick(u, 1, 1, "done" if "failure" not in outcome else "failed")

    interrupted = False
    stop_signal = 0
    workers = min(jobs, len(todo))
    on_cluster = bool(todo) and (bool(scheduler) or workers > 1)
    try:
        if on_cluster:
            _run_on_cluster(
                battery, entries, units, todo, workers, jobs, seed, options, scheduler,
                progress, say, finish,
            )  # fmt: skip
        else:
            for u in todo:
                i, k = units[u]
                outcome = _run_part(
                    battery,
                    entries[i][1],
                    k,
                    jobs,
                    seed,
                    options,
                    report=lambda d, t, lab, u=u: tick(u, d, t, lab),
                )
                finish(u, outcome)
    except KeyboardInterrupt as exc:
        interrupted = True
        stop_signal = getattr(exc, "signal_number", int(signal.SIGINT))
    if unsaved:
        notices.append(
            f"the cache was not saved ({store_failure[0]}): {len(unsaved)} result(s) kept "
            "for this run only"
        )

    grades = []
    finished = set()
    units_of: dict[int, list] = {}
    for u, (i, _k) in enumerate(units):
        units_of.setdefault(i, []).append(u)
    for i, (path, prof) in enumerate(entries):
        mine = units_of[i]
        if any(u not in outcomes for u in mine):
            continue
        finished.add(i)
        grades.append(
            grade_profile_parts(
                names[i],
                str(path),
                digests[i],
                prof,
                spec,
                [(units[u][1], outcomes[u], u in cached) for u in mine],
            )  # fmt: skip
        )
    unfinished = tuple(str(entries[i][0]) for i in range(len(entries)) if i not in finished)
    return GradeBatch(
        spec=spec,
        grades=rank_grades(grades),
        unfinished=unfinished,
        interrupted=interrupted,
        cache_dir=str(cache.directory) if cache is not None else "",
        warnings=tuple(notices),
        stop_signal=stop_signal,
    )


def _run_part(battery, profile, part, jobs, seed, options, report=None):
    """Run the battery on part ``part`` of a profile; never raises an ordinary exception.

    The part's profile comes from :func:`audiodsm.evaluate.parts.part_profile`. This is the
    task of a serial batch and of a cluster worker alike, so both give the same readings.
    """
    from audiodsm.evaluate.parts import part_profile

    return _run_one(battery, part_profile(profile, part), part, jobs, seed, options, report)


def _run_on_cluster(
    battery, entries, units, todo, workers, jobs, seed, options, scheduler, progress, say, finish
):
    """Run the batteries of ``todo`` as cluster tasks; ``finish`` gets each outcome here.

    A task carries (battery, profile, part index, threads, seed, options): descriptions,
    never signals; the worker derives the part's profile itself.
    """
    from audiodsm.evaluate.cluster import run_tasks

    threads = 1 if scheduler else max(1, jobs // workers)
    calls = [(battery, entries[units[u][0]][1], units[u][1], threads, seed, options) for u in todo]

    def on_result(k, status, value):
        u = todo[k]
        if status == "failed":  # the task itself failed (e.g. the battery not importable)
            value = {"failure": f"battery failed on a worker: {value}"}
        elif status == "lost":
            value = {"failure": value}
        finish(u, value)

    def report(done, total, per_minute, alive):
        if progress is not None:
            progress(done / total, f"{done}/{total} batteries, {per_minute:.1f}/min, "
                     f"{alive} workers")  # fmt: skip

    run_tasks(
        _run_part,
        calls,
        workers=workers,
        scheduler=scheduler,
        on_result=on_result,
        progress=report,
        say=say,
    )
