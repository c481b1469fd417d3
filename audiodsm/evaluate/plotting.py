"""Plots of battery curves (the only module that imports matplotlib).

Every function draws data it is given and computes nothing: it takes the battery's ``curves``
dict (of one profile, or of several for :func:`plot_overlay`), draws on ``ax`` when one is
passed (else on a new figure) and returns the figure. matplotlib is imported inside the
functions, so importing this module is cheap and nothing loads it unless a plot is asked for.
Figures are built with :class:`matplotlib.figure.Figure` directly (no pyplot state), so they
are safe to make in worker threads.

A missing curve raises :class:`~audiodsm.errors.ParameterError` naming it. The plots of
grades (margins, the spread over parts, cost against margin) are in
:mod:`audiodsm.evaluate.grade_plots`, drawn through this module's helpers, and found here by
name too.
"""

from __future__ import annotations

import numpy as np

from audiodsm.errors import ParameterError

#: Plots of grades rather than of one battery's curves, kept in
#: :mod:`audiodsm.evaluate.grade_plots` and still reachable here by name.
_GRADE_PLOTS = ("plot_margins", "plot_cost_against_margin", "plot_part_spread")

__all__ = [
    "PLOTS",
    "OVERLAYS",
    "series_style",
    "plot_noise_density",
    "plot_audio_band_density",
    "plot_spectrum",
    "plot_thd_n_vs_level",
    "plot_thd_n_vs_frequency",
    "plot_idle_tone_map",
    "plot_state_histograms",
    "plot_frequency_response",
    "plot_dynamic_range_vs_jitter",
    "plot_overlay",
    "overlay_curve",
    "plot_spectrogram",
]

# Okabe & Ito's colour-blind-safe set ("Color Universal Design", 2008): blue, vermillion,
# bluish green, reddish purple, orange, sky blue, black; yellow is left out (too pale on white).
_INK = "#222222"
_BLUE = "#0072B2"
_VERMILLION = "#D55E00"
_GREEN = "#009E73"
_PURPLE = "#CC79A7"
_ORANGE = "#E69F00"
_SKY = "#56B4E9"
_GREY = "#8a8a8a"
_OCHRE = _ORANGE
_RED = _VERMILLION
#: Colours for a series of curves or bars, used in turn.
_SERIES = (_BLUE, _VERMILLION, _GREEN, _PURPLE, _ORANGE, _SKY, _INK)
#: Line styles and markers used in turn with the colours, so series differ without colour.
_LINESTYLES = ("-", "--", "-.", ":")
_MARKERS = ("o", "s", "^", "D", "v", "P", "*")
#: Marker shapes of a limit's verdict: readable without colour.
_PASS_MARKER, _FAIL_MARKER = "o", "X"


def series_style(index: int) -> dict:
    """Colour, line style and marker of series ``index`` (one per profile in a report).

    The colour cycles through a colour-blind-safe set of seven (Okabe & Ito 2008); the line
    style and the marker change too, so two series differ in print and without colour.

    Parameters
    ----------
    index : int
        0-based position of the series (a profile's rank minus one).

    Returns
    -------
    dict
        ``{"color": str, "ls": str, "marker": str}``, keyword arguments for ``Axes.plot``.

    References
    ----------
    .. [1] M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and
       presentations that are friendly to colorblind people", 2008 (the palette).
    """
    i = int(index)
    return {
        "color": _SERIES[i % len(_SERIES)],
        "ls": _LINESTYLES[(i // len(_SERIES) + i) % len(_LINESTYLES)],
        "marker": _MARKERS[i % len(_MARKERS)],
    }


def _new_figure(size):
    """A new figure (no pyplot state), 100 dpi, laid out to fit its axes."""
    from matplotlib.figure import Figure

    return Figure(figsize=size, dpi=100, layout="constrained")


def _box(ax, xy, width, height, **kw):
    """An unfilled rectangle with its lower left corner at ``xy``."""
    from matplotlib.patches import Rectangle

    ax.add_patch(Rectangle(xy, width, height, fill=False, **kw))


def _axes(ax, size=(6.4, 3.4)):
    if ax is not None:
        return ax.figure, ax
    fig = _new_figure(size)
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


def _graded(graded, *metrics):
    """The graded targets (``TargetGrade``) among ``graded`` whose metric is in ``metrics``."""
    return [g for g in graded or () if g.target.metric in metrics]


def _verdict(g, level_dbfs=None, *, where=None, word=True) -> str:
    """A target's limit and verdict in words, e.g. ``"limit <= -90 dB: pass"``.

    ``where`` (e.g. ``"at 10 ps"``) replaces the level the target is graded at; without
    ``word`` the verdict is left out (a limit several profiles share).
    """
    t = g.target
    sign = ">=" if t.bound == "at_least" else "<="
    unit = f" {t.unit}" if t.unit else ""
    if level_dbfs is None:
        level_dbfs = t.at_level_dbfs
    if where is None:
        where = f"at {level_dbfs:g} dBFS" if level_dbfs is not None else ""
    text = f"limit{' ' + where if where else ''} {sign} {t.limit:g}{unit}"
    if not word:
        return text
    if g.passed:
        verdict = "pass"
    else:
        verdict = "FAIL" if g.value is not None else "FAIL (no valid reading)"
    return f"{text}: {verdict}"


def _limit_line(ax, g, *, y=None, x=None, xspan=None, shared=None, **kw):
    """A dashed limit line (horizontal at ``y`` or vertical at ``x``), labelled with its verdict.

    ``shared`` (a set, on a plot of several profiles) holds the lines drawn so far: a limit
    the profiles share is drawn once.
    """
    style = {"color": _INK, "lw": 1.0, "ls": (0, (5, 3)), "label": _verdict(g), **kw}
    if shared is not None:
        key = (style["label"], y, x, None if xspan is None else tuple(xspan))
        if key in shared:
            return
        shared.add(key)
    if y is not None:
        if xspan is None:
            ax.axhline(y, **style)
        else:
            ax.plot(xspan, [y, y], **style)
    else:
        ax.axvline(x, **style)


def _verdict_marker(ax, g, x, y, colour=_INK):
    """The reading against its limit: an open circle when it passes, a filled cross when not."""
    if y is None or not np.isfinite(y):
        return
    ax.plot([x], [y], _PASS_MARKER if g.passed else _FAIL_MARKER, color=colour, ms=7,
            mfc="none" if g.passed else colour, zorder=5)  # fmt: skip


def _db_power(v):
    with np.errstate(divide="ignore"):
        return 10.0 * np.log10(v)


def _prediction_label(c):
    """The legend of a predicted density: what it assumes of the quantizer."""
    k = float(np.asarray(c.get("predicted_quantizer_gain", [1.0]), dtype=float)[0])
    if k == 1.0:
        return "predicted from the NTF (quantizer gain 1, white error + dither)"
    # a single-bit loop: the sign quantizer's error is not white, and no gain can say so; the
    # model is an upper bound, the simulated density lies 1 to 4.5 dB under it (docs/report.md)
    return (
        f"predicted from the NTF, effective quantizer gain {k:.2f} (fitted to a run);\n"
        "single-bit: an upper bound, up to 4.5 dB high (the error is not white)"
    )


# -- What the plot of one profile and the plot of every profile share for a quantity: the axes,
# and the spec limits with the readings marked against them. A limit helper draws the limit
# lines of the graded targets it knows and returns where each reading goes, ``(grade, x, y,
# limit label)`` (``y`` None without a reading). With ``shared`` (a set, on the plot of every
# profile) a limit is drawn once and labelled without a verdict, which the markers in each
# profile's colour then give.

#: The dynamic-range metrics drawn on the audio-band density.
_DR_METRICS = ("dynamic_range_db", "dynamic_range_db_a", "dynamic_range_db_ccir")
#: The in-band width a flat density is spread over to give a dynamic range (20 Hz to 20 kHz).
_IN_BAND_WIDTH_DB = 10.0 * np.log10(20000.0 - 20.0)


def _level_axes(ax, title):
    _style(ax, title, "tone level (dBFS)", "THD+N (dB)")


def _frequency_axes(ax, title):
    ax.set_xscale("log")
    _style(ax, title, "tone frequency (Hz)", "THD+N (dB)")


def _audio_band_axes(ax, title, top_khz=24.0):
    ax.set_xlim(0.0, top_khz)
    ax.axvline(20.0, color=_GREY, lw=0.8, ls=":")
    _style(ax, title, "frequency (kHz)", "noise density (dBFS/\u221aHz)")


def _jitter_axes(ax, title, sigma_ps):
    ax.set_xscale("log")
    ticks = sorted({float(v) for v in sigma_ps if np.isfinite(v) and v > 0})
    if ticks:
        ax.set_xlim(ticks[0] / 2.0, ticks[-1] * 2.0)
        ax.set_xticks(ticks, [f"{v:g}" for v in ticks])
        ax.minorticks_off()
    _style(ax, title, "clock jitter, white, rms (ps)", "dynamic range (dB)")


def _level_limits(ax, graded, curve=None, *, shared=None):
    """THD+N targets at a level: a short bar at the level, the reading at the level."""
    marks = []
    for g in _graded(graded, *_THD_N_LEVEL_METRICS):
        column, fixed = _THD_N_LEVEL_METRICS[g.target.metric]
        lv = fixed if fixed is not None else g.target.at_level_dbfs
        if lv is None:
            continue
        weighted = column == "thd_n_db_a"
        label = ("A-wtd " if weighted else "") + _verdict(g, lv, word=shared is None)
        _limit_line(ax, g, y=g.target.limit, xspan=(lv - 4.0, lv + 4.0), shared=shared,
                    ls="--" if weighted else (0, (5, 3)), label=label)  # fmt: skip
        marks.append((g, lv, g.value, label))
    return marks


def _frequency_limits(ax, graded, curve, *, shared=None):
    """Worst THD+N over frequency: a line across the band, the reading at the worst tone."""
    f = np.asarray(curve["frequency_hz"], dtype=float)
    grid = np.atleast_2d(np.asarray(curve["thd_n_db"], dtype=float))
    levels = [float(v) for v in np.atleast_1d(curve["level_dbfs"])]
    marks = []
    for lv, name in ((-1.0, "minus1"), (-20.0, "minus20")):
        for g in _graded(graded, f"thd_n_db_worst_over_frequency_at_{name}_dbfs"):
            ls = (0, (5, 3)) if lv == -1.0 else (0, (1, 2))
            label = f"{lv:g} dBFS " + _verdict(g, word=shared is None)
            _limit_line(ax, g, y=g.target.limit, ls=ls, shared=shared, label=label)
            if lv in levels and np.isfinite(grid[levels.index(lv)]).any():
                row = grid[levels.index(lv)]
                j = int(np.nanargmax(row))
                marks.append((g, f[j], row[j] if g.value is not None else None, label))
            else:
                marks.append((g, np.nan, None, label))
    return marks


def _density_limits(ax, graded, curve=None, *, shared=None):
    """Dynamic range on the audio-band density: the flat density of the limit's power."""
    marks = []
    for g in _graded(graded, *_DR_METRICS):
        label = _verdict(g, word=shared is None)
        _limit_line(ax, g, y=-g.target.limit - _IN_BAND_WIDTH_DB, xspan=(0.02, 20.0),
                    shared=shared, label=label)  # fmt: skip
        y = None if g.value is None else -g.value - _IN_BAND_WIDTH_DB
        marks.append((g, 10.0, y, label))
    return marks


def _jitter_limits(ax, graded, curve=None, *, shared=None):
    """Dynamic range at a jitter: a short bar at that jitter, the reading on it."""
    from audiodsm.evaluate.battery_impairments import JITTER_METRICS

    marks = []
    for sigma_s, metric in JITTER_METRICS.items():
        x = sigma_s * 1e12
        for g in _graded(graded, metric):
            label = _verdict(g, where=f"at {x:g} ps", word=shared is None)
            _limit_line(ax, g, y=g.target.limit, xspan=(x / 1.6, x * 1.6), shared=shared,
                        label=label)  # fmt: skip
            marks.append((g, x, g.value, label))
    return marks


def _mark_readings(ax, marks, colour=_INK):
    """Each reading against its limit (see :func:`_verdict_marker`); True if any was drawn."""
    drawn = False
    for g, x, y, _label in marks:
        _verdict_marker(ax, g, x, y, colour)
        drawn = drawn or (y is not None and bool(np.isfinite(y)))
    return drawn


def plot_noise_density(curves, *, ax=None, title="Output noise density, whole output band",
                       graded=()):  # fmt: skip
    """The output noise as a density, with the density the designed NTF predicts.

    Parameters
    ----------
    curves : dict
        ``curves["spectrum"]`` with ``frequency_hz`` and ``density_dbfs_per_hz``; optional
        ``predicted_density_dbfs_per_hz`` (same axis) with ``predicted_quantizer_gain`` (the
        quantizer gain it assumes, named in the legend), ``out_of_band_hz`` (the band of the
        out-of-band noise reading) and ``weighting_db`` (A-weighting, right-hand axis).
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    graded : sequence of TargetGrade, keyword-only
        Graded targets; an ``out_of_band_noise_dbfs`` limit is drawn as the flat density
        that carries exactly the limit's power over the out-of-band band.

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "spectrum", ("frequency_hz", "density_dbfs_per_hz"))
    fig, ax = _axes(ax)
    f = np.asarray(c["frequency_hz"], dtype=float)
    keep = f > 0
    d = np.asarray(c["density_dbfs_per_hz"], dtype=float)
    ax.semilogx(f[keep], d[keep], color=_BLUE, lw=0.7, label="simulated output")
    if "predicted_density_dbfs_per_hz" in c:
        p = np.asarray(c["predicted_density_dbfs_per_hz"], dtype=float)
        ax.semilogx(f[keep], p[keep], color=_VERMILLION, lw=1.3, ls="--",
                    label=_prediction_label(c))  # fmt: skip
    _style(ax, title, "frequency (Hz)", "noise density (dBFS/\u221aHz)")
    ax.axvline(20000.0, color=_GREY, lw=0.8, ls=":")
    finite = d[keep][np.isfinite(d[keep])]
    if finite.size:
        ax.set_ylim(max(np.min(finite), np.max(finite) - 160.0) - 5.0, np.max(finite) + 10.0)
    band = np.asarray(c.get("out_of_band_hz", (20000.0, f[-1])), dtype=float)
    for g in _graded(graded, "out_of_band_noise_dbfs"):
        flat = g.target.limit - 10.0 * np.log10(band[1] - band[0])
        _limit_line(ax, g, y=flat, xspan=band)
        if g.value is not None:
            _verdict_marker(ax, g, float(np.sqrt(band[0] * band[1])),
                            g.value - 10.0 * np.log10(band[1] - band[0]))  # fmt: skip
    if "weighting_db" in c:
        right = ax.twinx()
        right.set_ylabel("A-weighting gain (dB)", fontsize=9)
        right.tick_params(labelsize=8)
        right.spines["top"].set_visible(False)
        w = np.asarray(c["weighting_db"], dtype=float)[keep]
        right.semilogx(f[keep], w, color=_GREEN, lw=1.0, ls=":", label="A-weighting (right axis)")
        right.set_ylim(-120, 20)
        h1, l1 = ax.get_legend_handles_labels()
        h2, l2 = right.get_legend_handles_labels()
        ax.legend(h1 + h2, l1 + l2, fontsize=7, loc="lower right", frameon=False)
    else:
        ax.legend(fontsize=7, loc="lower right", frameon=False)
    return fig


def plot_audio_band_density(curves, *, ax=None, title="Output noise density, audio band",
                            graded=()):  # fmt: skip
    """The audio band (linear 0 to 24 kHz, fine bins) as a density, with the prediction.

    Parameters
    ----------
    curves : dict
        ``curves["audio_spectrum"]`` with ``frequency_hz`` and ``density_dbfs_per_hz``;
        optional ``predicted_density_dbfs_per_hz`` and ``predicted_quantizer_gain``.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    graded : sequence of TargetGrade, keyword-only
        A ``dynamic_range_db`` (or ``_a``, ``_ccir``) limit is drawn as the flat in-band
        density whose 20 Hz..20 kHz power is ``-limit`` dBFS (for the weighted ones an
        approximation: the weighting is not applied to the line).

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "audio_spectrum", ("frequency_hz", "density_dbfs_per_hz"))
    fig, ax = _axes(ax)
    f = np.asarray(c["frequency_hz"], dtype=float) / 1e3
    d = np.asarray(c["density_dbfs_per_hz"], dtype=float)
    ax.plot(f, d, color=_BLUE, lw=0.6, label="simulated output (-60 dBFS tone in)")
    if "predicted_density_dbfs_per_hz" in c:
        pred = np.asarray(c["predicted_density_dbfs_per_hz"], dtype=float)
        ax.plot(f, pred, color=_VERMILLION, lw=1.3, ls="--", label=_prediction_label(c))
    res = float(np.asarray(c.get("resolution_hz", [np.nan]))[0])
    _audio_band_axes(ax, title + (f" ({res:.1f} Hz bins)" if np.isfinite(res) else ""),
                     min(24.0, float(f[-1])) if f.size else 24.0)  # fmt: skip
    finite = d[np.isfinite(d) & (f <= 20.0)]
    if finite.size:
        ax.set_ylim(np.percentile(finite, 1) - 10.0, np.max(finite) + 5.0)
    _mark_readings(ax, _density_limits(ax, graded))
    ax.legend(fontsize=7, loc="upper left", frameon=False)
    return fig


def plot_spectrum(curves, *, ax=None, title="Output spectrum", graded=()):
    """The reconstructed output spectrum, with the designed NTF and the weighting overlaid.

    Parameters
    ----------
    curves : dict
        ``curves["spectrum"]`` with ``frequency_hz`` and ``level_dbfs``; optional
        ``ntf_gain_db`` (designed NTF magnitude) and ``weighting_db`` (e.g. A-weighting)
        at the same frequencies, drawn against the right-hand axis.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    graded : sequence of TargetGrade, keyword-only
        Not used (the report draws limits on the density plots).

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
    for key, colour, style, label in (
        ("ntf_gain_db", _VERMILLION, "--", "designed NTF"),
        ("weighting_db", _GREEN, ":", "A-weighting"),
    ):
        if key in c:
            if right is None:
                right = ax.twinx()
                right.set_ylabel("gain (dB)", fontsize=9)
                right.tick_params(labelsize=8)
                right.spines["top"].set_visible(False)
            g = np.asarray(c[key], dtype=float)[keep]
            right.semilogx(f[keep], g, color=colour, lw=1.1, ls=style, label=label)
    if right is not None:
        right.set_ylim(-120, 20)
        h1, l1 = ax.get_legend_handles_labels()
        h2, l2 = right.get_legend_handles_labels()
        ax.legend(h1 + h2, l1 + l2, fontsize=8, loc="lower right", frameon=False)
    return fig


_THD_N_LEVEL_METRICS = {
    "thd_n_db": ("thd_n_db", None),
    "thd_n_db_a": ("thd_n_db_a", None),
    "thd_n_db_at_minus1_dbfs": ("thd_n_db", -1.0),
    "thd_n_db_a_at_minus1_dbfs": ("thd_n_db_a", -1.0),
    "thd_n_db_at_minus20_dbfs": ("thd_n_db", -20.0),
    "thd_n_db_a_at_minus20_dbfs": ("thd_n_db_a", -20.0),
}


def plot_thd_n_vs_level(curves, *, ax=None, title="THD+N against level", graded=()):
    """THD+N (unweighted and A-weighted) against the 997 Hz tone level.

    Parameters
    ----------
    curves : dict
        ``curves["thd_n_vs_level"]`` with ``level_dbfs`` and ``thd_n_db`` (optional
        ``thd_n_db_a``); ``curves["overload"]`` (same fields) is drawn when present.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    graded : sequence of TargetGrade, keyword-only
        THD+N targets at a level (``thd_n_db`` at a stated level, ``thd_n_db_at_minus1_dbfs``
        ...) are drawn as a short limit bar at their level, with the reading marked by a
        circle (pass) or a cross (fail).

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "thd_n_vs_level", ("level_dbfs", "thd_n_db"))
    fig, ax = _axes(ax)
    ax.plot(c["level_dbfs"], c["thd_n_db"], "o-", color=_BLUE, ms=3, lw=1, label="unweighted")
    if "thd_n_db_a" in c:
        ax.plot(c["level_dbfs"], c["thd_n_db_a"], "s--", color=_ORANGE, ms=3, lw=1, label="A-wtd")
    over = curves.get("overload")
    if isinstance(over, dict) and "level_dbfs" in over and "thd_n_db" in over:
        ax.plot(over["level_dbfs"], over["thd_n_db"], "x", color=_VERMILLION, ms=5,
                label="overload")  # fmt: skip
    _mark_readings(ax, _level_limits(ax, graded))
    _level_axes(ax, title)
    ax.legend(fontsize=7, frameon=False)
    return fig


def plot_thd_n_vs_frequency(curves, *, ax=None, title="THD+N against frequency", graded=()):
    """THD+N of single tones against their frequency, one line per tone level.

    Parameters
    ----------
    curves : dict
        ``curves["thd_n_vs_frequency"]`` with ``frequency_hz`` (F), ``level_dbfs`` (L) and
        ``thd_n_db`` (L x F, NaN at invalid tones).
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    graded : sequence of TargetGrade, keyword-only
        ``thd_n_db_worst_over_frequency_at_minus1_dbfs`` / ``..._minus20_dbfs`` limits are
        drawn as lines across the band, the worst reading marked at its frequency.

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "thd_n_vs_frequency", ("frequency_hz", "level_dbfs", "thd_n_db"))
    fig, ax = _axes(ax)
    f = np.asarray(c["frequency_hz"], dtype=float)
    grid = np.atleast_2d(np.asarray(c["thd_n_db"], dtype=float))
    levels = [float(v) for v in np.atleast_1d(c["level_dbfs"])]
    for k, lv in enumerate(levels):
        ax.plot(f, grid[k], marker=_MARKERS[k % len(_MARKERS)], ms=3, lw=1,
                ls=_LINESTYLES[k % len(_LINESTYLES)], color=_SERIES[k % len(_SERIES)],
                label=f"{lv:g} dBFS tones")  # fmt: skip
    _mark_readings(ax, _frequency_limits(ax, graded, c))
    _frequency_axes(ax, title)
    ax.legend(fontsize=7, frameon=False)
    return fig


def plot_idle_tone_map(curves, *, ax=None, title="Idle tones against DC offset", graded=()):
    """The strongest in-band line at each small DC offset, with the detection limit.

    Parameters
    ----------
    curves : dict
        ``curves["idle_tone_map"]`` with ``dc_offset`` (signed, full-scale units),
        ``line_dbfs`` (NaN where no line was found) and ``detection_limit_dbfs``; optional
        ``line_hz`` (the worst lines are labelled with their frequency) and
        ``weakest_detectable_dbfs`` (drawn as the limit when present: no found line lies
        below it).
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    graded : sequence of TargetGrade, keyword-only
        An ``idle_tone_max_dbfs`` limit is drawn across the map.

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "idle_tone_map", ("dc_offset", "line_dbfs", "detection_limit_dbfs"))
    fig, ax = _axes(ax)
    off = np.asarray(c["dc_offset"], dtype=float)
    line = np.asarray(c["line_dbfs"], dtype=float)
    key = "weakest_detectable_dbfs" if "weakest_detectable_dbfs" in c else "detection_limit_dbfs"
    limit = np.asarray(c[key], dtype=float)
    # a found line is never drawn under its limit: where the stored limit lies above the line
    # (the older band-wide limit), the limit is drawn at the line
    limit = np.where(np.isfinite(line), np.fmin(limit, line), limit)
    hz = np.asarray(c.get("line_hz", np.full(off.shape, np.nan)), dtype=float)
    for sign, marker, colour, label in (
        (1, "^", _BLUE, "positive"),
        (-1, "v", _ORANGE, "negative"),
    ):
        sel = np.sign(off) == sign
        order = np.argsort(np.abs(off[sel]))
        mag = np.abs(off[sel])[order]
        ax.semilogx(mag, limit[sel][order], color=colour, lw=0.8, ls=":")
        ax.semilogx(mag, line[sel][order], marker, color=colour, ms=5, label=f"{label} offset")
    found = np.flatnonzero(np.isfinite(line))
    for i in found[np.argsort(line[found])[::-1]][:3]:  # the three strongest lines
        if np.isfinite(hz[i]):
            ax.annotate(f"{hz[i]:.0f} Hz", (abs(off[i]), line[i]), textcoords="offset points",
                        xytext=(4, 4), fontsize=7, color=_INK)  # fmt: skip
    for g in _graded(graded, "idle_tone_max_dbfs"):
        _limit_line(ax, g, y=g.target.limit)
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
    ax.legend(fontsize=7, frameon=False, title="dotted: weakest detectable line",
              title_fontsize=7)  # fmt: skip
    return fig


def plot_state_histograms(curves, *, ax=None, title="Integrator states", graded=()):
    """Histograms of the loop's integrator states at the maximum stable amplitude.

    The axis is fitted to the central 99.9 % of each state's samples (rarer excursions are
    named in the legend with their reach); the guard's state bound (where the loop is reset or
    clamped) is marked when it lies near the data, else named in the legend.

    Parameters
    ----------
    curves : dict
        ``curves["state_histograms"]`` with ``edges`` (states x (bins + 1)) and ``counts``
        (states x bins); optional ``state_bound``.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    graded : sequence of TargetGrade, keyword-only
        A ``state_peak_max`` limit is drawn at plus and minus the limit.

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "state_histograms", ("edges", "counts"))
    fig, ax = _axes(ax)
    edges = np.atleast_2d(np.asarray(c["edges"], dtype=float))
    counts = np.atleast_2d(np.asarray(c["counts"], dtype=float))
    lo, hi = np.inf, -np.inf
    reach = 0.0
    for k in range(counts.shape[0]):
        total = counts[k].sum()
        share = counts[k] / total if total > 0 else counts[k]
        st = series_style(k)
        ax.stairs(share, edges[k], color=st["color"], ls=st["ls"], lw=1.1, label=f"state {k + 1}")
        used = np.flatnonzero(counts[k] > 0)
        if used.size:
            reach = max(reach, abs(edges[k][used[0]]), abs(edges[k][used[-1] + 1]))
            # the axis holds the central 99.9 % of each state's samples
            cum = np.cumsum(counts[k]) / total
            first = int(np.searchsorted(cum, 0.0005))
            last = int(np.searchsorted(cum, 0.9995))
            lo, hi = min(lo, edges[k][first]), max(hi, edges[k][min(last, cum.size - 1) + 1])
    if np.isfinite(lo):
        span = max(abs(lo), abs(hi)) * 1.1
        if reach > span:
            ax.plot([], [], " ", label=f"rare excursions to \u00b1{reach:.3g}, beyond the axis")
        limits = [g.target.limit for g in _graded(graded, "state_peak_max")]
        span = max([span, *(1.05 * v for v in limits)])
        ax.set_xlim(-span, span)
    bound = float(np.asarray(c.get("state_bound", [np.nan]))[0])
    if np.isfinite(bound):
        if np.isfinite(lo) and bound <= 3.0 * max(abs(lo), abs(hi)):
            ax.set_xlim(-1.05 * bound, 1.05 * bound)
            for x in (-bound, bound):
                ax.axvline(x, color=_VERMILLION, lw=1.2, ls="-.",
                           label="guard bound" if x > 0 else None)  # fmt: skip
        else:
            ax.plot([], [], " ", label=f"guard bound \u00b1{bound:g}, off scale")
    for g in _graded(graded, "state_peak_max"):
        for x in (-g.target.limit, g.target.limit):
            _limit_line(ax, g, x=x, label=_verdict(g) if x > 0 else None)
    _style(ax, title, "state value (full-scale units)", "share of samples")
    ax.legend(fontsize=7, frameon=False, ncols=2)
    return fig


def plot_frequency_response(curves, *, ax=None, title="Frequency response", graded=()):
    """Gain of the whole chain relative to 997 Hz.

    Parameters
    ----------
    curves : dict
        ``curves["frequency_response"]`` with ``frequency_hz`` and ``gain_db``.
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    graded : sequence of TargetGrade, keyword-only
        A ``passband_ripple_db`` limit (peak to peak) is drawn as a band of that width
        centred on the middle of the measured response.

    Returns
    -------
    matplotlib.figure.Figure
    """
    c = _curve(curves, "frequency_response", ("frequency_hz", "gain_db"))
    fig, ax = _axes(ax)
    gain = np.asarray(c["gain_db"], dtype=float)
    ax.semilogx(c["frequency_hz"], gain, "o-", color=_BLUE, ms=3, lw=1, label="response")
    ax.axhline(0.0, color=_GREY, lw=0.8)
    for g in _graded(graded, "passband_ripple_db"):
        mid = 0.5 * (np.nanmax(gain) + np.nanmin(gain)) if np.isfinite(gain).any() else 0.0
        half = 0.5 * g.target.limit
        _limit_line(ax, g, y=mid + half, label="band of the ripple " + _verdict(g))
        _limit_line(ax, g, y=mid - half, label=None)
    _style(ax, title, "frequency (Hz)", "gain re 997 Hz (dB)")
    ax.legend(fontsize=7, frameon=False)
    return fig


def _short(text, n=70):
    text = " ".join(str(text).split())
    return text if len(text) <= n else text[: n - 1] + "\u2026"


def plot_dynamic_range_vs_jitter(curves, *, ax=None, title="Dynamic range against clock jitter",
                                 graded=()):  # fmt: skip
    """The -60 dBFS dynamic range with white clock jitter on the output edges, and its prediction.

    Parameters
    ----------
    curves : dict
        ``curves["dynamic_range_vs_jitter"]`` with ``sigma_s`` (rms jitter, seconds),
        ``dynamic_range_db`` (NaN where invalid) and ``predicted_dynamic_range_db``; optional
        ``dynamic_range_db_a`` and ``invalid_reason`` (a point without a reading is named in
        the legend with its reason).
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, keyword-only
    graded : sequence of TargetGrade, keyword-only
        ``jitter_dynamic_range_db_at_1ps`` / ``_10ps`` / ``_100ps`` limits are drawn as a
        short bar at their jitter, the reading marked by a circle (pass) or a cross (fail).

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    .. [1] R. Schreier and G. C. Temes, "Understanding Delta-Sigma Data Converters", 2005
       (clock jitter of continuous-time DACs: white jitter adds noise in proportion to the
       mean squared output step); the battery computes the prediction (docs/impairments.md).
    """
    c = _curve(curves, "dynamic_range_vs_jitter",
               ("sigma_s", "dynamic_range_db", "predicted_dynamic_range_db"))  # fmt: skip
    fig, ax = _axes(ax)
    ps = np.asarray(c["sigma_s"], dtype=float) * 1e12
    dr = np.asarray(c["dynamic_range_db"], dtype=float)
    # small dots under the prediction's larger crosses, drawn on top: both stay visible where
    # they agree (open circles and filled crosses are the verdict markers)
    ax.plot(ps, dr, "o-", color=_BLUE, ms=4, lw=1, label="simulated, unweighted")
    if "dynamic_range_db_a" in c:
        ax.plot(ps, np.asarray(c["dynamic_range_db_a"], dtype=float), "s--", color=_ORANGE,
                ms=4, lw=1, label="simulated, A-weighted")  # fmt: skip
    pred = np.asarray(c["predicted_dynamic_range_db"], dtype=float)
    if np.isfinite(pred).any():
        ax.plot(ps, pred, color=_VERMILLION, lw=1.6, ls=(0, (1, 2)), marker="+", ms=9, zorder=3,
                label="predicted: jitter-free noise + textbook jitter noise")  # fmt: skip
    else:
        ax.plot([], [], " ", label="no prediction (no valid jitter-free reading)")
    reasons = np.asarray(c.get("invalid_reason", np.full(ps.shape, "")), dtype=str)
    for x, y, why in zip(ps, dr, reasons, strict=True):
        if not np.isfinite(y):
            ax.plot([], [], " ", label=f"{x:g} ps: no reading ({_short(why or 'invalid')})")
    _mark_readings(ax, _jitter_limits(ax, graded))
    _jitter_axes(ax, title, ps)
    ax.legend(fontsize=7, frameon=False, loc="lower left")
    return fig


#: What each overlay plot draws: kind -> (curve, title).
_OVERLAY_KINDS = {
    "thd_n_vs_level": ("thd_n_vs_level", "THD+N against level, every profile"),
    "thd_n_vs_frequency": ("thd_n_vs_frequency", "THD+N against frequency, every profile"),
    "noise_density": ("audio_spectrum", "Output noise density in the audio band, every profile"),
    "dynamic_range_vs_jitter": ("dynamic_range_vs_jitter",
                                "Dynamic range against clock jitter, every profile"),
}  # fmt: skip


def overlay_curve(kind: str) -> str:
    """The battery curve an overlay ``kind`` of :func:`plot_overlay` draws."""
    if kind not in _OVERLAY_KINDS:
        raise ParameterError("kind", kind, "one of " + ", ".join(_OVERLAY_KINDS))
    return _OVERLAY_KINDS[kind][0]


def _smooth_db(d, bins):
    """Density in dB averaged in power over runs of ``bins`` bins (a readable overlay)."""
    p = 10.0 ** (np.asarray(d, dtype=float) / 10.0)
    n = len(p) // bins * bins
    return _db_power(p[:n].reshape(-1, bins).mean(axis=1))


def plot_overlay(kind, profiles, *, ax=None, title=None, graded=None):
    """One quantity for several profiles on one axis, one colour and style per profile.

    Parameters
    ----------
    kind : str
        ``"thd_n_vs_level"``, ``"thd_n_vs_frequency"`` (-1 dBFS solid markers, -20 dBFS
        hollow), ``"noise_density"`` (the audio-band density, averaged over 8 bins) or
        ``"dynamic_range_vs_jitter"`` (the unweighted dynamic range against rms jitter).
    profiles : sequence of (str, dict, int)
        ``(name, curves, style index)``; the style index picks :func:`series_style`, so a
        profile keeps its colour across the report. Profiles without the curve are listed in
        the legend as "no data".
    ax : matplotlib.axes.Axes, optional, keyword-only
    title : str, optional, keyword-only
    graded : sequence of sequences of TargetGrade, optional, keyword-only
        Each profile's graded targets, in the order of ``profiles``. The limits of the
        quantity's targets are drawn once (the profiles share the spec sheet) and each
        profile's reading is marked in its colour: an open circle when it meets the limit, a
        filled cross when not.

    Returns
    -------
    matplotlib.figure.Figure
    """
    if kind not in _OVERLAY_KINDS:
        raise ParameterError("kind", kind, "one of " + ", ".join(_OVERLAY_KINDS))
    curve, default_title = _OVERLAY_KINDS[kind]
    profiles = list(profiles)
    graded = [()] * len(profiles) if graded is None else list(graded)
    if len(graded) != len(profiles):
        raise ParameterError("graded", len(graded), f"one entry per profile ({len(profiles)})")
    fig, ax = _axes(ax, size=(7.6, 3.8))
    shared, marked, missing = set(), False, []
    sigma_ps = []
    for (name, curves, index), lines in zip(profiles, graded, strict=True):
        st = series_style(index)
        c = curves.get(curve) if isinstance(curves, dict) else None
        if not isinstance(c, dict):
            ax.plot([], [], " ", label=f"{name}: no data")
            continue
        if kind == "thd_n_vs_level":
            ax.plot(c["level_dbfs"], c["thd_n_db"], ms=4, lw=1.1, label=name, **st)
            marks = _level_limits(ax, lines, shared=shared)
        elif kind == "thd_n_vs_frequency":
            grid = np.atleast_2d(np.asarray(c["thd_n_db"], dtype=float))
            for k, lv in enumerate(np.atleast_1d(c["level_dbfs"])):
                ax.plot(c["frequency_hz"], grid[k], ms=4, lw=1.1,
                        mfc=st["color"] if k == 0 else "none",
                        label=f"{name}, {float(lv):g} dBFS", **st)  # fmt: skip
            marks = _frequency_limits(ax, lines, c, shared=shared)
        elif kind == "noise_density":
            f = np.asarray(c["frequency_hz"], dtype=float)
            d = _smooth_db(c["density_dbfs_per_hz"], 8)
            fk = f[: len(d) * 8].reshape(-1, 8).mean(axis=1) / 1e3
            ax.plot(fk, d, lw=0.9, color=st["color"], ls=st["ls"], label=name)
            marks = _density_limits(ax, lines, shared=shared)
        else:
            ps = np.asarray(c["sigma_s"], dtype=float) * 1e12
            sigma_ps += list(ps)
            ax.plot(ps, c["dynamic_range_db"], ms=4, lw=1.1, label=name, **st)
            marks = _jitter_limits(ax, lines, shared=shared)
        marked = _mark_readings(ax, marks, st["color"]) or marked
        for _g, _x, y, label in marks:
            if y is None or not np.isfinite(y):  # failed without a reading: said in words
                missing.append((st["color"], f"{name}: no valid reading ({label})"))
    for colour, text in missing:
        ax.plot([], [], _FAIL_MARKER, color=colour, label=text)
    if marked or missing:
        ax.plot([], [], _PASS_MARKER, color=_INK, mfc="none", label="reading meets the limit")
        ax.plot([], [], _FAIL_MARKER, color=_INK, label="reading misses the limit")
    title = title or default_title
    if kind == "thd_n_vs_level":
        _level_axes(ax, title)
    elif kind == "thd_n_vs_frequency":
        _frequency_axes(ax, title)
    elif kind == "noise_density":
        _audio_band_axes(ax, title)
    else:
        _jitter_axes(ax, title, sigma_ps)
    # the profiles first, then the limits they share, then what the markers mean
    limits = {key[0] for key in shared}
    handles, labels = ax.get_legend_handles_labels()
    order = sorted(range(len(labels)), key=lambda i: labels[i] in limits)
    ax.legend([handles[i] for i in order], [labels[i] for i in order], fontsize=7,
              frameon=False, loc="upper left", bbox_to_anchor=(1.01, 1.0))  # fmt: skip
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
    ("spectrum", plot_noise_density, "output noise density with the linear model's prediction"),
    ("audio_spectrum", plot_audio_band_density, "audio-band noise density, fine bins"),
    ("thd_n_vs_level", plot_thd_n_vs_level, "THD+N against level"),
    ("thd_n_vs_frequency", plot_thd_n_vs_frequency, "THD+N against frequency"),
    ("idle_tone_map", plot_idle_tone_map, "idle-tone map"),
    ("state_histograms", plot_state_histograms, "integrator state histograms"),
    ("frequency_response", plot_frequency_response, "frequency response"),
    (
        "dynamic_range_vs_jitter",
        plot_dynamic_range_vs_jitter,
        "dynamic range against clock jitter, with the textbook prediction",
    ),
)

#: The report's plots of every profile together: (kind for plot_overlay, caption).
OVERLAYS = (
    ("thd_n_vs_level", "THD+N against level, every profile"),
    ("thd_n_vs_frequency", "THD+N against frequency, every profile"),
    ("noise_density", "audio-band noise density, every profile"),
    ("dynamic_range_vs_jitter", "dynamic range against clock jitter, every profile"),
)


def __getattr__(name):
    # the plots of grades live in grade_plots (this module stays under 1000 lines); they are
    # still found here, loaded on first use
    if name in _GRADE_PLOTS:
        from audiodsm.evaluate import grade_plots

        return getattr(grade_plots, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
