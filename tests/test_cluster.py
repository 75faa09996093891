"""A real Dask cluster: ``gapgauge sweep --dask ADDRESS`` against a ``distributed.LocalCluster`` of two worker
processes (not threads), one of them killed with SIGKILL mid-sweep.

Kept under a minute: 600 rollouts of a 1.2 s horizon (``test_robust_support.make_project``), chunks of 20.
Outside checks: an uninterrupted local run as the reference for every row; row counts, distinct indices and
SQLite's ``PRAGMA integrity_check`` read with the standard library's ``sqlite3``; the operating system's
word that the killed worker process is gone (``os.kill(pid, 0)`` raising ``ProcessLookupError``); the
scheduler's own record of the worker leaving and of the chunks it was running being run again.
"""

from __future__ import annotations

import os
import signal
import subprocess
import time
from pathlib import Path

import pytest

from gapgauge.app.sweep import sweep
from test_robust_support import assert_same_rows, gapgauge, make_project, scalar, sweep_rows, wait_until

distributed = pytest.importorskip("distributed")

PLANNED = 600
SEED = 11
CHUNK = 20


@pytest.fixture(scope="module")
def project(tmp_path_factory) -> Path:
    return make_project(tmp_path_factory.mktemp("cluster"))


@pytest.fixture(scope="module")
def reference(project, tmp_path_factory) -> list[tuple]:
    """The rows of an uninterrupted local sweep."""
    path = tmp_path_factory.mktemp("reference") / "local.sqlite"
    summary = sweep(project, PLANNED, seed=SEED, store=path, workers=2, chunk_size=200, progress=False)
    assert summary.done == PLANNED
    return sweep_rows(path)


@pytest.fixture()
def cluster():
    """Two worker processes of one thread each; the nanny restarts a worker that dies."""
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None,
                                  silence_logs=50) as cluster, distributed.Client(cluster) as client:
        client.wait_for_workers(2, timeout=60)
        yield cluster, client


def sweep_command(project: Path, store: Path, address: str) -> list[str]:
    return gapgauge("sweep", project, "--rollouts", PLANNED, "--seed", SEED, "--store", store,
                    "--chunk-size", CHUNK, "--dask", address)


def stored(store: Path) -> int:
    return scalar(store, "SELECT COUNT(*) FROM rollouts") or 0


def test_a_sweep_on_two_worker_processes_stores_the_rows_of_a_local_run(project, reference, cluster, tmp_path):
    cluster, client = cluster
    store = tmp_path / "dask.sqlite"
    result = subprocess.run(sweep_command(project, store, cluster.scheduler_address), capture_output=True,
                            text=True, timeout=300)
    assert result.returncode == 0, result.stderr
    assert len({pid for pid in client.run(os.getpid).values()}) == 2  # two processes, not threads
    assert scalar(store, "SELECT COUNT(DISTINCT idx) FROM rollouts") == PLANNED
    assert_same_rows(sweep_rows(store), reference)


def test_a_worker_killed_mid_sweep_loses_no_rollout_and_stores_none_twice(project, reference, cluster, tmp_path):
    cluster, client = cluster
    store = tmp_path / "killed_worker.sqlite"
    victim, pid = sorted(client.run(os.getpid).items())[0]
    proc = subprocess.Popen(sweep_command(project, store, cluster.scheduler_address),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        assert wait_until(proc, lambda: stored(store) >= CHUNK, timeout=120), "no chunk was ever stored"
        os.kill(pid, signal.SIGKILL)  # what an out-of-memory kill or a lost node does: no goodbye
        at_kill = stored(store)
        _, err = proc.communicate(timeout=300)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    assert at_kill < PLANNED - 2 * CHUNK, "the kill must land while the worker still had chunks to do"
    with pytest.raises(ProcessLookupError):
        os.kill(pid, 0)  # the killed worker process is gone
    deadline = time.monotonic() + 60
    while victim in client.scheduler_info()["workers"] and time.monotonic() < deadline:
        time.sleep(0.1)
    assert victim not in client.scheduler_info()["workers"]  # the scheduler saw it leave
    # ... and, in its own log, took chunks the worker was running off it, to run them again elsewhere
    interrupted = {entry[0] for entry in cluster.scheduler.transition_log
                   if entry[1] == "processing" and entry[2] in ("released", "waiting", "no-worker")}
    assert interrupted, "the kill must land while the worker is simulating a chunk"
    assert scalar(store, "SELECT COUNT(*) FROM rollouts") == PLANNED  # every rollout ...
    assert scalar(store, "SELECT COUNT(DISTINCT idx) FROM rollouts") == PLANNED  # ... exactly once
    assert scalar(store, "PRAGMA integrity_check") == "ok"
    assert_same_rows(sweep_rows(store), reference)  # the rows of a run never interrupted
