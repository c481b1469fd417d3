"""Aligned plain-text tables of results for the terminal (the commands and the demo print them).

:func:`aligned_lines` lays out any rows; :func:`metrics_table` shows battery metrics, one
column per profile (``audiodsm measure``); :func:`summary_table` and :func:`detail_table` show
a graded batch (``audiodsm grade`` and the demo).
"""

from __future__ import annotations

import math

__all__ = ["aligned_lines", "metrics_table", "summary_table", "detail_table"]


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


def metrics_table(names: list[str], metric_rows: list[dict]) -> str:
    """An aligned text table: one row per metric (with its unit), one column per profile.

    Parameters
    ----------
    names : list of str
        Column titles (profile names).
    metric_rows : list of dict
        One metrics dict per profile, in the order of ``names``.

    Returns
    -------
    str
    """
    from audiodsm.evaluate.battery import METRIC_UNITS

    keys = [k for k in METRIC_UNITS if any(k in m for m in metric_rows)]
    header = ["metric", "unit", *names]
    rows = [header]
    for k in keys:
        unit = METRIC_UNITS[k][1]
        rows.append([k, unit or "-", *(_cell(m.get(k), unit) for m in metric_rows)])
    lines = aligned_lines(rows, right=range(2, len(header)), rule=True)
    return "\n".join(lines)


def _fmt(value, spec="+.2f"):
    return "-" if value is None else format(value, spec)


def summary_table(batch) -> list:
    """One line per profile: rank, verdict, worst margin, failed targets, source.

    Parameters
    ----------
    batch : GradeBatch
        What :func:`audiodsm.evaluate.grade.grade_batch` returned.

    Returns
    -------
    list of str
    """
    rows = [("rank", "profile", "verdict", "worst margin", "failed", "from")]
    for rank, g in enumerate(batch.grades, 1):
        worst = g.worst_margin
        rows.append(
            (
                str(rank),
                g.name,
                "PASS" if g.passed else "FAIL",
                "none" if worst == float("-inf") else f"{worst:+.2f}",
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
                    _fmt(line.value, ".2f"),
                    _fmt(line.margin),
                    t.unit,
                    "pass"
                    if line.passed
                    else ("FAIL" if not line.reason else "FAIL: " + line.reason),
                )
            )
    return aligned_lines(rows, right=(0, 4, 5))
