"""Spec sheets: the targets a candidate chain must meet, read from a TOML file.

A spec sheet is a list of targets written in the battery's metric names. Each target says the
least (``at_least``) or the most (``at_most``) a metric may read, and, for the metrics that need
one, a condition: the tone level of a THD+N reading taken from the THD+N-versus-level sweep.

The layout (all keys other than those listed are refused)::

    name = "Demo DAC chip: audio targets"
    description = "Invented for the audiodsm demo."

    [[target]]
    metric = "dynamic_range_db_a"
    at_least = 118.0

    [[target]]
    metric = "thd_n_db"          # a metric that needs a condition ...
    at_level_dbfs = -10.0        # ... the tone level of the reading
    at_most = -100.0
    note = "mid-level distortion"
    percentile = 95              # optional: 95 % of the parts must meet it (default: all)

The file is parsed into a frozen :class:`SpecSheet`. A bad file raises
:class:`~audiodsm.errors.ProfileError` naming the file, the key (``target[2].metric`` for the
second target) and what is allowed.
"""

from __future__ import annotations

import hashlib
import json
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path

from audiodsm.errors import ProfileError

__all__ = [
    "METRIC_CATALOGUE",
    "CONDITIONAL_METRICS",
    "Target",
    "SpecSheet",
    "load_spec",
    "parse_spec",
    "spec_digest",
]

#: Metrics a target may name: metric name -> (unit shown in tables, plain description).
#: The names are those of the test battery (``audiodsm.evaluate.battery``); a test keeps the
#: two in step. Counts have the unit "count", state magnitudes are in full-scale units "FS".
METRIC_CATALOGUE = {
    "dynamic_range_db": ("dB", "dynamic range, unweighted (-60 dBFS method)"),
    "dynamic_range_db_a": ("dB", "dynamic range, A-weighted"),
    "dynamic_range_db_ccir": ("dB", "dynamic range, CCIR-RMS weighted"),
    "thd_n_db_at_minus1_dbfs": ("dB", "THD+N at -1 dBFS"),
    "thd_n_db_a_at_minus1_dbfs": ("dB", "THD+N at -1 dBFS, A-weighted"),
    "thd_n_db_at_minus20_dbfs": ("dB", "THD+N at -20 dBFS"),
    "thd_n_db_a_at_minus20_dbfs": ("dB", "THD+N at -20 dBFS, A-weighted"),
    "thd_n_db_worst_over_frequency_at_minus1_dbfs": (
        "dB",
        "worst THD+N over frequency (20 Hz to 20 kHz), -1 dBFS tones",
    ),
    "thd_n_db_worst_over_frequency_at_minus20_dbfs": (
        "dB",
        "worst THD+N over frequency (20 Hz to 20 kHz), -20 dBFS tones",
    ),
    "idle_noise_dbfs": ("dBFS", "idle-channel noise, unweighted"),
    "idle_noise_dbfs_a": ("dBFS", "idle-channel noise, A-weighted"),
    "idle_noise_dbfs_ccir": ("dBFS", "idle-channel noise, CCIR-RMS weighted"),
    "idle_tone_max_dbfs": ("dBFS", "strongest in-band idle tone"),
    "max_stable_amplitude_dbfs": ("dBFS", "largest stable sine amplitude"),
    "passband_ripple_db": ("dB", "frequency response ripple, 20 Hz to 20 kHz"),
    "image_rejection_db": ("dB", "image rejection"),
    "imd_smpte_db": ("dB", "SMPTE intermodulation"),
    "imd_difference_db": ("dB", "difference-frequency intermodulation"),
    "out_of_band_noise_dbfs": ("dBFS", "out-of-band noise after the reconstruction filter"),
    "carrier_ripple_dbfs": ("dBFS", "ripple inside each frame (PWM carrier) after the filter"),
    "noise_modulation_db": ("dB", "noise modulation: spread of the noise between the harmonics"),
    "state_peak_max": ("FS", "largest integrator state"),
    "overload_count": ("count", "loop overload samples at or below the stable amplitude"),
    "pwm_dropped_pulses": ("count", "PWM pulses dropped for the minimum width"),
    "pwm_stretched_pulses": ("count", "PWM pulses stretched to the minimum width"),
    "switching_rate_hz": ("Hz", "output level changes per second at idle"),
    "dc_offset_dbfs": ("dBFS", "DC at the output during silence"),
    "jitter_noise_dbfs_at_1ps": ("dBFS", "in-band noise 1 ps rms of clock jitter adds"),
    "jitter_dynamic_range_db_at_1ps": ("dB", "dynamic range with 1 ps rms clock jitter"),
    "jitter_dynamic_range_db_at_10ps": ("dB", "dynamic range with 10 ps rms clock jitter"),
    "jitter_dynamic_range_db_at_100ps": ("dB", "dynamic range with 100 ps rms clock jitter"),
    "output_step_rms_fs": ("FS", "rms step between output samples (jitter noise goes with it)"),
    "dc_offset_fs": ("FS", "DC at the output during silence, signed fraction of full scale"),
    "analog_noise_dbfs": ("dBFS", "in-band noise of the analog noise floor alone"),
    "analog_noise_dbfs_a": ("dBFS", "in-band noise of the analog noise floor alone, A-weighted"),
    "mismatch_free_thd_n_db_at_minus1_dbfs": ("dB", "THD+N at -1 dBFS with ideal unit elements"),
    "mismatch_free_dynamic_range_db_a": ("dB", "A-weighted dynamic range, ideal unit elements"),
    "mismatch_thd_n_cost_db": ("dB", "THD+N the unit elements' mismatch adds at -1 dBFS"),
    "mismatch_dynamic_range_cost_db": ("dB", "dynamic range the unit elements' mismatch costs"),
    "supply_ripple_sideband_db": ("dB", "supply ripple sideband beside a tone (supply rejection)"),
    "output_peak_volts": ("V", "peak load voltage at -1 dBFS"),
    "load_current_peak_amperes": ("A", "peak load current at -1 dBFS"),
    "inductor_current_peak_amperes": ("A", "peak filter-inductor current at -1 dBFS"),
    "switch_conduction_watts": ("W", "conduction loss in the switches at -1 dBFS"),
    "load_power_watts": ("W", "power into the load at -1 dBFS"),
    # read from the THD+N-versus-level sweep at the level the target names
    "thd_n_db": ("dB", "THD+N at the stated tone level"),
    "thd_n_db_a": ("dB", "THD+N at the stated tone level, A-weighted"),
}

#: Metrics read from a curve at a condition: metric -> name of the condition key it needs.
CONDITIONAL_METRICS = {"thd_n_db": "at_level_dbfs", "thd_n_db_a": "at_level_dbfs"}

_TOP_KEYS = ("name", "description", "target")
_TARGET_KEYS = ("metric", "at_least", "at_most", "at_level_dbfs", "percentile", "note")


@dataclass(frozen=True)
class Target:
    """One line of a spec sheet.

    Attributes
    ----------
    metric : str
        A name from :data:`METRIC_CATALOGUE`.
    bound : str
        ``"at_least"`` (the reading must be >= ``limit``) or ``"at_most"`` (<= ``limit``).
    limit : float
        The limit, in the metric's unit.
    at_level_dbfs : float or None
        Tone level of the reading for the metrics in :data:`CONDITIONAL_METRICS`, else None.
    note : str
        Free text shown in reports.
    percentile : float or None
        For a profile run as several parts: the share of parts (percent, above 0 and at most
        100) that must meet the limit. None means every part (docs/grade.md, "Parts").
    """

    metric: str
    bound: str
    limit: float
    at_level_dbfs: float | None = None
    note: str = ""
    percentile: float | None = None

    @property
    def unit(self) -> str:
        """Unit of the metric ("dB", "dBFS", "Hz", "count" or "FS")."""
        return METRIC_CATALOGUE[self.metric][0]

    @property
    def label(self) -> str:
        """The metric with its condition, e.g. ``"thd_n_db @ -10 dBFS"``."""
        if self.at_level_dbfs is None:
            return self.metric
        return f"{self.metric} @ {self.at_level_dbfs:g} dBFS"

    @property
    def requirement(self) -> str:
        """Plain text of the requirement, e.g. ``">= 118 dB"``."""
        sign = ">=" if self.bound == "at_least" else "<="
        unit = f" {self.unit}" if self.unit else ""
        share = "" if self.percentile is None else f" in {self.percentile:g} % of parts"
        return f"{sign} {self.limit:,.10g}{unit}{share}"

    def margin(self, value: float) -> float:
        """How far ``value`` is better than the limit (positive) or worse (negative)."""
        if self.bound == "at_least":
            return float(value) - self.limit
        return self.limit - float(value)


@dataclass(frozen=True)
class SpecSheet:
    """A named list of targets.

    Attributes
    ----------
    name : str
    description : str
    targets : tuple of Target
    path : str
        The file it was read from ("" when parsed from text).
    """

    name: str
    description: str
    targets: tuple
    path: str = ""


def _bad(path, key, got, expected):
    raise ProfileError(path, key, f"got {got!r}; expected {expected}")


def _number(path, key, value):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        _bad(path, key, value, "a number")
    value = float(value)
    if not math.isfinite(value):
        _bad(path, key, value, "a finite number")
    return value


def _parse_target(path, index, table) -> Target:
    where = f"target[{index}]"
    if not isinstance(table, dict):
        _bad(path, where, table, "a table")
    for key in table:
        if key not in _TARGET_KEYS:
            raise ProfileError(
                path, f"{where}.{key}", "unknown key; expected one of: " + ", ".join(_TARGET_KEYS)
            )
    metric = table.get("metric")
    if metric is None:
        raise ProfileError(path, f"{where}.metric", "missing; every target names a metric")
    if not isinstance(metric, str) or metric not in METRIC_CATALOGUE:
        raise ProfileError(
            path,
            f"{where}.metric",
            f"unknown metric {metric!r}; expected one of: " + ", ".join(METRIC_CATALOGUE),
        )
    bounds = [b for b in ("at_least", "at_most") if b in table]
    if len(bounds) != 1:
        raise ProfileError(
            path, where, f"got {bounds or 'no bound'}; expected exactly one of at_least, at_most"
        )
    bound = bounds[0]
    limit = _number(path, f"{where}.{bound}", table[bound])
    condition = CONDITIONAL_METRICS.get(metric)
    level = None
    if condition is not None:
        if condition not in table:
            raise ProfileError(
                path, f"{where}.{condition}", f"missing; metric {metric!r} needs {condition}"
            )
        level = _number(path, f"{where}.{condition}", table[condition])
        if not -160.0 <= level <= 0.0:
            _bad(path, f"{where}.{condition}", level, "a level from -160 to 0 dBFS")
    elif "at_level_dbfs" in table:
        raise ProfileError(
            path,
            f"{where}.at_level_dbfs",
            f"metric {metric!r} takes no condition; only " + ", ".join(CONDITIONAL_METRICS) + " do",
        )
    note = table.get("note", "")
    if not isinstance(note, str):
        _bad(path, f"{where}.note", note, "a string")
    percentile = None
    if "percentile" in table:
        percentile = _number(path, f"{where}.percentile", table["percentile"])
        if not 0.0 < percentile <= 100.0:
            _bad(path, f"{where}.percentile", percentile, "a share of parts above 0, at most 100")
    return Target(
        metric=metric,
        bound=bound,
        limit=limit,
        at_level_dbfs=level,
        note=note,
        percentile=percentile,
    )


def parse_spec(text: str, *, path: str = "<spec>") -> SpecSheet:
    """Parse spec-sheet TOML text.

    Parameters
    ----------
    text : str
        The TOML text.
    path : str, keyword-only
        Name used in error messages.

    Returns
    -------
    SpecSheet

    Raises
    ------
    ProfileError
        Bad TOML, an unknown key or metric, a missing or doubled bound, a missing condition.
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(path, "", f"not valid TOML ({exc})") from None
    for key in data:
        if key not in _TOP_KEYS:
            raise ProfileError(path, key, "unknown key; expected one of: " + ", ".join(_TOP_KEYS))
    name = data.get("name", Path(path).stem)
    if not isinstance(name, str) or not name.strip():
        _bad(path, "name", name, "a non-empty string")
    description = data.get("description", "")
    if not isinstance(description, str):
        _bad(path, "description", description, "a string")
    targets = data.get("target")
    if not isinstance(targets, list) or not targets:
        raise ProfileError(
            path, "target", "missing or empty; expected at least one [[target]] table"
        )
    parsed = tuple(_parse_target(path, i + 1, t) for i, t in enumerate(targets))
    seen = set()
    for i, t in enumerate(parsed):
        key = (t.metric, t.bound, t.at_level_dbfs, t.percentile)
        if key in seen:
            raise ProfileError(path, f"target[{i + 1}]", f"repeats an earlier {t.bound} {t.label}")
        seen.add(key)
    return SpecSheet(name=name, description=description, targets=parsed, path=str(path))


def load_spec(path) -> SpecSheet:
    """Read a spec sheet from a TOML file.

    Parameters
    ----------
    path : path-like

    Returns
    -------
    SpecSheet

    Raises
    ------
    ProfileError
        The file is missing or unreadable, or its content is refused (see :func:`parse_spec`).
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ProfileError(
            str(p), "", f"cannot read the spec sheet ({exc.__class__.__name__})"
        ) from None
    return parse_spec(text, path=str(p))


def spec_digest(spec: SpecSheet) -> str:
    """A stable SHA-256 of the targets (names, bounds, limits, conditions).

    The sheet's name, description, notes and file path are left out: they change no grade.

    Returns
    -------
    str
        64 lowercase hex digits.
    """
    rows = sorted(
        (t.metric, t.bound, repr(t.limit), repr(t.at_level_dbfs))
        + (() if t.percentile is None else (repr(t.percentile),))
        for t in spec.targets
    )
    text = json.dumps(rows, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()
