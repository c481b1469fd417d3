"""Errors raised by audiodsm.

A small hierarchy: every error the library raises on a user mistake derives from
:class:`AudiodsmError`; those about a bad value are also :class:`ValueError`, so
callers that already catch ``ValueError`` keep working. The command line turns any
:class:`AudiodsmError` into a one-line message and a non-zero exit code.
"""

from __future__ import annotations

__all__ = [
    "AudiodsmError",
    "ParameterError",
    "ProfileError",
    "AudioFileError",
    "OutputError",
]


class AudiodsmError(Exception):
    """Root of every error audiodsm raises on purpose."""


class ParameterError(AudiodsmError, ValueError):
    """A parameter has a value outside what is allowed.

    Parameters
    ----------
    name : str
        The parameter's name as the caller wrote it.
    value : object
        The value received.
    expected : str
        Plain words for what is allowed, e.g. ``"an integer from 1 to 8"``.
    """

    def __init__(self, name: str, value: object, expected: str):
        self.name = name
        self.value = value
        self.expected = expected
        super().__init__(f"{name}={value!r}: expected {expected}")


class ProfileError(AudiodsmError, ValueError):
    """A profile or spec-sheet file has an unknown key, a wrong type or a bad value.

    Parameters
    ----------
    path : str
        The file.
    key : str
        The dotted key, e.g. ``"modulator.order"``; empty for file-level problems.
    message : str
        What was received and what is allowed.
    """

    def __init__(self, path: str, key: str, message: str):
        self.path = str(path)
        self.key = key
        self.message = message
        where = f"{self.path}: {key}: " if key else f"{self.path}: "
        super().__init__(where + message)


class AudioFileError(AudiodsmError, ValueError):
    """An audio file is missing, unreadable, truncated, empty or holds bad samples."""

    def __init__(self, path: str, message: str):
        self.path = str(path)
        self.message = message
        super().__init__(f"{self.path}: {message}")


class OutputError(AudiodsmError):
    """An output cannot be written (directory not writable, would overwrite an input, ...)."""
