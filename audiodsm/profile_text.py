"""Chain profiles written out: TOML text, plain dicts, the content digest, the table of keys.

:func:`profile_to_toml` writes a :class:`~audiodsm.profile.ChainProfile` with ``tomli-w``
(:func:`audiodsm.profile.parse_profile` reads it back to an equal profile),
:func:`profile_to_dict` gives the nested dict of plain values, :func:`profile_digest` a
SHA-256 digest of every setting that changes a result, and :func:`schema_rows` every key with
its type, allowed values and default (the documentation is checked against it).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json

import tomli_w

from audiodsm.profile import _DESIGN_KEYS, _SECTIONS, ChainProfile, ModulatorSettings

__all__ = ["profile_to_dict", "profile_to_toml", "profile_digest", "schema_rows"]


#: Version of the digest recipe; bump it when the meaning of a key changes.
_DIGEST_VERSION = 2  # 2: modulator state scaling (on by default)


# ---------------------------------------------------------------------------------------------
# Writing and hashing
# ---------------------------------------------------------------------------------------------


def _applies(settings, f) -> bool:
    """Whether field ``f`` does something for these settings (kind-specific keys)."""
    only = f.metadata.get("only")
    if only is not None and only != getattr(settings, f.metadata.get("only_by", "kind"), None):
        return False
    if isinstance(settings, ModulatorSettings) and settings.explicit_ntf:
        return f.name not in _DESIGN_KEYS
    return True


def _plain(value):
    """A JSON/TOML-friendly form of one field value."""
    if isinstance(value, tuple):
        return [[v.real, v.imag] if isinstance(v, complex) else v for v in value]
    return value


def profile_to_dict(profile: ChainProfile, *, full: bool = True) -> dict:
    """The profile as a nested dict of plain values (the inverse of :func:`profile_from_dict`).

    Parameters
    ----------
    profile : ChainProfile
    full : bool, keyword-only
        True lists every key; False leaves out keys at their default and keys that do not
        apply to the stage's kind (the compact form :func:`profile_to_toml` writes).
    """
    out = {"name": profile.name, "description": profile.description}
    for section, cls in _SECTIONS.items():
        settings = getattr(profile, section)
        if section in ("fixed_point", "impairments") and not settings.active:
            continue  # off: nothing in it may differ from its defaults (see _check_fixed_point)
        table = {}
        for f in dataclasses.fields(cls):
            value = getattr(settings, f.name)
            default = f.default if f.default is not dataclasses.MISSING else f.default_factory()
            if not full and (value == default or not _applies(settings, f)):
                continue
            table[f.name] = _plain(value)
        out[section] = table
    return out


def _toml_literal(value) -> str:
    """One plain value as TOML text, as tomli-w writes it (for the table of keys and defaults)."""
    return tomli_w.dumps({"v": value}).removeprefix("v = ").removesuffix("\n")


def profile_to_toml(profile: ChainProfile, *, full: bool = False) -> str:
    """Write a profile as TOML text that :func:`parse_profile` reads back to an equal profile.

    Parameters
    ----------
    profile : ChainProfile
    full : bool, keyword-only
        False (default) writes only the keys that differ from their defaults; True writes
        every key that applies to the chosen kinds.

    Returns
    -------
    str
        TOML text ending in a newline, written by tomli-w (one key a line, each stage a table,
        a list one item a line).

    References
    ----------
    .. [1] TOML v1.0.0, https://toml.io/en/v1.0.0 (the format tomli-w writes and
       :mod:`tomllib` reads).
    """
    data = profile_to_dict(profile, full=False)
    if full:
        complete = profile_to_dict(profile, full=True)
        for section, cls in _SECTIONS.items():
            if section not in complete:
                continue
            data[section] = {
                f.name: complete[section][f.name]
                for f in dataclasses.fields(cls)
                if _applies(getattr(profile, section), f)
            }
    document = {"name": data["name"]}
    if data["description"]:
        document["description"] = data["description"]
    for section in _SECTIONS:
        if data.get(section):
            document[section] = data[section]
    return tomli_w.dumps(document)


def profile_digest(profile: ChainProfile) -> str:
    """A stable hash of everything in the profile that changes a result.

    The name and description are left out: two profiles that differ only in their labels
    describe the same chain and hash equal. Every other key is included at its effective value
    (defaults written out), so a profile file and the same chain written more compactly hash
    equal too. Floats enter by their exact ``repr``. ``impairments.parts`` (how many parts
    to run) is left out too: it changes no one battery, so every part keeps its cache entry
    when the count changes.

    Parameters
    ----------
    profile : ChainProfile

    Returns
    -------
    str
        64 lowercase hex digits (SHA-256).
    """
    if profile.impairments.parts != 1:  # how many parts to run changes no one part's result
        profile = dataclasses.replace(
            profile, impairments=dataclasses.replace(profile.impairments, parts=1)
        )
    data = profile_to_dict(profile, full=True)
    del data["name"], data["description"]
    if "impairments" in data:
        data["impairments"].pop("parts", None)  # digests of profiles written before the key
    data["digest_version"] = _DIGEST_VERSION
    text = json.dumps(data, sort_keys=True, separators=(",", ":"), default=repr)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def schema_rows():
    """Every profile key with its type, allowed values and default (for the documentation).

    Yields
    ------
    tuple of str
        ``(dotted_key, kind, expect, default_text, doc)``.
    """
    for section, cls in _SECTIONS.items():
        for f in dataclasses.fields(cls):
            default = f.default if f.default is not dataclasses.MISSING else f.default_factory()
            yield (
                f"{section}.{f.name}",
                f.metadata["kind"],
                f.metadata["expect"],
                _toml_literal(_plain(default)),
                f.metadata.get("doc", ""),
            )
