"""Run many batteries as Dask tasks: a local cluster by default, or an existing scheduler.

This is the only module that imports Dask (``dask.distributed``). Batch work (``grade``,
``measure`` on several profiles, ``explore``) goes through :func:`run_tasks`:

* With no scheduler address, a local cluster of worker processes starts on the loopback
  address (127.0.0.1), one single-threaded worker per requested process, and stops when the
  batch ends, however it ends (done, Ctrl-C, SIGTERM). Nothing needs setting up.
* With an address (``tcp://host:port``) the batch goes to that scheduler's workers. Before any
  task is sent, every worker reports ``audiodsm.__version__`` and a digest of the package's
  source files (:func:`code_digest`); a worker that differs from this process, an unreachable
  scheduler or a scheduler without workers raises :class:`~audiodsm.errors.ClusterError`.
* The compiled loops are loaded before the first task. The local cluster's workers are
  forked from one process server (multiprocessing's ``forkserver``, where the platform has
  it) that imports the battery and runs its loops once (:func:`warm_up_loops`, preloaded by
  ``audiodsm.evaluate._worker_preload``): every worker, and every worker restarted after a
  crash, starts with the loops in memory. A worker of a named scheduler (started by Dask's
  own commands) warms up when it joins (:class:`LoopWarmUp`, a worker plugin running the
  same warm-up).
* Workers of the local cluster inherit this process's environment unchanged (Dask would set
  the BLAS and OpenMP thread counts to 1, which changes numpy's results in the last bits), so
  a batch on the local cluster equals a serial one bit for bit. Remote workers give the same
  bits when they run with the same libraries and thread settings.
* Tasks carry the callable (by reference), the profile and the plan; never signal arrays.
  Results come back to the caller, which owns the cache. A task never raises on the worker:
  an exception becomes a failure naming its type and message, so the rest of the batch goes
  on. A worker lost mid-task (killed, crashed) is retried on another worker by the scheduler
  (:data:`ALLOWED_FAILURES` times on a local cluster; a remote scheduler's own
  ``distributed.scheduler.allowed-failures``); a task that kills every
  worker it lands on ends as a failure of its profile alone.

References
----------
.. [1] Dask.distributed documentation, "Worker Plugins", "LocalCluster" and "Resilience"
   (https://distributed.dask.org/en/stable/).
"""

from __future__ import annotations

import hashlib
import logging
import multiprocessing
import os
import sys
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import dask
from distributed import Client, LocalCluster, as_completed
from distributed.diagnostics.plugin import WorkerPlugin

from audiodsm.errors import ClusterError

__all__ = [
    "ALLOWED_FAILURES",
    "ClusterInfo",
    "LoopWarmUp",
    "code_digest",
    "worker_identity",
    "guarded_call",
    "run_tasks",
]

#: Times a task may lose its worker before it fails, on a local cluster (Dask's default is
#: 3; each loss costs a worker restart with its warm-up).
ALLOWED_FAILURES = 2
#: Seconds to wait for a scheduler to answer, and for its first worker.
_CONNECT_TIMEOUT_S = 10.0
#: Seconds a local cluster may take to start its workers (cold imports on a busy machine).
_LOCAL_START_TIMEOUT_S = 120.0
#: The module the local cluster's process server imports before it forks the workers.
_PRELOAD_MODULE = "audiodsm.evaluate._worker_preload"


@dataclass(frozen=True)
class ClusterInfo:
    """What the batch ran on; handed to ``say`` and returned by :func:`run_tasks`.

    Attributes
    ----------
    address : str
        The scheduler's address.
    local : bool
        True for a cluster this process started (and stopped).
    workers : int
        Workers when the batch started.
    dashboard : str
        The Dask dashboard's address, "" when there is none.
    start_s : float
        Seconds from asking for the cluster to having workers (on a local cluster, the
        process server's warm-up included).
    warm_up_s : float
        The slowest worker's own warm-up before its first task (what it still had to import
        or load), seconds.
    preload_s : float
        The warm-up done once in the local cluster's process server before the workers were
        forked from it (imports and compiled loops), seconds; 0 when there is none.
    """

    address: str
    local: bool
    workers: int
    dashboard: str
    start_s: float
    warm_up_s: float
    preload_s: float = 0.0


def code_digest() -> str:
    """SHA-256 of the package's Python sources (relative path and bytes of every ``.py``).

    Two installations with the same digest run the same code; the version number alone
    misses local edits.
    """
    root = Path(__file__).resolve().parents[1]
    h = hashlib.sha256()
    for path in sorted(root.rglob("*.py")):
        h.update(path.relative_to(root).as_posix().encode())
        h.update(b"\0")
        h.update(path.read_bytes())
        h.update(b"\0")
    return h.hexdigest()


def worker_identity() -> tuple:
    """``(audiodsm.__version__, code_digest())`` of the process it runs in."""
    from audiodsm import __version__

    return (__version__, code_digest())


#: Chains run by :func:`warm_up_loops`: the default profile (a 5th-order single-bit PDM
#: loop at 64x) and a multi-level NRZ one, which between them load every kernel family the
#: battery calls (rate converters, modulator, output stage, reconstruction filter).
_WARM_UP_PROFILES = (
    {"name": "warm-up pdm"},
    {"name": "warm-up nrz", "modulator": {"levels": 17}, "output": {"kind": "nrz"}},
)


def warm_up_loops() -> float | None:
    """Import the battery and run the compiled loops it calls once; return the seconds.

    Runs each chain of ``_WARM_UP_PROFILES`` on 20 ms of a tone (loading its kernels from
    numba's on-disk cache, or compiling them on a fresh checkout, and its loop design from the
    loop cache) and the battery's measurement modules. Never raises: a failure returns None
    and the worker loads what it needs at its first task instead.
    """
    start = time.perf_counter()
    try:
        import numpy as np

        import audiodsm.evaluate.battery  # noqa: F401  (the battery and the chain's stages)
        from audiodsm.evaluate import battery_runs
        from audiodsm.profile import profile_from_dict
        from audiodsm.stages.chain import run_chain

        rate = 48000
        x = 0.1 * np.sin(2 * np.pi * 997.0 / rate * np.arange(rate // 50))
        for settings in _WARM_UP_PROFILES:
            res = run_chain(profile_from_dict(settings), x, rate_hz=rate, threads=1)
            battery_runs._meter(res.listening[:, 0], rate, 997.0, ("unweighted", "a"), 0.005)
        battery_runs._take_modulator_samples()
    except Exception:  # the warm-up is an optimisation: the tasks load what is missing
        return None
    return time.perf_counter() - start


class LoopWarmUp(WorkerPlugin):
    """Worker plugin: load the battery and the compiled loops once, when a worker starts.

    ``setup`` runs :func:`warm_up_loops` unless the worker was forked from the local
    cluster's process server, which has run it already (the worker inherits its modules and
    loops: its own warm-up is then only this check). The seconds are kept on the worker as
    ``audiodsm_warm_up_s``, and the process server's as ``audiodsm_preload_s``.
    """

    name = "audiodsm-loop-warm-up"
    idempotent = True

    def setup(self, worker):
        """Warm the worker up (see the class description)."""
        start = time.perf_counter()
        preloaded = sys.modules.get(_PRELOAD_MODULE)
        seconds = getattr(preloaded, "SECONDS", None)
        if seconds is None:
            warm_up_loops()
        worker.audiodsm_preload_s = float(seconds or 0.0)
        worker.audiodsm_warm_up_s = time.perf_counter() - start


def _warm_up_seconds(dask_worker=None):
    return (
        float(getattr(dask_worker, "audiodsm_warm_up_s", 0.0)),
        float(getattr(dask_worker, "audiodsm_preload_s", 0.0)),
    )


def _worker_start_method() -> str:
    """``forkserver`` where the platform has it (workers share one warm-up), else ``spawn``."""
    return "forkserver" if "forkserver" in multiprocessing.get_all_start_methods() else "spawn"


def _preload_process_server():
    """Have the process server import the warm-up module before it forks a worker.

    Only takes effect when the server is not running yet (the first local cluster of this
    process); later clusters fork from the same, already warm server.
    """
    from distributed.utils import get_mp_context

    context = get_mp_context()  # distributed sets its own preload list on its first call
    context.set_forkserver_preload(["distributed", _PRELOAD_MODULE])


def guarded_call(function: Callable, *args, **kwargs) -> tuple:
    """``("ok", function(...))``, or ``("failed", "Type: first line of the message")``.

    Runs on the worker, so an exception in one task is a result like any other and never
    stops the batch.
    """
    try:
        return ("ok", function(*args, **kwargs))
    except Exception as exc:
        text = str(exc).splitlines()[0] if str(exc) else ""
        return ("failed", f"{type(exc).__name__}: {text}".rstrip(": "))


def _quiet():
    for name in ("distributed", "tornado", "bokeh"):
        logging.getLogger(name).setLevel(logging.CRITICAL)


def _has_dashboard_library() -> bool:
    try:
        import bokeh  # noqa: F401
    except ImportError:
        return False
    return True


def _open(scheduler: str | None, workers: int):
    """(cluster or None, client); raises ClusterError before any work is sent."""
    _quiet()
    if scheduler:
        if not scheduler.startswith(("tcp://", "tls://")) or scheduler.count(":") < 2:
            raise ClusterError(f"scheduler address {scheduler!r} is not tcp://host:port")
        try:
            client = Client(scheduler, timeout=_CONNECT_TIMEOUT_S, set_as_default=False)
        except (OSError, TimeoutError) as exc:
            reason = " ".join(str(exc).split())[:160] or type(exc).__name__
            raise ClusterError(f"scheduler {scheduler} cannot be reached ({reason})") from None
        return None, client
    # Dask starts workers with OMP/MKL/OPENBLAS_NUM_THREADS=1; numpy's results then differ
    # from this process's in the last bits, so the workers inherit this process's environment
    # as it is, and a batch on the local cluster equals a serial one bit for bit.
    method = _worker_start_method()
    settings = {
        "distributed.scheduler.allowed-failures": ALLOWED_FAILURES,
        "distributed.nanny.pre-spawn-environ": {},
        "distributed.worker.multiprocessing-method": method,
    }
    with dask.config.set(settings), warnings.catch_warnings():
        if method == "forkserver":
            _preload_process_server()
        # "Port 8787 is already in use": Dask then picks a free port, which we print
        warnings.filterwarnings("ignore", message="Port .* is already in use")
        cluster = LocalCluster(
            n_workers=workers,
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            dashboard_address="127.0.0.1:8787" if _has_dashboard_library() else None,
            silence_logs=logging.CRITICAL,
            timeout=_LOCAL_START_TIMEOUT_S,
            # a forked worker has the process server's environment, from when that started;
            # each worker sets this process's environment of now again before its first task
            env=dict(os.environ),
        )
    try:
        client = Client(cluster, set_as_default=False)
    except BaseException:
        cluster.close()
        raise
    return cluster, client


def _check_workers(client, scheduler: str | None):
    """Wait for a worker, compare every worker's identity with this process's."""
    try:
        client.wait_for_workers(1, timeout=_CONNECT_TIMEOUT_S if scheduler else None)
    except TimeoutError:
        raise ClusterError(f"scheduler {scheduler} has no workers") from None
    mine = worker_identity()
    try:
        theirs = client.run(worker_identity)
    except Exception as exc:  # an old install without this module fails to unpickle it
        raise ClusterError(
            f"workers of {scheduler} cannot run this audiodsm ({type(exc).__name__}: "
            f"{' '.join(str(exc).split())[:120]})"
        ) from None
    for address, identity in sorted(theirs.items()):
        if tuple(identity) != mine:
            version, digest = identity
            raise ClusterError(
                f"worker {address} runs audiodsm {version} (code {digest[:12]}), this is "
                f"{mine[0]} (code {mine[1][:12]}); install the same version on every worker"
            )
    return len(theirs)


def run_tasks(
    function: Callable,
    calls: Sequence[tuple],
    *,
    workers: int = 2,
    scheduler: str | None = None,
    on_result: Callable[[int, str, object], None],
    progress: Callable[[int, int, float, int], None] | None = None,
    say: Callable[[str], None] | None = None,
) -> ClusterInfo:
    """Run ``function(*calls[i])`` for every ``i`` as Dask tasks; hand results back as they come.

    Parameters
    ----------
    function : callable
        A module-level function (workers import it by reference). Its arguments should be
        small descriptions (profiles, plans), not signals.
    calls : sequence of tuple
        Positional arguments of each task.
    workers : int, keyword-only
        Worker processes of the local cluster (ignored with ``scheduler``).
    scheduler : str or None, keyword-only
        ``tcp://host:port`` of an existing scheduler; None starts (and stops) a local cluster.
    on_result : callable, keyword-only
        ``on_result(index, status, value)`` in this process, in completion order: status
        ``"ok"`` with the return value, ``"failed"`` with one line naming the exception
        raised on the worker, or ``"lost"`` when the task ended every worker that ran it
        (:data:`ALLOWED_FAILURES` + 1 times).
    progress : callable, optional, keyword-only
        ``progress(done, total, tasks_per_minute, workers)`` after every finished task.
    say : callable, optional, keyword-only
        Receives one-line notices: where the batch runs, the dashboard address.

    Returns
    -------
    ClusterInfo

    Raises
    ------
    ClusterError
        Before any task is sent: an unreachable scheduler, one without workers, or workers
        running another version of the package.
    KeyboardInterrupt
        Ctrl-C (or a StopSignal): the outstanding tasks are cancelled and a local cluster is
        stopped before it propagates; results already handed to ``on_result`` stay handed.
    """
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ClusterError(f"workers={workers!r}: expected a positive integer")
    started = time.perf_counter()
    cluster, client = _open(scheduler, workers)
    futures = []
    try:
        count = _check_workers(client, scheduler)
        start_s = time.perf_counter() - started
        client.register_plugin(LoopWarmUp())
        warm = client.run(_warm_up_seconds)
        info = ClusterInfo(
            address=str(client.scheduler.address),
            local=cluster is not None,
            workers=count,
            dashboard=_dashboard(client),
            start_s=start_s,
            warm_up_s=max((w for w, _ in warm.values()), default=0.0),
            preload_s=max((p for _, p in warm.values()), default=0.0),
        )
        if say is not None:
            where = "a local cluster" if info.local else f"scheduler {info.address}"
            say(f"running {len(calls)} task(s) on {where} with {count} worker(s)")
            if info.dashboard:
                say(f"dashboard: {info.dashboard}")
        index_of = {}
        for i, args in enumerate(calls):
            fut = client.submit(guarded_call, function, *args, pure=False, key=f"audiodsm-{i}")
            futures.append(fut)
            index_of[fut.key] = i
        t0 = time.perf_counter()
        done = 0

        def hand_over(i, status, value):
            nonlocal done
            on_result(i, status, value)
            done += 1
            if progress is not None:
                minutes = max(time.perf_counter() - t0, 1e-9) / 60.0
                alive = len(client.scheduler_info(n_workers=-1).get("workers", {}))
                progress(done, len(calls), done / minutes, alive)

        with client.as_current():
            finished = as_completed(futures)
        suspects = []
        for fut in finished:
            i = index_of[fut.key]
            try:
                status, value = fut.result()
            except Exception:  # KilledWorker: it was on workers that died, maybe not its fault
                fut.release()
                suspects.append(i)
                continue
            fut.release()
            hand_over(i, status, value)
        # A worker that dies takes every task queued on it along; the scheduler cannot tell the
        # task that crashed it from its neighbours. Each suspect runs again alone, so only the
        # task that really ends its worker is reported lost.
        for n, i in enumerate(suspects):
            fut = client.submit(
                guarded_call, function, *calls[i], pure=False, key=f"audiodsm-{i}-alone-{n}"
            )
            futures.append(fut)
            try:
                status, value = fut.result()
            except Exception as exc:
                status = "lost"
                value = (
                    "worker process ended unexpectedly each time it ran this task "
                    f"({type(exc).__name__})"
                )
            fut.release()
            hand_over(i, status, value)
        return info
    finally:
        try:
            if futures:
                client.cancel(futures, force=True)
        finally:
            client.close()
            if cluster is not None:
                cluster.close()


def _dashboard(client) -> str:
    try:
        link = client.dashboard_link
    except Exception:
        return ""
    services = client.scheduler_info().get("services", {})
    return link if "dashboard" in services else ""
