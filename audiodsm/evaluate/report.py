"""The grading report: one self-contained HTML page, plus JSON and CSV of the same grades.

:func:`write_report` writes three files into a folder:

``grades.html``
    An overview (profiles ranked by worst margin, each in its plot colour, a target-by-profile
    matrix of readings and margins, a chart of the margins), the plots of every profile
    together (THD+N against level and frequency, audio-band noise density, dynamic range
    against clock jitter; the spec limits drawn once, each profile's reading marked against
    them), then one section
    per profile: its readings against the spec sheet, every battery metric, the battery's
    notes and the plots of :data:`audiodsm.evaluate.plotting.PLOTS` with the spec limits
    drawn (docs/report.md). The plots are embedded as base64 PNG and each one's data as a
    base64 CSV download, so the page is a single file that opens anywhere; the downloads are
    kept lean (numbers rounded by kind, the whole-band spectrum averaged over 1/96-octave
    bands above 24 kHz, the overlaid densities as drawn).
``grades.json``
    :func:`batch_to_dict` of the batch.
``grades.csv``
    One row per profile and target (:data:`CSV_COLUMNS`).

The report is complete or absent: each file is written to a temporary name and renamed
only when all three are written (a new folder is renamed into place as a whole).
"""

from __future__ import annotations

import base64
import csv
import functools
import html
import io
import json
import math
import os
import shutil
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from audiodsm.errors import AudiodsmError, OutputError, ParameterError, StorageError
from audiodsm.evaluate._plain import plain_scalar
from audiodsm.io_files import (
    OutputSet,
    create_temp_folder,
    remove_stale_temp_files,
    same_file,
)

__all__ = [
    "CSV_COLUMNS",
    "REPORT_FILES",
    "batch_to_dict",
    "batch_to_csv",
    "report_curves",
    "curve_to_csv",
    "overlay_to_csv",
    "parts_to_csv",
    "figure_to_png",
    "write_profile_plots",
    "render_html",
    "check_report_dir",
    "write_report",
]

#: File names written by :func:`write_report` (kind -> name).
REPORT_FILES = {"html": "grades.html", "json": "grades.json", "csv": "grades.csv"}

#: Columns of the CSV file.
CSV_COLUMNS = (
    "rank",
    "profile",
    "source",
    "metric",
    "at_level_dbfs",
    "bound",
    "limit",
    "unit",
    "value",
    "margin",
    "passed",
    "valid",
    "reason",
    "parts_met",
    "parts_needed",
    "parts_total",
)


def batch_to_dict(batch) -> dict:
    """The batch as plain JSON-ready data (non-finite numbers become None).

    Parameters
    ----------
    batch : GradeBatch

    Returns
    -------
    dict
        ``{"tool_version", "spec": {...}, "profiles": [...], "interrupted", "unfinished"}``;
        each profile carries ``rank``, ``name``, ``source``, ``digest``, ``passed``,
        ``worst_margin`` (plain minimum, in mixed units), ``ranking_margin_db`` (the worst
        normalized margin the ranking uses), ``failure``, ``cached``, ``seconds``,
        ``targets`` (one dict per target: metric, at_level_dbfs, bound, limit, unit, value,
        margin, passed, valid, reason, note, and for a profile run as several parts
        parts_met, parts_needed, parts_total, else null), ``metrics`` (an invalid reading is
        null), ``validity`` (metric -> ``{"valid": bool, "reason": str}``), ``notes`` and
        ``parts`` (null for one part; else ``{"count", "seeds", "percentiles", "spread":
        {metric: {"parts", "readings", "min", "p5", "median", "p95", "max"}}, "per_part":
        [{"part", "seed", "cached", "seconds", "metrics", "validity"}]}``; ``metrics`` and
        ``validity`` of the profile are then part 0's).
    """
    from audiodsm import __version__
    from audiodsm.evaluate.battery import validity_table

    spec = batch.spec
    profiles = []
    for rank, g in enumerate(batch.grades, 1):
        targets = []
        for line in g.lines:
            t = line.target
            targets.append(
                {
                    "metric": t.metric,
                    "at_level_dbfs": t.at_level_dbfs,
                    "bound": t.bound,
                    "limit": t.limit,
                    "unit": t.unit,
                    "value": plain_scalar(line.value),
                    "margin": plain_scalar(line.margin),
                    "passed": bool(line.passed),
                    "valid": bool(line.valid),
                    "reason": line.reason,
                    "note": t.note,
                    "percentile": t.percentile,
                    "parts_met": line.parts_met,
                    "parts_needed": line.parts_needed,
                    "parts_total": line.parts_total,
                }
            )
        profiles.append(
            {
                "rank": rank,
                "name": g.name,
                "source": g.source,
                "digest": g.digest,
                "passed": g.passed,
                "worst_margin": plain_scalar(g.worst_margin),
                "ranking_margin_db": plain_scalar(g.ranking_margin),
                "failed_targets": g.failed_count,
                "failure": g.failure,
                "cached": g.cached,
                "seconds": plain_scalar(g.seconds),
                "targets": targets,
                "metrics": {k: plain_scalar(v) for k, v in g.metrics.items()},
                "validity": validity_table(g.metrics, g.invalid),
                "notes": list(g.notes),
                "parts": _parts_dict(g),
            }
        )
    return {
        "tool_version": __version__,
        "spec": {
            "name": spec.name,
            "description": spec.description,
            "path": spec.path,
            "targets": [
                {
                    "metric": t.metric,
                    "at_level_dbfs": t.at_level_dbfs,
                    "bound": t.bound,
                    "limit": t.limit,
                    "unit": t.unit,
                    "note": t.note,
                    "percentile": t.percentile,
                }
                for t in spec.targets
            ],
        },
        "profiles": profiles,
        "passed": batch.passed,
        "interrupted": batch.interrupted,
        "unfinished": list(batch.unfinished),
    }


def _parts_dict(g):
    """A profile's parts as JSON-ready data (None for one part)."""
    from audiodsm.evaluate.battery import validity_table
    from audiodsm.evaluate.parts import SPREAD_PERCENTILES

    if not g.parts:
        return None
    spread = {name: {k: plain_scalar(v) for k, v in row.items()} for name, row in g.spread.items()}
    return {
        "count": len(g.parts),
        "seeds": [p.seed for p in g.parts],
        "percentiles": list(SPREAD_PERCENTILES),
        "spread": spread,
        "per_part": [
            {
                "part": p.index,
                "seed": p.seed,
                "cached": p.cached,
                "seconds": plain_scalar(p.seconds),
                "metrics": {k: plain_scalar(v) for k, v in p.metrics.items()},
                "validity": validity_table(p.metrics, p.invalid),
            }
            for p in g.parts
        ],
    }


def parts_to_csv(grade) -> str:
    """Every part's readings of one profile, one row per part and metric.

    Columns ``part, part_seed, metric, value, valid, reason`` (numbers in full precision,
    empty when there is none): the data of the report's spread plot.
    """
    from audiodsm.evaluate.parts import is_number

    rows = []
    for p in grade.parts:
        for name, value in p.metrics.items():
            bad = name in p.invalid
            number = None
            if not bad and is_number(value):
                number = plain_scalar(value)
            text = "" if number is None else repr(float(number))
            why = str(p.invalid.get(name, ""))
            rows.append((str(p.index), str(p.seed), name, text, "no" if bad else "yes", why))
    return _csv_text(("part", "part_seed", "metric", "value", "valid", "reason"), rows)


def batch_to_csv(batch) -> str:
    """One CSV row per profile and target, columns :data:`CSV_COLUMNS` (RFC 4180 quoting)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")
    w.writerow(CSV_COLUMNS)
    for p in batch_to_dict(batch)["profiles"]:
        for t in p["targets"]:
            w.writerow(
                [
                    p["rank"],
                    p["name"],
                    p["source"],
                    t["metric"],
                    "" if t["at_level_dbfs"] is None else repr(t["at_level_dbfs"]),
                    t["bound"],
                    repr(t["limit"]),
                    t["unit"],
                    "" if t["value"] is None else repr(t["value"]),
                    "" if t["margin"] is None else repr(t["margin"]),
                    "pass" if t["passed"] else "fail",
                    "yes" if t["valid"] else "no",
                    t["reason"],
                    *(
                        "" if t[k] is None else t[k]
                        for k in ("parts_met", "parts_needed", "parts_total")
                    ),
                ]
            )
    return buf.getvalue()


def report_curves(curves: dict) -> dict:
    """The battery's curves plus what the report overlays: the A-weighting on the spectrum.

    ``curves["spectrum"]["weighting_db"]`` is the IEC 61672-1 A-weighting at the spectrum's
    frequencies (:func:`audiodsm.measure.weighting.a_weighting_db`), floored at -120 dB.
    The input is not changed.
    """
    from audiodsm.measure.weighting import a_weighting_db

    out = dict(curves)
    spec = curves.get("spectrum")
    if isinstance(spec, dict) and "frequency_hz" in spec and "weighting_db" not in spec:
        f = np.asarray(spec["frequency_hz"], dtype=float)
        with np.errstate(divide="ignore"):
            w = np.where(f > 0, a_weighting_db(np.maximum(f, 1e-3)), -np.inf)
        out["spectrum"] = {**spec, "weighting_db": np.maximum(w, -120.0)}
    return out


def _column(v, name=""):
    """One number of a CSV column, rounded for its kind (the column's name says it).

    Levels, ratios and gains (a name with ``db``) to 0.01 dB, below the repeatability of any
    reading; frequencies (``_hz``) to 1 mHz; whole numbers as integers; anything else to six
    significant digits. NaN and infinities are empty fields.
    """
    if isinstance(v, bool | str):
        return str(v)
    v = float(v)
    if not math.isfinite(v):
        return ""
    if "db" in name:
        text = f"{v:.2f}"
    elif name.endswith("_hz"):
        text = f"{v:.3f}".rstrip("0").rstrip(".")
    elif v.is_integer() and abs(v) < 1e15:
        text = str(int(v))
    else:
        text = f"{v:.6g}"
    return "0" if text in ("-0", "-0.00", "-0.0") else text


def _csv_text(header, rows) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")
    w.writerow(header)
    for row in rows:
        w.writerow(["" if v is None else _column(v, k) for k, v in zip(header, row, strict=True)])
    return buf.getvalue()


#: The whole-band spectrum's CSV in the report: every bin up to this frequency ...
_CSV_FULL_BELOW_HZ = 24000.0
#: ... and above it the bins averaged over bands of 1/96 octave (on the plot's log axis a
#: band is under one pixel wide).
_CSV_BANDS_PER_OCTAVE = 96
#: The overlaid audio-band densities are drawn averaged over runs of this many bins.
_OVERLAY_BINS = 8


def _averaged_curve(c: dict, groups) -> dict:
    """A spectrum curve with its bins averaged over ``groups`` (a group id per bin, runs).

    Columns in dB (a name with ``db``) are averaged in power, the others arithmetically, over
    the finite values of each group; ``bins_averaged`` counts the bins of each row. Arrays
    of another length than the spectrum's (``resolution_hz``, ...) are kept as they are.
    """
    f = np.asarray(c["frequency_hz"], dtype=float)
    groups = np.asarray(groups)
    index = np.cumsum(np.r_[True, groups[1:] != groups[:-1]]) - 1  # bin -> row
    counts = np.bincount(index)
    out = {}
    for key, value in c.items():
        a = np.asarray(value)
        if a.ndim != 1 or a.size != f.size or a.dtype.kind not in "fiu":
            out[key] = value
            continue
        x = a.astype(float)
        if "db" in key:
            with np.errstate(over="ignore"):
                x = 10.0 ** (x / 10.0)
        ok = np.isfinite(x)
        total = np.bincount(index, np.where(ok, x, 0.0), minlength=counts.size)
        used = np.bincount(index, ok.astype(float), minlength=counts.size)
        with np.errstate(divide="ignore", invalid="ignore"):
            mean = np.where(used > 0, total / np.maximum(used, 1.0), np.nan)
            row = 10.0 * np.log10(mean) if "db" in key else mean
        alone = counts[index] == 1  # a bin that is its own row keeps its value exactly
        row[index[alone]] = a[alone]
        out[key] = row
    out["bins_averaged"] = counts.astype(float)
    return out


def _thinned_wide_spectrum(c: dict) -> dict:
    """The whole-band spectrum for its CSV: fine below 24 kHz, 1/96-octave bands above."""
    f = np.asarray(c["frequency_hz"], dtype=float)
    above = f > _CSV_FULL_BELOW_HZ
    with np.errstate(divide="ignore"):
        band = np.floor(_CSV_BANDS_PER_OCTAVE * np.log2(np.maximum(f, 1e-300) / _CSV_FULL_BELOW_HZ))
    groups = np.where(above, f.size + band, np.arange(f.size))
    return _averaged_curve(c, groups.astype(np.int64))


def _overlay_density_curves(profiles):
    """The audio-band densities as the overlay draws them: power means of 8-bin runs."""
    out = []
    for name, curves in profiles:
        c = curves.get("audio_spectrum") if isinstance(curves, dict) else None
        if isinstance(c, dict):
            n = np.asarray(c["frequency_hz"]).size // _OVERLAY_BINS * _OVERLAY_BINS
            cut = {k: (np.asarray(v)[:n] if np.ndim(v) == 1 and np.size(v) > n else v)
                   for k, v in c.items()}  # fmt: skip
            curves = {
                **curves,
                "audio_spectrum": _averaged_curve(cut, np.arange(n) // _OVERLAY_BINS),
            }
        out.append((name, curves))
    return out


#: The columns of the jitter curve the plot of every profile draws (the reason says why a
#: point is missing); the A-weighted readings and the prediction are on each profile's plot.
_OVERLAY_JITTER_COLUMNS = ("sigma_s", "dynamic_range_db", "invalid_reason")


def _overlay_jitter_curves(profiles):
    """The jitter curves as the plot of every profile draws them: unweighted readings only."""
    out = []
    for name, curves in profiles:
        c = curves.get("dynamic_range_vs_jitter") if isinstance(curves, dict) else None
        if isinstance(c, dict):
            kept = {k: c[k] for k in _OVERLAY_JITTER_COLUMNS if k in c}
            curves = {**curves, "dynamic_range_vs_jitter": kept}
        out.append((name, curves))
    return out


def _curve_table(curves: dict, name: str):
    """(header, rows) of one curve as a table; numbers as Python floats, NaN as None."""
    c = curves[name]

    def num(v):
        v = float(v)
        return v if math.isfinite(v) else None

    if name == "state_histograms":
        edges = np.atleast_2d(np.asarray(c["edges"], dtype=float))
        counts = np.atleast_2d(np.asarray(c["counts"], dtype=float))
        rows = [
            [k + 1, num(edges[k][i]), num(edges[k][i + 1]), num(counts[k][i])]
            for k in range(counts.shape[0])
            for i in range(counts.shape[1])
        ]
        return ["state", "lower", "upper", "count"], rows
    if name == "thd_n_vs_frequency":
        f = np.asarray(c["frequency_hz"], dtype=float)
        grid = np.atleast_2d(np.asarray(c["thd_n_db"], dtype=float))
        levels = [float(v) for v in np.atleast_1d(c["level_dbfs"])]
        reasons = np.atleast_2d(np.asarray(c.get("invalid_reason", np.full(grid.shape, ""))))
        header = ["frequency_hz"]
        for lv in levels:
            header += [f"thd_n_db_at_{lv:g}_dbfs", f"invalid_reason_at_{lv:g}_dbfs"]
        rows = []
        for j in range(f.size):
            row = [num(f[j])]
            for k in range(len(levels)):
                row += [num(grid[k][j]), str(reasons[k][j])]
            rows.append(row)
        return header, rows
    arrays = {k: np.asarray(v) for k, v in c.items()}
    n = max((a.size for a in arrays.values() if a.ndim == 1), default=0)
    keys = [k for k, a in arrays.items() if a.ndim == 1 and a.size == n and n > 1]
    rows = []
    for i in range(n):
        rows.append([str(arrays[k][i]) if arrays[k].dtype.kind in "US" else num(arrays[k][i])
                     for k in keys])  # fmt: skip
    return keys, rows


def curve_to_csv(curves: dict, name: str) -> str:
    """One battery curve as CSV text (RFC 4180, CRLF lines), the data behind its plot.

    Every 1-D array of the curve's length becomes a column named as the array; NaN and
    infinities become empty fields. Numbers are rounded by their kind: a column whose name
    holds ``db`` to 0.01 dB, one ending in ``_hz`` to 1 mHz, whole numbers as integers, the
    rest to six significant digits. ``thd_n_vs_frequency`` gets one THD+N column (and one
    reason column) per tone level; ``state_histograms`` one row per state and bin.

    Parameters
    ----------
    curves : dict
        A battery's curves (:attr:`BatteryResult.curves`, or :func:`report_curves`).
    name : str
        The curve.

    Returns
    -------
    str
    """
    if not isinstance(curves, dict) or not isinstance(curves.get(name), dict):
        raise ParameterError(f"curves[{name!r}]", None, "a battery curve")
    return _csv_text(*_curve_table(curves, name))


def overlay_to_csv(curve: str, profiles) -> str:
    """One curve of several profiles as one CSV table, with a leading ``profile`` column.

    Parameters
    ----------
    curve : str
        The battery curve (e.g. ``"thd_n_vs_level"``).
    profiles : sequence of (str, dict)
        ``(profile name, curves)``; profiles without the curve are left out.

    Returns
    -------
    str
    """
    header, rows = ["profile"], []
    for name, curves in profiles:
        if not isinstance(curves, dict) or not isinstance(curves.get(curve), dict):
            continue
        cols, table = _curve_table(curves, curve)
        header += [c for c in cols if c not in header]
        rows += [{"profile": name, **dict(zip(cols, r, strict=True))} for r in table]
    return _csv_text(header, [[r.get(k) for k in header] for r in rows])


def figure_to_png(fig) -> bytes:
    """The figure as PNG bytes (100 dpi)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return buf.getvalue()


_TEMPLATE = "report.html.j2"


def _escape_text(value):
    """HTML-escape one value printed by the template (``&quot;`` and ``&#x27;`` for quotes).

    Used as the environment's ``finalize``: its Markup result passes autoescaping untouched,
    so the page spells entities as :func:`html.escape` does.
    """
    from markupsafe import Markup

    if isinstance(value, Markup):
        return value
    return Markup(html.escape(str(value), quote=True))


def _number(v, spec=".2f"):
    """A number in ``spec`` format, or an en dash for None, NaN and infinities."""
    from markupsafe import Markup

    return Markup("&ndash;") if v is None or not math.isfinite(float(v)) else format(float(v), spec)


def _reading(v):
    """One battery reading: text, flags and None as they are, numbers to 4 digits."""
    return v if isinstance(v, (bool, str)) or v is None else _number(v, ".4g")


@functools.cache
def _environment():
    """The Jinja2 environment reading the templates kept beside this module."""
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.PackageLoader("audiodsm.evaluate", "templates"),
        autoescape=True,
        finalize=_escape_text,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters["num"] = _number
    env.filters["reading"] = _reading
    return env


def _png_base64(fig) -> str:
    return base64.b64encode(figure_to_png(fig)).decode("ascii")


def _b64(text: str) -> str:
    return base64.b64encode(text.encode("utf-8")).decode("ascii")


def _file_stem(name: str) -> str:
    """A profile name as a plain download-file stem (letters, digits, '-', '_', '.')."""
    stem = "".join(ch if ch.isalnum() or ch in "-_." else "-" for ch in name).strip(".-")
    return stem[:60] or "profile"


def render_html(batch, *, title=None) -> str:
    """The report page as one HTML string with every image embedded as base64 PNG.

    The page is laid out by the Jinja2 template ``templates/report.html.j2`` (style sheet
    ``templates/report.css``) beside this module; this function draws the plots and hands the
    template the batch.

    Parameters
    ----------
    batch : GradeBatch
    title : str, optional, keyword-only

    Returns
    -------
    str
    """
    from audiodsm import __version__
    from audiodsm.evaluate import grade_plots, plotting

    spec = batch.spec
    title = title or f"Grades against {spec.name}"
    stamp = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    margins_png = _png_base64(grade_plots.plot_margins(batch)) if batch.grades else None
    sections = []
    with_curves, with_lines = [], []
    for rank, g in enumerate(batch.grades, 1):
        plots = None
        style = plotting.series_style(rank - 1)
        if g.curves:
            curves = report_curves(g.curves)
            with_curves.append((g.name, curves, rank - 1))
            with_lines.append(g.lines)
            # the CSV beside each plot: the whole-band spectrum thinned above the audio band
            data = dict(curves)
            if isinstance(curves.get("spectrum"), dict):
                data["spectrum"] = _thinned_wide_spectrum(curves["spectrum"])
            plots = []
            for name, fn, caption in plotting.PLOTS:
                try:
                    fig = fn(curves, graded=g.lines)
                except AudiodsmError:
                    plots.append({"caption": caption, "png": None})
                    continue
                plots.append(
                    {
                        "caption": caption,
                        "png": _png_base64(fig),
                        "id": f"profile-{rank}-{name}",
                        "csv": _b64(curve_to_csv(data, name)),
                        "csv_name": f"{_file_stem(g.name)}-{name}.csv",
                    }
                )
        spread = None
        if g.parts:
            spread = {
                "table": g.spread,
                "png": None,
                "id": f"profile-{rank}-parts",
                "caption": f"spread over {len(g.parts)} parts",
                "csv": _b64(parts_to_csv(g)),
                "csv_name": f"{_file_stem(g.name)}-parts.csv",
            }
            try:
                spread["png"] = _png_base64(grade_plots.plot_part_spread(g.parts, graded=g.lines))
            except AudiodsmError:  # no metric differs between parts: the table says it all
                pass
        sections.append(
            {"rank": rank, "grade": g, "plots": plots, "colour": style["color"], "spread": spread}
        )
    overlays = []
    if len(with_curves) > 1:
        for kind, caption in plotting.OVERLAYS:
            curve = plotting.overlay_curve(kind)
            if not any(curve in c for _, c, _ in with_curves):
                continue
            fig = plotting.plot_overlay(kind, with_curves, graded=with_lines)
            drawn = [(n, c) for n, c, _ in with_curves]
            if kind == "noise_density":
                drawn = _overlay_density_curves(drawn)
            elif kind == "dynamic_range_vs_jitter":
                drawn = _overlay_jitter_curves(drawn)
            overlays.append(
                {
                    "caption": caption,
                    "png": _png_base64(fig),
                    "id": f"overlay-{kind}",
                    "csv": _b64(overlay_to_csv(curve, drawn)),
                    "csv_name": f"every-profile-{kind}.csv",
                }
            )
    return (
        _environment()
        .get_template(_TEMPLATE)
        .render(
            title=title,
            stamp=stamp,
            version=__version__,
            spec=spec,
            batch=batch,
            margins_png=margins_png,
            sections=sections,
            overlays=overlays,
            csv_file=REPORT_FILES["csv"],
        )
    )


def check_report_dir(directory, *, protect=()) -> Path:
    """Check, before any work, that a report can be written into a folder.

    The folder is not created here: :func:`write_report` creates it complete, so a run that
    fails or is stopped before the report leaves no empty folder behind. Hidden temporary
    files and folders a killed run left are removed.

    Parameters
    ----------
    directory : path-like
        The report folder; it may exist (its report files are replaced) or not (it is
        created, with parents, by :func:`write_report`).
    protect : sequence of path-like, keyword-only
        Input files that must never be replaced (compared by device and inode, so another
        path to the same file is caught too).

    Returns
    -------
    Path

    Raises
    ------
    OutputError
        The path (or a parent) is a file, or a report file name is a protected input.
    StorageError
        The folder, or the nearest existing parent, is not writable.
    """
    d = Path(directory)
    if d.exists() and not d.is_dir():
        raise OutputError(f"{d}: --report must be a folder, and this is a file")
    existing = d
    while not existing.exists():
        if existing.parent == existing:
            break
        existing = existing.parent
    if not existing.is_dir():
        raise OutputError(f"{d}: cannot create the report folder ({existing} is a file)")
    if not os.access(existing, os.W_OK):
        raise StorageError(d, f"folder {str(existing)!r} is not writable")
    if d.is_dir():
        for name in REPORT_FILES.values():
            if any(same_file(d / name, p) for p in protect):
                raise OutputError(f"{d / name}: is an input of this run; refusing to overwrite it")
        for name in REPORT_FILES.values():  # only our own names: the folder may be anyone's
            remove_stale_temp_files(d, name=name)
    if d.parent.is_dir():
        remove_stale_temp_files(d.parent, name=d.name)
    return d


def _write_new_report_folder(d: Path, texts: dict) -> None:
    """Write the report files into a hidden temporary folder and rename it to ``d``."""
    try:
        d.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StorageError(d.parent, exc) from None
    tmp = create_temp_folder(d)
    try:
        for kind, text in texts.items():
            with open(tmp / REPORT_FILES[kind], "w", encoding="utf-8", newline="") as fh:
                fh.write(text)
                fh.flush()
                os.fsync(fh.fileno())
        os.rename(tmp, d)  # fails if a non-empty d appeared meanwhile: nothing replaced
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise StorageError(d, exc) from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _replace_report_files(d: Path, texts: dict) -> None:
    """Write every report file to a temporary name first, then rename them all.

    One :class:`~audiodsm.io_files.OutputSet`: a rename that fails puts back the files the
    others replaced, so the folder holds the old report or the new one, never a mix.
    """
    with OutputSet() as outputs:
        for kind, text in texts.items():
            outputs.add_text(d / REPORT_FILES[kind], text, overwrite=True)


def write_report(batch, directory, *, protect=(), title=None) -> dict:
    """Write ``grades.html``, ``grades.json`` and ``grades.csv`` into a folder.

    The report is complete or absent: a new folder is written under a hidden temporary
    name beside it and renamed when all three files are in it; in an existing folder all
    three files are written to temporary names before any of them replaces its old version.
    On a full disk, a read-only folder or an interruption the temporary files are removed
    and the old report (if any) stays as it was.

    Parameters
    ----------
    batch : GradeBatch
    directory : path-like
        Created (with parents) when missing.
    protect : sequence of path-like, keyword-only
        Input files never to replace.
    title : str, optional, keyword-only
        Page title (default: "Grades against <spec name>").

    Returns
    -------
    dict
        Kind (``"html"``, ``"json"``, ``"csv"``) -> path written.

    Raises
    ------
    OutputError
        See :func:`check_report_dir`.
    StorageError
        A file or the folder could not be written (the message names it and the cause).
    """
    d = check_report_dir(directory, protect=protect)
    texts = {
        "json": json.dumps(batch_to_dict(batch), indent=2, allow_nan=False) + "\n",
        "csv": batch_to_csv(batch),
        "html": render_html(batch, title=title),
    }
    if d.is_dir():
        _replace_report_files(d, texts)
    else:
        _write_new_report_folder(d, texts)
    return {kind: d / REPORT_FILES[kind] for kind in ("json", "csv", "html")}


#: File formats :func:`write_profile_plots` writes each plot in.
PLOT_FORMATS = ("png", "svg")


def write_profile_plots(curves: dict, folder, *, stem: str) -> list:
    """Write one profile's report plots into a folder, as PNG and SVG files.

    The plots are those of a report section (:data:`audiodsm.evaluate.plotting.PLOTS`), drawn
    without spec limits; a curve the battery did not give is skipped. Files are named
    ``<stem>-<curve>.png`` and ``.svg`` (e.g. ``pdm5-thd_n_vs_frequency.svg``) and replace
    files of the same name. They appear together or not at all
    (:class:`audiodsm.io_files.OutputSet`).

    Parameters
    ----------
    curves : dict
        A battery's curves (:attr:`BatteryResult.curves`).
    folder : path-like
        Created (with parents) when missing.
    stem : str
        Start of every file name (a profile name; characters other than letters, digits,
        ``-``, ``_`` and ``.`` become ``-``).

    Returns
    -------
    list of Path
        The files written, in plot order.

    Raises
    ------
    OutputError
        ``folder`` is a file.
    StorageError
        A file could not be written (nothing of this profile is left under a final name).
    """
    from audiodsm.evaluate import plotting

    d = Path(folder)
    if d.exists() and not d.is_dir():
        raise OutputError(f"{d}: the plot folder is a file")
    try:
        d.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StorageError(d, exc) from None
    curves = report_curves(curves)
    base = _file_stem(stem)
    with OutputSet() as outputs:
        for name, fn, _caption in plotting.PLOTS:
            try:
                fig = fn(curves)
            except AudiodsmError:
                continue
            for fmt in PLOT_FORMATS:
                outputs.add_from_writer(
                    d / f"{base}-{name}.{fmt}",
                    functools.partial(fig.savefig, format=fmt, dpi=100),
                    overwrite=True,
                )
        written = outputs.commit()
    return [Path(p) for p in written]
