"""Parts: one profile built many times, each with its own draw of the random impairments.

A profile's random impairments (element mismatch, random edge jitter, analog noise) are drawn
from ``impairments.part_seed``: one seed is one part, one converter as it comes off the line.
``measure`` and ``grade`` can run N parts of a profile (``impairments.parts``, or ``--parts``):
part 0 is the profile as written (its own ``part_seed``), part ``k >= 1`` uses the seed
:func:`part_seed_of` derives from ``(part_seed, k)``. Each part is a whole battery run on its
own profile (:func:`part_profile`), so it is cached under its own digest like any battery.
A profile with no random draw (:func:`random_draws` empty) has one part whatever N says.

Grading over parts (:func:`grade_parts`) counts the parts that meet each target: a target
with ``percentile = p`` passes when at least ``ceil(p N / 100)`` of the N parts meet it (every
part when the target names no percentile); its reading is the order statistic at that count
(the ``ceil(p N / 100)``-th best reading). The spread of every metric over parts
(:func:`metric_spread`) gives the minimum, the median, chosen percentiles and the maximum.

References
----------
R. J. Hyndman and Y. Fan, "Sample quantiles in statistical packages", The American
Statistician 50(4), 1996: definition 1 (inverse of the empirical distribution function) is
what the graded order statistic is for an ``at_most`` target; definition 7 (numpy's default)
gives the percentiles of the spread tables.
"""

from __future__ import annotations

import hashlib
import math
import numbers
from dataclasses import dataclass, field, replace
from fractions import Fraction

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.limits import PARTS_RANGE

__all__ = [
    "SPREAD_PERCENTILES",
    "PartReading",
    "is_number",
    "random_draws",
    "part_seed_of",
    "part_profile",
    "parts_to_run",
    "check_parts",
    "parts_needed",
    "grade_parts",
    "grade_profile_parts",
    "metric_spread",
    "spread_rows",
]

#: Percentiles shown between the minimum, the median and the maximum of every spread
#: (Hyndman & Fan definition 7, numpy's ``method="linear"``).
SPREAD_PERCENTILES = (5.0, 95.0)


@dataclass(frozen=True)
class PartReading:
    """One part's battery readings, as a graded profile keeps them.

    Attributes
    ----------
    index : int
        The part's number (0 is the profile as written).
    seed : int
        Its ``impairments.part_seed``.
    metrics : dict
        Metric name -> reading.
    invalid : dict
        Metric name -> why the battery called the reading invalid.
    curves : dict
        Only the curves a target reads from (the THD+N-versus-level sweep).
    cached : bool
        True when the battery came from the cache.
    seconds : float
    """

    index: int
    seed: int
    metrics: dict = field(repr=False)
    invalid: dict = field(default_factory=dict, repr=False)
    curves: dict = field(default_factory=dict, repr=False)
    cached: bool = False
    seconds: float = 0.0


def is_number(value) -> bool:
    """True for a real number that is not a flag (Python or numpy; bools are flags)."""
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))


def random_draws(profile) -> tuple:
    """The ``[impairments]`` keys of a profile that draw something at random per part.

    Element mismatch (the element weights; random selection draws only where there is
    mismatch to move, with none it is the ideal output bit for bit), random edge jitter and
    analog noise. Sinusoidal jitter and supply ripple are deterministic.

    Returns
    -------
    tuple of str
        Empty when every part would be the same converter.
    """
    imp = profile.impairments
    keys = []
    if imp.element_mismatch > 0.0:
        keys.append("element_mismatch")
    if imp.jitter_rms_s > 0.0:
        keys.append("jitter_rms_s")
    if imp.noise_density_nv > 0.0:
        keys.append("noise_density_nv")
    return tuple(keys)


def part_seed_of(base_seed: int, index: int) -> int:
    """The ``part_seed`` of part ``index`` of a profile whose own ``part_seed`` is ``base_seed``.

    Part 0 is ``base_seed`` itself. Part ``k >= 1``: the first four bytes of the SHA-256 of
    the ASCII text ``"audiodsm part <base_seed> <k>"`` (decimal numbers, single spaces), read
    as a big-endian unsigned integer with its top bit cleared (0 to 2**31 - 1, the key's
    range). Any tool can recompute it; the seeds of different ``k`` are unrelated.

    Parameters
    ----------
    base_seed : int
    index : int
        0 or more.

    Returns
    -------
    int
    """
    if index == 0:
        return int(base_seed)
    text = f"audiodsm part {int(base_seed)} {int(index)}".encode("ascii")
    return int.from_bytes(hashlib.sha256(text).digest()[:4], "big") & 0x7FFFFFFF


def part_profile(profile, index: int):
    """Part ``index`` of a profile: the same profile with that part's seed and one part.

    ``impairments.parts`` is set to 1, so the part's digest (and so its cache key) is the
    same however many parts the batch runs. Part 0 of a profile with ``parts = 1`` is the
    profile itself.
    """
    imp = profile.impairments
    seed = part_seed_of(imp.part_seed, index)
    if seed == imp.part_seed and imp.parts == 1:
        return profile
    return replace(profile, impairments=replace(imp, part_seed=seed, parts=1))


def check_parts(value, *, name: str = "parts") -> int:
    """Refuse a part count outside :data:`~audiodsm.limits.PARTS_RANGE` (one line).

    Raises
    ------
    ParameterError
        Not an integer, or not from 1 to the stated limit.
    """
    lo, hi = PARTS_RANGE
    if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
        raise ParameterError(name, value, f"an integer from {lo} to {hi} (parts per profile)")
    return value


def parts_to_run(profile, requested: int | None = None) -> int:
    """How many parts of a profile to run: 1 without random draws, else the count asked for.

    Parameters
    ----------
    profile : ChainProfile
    requested : int or None
        A count from the command line; None takes the profile's ``impairments.parts``.
    """
    if not random_draws(profile):
        return 1
    return check_parts(requested) if requested is not None else profile.impairments.parts


def parts_needed(percentile, count: int) -> int:
    """How many of ``count`` parts must meet a target: ``ceil(percentile * count / 100)``.

    Computed exactly (the percentile as the decimal it was written as), so 95 % of 20 parts
    is 19, not 20 by a rounding error; at least 1. ``percentile`` None means every part.
    """
    if percentile is None:
        return count
    share = Fraction(repr(float(percentile))) * count / 100
    return max(1, math.ceil(share))


def grade_parts(parts, spec) -> tuple:
    """Grade the readings of several parts of one profile against a spec sheet.

    For each target, every part's reading is taken as :func:`~audiodsm.evaluate.grade.
    grade_metrics` takes it (an invalid or missing reading never meets the target). With ``r
    = parts_needed(target.percentile, N)`` the target passes when at least ``r`` parts meet
    it. The graded value is the ``r``-th best reading (for ``at_most`` the ``r``-th smallest,
    for ``at_least`` the ``r``-th largest; the valid readings come before the missing ones),
    so its margin is positive exactly when the target passes. When fewer than ``r`` parts
    have a reading, there is no value and the reason says how many had one.

    Parameters
    ----------
    parts : sequence of PartReading
    spec : SpecSheet

    Returns
    -------
    tuple of TargetGrade
        With ``parts_met``, ``parts_needed`` and ``parts_total`` set.
    """
    from audiodsm.evaluate.grade import TargetGrade, _reading

    out = []
    count = len(parts)
    for target in spec.targets:
        needed = parts_needed(target.percentile, count)
        values, reasons = [], []
        for p in parts:
            value, reason = _reading(target, p.metrics, p.curves, p.invalid)
            if value is None:
                reasons.append(f"part {p.index}: {reason}")
            else:
                values.append(value)
        met = sum(target.margin(v) >= 0.0 for v in values)
        counts = {"parts_met": met, "parts_needed": needed, "parts_total": count}
        if len(values) < needed:
            why = f"{len(values)} of {count} parts have a reading, {needed} needed ({reasons[0]})"
            out.append(TargetGrade(target, None, None, False, why, **counts))
            continue
        ordered = sorted(values, reverse=target.bound == "at_least")
        value = ordered[needed - 1]
        margin = target.margin(value)
        out.append(TargetGrade(target, value, margin, margin >= 0.0, **counts))
    return tuple(out)


def grade_profile_parts(name, source, digest, profile, spec, outcomes):
    """One profile's :class:`~audiodsm.evaluate.grade.ProfileGrade` from its parts' outcomes.

    Parameters
    ----------
    name, source, digest : str
    profile : ChainProfile
        The profile as written (its ``part_seed`` is part 0's).
    spec : SpecSheet
    outcomes : list of (int, dict, bool)
        ``(part index, battery outcome, came from the cache)`` in part order; an outcome
        with a ``"failure"`` fails the whole profile, naming the part.

    Returns
    -------
    ProfileGrade
        One part: graded as :func:`~audiodsm.evaluate.grade.grade_metrics` grades; several:
        by :func:`grade_parts`, with every part's readings in ``parts``.
    """
    from audiodsm.evaluate.grade import ProfileGrade, _failed_lines, grade_metrics

    for part, out, _ in outcomes:
        if "failure" in out:
            failure = out["failure"]
            if len(outcomes) > 1:
                seed = part_seed_of(profile.impairments.part_seed, part)
                failure = f"part {part} (part_seed {seed}): {failure}"
            return ProfileGrade(
                name=name,
                source=source,
                digest=digest,
                lines=_failed_lines(spec, failure),
                failure=failure,
            )
    first = outcomes[0][1]
    readings = ()
    if len(outcomes) == 1:
        lines = grade_metrics(first["metrics"], first["curves"], spec, first.get("invalid"))
    else:
        readings = tuple(
            PartReading(
                index=part,
                seed=part_seed_of(profile.impairments.part_seed, part),
                metrics=out["metrics"],
                invalid=dict(out.get("invalid", {})),
                curves={k: v for k, v in out["curves"].items() if k == "thd_n_vs_level"},
                cached=was_cached,
                seconds=out["seconds"],
            )
            for part, out, was_cached in outcomes
        )
        lines = grade_parts(readings, spec)
    return ProfileGrade(
        name=name,
        source=source,
        digest=digest,
        lines=lines,
        metrics=first["metrics"],
        curves=first["curves"],
        notes=tuple(first["notes"]),
        cached=all(c for _, _, c in outcomes),
        seconds=sum(out["seconds"] for _, out, _ in outcomes),
        invalid=dict(first.get("invalid", {})),
        parts=readings,
    )


def metric_spread(parts, percentiles=SPREAD_PERCENTILES) -> dict:
    """Each metric's distribution over parts.

    Parameters
    ----------
    parts : sequence of PartReading
    percentiles : sequence of float
        Shown besides the minimum, median and maximum (Hyndman & Fan definition 7).

    Returns
    -------
    dict
        Metric name -> ``{"parts": N, "readings": n, "min", "p5", ..., "median", ...,
        "max"}`` (``p<q>`` with ``q`` as ``%g``), over the ``n`` parts whose reading is a
        valid finite number (flags and invalid readings left out); the numbers are None when
        ``n`` is 0. Metrics in the order of the first part.
    """
    names = []
    for p in parts:
        names.extend(k for k in p.metrics if k not in names)
    out = {}
    for name in names:
        values = []
        for p in parts:
            v = p.metrics.get(name)
            if name in p.invalid or not is_number(v):
                continue
            if math.isfinite(float(v)):
                values.append(float(v))
        row = {"parts": len(parts), "readings": len(values)}
        arr = np.asarray(values, dtype=float)
        stats = [("min", 0.0)]
        stats += [(f"p{q:g}", float(q)) for q in percentiles if q < 50.0]
        stats += [("median", 50.0)]
        stats += [(f"p{q:g}", float(q)) for q in percentiles if q >= 50.0]
        stats += [("max", 100.0)]
        for key, q in stats:
            row[key] = float(np.percentile(arr, q, method="linear")) if arr.size else None
        out[name] = row
    return out


def spread_rows(spread: dict) -> list:
    """The column titles and rows of a spread table (text, for terminal tables).

    Returns
    -------
    list of tuple of str
        First the header (``metric, unit, parts, min, p5, median, p95, max``), then one row
        per metric with at least one reading.
    """
    from audiodsm.evaluate.battery import METRIC_UNITS

    if not spread:
        return []
    stat_keys = [k for k in next(iter(spread.values())) if k not in ("parts", "readings")]
    rows = [("metric", "unit", "parts", *stat_keys)]
    for name, row in spread.items():
        if not row["readings"]:
            continue
        unit = METRIC_UNITS.get(name, ("", "", ""))[1] or "-"
        count = f"{row['readings']}/{row['parts']}"
        rows.append((name, unit, count, *(f"{row[k]:.6g}" for k in stat_keys)))
    return rows
