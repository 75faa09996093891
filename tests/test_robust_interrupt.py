"""Interruption: kill -9 of the real command line at random moments, and a crash at the commit of an ingest.

Outside checks: the process's own exit status, row counts read with the standard library's ``sqlite3``
against the planned count, SQLite's ``PRAGMA integrity_check``, and an uninterrupted reference run of
the same command with the same seed (rows equal: parameters, physics draw, status and reason exactly,
objective and features to 1e-12 relative).
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import time

import numpy as np
import pytest

from gapgauge import load_scenario
from gapgauge.app.ingest import ingest
from gapgauge.app.sweep import sweep
from gapgauge.sim.standin import run_standin
from gapgauge.store import Store, check_store
from test_robust_support import assert_same_rows, gapgauge, integrity, make_project, run, scalar, sweep_rows, wait_until

PLANNED = 480
SEED = 5
CHUNK = 40
MATCHES = 64


@pytest.fixture(scope="module")
def project(tmp_path_factory):
    return make_project(tmp_path_factory.mktemp("project"))


@pytest.fixture(scope="module")
def reference(project, tmp_path_factory):
    """The same sweep, never interrupted (another chunk size: chunking must not matter)."""
    path = tmp_path_factory.mktemp("reference") / "ref.sqlite"
    summary = sweep(project, PLANNED, seed=SEED, store=path, workers=2, chunk_size=120, progress=False)
    assert summary.done == PLANNED
    return path


@pytest.fixture(scope="module")
def logs(project, tmp_path_factory):
    """Two synthetic logs from the stand-in robot (the hardware log contract)."""
    scenario = load_scenario(project)
    paths = run_standin(scenario, project.parent / "standin" / "close.toml", design=2,
                        out_dir=tmp_path_factory.mktemp("logs"), seed=0)
    assert len(paths) == 2
    return paths


def kill(proc: subprocess.Popen) -> int:
    """kill -9; the process's exit status (negative signal number when the kill hit it running)."""
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGKILL)
    return proc.wait()


def sweep_command(project, store, chunk):
    return gapgauge("sweep", project, "--rollouts", PLANNED, "--seed", SEED, "--store", store,
                    "--chunk-size", chunk, "--workers", 2)


@pytest.mark.slow
def test_a_sweep_killed_four_times_at_random_moments_ends_with_the_reference_rows(project, reference, tmp_path):
    store = tmp_path / "killed.sqlite"
    rng = np.random.default_rng(20240508)  # seeded delays: the same kill moments on every machine load
    count = lambda: scalar(store, "SELECT COUNT(*) FROM rollouts") or 0  # noqa: E731

    # 1: during the very first chunk (the whole run is one chunk here, so nothing can be committed yet)
    proc = subprocess.Popen(sweep_command(project, store, PLANNED), stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    assert wait_until(proc, lambda: scalar(store, "SELECT COUNT(*) FROM runs") == 1)
    time.sleep(rng.uniform(0.0, 0.3))
    assert kill(proc) == -signal.SIGKILL
    assert count() == 0 and scalar(store, "SELECT status FROM runs") == "running"
    assert integrity(store) == "ok"

    # 2-4: after two chunks were committed, a random moment later: between chunks or inside the next one.
    # The moment is a random fraction of the time the second chunk took, so that the kill lands while
    # the sweep runs however fast this machine simulates (a fixed delay let a fast machine finish first).
    seen = []
    for _ in range(3):
        before = count()
        proc = subprocess.Popen(sweep_command(project, store, CHUNK), stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
        assert wait_until(proc, lambda before=before: count() > before)
        first = time.monotonic()
        assert wait_until(proc, lambda before=before: count() > before + CHUNK)
        time.sleep(rng.uniform(0.0, 1.0) * (time.monotonic() - first))
        assert kill(proc) == -signal.SIGKILL, "the kill must land while the sweep runs"
        seen.append(count())
        assert before < seen[-1] < PLANNED and seen[-1] % CHUNK == 0  # whole chunks only
        assert integrity(store) == "ok"

    finished = run(*sweep_command(project, store, 70)[3:])  # resume once more with yet another chunking
    assert finished.returncode == 0, finished.stderr
    assert count() == PLANNED
    assert scalar(store, "SELECT COUNT(DISTINCT idx) FROM rollouts") == PLANNED
    assert scalar(store, "SELECT COUNT(*) FROM runs") == 1 and scalar(store, "SELECT status FROM runs") == "done"
    assert integrity(store) == "ok"
    assert_same_rows(sweep_rows(store), sweep_rows(reference))
    checked = run("store", "check", "--store", store)
    assert checked.returncode == 0 and "healthy" in checked.stdout


@pytest.fixture(scope="module")
def reference_ingest(project, logs, tmp_path_factory):
    path = tmp_path_factory.mktemp("ref-ingest") / "ref.sqlite"
    with Store(path) as store:
        summary = ingest(load_scenario(project), store, logs, matches=MATCHES, seed=0, progress=False)
    assert len(summary.stored) == 2 and not summary.failed
    return path


def trial_rows(path):
    with sqlite3.connect(path) as conn:
        return conn.execute("SELECT sha256, params_json, robot_id, features_json, objective, series_npz, notes"
                            " FROM trials ORDER BY sha256").fetchall()


@pytest.mark.slow
def test_an_ingest_killed_during_its_matched_simulations_shows_no_trial_without_matches_and_a_rerun_completes(
        project, logs, reference_ingest, tmp_path):
    store = tmp_path / "lab.sqlite"
    command = gapgauge("ingest", project, *logs, "--store", store, "--matches", MATCHES)
    proc = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    lacking = ("SELECT COUNT(*) FROM trials t WHERE (SELECT COUNT(*) FROM matches m WHERE m.trial_id = t.id) < ?",
               (MATCHES,))
    seen = []

    def watch() -> bool:  # every look at the store while the ingest runs: no trial without all its matches
        seen.append(scalar(store, *lacking) or 0)
        return (scalar(store, "SELECT COUNT(*) FROM runs WHERE kind = 'match'") or 0) == 2

    assert wait_until(proc, watch)  # both match runs started: the matched simulations are under way
    time.sleep(np.random.default_rng(20240509).uniform(0.0, 0.2))
    assert kill(proc) == -signal.SIGKILL, "the kill must land while the ingest runs"
    assert set(seen) == {0} and (scalar(store, *lacking) or 0) == 0
    trials = scalar(store, "SELECT COUNT(*) FROM trials")
    assert scalar(store, "SELECT COUNT(*) FROM matches") == trials * MATCHES  # whole trials or none
    assert integrity(store) == "ok"
    assert "run `gapgauge ingest` on its log again" not in run("store", "check", "--store", store).stdout

    again = run(*command[3:])
    assert again.returncode == 0, again.stderr
    assert trial_rows(store) == trial_rows(reference_ingest)
    assert scalar(store, "SELECT COUNT(*) FROM matches") == 2 * MATCHES
    assert_same_rows(sweep_rows(store, "match"), sweep_rows(reference_ingest, "match"))
    assert run("store", "check", "--store", store).returncode == 0


class Crash(BaseException):
    """Stands for the process dying: not an Exception, so nothing may swallow it."""


class CrashAtCommit:
    """The store's connection, except that the COMMIT of the first transaction whose SQL contains
    ``marker`` raises :class:`Crash` (the moment a kill -9 would hurt most)."""

    def __init__(self, conn: sqlite3.Connection, marker: str):
        self._conn, self._marker, self._armed, self.crashed = conn, marker, False, False

    def execute(self, sql, *args):
        if self._marker in sql and not self.crashed:
            self._armed = True
        if sql == "COMMIT" and self._armed and not self.crashed:
            self.crashed = True
            raise Crash(sql)
        return self._conn.execute(sql, *args)

    def executemany(self, sql, *args):
        if self._marker in sql and not self.crashed:
            self._armed = True
        return self._conn.executemany(sql, *args)

    def __getattr__(self, name):
        return getattr(self._conn, name)


@pytest.mark.parametrize("marker", ["INTO trials", "INTO matches"], ids=["storing-the-trial", "linking-matches"])
def test_an_ingest_that_dies_at_the_commit_of_a_trial_stores_nothing_of_it_and_resumes(project, logs, tmp_path,
                                                                                        marker):
    scenario = load_scenario(project)
    path = tmp_path / "lab.sqlite"
    store = Store(path)
    store._conn = CrashAtCommit(store._conn, marker)
    with pytest.raises(Crash):
        ingest(scenario, store, logs[:1], matches=8, seed=0, progress=False)
    assert store._conn.crashed
    store.close()
    assert integrity(path) == "ok"
    # the trial, its matched rollouts and its links are one transaction: none of them was stored
    assert scalar(path, "SELECT COUNT(*) FROM trials") == 0
    assert scalar(path, "SELECT COUNT(*) FROM matches") == 0
    assert scalar(path, "SELECT COUNT(*) FROM rollouts") == 0
    with Store(path) as store:
        summary = ingest(scenario, store, logs[:1], matches=8, seed=0, progress=False)
        problems, unfinished = check_store(path)
    assert summary.matched == {summary.trials[0].id: 8}
    assert summary.simulated == 8
    assert scalar(path, "SELECT COUNT(*) FROM trials") == 1 and scalar(path, "SELECT COUNT(*) FROM matches") == 8
    assert (problems, unfinished) == ([], [])
