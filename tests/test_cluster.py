"""Grading on a real Dask cluster on 127.0.0.1 with two worker processes.

The reference is the serial run in this process (``jobs=1``): the same battery on the same
profiles must give the same readings bit for bit on the cluster, also when a worker is lost
mid-batch (the scheduler runs the task again elsewhere).
"""

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from fault_batteries import short_real_battery, worker_killing_battery
from subprocess_helpers import start_batch_and_wait

from audiodsm.cli import main
from audiodsm.errors import ClusterError
from audiodsm.evaluate.grade import GradeCache, collect_profiles, grade_batch
from audiodsm.spec import parse_spec

TESTS = Path(__file__).resolve().parent
ROOT = TESTS.parent
SHEET = '[[target]]\nmetric = "dynamic_range_db"\nat_least = 90.0\n'
#: six short loops: (name, order, levels)
SIX = (("k2", 2, 2), ("k3", 3, 2), ("k4", 4, 2), ("k3m", 3, 5), ("k2m", 2, 9), ("k5", 5, 3))


def write_profiles(folder, loops=SIX):
    folder.mkdir(parents=True, exist_ok=True)
    for name, order, levels in loops:
        kind = "pdm" if levels == 2 else "nrz"
        (folder / f"{name}.toml").write_text(
            f'name = "{name}"\n[modulator]\norder = {order}\nlevels = {levels}\n'
            f'[output]\nkind = "{kind}"\n'
        )
    return folder


@pytest.fixture
def calls(tmp_path, monkeypatch):
    folder = tmp_path / "calls"
    folder.mkdir()
    monkeypatch.setenv("AUDIODSM_TEST_CALLS", str(folder))
    return folder


def same_metrics(a, b):
    """Every reading bit for bit, the A- and CCIR-weighted ones included."""
    assert a.keys() == b.keys()
    for key, value in a.items():
        assert repr(b[key]) == repr(value), key  # bit for bit (nan and None too)


def same_results(a, b):
    """Same profiles, same readings and curves bit for bit, same grades."""
    assert [g.name for g in a.grades] == [g.name for g in b.grades]
    # weighted readings are among those compared: their filters are shipped constants at the
    # battery's rates (measure/_weighting_sections.py), so they too match bit for bit
    weighted = [
        key
        for g in a.grades
        for key, value in g.metrics.items()
        if key.endswith(("_a", "_ccir")) and value is not None
    ]
    assert len(weighted) >= 2
    for x, y in zip(a.grades, b.grades, strict=True):
        assert not x.failure and not y.failure, (x.failure, y.failure)
        same_metrics(x.metrics, y.metrics)
        assert x.lines == y.lines  # the sheet grades an unweighted reading
        assert x.curves.keys() == y.curves.keys()
        for name, fields in x.curves.items():
            for key, values in fields.items():
                np.testing.assert_array_equal(values, y.curves[name][key])


@pytest.fixture(scope="module")
def serial(tmp_path_factory):
    folder = write_profiles(tmp_path_factory.mktemp("serial") / "p")
    return grade_batch(
        collect_profiles([folder]), parse_spec(SHEET), battery=short_real_battery, jobs=1
    )


def test_two_workers_give_the_serial_grades(tmp_path, serial):
    folder = write_profiles(tmp_path / "p")
    notices = []
    labels = []
    out = grade_batch(
        collect_profiles([folder]),
        parse_spec(SHEET),
        battery=short_real_battery,
        jobs=2,
        cache_dir=tmp_path / "cache",
        say=notices.append,
        progress=lambda f, label: labels.append((f, label)),
    )
    same_results(serial, out)
    assert notices[0] == "running 6 task(s) on a local cluster with 2 worker(s)"
    # a dashboard when Dask finds its plotting library, on the loopback address
    assert all(n.startswith("dashboard: http://127.0.0.1:") for n in notices[1:])
    told = len(notices)
    assert labels[-1][0] == 1.0 and labels[-1][1].startswith("6/6 batteries")
    assert labels[-1][1].endswith("2 workers")
    # the client wrote the cache; a second batch reads all six back without a cluster
    assert len(list((tmp_path / "cache").glob("*.npz"))) == 6
    again = grade_batch(
        collect_profiles([folder]),
        parse_spec(SHEET),
        battery=short_real_battery,
        jobs=2,
        cache_dir=tmp_path / "cache",
        say=notices.append,
    )
    assert all(g.cached for g in again.grades) and len(notices) == told  # no cluster started
    same_results(serial, again)


def test_local_workers_are_forked_from_a_warm_process_server():
    # the workers start from a process that ran the warm-up (imports and compiled loops)
    # without an error, and the cluster reports the seconds it took
    from fault_batteries import preloaded_warm_up

    from audiodsm.evaluate.cluster import run_tasks

    got = {}
    info = run_tasks(
        preloaded_warm_up,
        [(), ()],
        workers=2,
        on_result=lambda i, status, value: got.update({i: (status, value)}),
    )
    assert sorted(got) == [0, 1]
    for status, (seconds, imported) in got.values():
        assert status == "ok" and seconds is not None and seconds > 0 and imported
        assert info.preload_s == pytest.approx(seconds)
    assert info.workers == 2 and info.local


def test_a_worker_lost_mid_batch_is_retried_with_the_same_grades(tmp_path, calls, serial):
    folder = write_profiles(tmp_path / "p")
    out = grade_batch(
        collect_profiles([folder]),
        parse_spec(SHEET),
        battery=worker_killing_battery,
        jobs=2,
        cache_dir=tmp_path / "cache",
    )
    assert (calls / "killed.once").exists()  # a worker really died running k3
    same_results(serial, out)


def test_unreachable_scheduler_is_one_line_exit_2(tmp_path, monkeypatch):
    monkeypatch.setattr("audiodsm.evaluate.cluster._CONNECT_TIMEOUT_S", 2.0)  # Dask retries
    folder = write_profiles(tmp_path / "p", SIX[:1])
    with pytest.raises(ClusterError, match="cannot be reached"):
        grade_batch(
            collect_profiles([folder]),
            parse_spec(SHEET),
            battery=short_real_battery,
            scheduler="tcp://127.0.0.1:9",  # the discard port: nobody listens there
        )
    (tmp_path / "s.toml").write_text(SHEET)
    r = CliRunner().invoke(
        main,
        [
            "grade", str(folder), "--spec", str(tmp_path / "s.toml"), "--no-cache",
            "--scheduler", "tcp://127.0.0.1:9",
        ],
    )  # fmt: skip
    assert r.exit_code == 2
    assert len(r.output.strip().splitlines()) == 1 and "cannot be reached" in r.output
    r = CliRunner().invoke(
        main, ["grade", str(folder), "--spec", str(tmp_path / "s.toml"), "--no-cache"],
        env={"AUDIODSM_SCHEDULER": "somewhere:1"},
    )  # fmt: skip
    assert r.exit_code == 2 and "not tcp://host:port" in r.output


def _worker(address, *extra):
    return subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1",
         "--no-nanny", "--host", "127.0.0.1", "--no-dashboard", *extra],
        cwd=str(TESTS),
        env={**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), str(TESTS)])},
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )  # fmt: skip


def test_a_named_scheduler_runs_the_batch_and_refuses_another_version(tmp_path, serial):
    from distributed import LocalCluster

    folder = write_profiles(tmp_path / "p", SIX[:2])
    with LocalCluster(n_workers=0, host="127.0.0.1", dashboard_address=None) as scheduler:
        other = _worker(scheduler.scheduler_address, "--preload", "other_version_preload")
        try:
            with pytest.raises(ClusterError, match="runs audiodsm 0.0.0-other"):
                grade_batch(
                    collect_profiles([folder]),
                    parse_spec(SHEET),
                    battery=short_real_battery,
                    scheduler=scheduler.scheduler_address,
                )
        finally:
            other.terminate()
            other.wait(30)
        same = _worker(scheduler.scheduler_address)
        try:
            out = grade_batch(
                collect_profiles([folder]),
                parse_spec(SHEET),
                battery=short_real_battery,
                scheduler=scheduler.scheduler_address,
            )
        finally:
            same.terminate()
            same.wait(30)
    by_name = {g.name: g for g in serial.grades}
    assert len(out.grades) == 2
    for g in out.grades:
        same_metrics(g.metrics, by_name[g.name].metrics)
        assert g.lines == by_name[g.name].lines


_CTRL_C_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
sys.path.insert(0, {root!r})
from fault_batteries import waiting_battery
from audiodsm.evaluate.grade import collect_profiles, grade_batch
from audiodsm.spec import parse_spec

if __name__ == "__main__":
    spec = parse_spec('[[target]]\\nmetric = "dynamic_range_db_a"\\nat_least = 90\\n')
    b = grade_batch(collect_profiles([{pdir!r}]), spec, battery=waiting_battery, jobs=2,
                    cache_dir={cache!r})
    print("RESULT", b.interrupted, [g.name for g in b.grades], len(b.unfinished), flush=True)
"""


def _alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


def test_sigint_on_the_client_keeps_the_cache_and_stops_its_cluster(tmp_path, calls):
    pdir = write_profiles(tmp_path / "p", (("a", 2, 2), ("b", 3, 2), ("c", 4, 2)))
    cache = tmp_path / "cache"
    script = tmp_path / "run.py"
    script.write_text(
        _CTRL_C_SCRIPT.format(tests=str(TESTS), root=str(ROOT), pdir=str(pdir), cache=str(cache))
    )
    proc, started = start_batch_and_wait(script, cache, calls)
    try:
        worker_pids = {int(p.name.rsplit(".", 1)[1]) for p in started}
        proc.send_signal(signal.SIGINT)  # the client only, not its process group
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert "RESULT True ['a'] 2" in out, err
    entries = list(cache.glob("*"))
    assert len(entries) == 1 and entries[0].suffix == ".npz"  # no half-written entries
    key = entries[0].stem
    entry, problem = GradeCache(cache).load_checked(key)
    assert entry is not None and not problem
    deadline = time.monotonic() + 30
    while any(_alive(p) for p in worker_pids) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert not any(_alive(p) for p in worker_pids), "a worker of the stopped cluster lives on"
