"""``audiodsm measure``: run the test battery on profiles and print their metrics.

The terminal shows one aligned table: a row per metric with its unit, a column per profile.
With ``--json``, stdout carries only one JSON object per profile, one per line::

    {"profile": str, "file": str, "digest": str, "rate_hz": int, "seconds": float,
     "metrics": {metric name: number | bool | null, ...}, "notes": [str, ...]}

The progress bar goes to stderr, so it never mixes with the JSON.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import click

from audiodsm.cli._table import aligned_lines

__all__ = ["measure", "profile_paths", "metrics_table"]


def profile_paths(arguments) -> list[Path]:
    """Expand profile arguments: a file stays, a folder gives its ``*.toml`` files (sorted).

    Parameters
    ----------
    arguments : iterable of str or Path

    Returns
    -------
    list of Path

    Raises
    ------
    ProfileError
        A folder that holds no ``.toml`` file, or a path that does not exist.
    """
    from audiodsm.errors import ProfileError

    out = []
    for arg in arguments:
        p = Path(arg)
        if p.is_dir():
            found = sorted(q for q in p.glob("*.toml") if q.is_file())
            if not found:
                raise ProfileError(str(p), "", "the folder holds no .toml profile")
            out.extend(found)
        elif p.exists():
            out.append(p)
        else:
            raise ProfileError(str(p), "", "no such file or folder")
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


class _Bar:
    """A click progress bar on stderr fed by the battery's progress callback."""

    def __init__(self, label: str, enabled: bool):
        self.enabled = enabled
        self.label = label
        self.bar = None
        self.seen = 0

    def __call__(self, done, total, what):
        if not self.enabled:
            return
        if self.bar is None:
            self.bar = click.progressbar(
                length=total, label=self.label, file=sys.stderr, show_pos=True, width=24
            )
            self.bar.__enter__()
        self.bar.label = f"{self.label}: {what}"
        self.bar.update(done - self.seen)
        self.seen = done

    def close(self):
        if self.bar is not None:
            self.bar.__exit__(None, None, None)
            self.bar = None


@click.command("measure")
@click.argument("profiles", nargs=-1, required=True, type=click.Path())
@click.option("--json", "as_json", is_flag=True, help="One JSON object per profile on stdout.")
@click.option(
    "--jobs",
    type=click.IntRange(min=1),
    default=None,
    help="Worker threads per battery (default: the number of cores).",
)
@click.option(
    "--seed",
    type=click.IntRange(min=0),
    default=0,
    show_default=True,
    help="Mixed into every run's dither seed.",
)
@click.option(
    "--short",
    is_flag=True,
    help="Shorter captures and fewer points (a preview; coarser resolution).",
)
@click.option("--no-progress", is_flag=True, help="Do not show the progress bar.")
def measure(profiles, as_json, jobs, seed, short, no_progress):
    """Run the test battery on each PROFILE (a file, or a folder of .toml files).

    Each profile's chain is driven with AES17-practice stimuli (997 Hz tones, silence, small
    DC offsets, a multitone, twin tones) at its audio rate, and its reconstructed output is
    measured: dynamic range, THD+N, idle noise and idle tones, maximum stable amplitude,
    frequency response, images, IMD, out-of-band noise, noise modulation, state peaks and,
    for PWM stages, pulse counts and switching rate.
    """
    from audiodsm.evaluate.battery import BatteryPlan, run_battery
    from audiodsm.profile import load_profile

    paths = profile_paths(profiles)
    loaded = [(p, load_profile(p)) for p in paths]  # every file checked before any runs
    plan = BatteryPlan.quick() if short else BatteryPlan()
    names, rows = [], []
    for path, prof in loaded:
        bar = _Bar(prof.name, enabled=not no_progress)
        try:
            res = run_battery(prof, jobs=jobs, progress=bar, seed=seed, plan=plan)
        finally:
            bar.close()
        if as_json:
            record = {
                "profile": prof.name,
                "file": str(path),
                "digest": res.digest,
                "rate_hz": res.rate_hz,
                "seconds": round(res.seconds, 3),
                "metrics": res.json_metrics(),
                "notes": list(res.notes),
            }
            click.echo(json.dumps(record))
        else:
            names.append(prof.name)
            rows.append(res.json_metrics())
            click.echo(f"{prof.name}: measured in {res.seconds:.1f} s ({path})", err=True)
    if not as_json:
        click.echo(metrics_table(names, rows))
