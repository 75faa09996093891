"""Concurrency: two processes writing one store (a sweep and an ingest) both keep every row; a writer
that finds the store locked waits (busy timeout), retries with doubling waits, and gives up with one
clear line only when the lock never goes.

Outside checks: row counts read with the standard library's ``sqlite3`` against the planned counts,
SQLite's ``PRAGMA integrity_check``, the processes' exit statuses, and a lock taken by a plain
``sqlite3`` connection (``BEGIN IMMEDIATE``), which is what another process's write transaction holds.
"""

from __future__ import annotations

import sqlite3
import subprocess
import threading

import numpy as np
import pytest

from gapgauge import StoreError, load_scenario
from gapgauge.sim.standin import run_standin
from gapgauge.store import Store
from gapgauge.store import connection as db
from test_robust_support import ROOT, fake_batch, gapgauge, integrity, make_project, run, scalar, wait_until

PLANNED = 400
MATCHES = 24


@pytest.mark.slow
def test_a_sweep_and_an_ingest_at_once_both_keep_every_row(tmp_path):
    project = make_project(tmp_path / "project")
    scenario = load_scenario(project)
    logs = run_standin(scenario, project.parent / "standin" / "close.toml", design=3, out_dir=tmp_path / "logs",
                       seed=1)
    store = tmp_path / "shared.sqlite"
    sweep = subprocess.Popen(gapgauge("sweep", project, "--rollouts", PLANNED, "--store", store, "--chunk-size", 20,
                                      "--workers", 1), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    # the ingest starts once the sweep has committed a chunk, so both write while the other does
    assert wait_until(sweep, lambda: (scalar(store, "SELECT COUNT(*) FROM rollouts") or 0) > 0)
    assert sweep.poll() is None
    ingest = subprocess.Popen(gapgauge("ingest", project, *logs, "--store", store, "--matches", MATCHES),
                              stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    _, ingest_err = ingest.communicate()
    _, sweep_err = sweep.communicate()
    assert ingest.returncode == 0, ingest_err
    assert sweep.returncode == 0, sweep_err
    assert scalar(store, "SELECT COUNT(*) FROM rollouts r JOIN runs u ON u.id = r.run_id"
                         " WHERE u.kind = 'sweep'") == PLANNED
    assert scalar(store, "SELECT COUNT(*) FROM trials") == len(logs)
    assert scalar(store, "SELECT COUNT(*) FROM matches") == len(logs) * MATCHES
    assert scalar(store, "SELECT COUNT(*) FROM rollouts r JOIN runs u ON u.id = r.run_id"
                         " WHERE u.kind = 'match'") == len(logs) * MATCHES
    assert integrity(store) == "ok"
    assert run("store", "check", "--store", store).returncode == 0


@pytest.fixture
def scenario():
    return load_scenario(ROOT / "scenarios" / "push_recovery.toml")


def hold_lock(path, seconds: float) -> threading.Thread:
    """Take the store's write lock with a plain sqlite3 connection and release it ``seconds`` later."""
    taken = threading.Event()

    def holder():
        conn = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
        conn.execute("BEGIN IMMEDIATE")
        taken.set()
        threading.Event().wait(seconds)
        conn.execute("COMMIT")
        conn.close()

    thread = threading.Thread(target=holder)
    thread.start()
    taken.wait()
    return thread


def test_a_write_that_finds_the_store_locked_retries_with_doubling_waits_and_lands(tmp_path, scenario, monkeypatch):
    monkeypatch.setattr(db, "BUSY_TIMEOUT_MS", 50)  # so the retry path, not SQLite's busy wait, must carry it
    waits: list[float] = []
    real_sleep = db.time.sleep
    monkeypatch.setattr(db.time, "sleep", lambda s: (waits.append(s), real_sleep(s)))
    path = tmp_path / "s.sqlite"
    with Store(path) as store:
        run_id = store.start_run("sweep", scenario, seed=0, design="sobol", planned=10, nominal=False)
        holder = hold_lock(path, 0.6)
        written = store.write_rollouts(run_id, fake_batch(scenario, np.arange(10)))
        holder.join()
    assert written == 10 and scalar(path, "SELECT COUNT(*) FROM rollouts") == 10
    assert len(waits) >= 2 and all(b == 2 * a for a, b in zip(waits, waits[1:], strict=False))
    assert waits[0] == db.RETRY_FIRST_WAIT_S


def test_a_lock_that_never_goes_is_one_line_and_writes_nothing(tmp_path, scenario, monkeypatch):
    monkeypatch.setattr(db, "BUSY_TIMEOUT_MS", 20)
    monkeypatch.setattr(db, "RETRIES", 2)
    path = tmp_path / "s.sqlite"
    with Store(path) as store:
        run_id = store.start_run("sweep", scenario, seed=0, design="sobol", planned=10, nominal=False)
        holder = hold_lock(path, 2.0)
        try:
            with pytest.raises(StoreError) as err:
                store.write_rollouts(run_id, fake_batch(scenario, np.arange(10)))
        finally:
            holder.join()
    assert "stayed locked by another process" in str(err.value) and "\n" not in str(err.value)
    assert scalar(path, "SELECT COUNT(*) FROM rollouts") == 0
    assert integrity(path) == "ok"
