"""The grading report: one self-contained HTML page, plus JSON and CSV of the same grades.

:func:`write_report` writes three files into a folder:

``grades.html``
    An overview (profiles ranked by worst margin, a target-by-profile matrix of readings and
    margins, a chart of the margins), then one section per profile: its readings against the
    spec sheet, every battery metric, the battery's notes and five plots (output spectrum with
    the designed NTF and the A-weighting curve, THD+N against level, idle-tone map, integrator
    state histograms, frequency response). The plots are embedded as base64 PNG, so the page
    is a single file that opens anywhere.
``grades.json``
    :func:`batch_to_dict` of the batch.
``grades.csv``
    One row per profile and target (:data:`CSV_COLUMNS`).

Each file is written to a temporary name in the folder and renamed when complete.
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
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from audiodsm.errors import AudiodsmError, OutputError
from audiodsm.evaluate._plain import plain_scalar
from audiodsm.io import replace_text_atomically

__all__ = [
    "CSV_COLUMNS",
    "REPORT_FILES",
    "batch_to_dict",
    "batch_to_csv",
    "report_curves",
    "figure_to_png",
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
    "reason",
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
        ``worst_margin``, ``failure``, ``cached``, ``seconds``, ``targets`` (one dict per
        target: metric, at_level_dbfs, bound, limit, unit, value, margin, passed, reason,
        note), ``metrics`` and ``notes``.
    """
    from audiodsm import __version__

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
                    "reason": line.reason,
                    "note": t.note,
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
                "failed_targets": g.failed_count,
                "failure": g.failure,
                "cached": g.cached,
                "seconds": plain_scalar(g.seconds),
                "targets": targets,
                "metrics": {k: plain_scalar(v) for k, v in g.metrics.items()},
                "notes": list(g.notes),
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
                }
                for t in spec.targets
            ],
        },
        "profiles": profiles,
        "passed": batch.passed,
        "interrupted": batch.interrupted,
        "unfinished": list(batch.unfinished),
    }


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
                    t["reason"],
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
    from audiodsm.evaluate import plotting

    spec = batch.spec
    title = title or f"Grades against {spec.name}"
    stamp = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    margins_png = _png_base64(plotting.plot_margins(batch)) if batch.grades else None
    sections = []
    for rank, g in enumerate(batch.grades, 1):
        plots = None
        if g.curves:
            curves = report_curves(g.curves)
            plots = []
            for _name, fn, caption in plotting.PLOTS:
                try:
                    fig = fn(curves)
                except AudiodsmError:
                    plots.append({"caption": caption, "png": None})
                    continue
                plots.append({"caption": caption, "png": _png_base64(fig)})
        sections.append({"rank": rank, "grade": g, "plots": plots})
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
        )
    )


def check_report_dir(directory, *, protect=()) -> Path:
    """Make sure the report folder exists and that writing it replaces no input.

    Parameters
    ----------
    directory : path-like
        Created (with parents) when missing.
    protect : sequence of path-like, keyword-only
        Input files that must never be replaced.

    Returns
    -------
    Path

    Raises
    ------
    OutputError
        The path is a file, cannot be created, or a report file name is a protected input.
    """
    d = Path(directory)
    if d.exists() and not d.is_dir():
        raise OutputError(f"{d}: --report must be a folder, and this is a file")
    try:
        d.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{d}: cannot create the report folder ({exc.strerror})") from None
    if not os.access(d, os.W_OK):
        raise OutputError(f"{d}: the report folder is not writable")
    guarded = {Path(p).resolve() for p in protect}
    for name in REPORT_FILES.values():
        if (d / name).resolve() in guarded:
            raise OutputError(f"{d / name}: is an input of this run; refusing to overwrite it")
    return d


def write_report(batch, directory, *, protect=(), title=None) -> dict:
    """Write ``grades.html``, ``grades.json`` and ``grades.csv`` into a folder.

    Parameters
    ----------
    batch : GradeBatch
    directory : path-like
        Created when missing.
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
    """
    d = check_report_dir(directory, protect=protect)
    texts = {
        "json": json.dumps(batch_to_dict(batch), indent=2, allow_nan=False) + "\n",
        "csv": batch_to_csv(batch),
        "html": render_html(batch, title=title),
    }
    written = {}
    for kind in ("json", "csv", "html"):
        path = d / REPORT_FILES[kind]
        replace_text_atomically(path, texts[kind])
        written[kind] = path
    return written
