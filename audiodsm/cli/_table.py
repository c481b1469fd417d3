"""Aligned plain-text tables for the terminal output of the commands."""

from __future__ import annotations


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
