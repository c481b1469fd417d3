"""The ``audiodsm`` command: a thin shell over the library.

Each sub-command lives in its own module of this package and is imported only when
it runs, so ``audiodsm --help`` stays fast. Every failure ends as one line on stderr and a
documented exit code (:mod:`audiodsm.errors` defines them): a usage error or bad input
(:class:`~audiodsm.errors.AudiodsmError`, click's usage errors) exits 2, an output that cannot
be written (:class:`~audiodsm.errors.StorageError`, or an ``OSError`` such as a full disk that
reaches this far) exits 3, and Ctrl-C, SIGTERM and SIGHUP exit 128 + the signal's number
after the same clean-up (SIGTERM and SIGHUP raise :class:`~audiodsm.errors.StopSignal`, a
``KeyboardInterrupt``, so temporary files are removed and worker processes ended).
"""

from __future__ import annotations

import contextlib
import errno
import importlib
import signal
import sys
import threading

import click

from audiodsm import __version__
from audiodsm.errors import (
    EXIT_STORAGE,
    EXIT_USAGE,
    AudiodsmError,
    StopSignal,
    StorageError,
    exit_code_for_signal,
)

# command name -> "module:function"
COMMANDS = {
    "analyze": "audiodsm.cli.analyze:analyze",
    "render": "audiodsm.cli.render:render",
    "measure": "audiodsm.cli.measure:measure",
    "grade": "audiodsm.cli.grade:grade",
    "explore": "audiodsm.cli.explore:explore",
    "design": "audiodsm.cli.design:design",
    "listening-set": "audiodsm.cli.listening_set:listening_set",
    "score-answers": "audiodsm.cli.score_answers:score_answers",
    "plan": "audiodsm.cli.handoff:plan",
    "handoff": "audiodsm.cli.handoff:handoff",
}

#: Signals that stop a command the way Ctrl-C does (clean-up first, then exit 128 + number).
STOP_SIGNALS = tuple(
    getattr(signal, name) for name in ("SIGTERM", "SIGHUP") if hasattr(signal, name)
)

# OSError numbers that mean "this output cannot be written": exit EXIT_STORAGE, not a traceback
_STORAGE_ERRNOS = {
    errno.ENOSPC,
    errno.EROFS,
    errno.EACCES,
    errno.EPERM,
    errno.EIO,
    errno.EFBIG,
    errno.ENAMETOOLONG,
    getattr(errno, "EDQUOT", errno.ENOSPC),
}


def one_line(text) -> str:
    """A message folded onto one line (line breaks become spaces)."""
    return " ".join(str(text).splitlines()).strip()


def _error(text, code: int):
    click.echo(f"audiodsm: error: {one_line(text)}", err=True)
    sys.exit(code)


def _raise_stop(signum, frame):
    # a second signal of the same kind while cleaning up ends the process at once
    signal.signal(signum, signal.SIG_DFL)
    raise StopSignal(signum)


@contextlib.contextmanager
def stop_signals_as_interrupt():
    """Within the block, SIGTERM and SIGHUP raise :class:`~audiodsm.errors.StopSignal`.

    Only the main thread can install signal handlers; elsewhere the block changes nothing.
    The previous handlers are put back on the way out.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {}
    try:
        for sig in STOP_SIGNALS:
            previous[sig] = signal.signal(sig, _raise_stop)
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


class _LazyGroup(click.Group):
    """A click group that imports each sub-command's module on first use.

    It also turns every failure into one line on stderr and a documented exit code.
    """

    def list_commands(self, ctx):
        return sorted(name for name in COMMANDS if self._load(name) is not None)

    def get_command(self, ctx, name):
        return self._load(name)

    @staticmethod
    def _load(name):
        target = COMMANDS.get(name)
        if target is None:
            return None
        module_name, attr = target.split(":")
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name == module_name:  # command not built yet in this checkout
                return None
            raise
        return getattr(module, attr)

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except StorageError as exc:
            _error(exc, EXIT_STORAGE)
        except AudiodsmError as exc:
            _error(exc, EXIT_USAGE)
        except OSError as exc:
            if exc.errno not in _STORAGE_ERRNOS:
                raise
            where = f"{exc.filename}: " if exc.filename else ""
            _error(f"{where}{exc.strerror or exc}", EXIT_STORAGE)

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True, **extra):
        if not standalone_mode:
            return super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        try:
            with stop_signals_as_interrupt():
                result = super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        except click.exceptions.NoArgsIsHelpError as exc:
            exc.show()  # no arguments at all: the help text, as click shows it
            sys.exit(exc.exit_code)
        except click.UsageError as exc:
            hint = ""
            if exc.ctx is not None:
                hint = f" (see '{exc.ctx.command_path} --help')"
            _error(exc.format_message() + hint, exc.exit_code)
        except click.ClickException as exc:
            _error(exc.format_message(), exc.exit_code)
        except click.Abort as exc:
            cause = exc.__cause__ or exc.__context__
            signum = getattr(cause, "signal_number", signal.SIGINT)
            click.echo(f"audiodsm: stopped by {signal.Signals(signum).name}", err=True)
            sys.exit(exit_code_for_signal(signum))
        except StopSignal as exc:  # raised outside click's own handling
            click.echo(f"audiodsm: stopped by {signal.Signals(exc.signal_number).name}", err=True)
            sys.exit(exit_code_for_signal(exc.signal_number))
        finally:
            chain = sys.modules.get("audiodsm.stages.chain")
            if chain is not None:  # no idle worker thread may keep the process from ending
                chain.release_worker_threads()
        sys.exit(result if isinstance(result, int) else 0)


@click.group(cls=_LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="audiodsm")
def main():
    """Design, simulate, measure and grade delta-sigma noise shapers for audio."""
