"""Helpers for tests that send real signals to child processes."""

import signal


def interruptible() -> None:
    """``preexec_fn`` for a child that must react to Ctrl-C (SIGINT).

    A shell without job control starts background commands with SIGINT ignored, and a child
    inherits that; Python then installs no KeyboardInterrupt handler at all (it keeps an
    ignored SIGINT ignored, as POSIX programs should). A test run started that way would see
    its SIGINT ignored, so the child gets SIGINT's default back before it starts.
    """
    signal.signal(signal.SIGINT, signal.SIG_DFL)
