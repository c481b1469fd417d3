"""Plots of battery curves and grades (the only module that imports matplotlib).

Every function draws data it is given and computes nothing: it takes the battery's ``curves``
dict (or a graded batch), draws on ``ax`` when one is passed (else on a new figure) and returns
the figure. matplotlib is imported inside the functions, so importing this module is cheap and
nothing loads it unless a plot is asked for. Figures are built with
:class:`matplotlib.figure.Figure` directly (no pyplot state), so they are safe to make in
worker threads.

A missing curve raises :class:`~audiodsm.errors.ParameterError` naming it.
"""

from __future__ import annotations

import numpy as np

from audiodsm.errors import ParameterError

__all__ = [
    "PLOTS",
    "plot_spectrum",
    "plot_thd_n_vs_level",
    "plot_idle_tone_map",
    "plot_state_histograms",
    "plot_frequency_response",
    "plot_margins",
    "plot_spectrogram",
    "plot_cost_against_margin",
]

# a plain palette of our own: ink, a blue, an ochre, a grey and a muted red
_INK = "#222222"
_BLUE = "#2f5d8a"
_OCHRE = "#b07d1a"
_GREY = "#8a8a8a"
_RED = "#a33b2b"
_GREEN = "#3d7a4a"
#: Colours for a series of curves or bars, used in turn.
_SERIES = (_BLUE, _OCHRE, _GREEN, _RED, _GREY, _INK, "#6b4c9a", "#2a8a8a")


def _axes(ax, size=(6.4, 3.4)):
    if ax is not None:
        return ax.figure, ax
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, dpi=100, layout="constrained")
    return fig, fig.add_subplot()


def _curve(curves, name, fields):
    c = curves.get(name) if isinstance(curves, dict) else None
    if not isinstance(c, dict) or any(f not in c for f in fields):
        raise ParameterError(
            f"curves[{name!r}]",
            sorted(c) if isinstance(c, dict) else c,
            "a curve with the fields " + ", ".join(fields),
        )
    return c


def _style(ax, title, xlabel, ylabel):
    ax.set_title(title, fontsize=10, loc="left", color=_INK)
    ax.set_xlabel(xlabel, fontsize=9)
    ax.set_ylabel(ylabel, fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(True, which="major", color="#dddddd", linewidth=0.6)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def plot_spectrum(curves, *, ax=None, title="Output spectrum"):
    """The reconstructed output spectrum, with the designed NTF and the weighting overlaid.

    Parameters
    ----------
    curves : dict
        ``curves["spectrum"]`` with ``frequency_hz`` and ``level_dbfs``; optional
        ``ntf_gain_db`` (designed NTF magnitude) and ``weighting_db`` (e.g. A-weighting)
        at the same frequencies, drawn against the right-hand axis.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "spectrum", ("frequency_hz", "level_dbfs"))
    fig, ax = _axes(ax)
    f = np.asarray(c["frequency_hz"], dtype=float)
    keep = f > 0
    ax.semilogx(f[keep], np.asarray(c["level_dbfs"])[keep], color=_BLUE, lw=0.7, label="output")
    _style(ax, title, "frequency (Hz)", "level per bin (dBFS)")
    ax.axvline(20000.0, color=_GREY, lw=0.8, ls=":")
    right = None
    for key, colour, label in (
        ("ntf_gain_db", _OCHRE, "designed NTF"),
        ("weighting_db", _GREEN, "A-weighting"),
    ):
        if key in c:
            if right is None:
                right = ax.twinx()
                right.set_ylabel("gain (dB)", fontsize=9)
                right.tick_params(labelsize=8)
                right.spines["top"].set_visible(False)
            g = np.asarray(c[key], dtype=float)[keep]
            right.semilogx(f[keep], g, color=colour, lw=1.1, ls="--", label=label)
    if right is not None:
        right.set_ylim(-120, 20)
        h1, l1 = ax.get_legend_handles_labels()
        h2, l2 = right.get_legend_handles_labels()
        ax.legend(h1 + h2, l1 + l2, fontsize=8, loc="lower right", frameon=False)
    return fig


def plot_thd_n_vs_level(curves, *, ax=None, title="THD+N against level"):
    """THD+N (unweighted and A-weighted) against the 997 Hz tone level.

    Parameters
    ----------
    curves : dict
        ``curves["thd_n_vs_level"]`` with ``level_dbfs`` and ``thd_n_db`` (optional
        ``thd_n_db_a``); ``curves["overload"]`` (same fields) is drawn when present.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "thd_n_vs_level", ("level_dbfs", "thd_n_db"))
    fig, ax = _axes(ax)
    ax.plot(c["level_dbfs"], c["thd_n_db"], "o-", color=_BLUE, ms=3, lw=1, label="unweighted")
    if "thd_n_db_a" in c:
        ax.plot(c["level_dbfs"], c["thd_n_db_a"], "s--", color=_OCHRE, ms=3, lw=1, label="A-wtd")
    over = curves.get("overload")
    if isinstance(over, dict) and "level_dbfs" in over and "thd_n_db" in over:
        ax.plot(over["level_dbfs"], over["thd_n_db"], "x", color=_RED, ms=5, label="overload")
    _style(ax, title, "tone level (dBFS)", "THD+N (dB)")
    ax.legend(fontsize=8, frameon=False)
    return fig


def plot_idle_tone_map(curves, *, ax=None, title="Idle tones against DC offset"):
    """The strongest in-band line at each small DC offset, with the detection limit.

    Parameters
    ----------
    curves : dict
        ``curves["idle_tone_map"]`` with ``dc_offset`` (signed, full-scale units),
        ``line_dbfs`` (NaN where no line was found) and ``detection_limit_dbfs``.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "idle_tone_map", ("dc_offset", "line_dbfs", "detection_limit_dbfs"))
    fig, ax = _axes(ax)
    off = np.asarray(c["dc_offset"], dtype=float)
    line = np.asarray(c["line_dbfs"], dtype=float)
    limit = np.asarray(c["detection_limit_dbfs"], dtype=float)
    for sign, marker, colour, label in ((1, "^", _BLUE, "positive"), (-1, "v", _OCHRE, "negative")):
        sel = np.sign(off) == sign
        order = np.argsort(np.abs(off[sel]))
        mag = np.abs(off[sel])[order]
        ax.semilogx(mag, limit[sel][order], color=colour, lw=0.8, ls=":")
        ax.semilogx(mag, line[sel][order], marker, color=colour, ms=5, label=f"{label} offset")
    if np.isnan(line).all():
        ax.text(
            0.5,
            0.5,
            "no line above the detection limit at any offset",
            transform=ax.transAxes,
            ha="center",
            fontsize=9,
            color=_INK,
        )
    _style(ax, title, "DC offset (fraction of full scale)", "strongest line (dBFS)")
    ax.legend(fontsize=8, frameon=False, title="dotted: detection limit", title_fontsize=7)
    return fig


def plot_state_histograms(curves, *, ax=None, title="Integrator states"):
    """Histograms of the loop's integrator states at the maximum stable amplitude.

    Parameters
    ----------
    curves : dict
        ``curves["state_histograms"]`` with ``edges`` (states x (bins + 1)) and ``counts``
        (states x bins).
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "state_histograms", ("edges", "counts"))
    fig, ax = _axes(ax)
    edges = np.atleast_2d(np.asarray(c["edges"], dtype=float))
    counts = np.atleast_2d(np.asarray(c["counts"], dtype=float))
    for k in range(counts.shape[0]):
        total = counts[k].sum()
        share = counts[k] / total if total > 0 else counts[k]
        ax.stairs(share, edges[k], color=_SERIES[k % len(_SERIES)], lw=1.1, label=f"state {k + 1}")
    _style(ax, title, "state value (full-scale units)", "share of samples")
    ax.legend(fontsize=7, frameon=False, ncols=2)
    return fig


def plot_frequency_response(curves, *, ax=None, title="Frequency response"):
    """Gain of the whole chain relative to 997 Hz.

    Parameters
    ----------
    curves : dict
        ``curves["frequency_response"]`` with ``frequency_hz`` and ``gain_db``.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "frequency_response", ("frequency_hz", "gain_db"))
    fig, ax = _axes(ax)
    ax.semilogx(c["frequency_hz"], c["gain_db"], "o-", color=_BLUE, ms=3, lw=1)
    ax.axhline(0.0, color=_GREY, lw=0.8)
    _style(ax, title, "frequency (Hz)", "gain re 997 Hz (dB)")
    return fig


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


def plot_spectrogram(
    times_s, frequency_hz, level_dbfs, *, ax=None, title="Spectrogram", floor_dbfs=-160.0
):
    """A spectrogram of a listening clip (level per bin in dBFS against time and frequency).

    Parameters
    ----------
    times_s, frequency_hz : array_like
        Centres of the analysis frames and the bin frequencies.
    level_dbfs : array_like
        Shape ``(len(frequency_hz), len(times_s))``, e.g. from
        :func:`audiodsm.evaluate.listening.spectrogram_dbfs`.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    floor_dbfs : float, keyword-only
        Bottom of the colour scale (the top is 0 dBFS).

    Returns
    -------
    matplotlib.figure.Figure
    """
    t = np.asarray(times_s, dtype=float)
    f = np.asarray(frequency_hz, dtype=float)
    z = np.asarray(level_dbfs, dtype=float)
    if z.shape != (f.size, t.size) or t.size == 0 or f.size < 2:
        raise ParameterError("level_dbfs", z.shape, f"shape ({f.size}, {t.size}), not empty")
    fig, ax = _axes(ax, size=(6.4, 2.6))
    # evenly spaced frames and bins (as a short-time spectrum gives them): one image
    dt = (t[-1] - t[0]) / (t.size - 1) if t.size > 1 else 1.0
    df = (f[-1] - f[0]) / (f.size - 1)
    extent = (t[0] - dt / 2, t[-1] + dt / 2, (f[0] - df / 2) / 1e3, (f[-1] + df / 2) / 1e3)
    mesh = ax.imshow(
        z, origin="lower", aspect="auto", extent=extent, cmap="viridis", vmin=floor_dbfs,
        vmax=0.0, interpolation="nearest",
    )  # fmt: skip
    _style(ax, title, "time (s)", "frequency (kHz)")
    ax.grid(False)
    bar = fig.colorbar(mesh, ax=ax, pad=0.01)
    bar.set_label("dBFS per bin", fontsize=8)
    bar.ax.tick_params(labelsize=7)
    return fig


#: The per-profile plots of a report, in order: (curve name, function, caption).
PLOTS = (
    ("spectrum", plot_spectrum, "output spectrum, designed NTF and A-weighting"),
    ("thd_n_vs_level", plot_thd_n_vs_level, "THD+N against level"),
    ("idle_tone_map", plot_idle_tone_map, "idle-tone map"),
    ("state_histograms", plot_state_histograms, "integrator state histograms"),
    ("frequency_response", plot_frequency_response, "frequency response"),
)


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
