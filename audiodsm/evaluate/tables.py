"""Aligned plain-text tables of results for the terminal (the commands and the demo print them).

:func:`aligned_lines` lays out any rows; :func:`metrics_table` shows battery metrics, one
column per profile (``audiodsm measure``); :func:`summary_table` and :func:`detail_table` show
a graded batch (``audiodsm grade`` and the demo).
"""

from __future__ import annotations

import math

__all__ = ["aligned_lines", "metrics_table", "summary_table", "detail_table", "spread_tables"]


def aligned_lines(rows, *, right=(), rule=False) -> list:
    """Rows of text cells as lines with aligned columns, two spaces apart.

    Parameters
    ----------
    rows : sequence of sequence of str
        The header row first; every row has the same number of cells.
    right : collection of int, keyword-only
        Columns aligned to the right (the others are aligned to the left).
    rule : bool, keyword-only
        Put a line of dashes under the header, as wide as each column.

    Returns
    -------
    list of str
        One line per row (plus the rule), trailing spaces removed.
    """
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    out = []
    for j, r in enumerate(rows):
        cells = [
            cell.rjust(w) if c in right else cell.ljust(w)
            for c, (cell, w) in enumerate(zip(r, widths, strict=True))
        ]
        out.append("  ".join(cells).rstrip())
        if rule and j == 0:
            out.append("  ".join("-" * w for w in widths))
    return out


def _cell(value, unit: str) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            return "-"
        if unit == "Hz":
            return f"{value:.0f}"
        return f"{value:.2f}" if abs(value) < 1e5 else f"{value:.4g}"
    return str(value)


def metrics_table(
    names: list[str], metric_rows: list[dict], invalid_rows=None, note_rows=None
) -> str:
    """An aligned text table: one row per metric (with its unit), one column per profile.

    An invalid reading shows as ``invalid [n]``, never as a number; the numbered reasons
    follow the table (one number per distinct reason), then each profile's battery notes.

    Parameters
    ----------
    names : list of str
        Column titles (profile names).
    metric_rows : list of dict
        One metrics dict per profile, in the order of ``names``.
    invalid_rows : list of dict, optional
        One ``{metric: reason}`` dict per profile (:attr:`BatteryResult.invalid`).
    note_rows : list of sequence of str, optional
        One list of battery notes per profile.

    Returns
    -------
    str
    """
    from audiodsm.evaluate.battery import METRIC_UNITS

    invalid_rows = invalid_rows or [{} for _ in metric_rows]
    keys = [k for k in METRIC_UNITS if any(k in m for m in metric_rows)]
    header = ["metric", "unit", *names]
    rows = [header]
    reasons: dict[str, int] = {}

    def cell(m, bad, k, unit):
        if k in bad:
            n = reasons.setdefault(str(bad[k]), len(reasons) + 1)
            return f"invalid [{n}]"
        return _cell(m.get(k), unit)

    for k in keys:
        unit = METRIC_UNITS[k][1]
        rows.append(
            [
                k,
                unit or "-",
                *(cell(m, bad, k, unit) for m, bad in zip(metric_rows, invalid_rows, strict=True)),
            ]
        )
    lines = aligned_lines(rows, right=range(2, len(header)), rule=True)
    if reasons:
        lines.append("")
        lines.append("invalid readings:")
        lines.extend(f"  [{n}] {text}" for text, n in reasons.items())
    for name, notes in zip(names, note_rows or [], strict=False):
        if notes:
            lines.append("")
            lines.append(f"notes on {name}:")
            lines.extend(f"  - {n}" for n in notes)
    return "\n".join(lines)


def _fmt(value, spec="+.2f"):
    return "-" if value is None else format(value, spec)


def summary_table(batch) -> list:
    """One line per profile: rank, verdict, worst normalized margin, failed targets, source.

    The margin column is :attr:`ProfileGrade.ranking_margin` (dB, see
    :func:`audiodsm.evaluate.grade.normalized_margin`): "none" when a target has no valid
    reading, "n/a" when every target is a count.

    Parameters
    ----------
    batch : GradeBatch
        What :func:`audiodsm.evaluate.grade.grade_batch` returned.

    Returns
    -------
    list of str
    """
    rows = [("rank", "profile", "verdict", "worst margin (dB)", "failed", "from")]
    for rank, g in enumerate(batch.grades, 1):
        worst = g.ranking_margin
        rows.append(
            (
                str(rank),
                g.name,
                "PASS" if g.passed else "FAIL",
                "n/a" if worst is None else ("none" if worst == float("-inf") else f"{worst:+.2f}"),
                f"{g.failed_count}/{len(g.lines)}",
                "cache" if g.cached else ("crashed" if g.failure else "run"),
            )
        )
    return aligned_lines(rows, right=(0, 3, 4))


def detail_table(batch) -> list:
    """One line per profile and target: requirement, reading, margin, unit, result.

    Parameters
    ----------
    batch : GradeBatch
        What :func:`audiodsm.evaluate.grade.grade_batch` returned.

    Returns
    -------
    list of str
    """
    rows = [("rank", "profile", "target", "requirement", "reading", "margin", "unit", "result")]
    for rank, g in enumerate(batch.grades, 1):
        for k, line in enumerate(g.lines):
            t = line.target
            rows.append(
                (
                    str(rank) if k == 0 else "",
                    g.name if k == 0 else "",
                    t.label,
                    t.requirement,
                    _fmt(line.value, ".2f")
                    if line.valid or not line.reason.startswith("invalid")
                    else "invalid",
                    _fmt(line.margin),
                    t.unit,
                    ("pass" if line.passed else "FAIL")
                    + _parts_text(line)
                    + ("" if line.passed or not line.reason else ": " + line.reason),
                )
            )
    return aligned_lines(rows, right=(0, 4, 5))


def _parts_text(line) -> str:
    """`` (19/20 parts met, 19 needed)`` for a target graded over parts, else empty."""
    if line.parts_total is None:
        return ""
    return f" ({line.parts_met}/{line.parts_total} parts met, {line.parts_needed} needed)"


def spread_tables(batch) -> list:
    """For every profile graded over several parts: each metric's spread over its parts.

    One block per such profile: a title line, then one row per metric with the number of
    parts with a reading, the minimum, the 5th percentile, the median, the 95th percentile
    and the maximum (:func:`audiodsm.evaluate.parts.metric_spread`).

    Returns
    -------
    list of str
        Empty when no profile ran more than one part.
    """
    from audiodsm.evaluate.parts import spread_rows

    lines = []
    for rank, g in enumerate(batch.grades, 1):
        if not g.parts:
            continue
        seeds = ", ".join(str(p.seed) for p in g.parts[:3])
        more = ", ..." if len(g.parts) > 3 else ""
        lines.append("")
        lines.append(
            f"{rank}. {g.name}: spread over {len(g.parts)} parts (part seeds {seeds}{more})"
        )
        rows = spread_rows(g.spread)
        lines.extend(aligned_lines(rows, right=range(2, len(rows[0])), rule=True))
    return lines
