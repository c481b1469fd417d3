"""Plots of grades: margins per target, the spread over parts, cost against worst margin.

The plots of one battery's curves (and of several profiles' curves together) are in
:mod:`audiodsm.evaluate.plotting`, whose palette, axes style and figure making these share;
like those, every function here draws data it is given, computes nothing, draws on ``ax``
when one is passed (else on a new :class:`matplotlib.figure.Figure`) and returns the figure.
They never import matplotlib themselves: figures and shapes come from the plotting module's
helpers, which stays the only importer of matplotlib. The three are also found in
:mod:`audiodsm.evaluate.plotting` by name.
"""

from __future__ import annotations

import numpy as np

from audiodsm.errors import ParameterError
from audiodsm.evaluate.plotting import (
    _BLUE,
    _GREY,
    _INK,
    _RED,
    _SERIES,
    _VERMILLION,
    _axes,
    _box,
    _new_figure,
    _style,
)

__all__ = ["plot_margins", "plot_part_spread", "plot_cost_against_margin"]


def plot_margins(batch, *, ax=None, title="Margin per target"):
    """Each profile's margin on each target of the spec sheet (positive = better than limit).

    Parameters
    ----------
    batch : GradeBatch
        A graded batch (:func:`audiodsm.evaluate.grade.grade_batch`).
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only

    Returns
    -------
    matplotlib.figure.Figure
        Targets without a reading are marked with a cross at the left edge.
    """
    grades = list(batch.grades)
    targets = list(batch.spec.targets)
    fig, ax = _axes(ax, size=(7.6, 0.3 * len(targets) * max(1, len(grades)) ** 0.5 + 1.3))
    n = max(1, len(grades))
    height = 0.8 / n
    y = np.arange(len(targets), dtype=float)
    finite = [ln.margin for g in grades for ln in g.lines if ln.margin is not None]
    low = min(finite + [0.0])
    for k, g in enumerate(grades):
        pos = y - 0.4 + height * (k + 0.5)
        m = np.array([np.nan if ln.margin is None else ln.margin for ln in g.lines])
        ax.barh(pos, np.nan_to_num(m), height=height, color=_SERIES[k % len(_SERIES)], label=g.name)
        missing = np.isnan(m)
        if missing.any():
            ax.plot(np.full(missing.sum(), low), pos[missing], "x", color=_RED, ms=6)
    ax.axvline(0.0, color=_INK, lw=0.9)
    # margins come in different units and sizes (0.1 dB to 1e5 Hz): a scale linear within
    # +-1 and logarithmic beyond keeps every bar readable
    ax.set_xscale("symlog", linthresh=1.0)
    ax.set_yticks(y, [t.label + f" ({t.unit})" for t in targets], fontsize=8)
    ax.invert_yaxis()
    _style(ax, title, "margin in the target's unit (linear within ±1, logarithmic beyond)", "")
    ax.legend(fontsize=7, frameon=False, loc="best")
    return fig


def plot_part_spread(parts, *, graded=(), title="Spread over parts", max_metrics=12):
    """Each metric's readings over the parts of one profile: a strip plot per metric.

    One panel per metric (each in its own unit): every part's reading as a point (circle
    when it meets the metric's spec target, cross when not; jittered up and down so equal
    readings stay visible), a box from the 5th to the 95th percentile with the median as a
    thick line, and the target's limit as a dashed line. Metrics a target names come first,
    then those that differ between parts; at most ``max_metrics`` panels.

    Parameters
    ----------
    parts : sequence of PartReading
        A profile's parts (:attr:`ProfileGrade.parts`).
    graded : sequence of TargetGrade, keyword-only
        The profile's graded targets (their limits are drawn).
    title : str, keyword-only
    max_metrics : int, keyword-only

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    ParameterError
        No metric has a reading in two or more parts.
    """
    from audiodsm.evaluate.battery import METRIC_UNITS
    from audiodsm.evaluate.parts import is_number, metric_spread

    spread = metric_spread(parts)
    limits = {}
    for line in graded:
        t = line.target
        if t.at_level_dbfs is None and t.metric in spread:
            limits.setdefault(t.metric, t)
    varied = [k for k, r in spread.items() if r["readings"] >= 2 and r["max"] > r["min"]]
    names = [k for k in limits if spread[k]["readings"] >= 2]
    names += [k for k in varied if k not in names]
    names = names[:max_metrics]
    if not names:
        raise ParameterError("parts", len(parts), "readings that differ between two or more parts")
    fig = _new_figure((7.6, 0.85 * len(names) + 0.9))
    axes = fig.subplots(len(names), 1, squeeze=False)
    offsets = np.linspace(-0.25, 0.25, len(parts)) if len(parts) > 1 else np.zeros(1)
    for ax, name in zip(axes[:, 0], names, strict=True):
        row, target = spread[name], limits.get(name)
        values = np.array(
            [
                np.nan
                if name in p.invalid or not is_number(p.metrics.get(name))
                else float(p.metrics[name])
                for p in parts
            ]
        )
        ok = np.isfinite(values)
        meets = np.ones(values.size, dtype=bool)
        if target is not None:
            meets = np.array(
                [bool(v) and target.margin(x) >= 0.0 for x, v in zip(values, ok, strict=True)]
            )
        for mask, marker, colour in ((ok & meets, "o", _BLUE), (ok & ~meets, "x", _VERMILLION)):
            if mask.any():
                ax.plot(values[mask], offsets[mask], marker, color=colour, ms=4, alpha=0.8)
        _box(ax, (row["p5"], -0.38), row["p95"] - row["p5"], 0.76, ec=_INK, lw=0.8)
        ax.plot([row["median"]] * 2, [-0.38, 0.38], color=_INK, lw=2.2)
        if target is not None:
            ax.axvline(target.limit, color=_INK, ls="--", lw=1.0)
        ax.set_ylim(-0.5, 0.5)
        ax.set_yticks([])
        unit = target.unit if target is not None else METRIC_UNITS.get(name, ("", "", ""))[1]
        label = f"{name} ({unit})" if unit else name
        ax.set_ylabel(label, rotation=0, ha="right", va="center", fontsize=7)
        ax.tick_params(axis="x", labelsize=7)
        ax.grid(True, axis="x", alpha=0.3)
    axes[0, 0].set_title(
        f"{title}: {len(parts)} parts (box: 5th to 95th percentile, thick line: median, "
        "dashed: limit, x: misses it)",
        fontsize=8,
    )
    return fig


def plot_cost_against_margin(points, front, *, ax=None, title="Cost against worst margin"):
    """Every graded candidate of an exploration: cost against worst margin, front highlighted.

    Parameters
    ----------
    points : sequence of (float, float, str)
        ``(cost, worst margin in dB, profile name)``; a margin of ``-inf`` (no reading) is
        drawn as a cross at the bottom edge.
    front : collection of str
        Names of the profiles on the front: drawn larger, joined by a line and labelled.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, ax = _axes(ax, size=(7.6, 4.6))
    finite = [m for _, m, _ in points if np.isfinite(m)]
    floor = (min(finite) if finite else 0.0) - 3.0
    for cost, margin, name in points:
        if not np.isfinite(margin):
            ax.plot(cost, floor, "x", color=_RED, ms=5)
        elif name not in front:
            ax.plot(cost, margin, "o", color=_GREY, ms=4, alpha=0.7)
    chosen = sorted((c, m, n) for c, m, n in points if n in front and np.isfinite(m))
    if chosen:
        ax.plot([c for c, _, _ in chosen], [m for _, m, _ in chosen], "-o", color=_BLUE, ms=6)
        for c, m, n in chosen:
            ax.annotate(n, (c, m), textcoords="offset points", xytext=(4, 4), fontsize=7)
    ax.axhline(0.0, color=_INK, lw=0.8)
    ax.set_xscale("log")
    _style(ax, title, "cost: clock MHz x levels x order (+ PWM edges, MHz)", "worst margin (dB)")
    return fig
