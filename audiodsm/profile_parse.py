"""Reading one section of a profile: each key converted and checked against its declaration.

:func:`audiodsm.profile.profile_from_dict` hands every TOML table to :func:`_parse_section`,
which refuses unknown keys, converts each value to the declared kind (int, float, bool, str,
roots, lists) and applies the key's range or choice check; a failure is one
:class:`~audiodsm.errors.ProfileError` line naming the file, the key, what came and what is
expected.
"""

from __future__ import annotations

import dataclasses
import math

from audiodsm.errors import ProfileError
from audiodsm.limits import ORDER_RANGE


def _describe(value) -> str:
    """A short readable rendering of a received value for error messages."""
    if isinstance(value, dict):
        return "a table"
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _type_name(value) -> str:
    return {bool: "boolean", int: "integer", float: "number", str: "string"}.get(
        type(value), type(value).__name__
    )


def _convert(value, kind, path, key, expect):
    """Convert one TOML value to the field's Python type, or raise ProfileError."""

    def bad(got=None):
        raise ProfileError(path, key, f"got {got or _describe(value)}; expected {expect}")

    if kind == "bool":
        if not isinstance(value, bool):
            bad(f"{_describe(value)} ({_type_name(value)})")
        return value
    if kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            bad(f"{_describe(value)} ({_type_name(value)})")
        return value
    if kind == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            bad(f"{_describe(value)} ({_type_name(value)})")
        value = float(value)
        if not math.isfinite(value):
            bad()
        return value
    if kind == "str":
        if not isinstance(value, str):
            bad(f"{_describe(value)} ({_type_name(value)})")
        return value
    if kind == "floats":
        if not isinstance(value, list) or len(value) > 256:
            bad()
        out = []
        for v in value:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                bad()
            out.append(float(v))
        return tuple(out)
    if kind in ("ints", "strs"):
        if not isinstance(value, list) or len(value) > 8:
            bad()
        for v in value:
            if kind == "ints" and (isinstance(v, bool) or not isinstance(v, int)):
                bad()
            if kind == "strs" and not isinstance(v, str):
                bad()
        return tuple(value)
    if kind == "roots":
        if not isinstance(value, list) or len(value) > ORDER_RANGE[1]:
            bad()
        out = []
        for v in value:
            if isinstance(v, bool):
                bad()
            if isinstance(v, (int, float)):
                re, im = float(v), 0.0
            elif (
                isinstance(v, list)
                and len(v) == 2
                and all(isinstance(p, (int, float)) and not isinstance(p, bool) for p in v)
            ):
                re, im = float(v[0]), float(v[1])
            else:
                bad()
            if not (math.isfinite(re) and math.isfinite(im)):
                bad()
            out.append(complex(re, im))
        return tuple(out)
    raise AssertionError(kind)  # pragma: no cover - schema error


def _parse_section(cls, table, path, section):
    if not isinstance(table, dict):
        raise ProfileError(path, section, f"got {_describe(table)}; expected a table [{section}]")
    fields = {f.name: f for f in dataclasses.fields(cls)}
    for key in table:
        if key not in fields:
            allowed = ", ".join(fields)
            raise ProfileError(path, f"{section}.{key}", f"unknown key; expected one of: {allowed}")
    values = {}
    for name, f in fields.items():
        if name not in table:
            continue
        meta = f.metadata
        dotted = f"{section}.{name}"
        value = _convert(table[name], meta["kind"], path, dotted, meta["expect"])
        check = meta["check"]
        if check is not None and not check(value):
            raise ProfileError(
                path, dotted, f"got {_describe(table[name])}; expected {meta['expect']}"
            )
        values[name] = value
    settings = cls(**values)
    # keys that belong to another kind of this stage would do nothing: refuse them
    for name, f in fields.items():
        only = f.metadata.get("only")
        by = f.metadata.get("only_by", "kind")
        kind = getattr(settings, by, None)
        if only is not None and name in table and kind != only:
            raise ProfileError(
                path,
                f"{section}.{name}",
                f"applies only when {section}.{by} = {only!r}; this profile has {by} = {kind!r}",
            )
    return settings
