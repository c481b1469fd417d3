"""Helpers for tests that send real signals to child processes."""

import os
import signal
import subprocess
import sys
import time

import pytest


def interruptible() -> None:
    """``preexec_fn`` for a child that must react to Ctrl-C (SIGINT).

    A shell without job control starts background commands with SIGINT ignored, and a child
    inherits that; Python then installs no KeyboardInterrupt handler at all (it keeps an
    ignored SIGINT ignored, as POSIX programs should). A test run started that way would see
    its SIGINT ignored, so the child gets SIGINT's default back before it starts.
    """
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def start_batch_and_wait(script, cache, calls, timeout_s=120.0):
    """Start ``script`` (a batch that caches results) and wait until it got going.

    The child runs in its own session with SIGINT's default restored (:func:`interruptible`),
    so a test can send it Ctrl-C; "going" means one result is in the cache folder ``cache``
    and at least one battery has left a ``started.<pid>`` file in ``calls``. Returns the
    process and those files; fails the test (and kills the child) when nothing happens in
    ``timeout_s``.
    """
    proc = subprocess.Popen(
        [sys.executable, str(script)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        preexec_fn=interruptible,
        text=True,
        start_new_session=True,
    )
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        started = [p for p in calls.iterdir() if p.name.startswith("started.")]
        if len(list(cache.glob("*.npz"))) == 1 and started:
            return proc, started
        time.sleep(0.1)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.communicate()
    pytest.fail("the batch never got going")
