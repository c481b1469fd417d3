"""Errors raised by audiodsm.

A small hierarchy: every error the library raises on a user mistake derives from
:class:`AudiodsmError`; those about a bad value are also :class:`ValueError`, so
callers that already catch ``ValueError`` keep working. The command line turns any
:class:`AudiodsmError` into a one-line message and a non-zero exit code.

The exit codes of every command are defined here, once (the README lists them):

==========================  =====  ==================================================
name                        code   meaning
==========================  =====  ==================================================
:data:`EXIT_OK`             0      done; every target passed
:data:`EXIT_FAILED`         1      done, but a target failed (grade, design) or a
                                   check found a problem
:data:`EXIT_USAGE`          2      bad input: a usage error, a bad profile, spec
                                   sheet or audio file, an output that would be
                                   replaced without permission
:data:`EXIT_STORAGE`        3      an output could not be written: disk full, a
                                   read-only folder, a name too long, an I/O error
128 + signal number         130    interrupted by Ctrl-C (SIGINT); 143 for SIGTERM,
                                   129 for SIGHUP. Finished work is kept.
==========================  =====  ==================================================
"""

from __future__ import annotations

__all__ = [
    "AudiodsmError",
    "ParameterError",
    "ProfileError",
    "AudioFileError",
    "ClusterError",
    "OutputError",
    "StorageError",
    "StopSignal",
    "EXIT_OK",
    "EXIT_FAILED",
    "EXIT_USAGE",
    "EXIT_STORAGE",
    "exit_code_for_signal",
]

#: Exit code: the command did its work and everything it checked passed.
EXIT_OK = 0
#: Exit code: the command did its work and something it checked failed (a target, a check).
EXIT_FAILED = 1
#: Exit code: a usage error or bad input (profile, spec sheet, audio file, refused output).
EXIT_USAGE = 2
#: Exit code: an output could not be written (disk full, read-only folder, I/O error).
EXIT_STORAGE = 3


def exit_code_for_signal(signal_number: int) -> int:
    """The exit code of a command stopped by a signal: 128 + its number (shell convention).

    130 for SIGINT (Ctrl-C), 143 for SIGTERM, 129 for SIGHUP.
    """
    return 128 + int(signal_number)


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


class ClusterError(AudiodsmError):
    """The compute cluster cannot take the batch; the command line exits :data:`EXIT_USAGE`.

    Its scheduler cannot be reached, it has no workers, or its workers run another version of
    audiodsm (checked before any work is sent).
    """


class OutputError(AudiodsmError):
    """An output cannot be written (directory not writable, would overwrite an input, ...)."""


class StorageError(OutputError, OSError):
    """An output could not be written: disk full, read-only folder, name too long, I/O error.

    Also an :class:`OSError`, so code that already catches ``OSError`` around a write keeps
    working. The command line prints its one-line message and exits with
    :data:`EXIT_STORAGE`.

    Parameters
    ----------
    path : str or os.PathLike
        The file or folder that could not be written.
    cause : str or OSError
        Plain words for the cause; an ``OSError`` gives its ``strerror`` (e.g. "No space
        left on device").
    """

    def __init__(self, path, cause):
        if isinstance(cause, OSError):
            cause = cause.strerror or str(cause) or type(cause).__name__
        self.path = str(path)
        self.cause = str(cause)
        Exception.__init__(self, f"{self.path}: cannot write ({self.cause})")

    def __str__(self) -> str:
        return f"{self.path}: cannot write ({self.cause})"


class StopSignal(KeyboardInterrupt):
    """SIGTERM or SIGHUP asked the command to stop; handled like Ctrl-C.

    A subclass of ``KeyboardInterrupt``, so every clean-up path that runs on Ctrl-C
    (temporary files removed, worker processes ended, finished results kept) runs for these
    signals too. The command line installs the handlers that raise it.

    Parameters
    ----------
    signal_number : int
        The signal received.
    """

    def __init__(self, signal_number: int):
        self.signal_number = int(signal_number)
        super().__init__(f"stopped by signal {self.signal_number}")
