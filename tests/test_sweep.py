"""The sweep end to end with the real simulator: resume after kill -9, Dask equals local, the CLI.

Kept small: 240 rollouts of a 1.2 s horizon (a temporary copy of push_recovery.toml). Outside checks:
row counts and SQLite's ``PRAGMA integrity_check`` read with the standard library's ``sqlite3``, the
process's own exit status, and an uninterrupted local run as the reference for every other run.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from gapgauge import load_scenario
from gapgauge.app.sweep import sweep
from gapgauge.cli import main
from gapgauge.store import Store

ROOT = Path(__file__).resolve().parents[1]
PLANNED = 240
SEED = 3


@pytest.fixture(scope="module")
def project(tmp_path_factory) -> Path:
    """A copy of the project's scenario and model with a 1.2 s horizon (600 steps)."""
    root = tmp_path_factory.mktemp("project")
    shutil.copytree(ROOT / "models", root / "models")
    (root / "scenarios").mkdir()
    text = (ROOT / "scenarios" / "push_recovery.toml").read_text()
    assert "horizon = 3.0" in text
    (root / "scenarios" / "short.toml").write_text(text.replace("horizon = 3.0", "horizon = 1.2"))
    return root / "scenarios" / "short.toml"


@pytest.fixture(scope="module")
def reference(project, tmp_path_factory) -> Path:
    """An uninterrupted local sweep: the rows every other way of running must reproduce."""
    path = tmp_path_factory.mktemp("reference") / "ref.sqlite"
    summary = sweep(project, PLANNED, seed=SEED, store=path, workers=2, chunk_size=80, progress=False)
    assert summary.done == PLANNED
    return path


def rows(path: Path) -> list[tuple]:
    """Every rollout row as stored, read with sqlite3 directly, by index."""
    with sqlite3.connect(path) as conn:
        return conn.execute(
            "SELECT idx, params, physics, status, objective, features FROM rollouts ORDER BY idx"
        ).fetchall()


def assert_same_rows(got: list[tuple], want: list[tuple]) -> None:
    """Index, parameters, physics draw and status identical; objective and features equal to 1e-12
    relative (a feature's summation order may depend on how many rollouts share a batch)."""
    assert [r[:4] for r in got] == [r[:4] for r in want]
    np.testing.assert_allclose([np.nan if r[4] is None else r[4] for r in got],
                               [np.nan if r[4] is None else r[4] for r in want], rtol=1e-12)
    np.testing.assert_allclose(np.frombuffer(b"".join(r[5] for r in got), dtype="<f8"),
                               np.frombuffer(b"".join(r[5] for r in want), dtype="<f8"), rtol=1e-12)


def scalar(path: Path, sql: str):
    with sqlite3.connect(path) as conn:
        return conn.execute(sql).fetchone()[0]


def wait_for_first_chunk(proc: subprocess.Popen, store: Path) -> None:
    """Poll the store (read-only, with sqlite3) until the running sweep has committed a chunk."""
    deadline = time.monotonic() + 300
    while proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
        if store.exists():
            try:
                if scalar(store, "SELECT COUNT(*) FROM rollouts") > 0:
                    return
            except sqlite3.OperationalError:  # tables not created yet
                pass


def gapgauge(*args: str) -> list[str]:
    return [sys.executable, "-m", "gapgauge.cli", *args]


def test_a_sweep_killed_with_sigkill_resumes_without_duplicates(project, reference, tmp_path):
    store = tmp_path / "killed.sqlite"
    command = gapgauge("sweep", str(project), "--rollouts", str(PLANNED), "--seed", str(SEED),
                       "--store", str(store), "--chunk-size", "40", "--workers", "2")
    proc = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        wait_for_first_chunk(proc, store)
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait()
    assert proc.returncode == -signal.SIGKILL
    at_kill = scalar(store, "SELECT COUNT(*) FROM rollouts")
    assert 0 < at_kill < PLANNED, "the kill must land mid-run"
    assert at_kill % 40 == 0  # whole chunks only: each chunk is one transaction

    resumed = subprocess.run(command, capture_output=True, text=True)
    assert resumed.returncode == 0, resumed.stderr
    assert scalar(store, "SELECT COUNT(*) FROM rollouts") == PLANNED
    assert scalar(store, "SELECT COUNT(DISTINCT idx) FROM rollouts") == PLANNED
    assert scalar(store, "PRAGMA integrity_check") == "ok"
    assert_same_rows(rows(store), rows(reference))  # the rows of a run never interrupted

    again = subprocess.run(command, capture_output=True, text=True)
    assert again.returncode == 0 and "nothing left to do" in again.stdout
    assert scalar(store, "SELECT COUNT(*) FROM rollouts") == PLANNED


def test_ctrl_c_stops_a_sweep_with_exit_130_and_keeps_whole_chunks(project, tmp_path):
    store = tmp_path / "interrupted.sqlite"
    command = gapgauge("sweep", str(project), "--rollouts", str(PLANNED), "--seed", str(SEED),
                       "--store", str(store), "--chunk-size", "40", "--workers", "2")
    # a shell's background job ignores SIGINT; give the child the default disposition, as a terminal does
    proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    wait_for_first_chunk(proc, store)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate()
    assert proc.returncode == 130, err
    assert "run the same command again" in err and "Traceback" not in err
    kept = scalar(store, "SELECT COUNT(*) FROM rollouts")
    assert 0 < kept < PLANNED and kept % 40 == 0


def test_a_dask_run_stores_the_same_rows_as_a_local_run(project, reference, tmp_path):
    distributed = pytest.importorskip("distributed")
    store = tmp_path / "dask.sqlite"
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        summary = sweep(project, PLANNED, seed=SEED, store=store, dask=client, chunk_size=60, progress=False)
    assert summary.ran_now == PLANNED
    assert_same_rows(rows(store), rows(reference))


def test_a_sweep_split_over_two_invocations_equals_one(project, reference, tmp_path):
    store = tmp_path / "split.sqlite"
    scenario = load_scenario(project)
    with Store(store) as db:
        run = db.start_run("sweep", scenario, seed=SEED, design="sobol", planned=PLANNED, nominal=False)
        with Store(reference) as ref:  # pretend the first 100 were done by an earlier invocation
            first = ref.rollouts(scenario.content_hash).subset(slice(0, 100))
        db.write_rollouts(run, first)
        summary = sweep(scenario, PLANNED, seed=SEED, store=db, workers=2, chunk_size=70, progress=False)
    assert (summary.ran_now, summary.done, summary.nothing_to_do) == (PLANNED - 100, PLANNED, False)
    assert_same_rows(rows(store), rows(reference))


def test_the_summary_counts_match_the_stored_statuses(project, reference):
    summary = sweep(project, PLANNED, seed=SEED, store=reference, progress=False)
    counts = dict(sqlite3.connect(reference).execute("SELECT status, COUNT(*) FROM rollouts GROUP BY status"))
    best = scalar(reference, "SELECT MIN(objective) FROM rollouts WHERE status = 'ok'")
    assert summary.nothing_to_do and summary.ran_now == 0
    assert (summary.ok, summary.fell, summary.diverged) == tuple(counts.get(s, 0) for s in ("ok", "fell", "diverged"))
    assert summary.best_objective == best
    assert list(summary.best_params) == load_scenario(project).parameter_names


def test_info_json_has_the_documented_keys(reference, tmp_path):
    out = tmp_path / "info.json"
    result = CliRunner().invoke(main, ["info", "--store", str(reference), "--json", str(out)])
    assert result.exit_code == 0, result.output
    info = json.loads(out.read_text())
    assert set(info["rollouts"]) >= {"total", "ok", "fell", "diverged"}
    assert info["rollouts"]["total"] == scalar(reference, "SELECT COUNT(*) FROM rollouts")
    assert set(info["trials"]) >= {"total"}
    run = info["runs"][0]
    assert {k: run[k] for k in ("kind", "planned", "done", "seed")} == {
        "kind": "sweep", "planned": PLANNED, "done": PLANNED, "seed": SEED}
    assert {"scenarios", "models"} <= set(info)


def test_store_check_exits_0_when_healthy_and_1_when_damaged(reference, tmp_path):
    healthy = CliRunner().invoke(main, ["store", "check", "--store", str(reference)])
    damaged_path = tmp_path / "damaged.sqlite"
    with sqlite3.connect(reference) as src, sqlite3.connect(damaged_path) as dst:
        src.backup(dst)
        dst.execute("DELETE FROM rollouts WHERE idx = 7")
    damaged = CliRunner().invoke(main, ["store", "check", "--store", str(damaged_path)])
    assert healthy.exit_code == 0 and "healthy" in healthy.output
    assert damaged.exit_code == 1 and "239 of 240" in damaged.output


def test_a_missing_scenario_is_one_line_and_exit_2(tmp_path):
    result = subprocess.run(gapgauge("sweep", str(tmp_path / "nope.toml"), "--store", str(tmp_path / "s.sqlite")),
                            capture_output=True, text=True)
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1 and "nope.toml" in result.stderr


def test_nominal_physics_rows_are_all_the_nominal_values(project, tmp_path):
    scenario = load_scenario(project)
    sweep(scenario, 8, seed=SEED, store=tmp_path / "n.sqlite", nominal=True, workers=2, progress=False)
    with Store(tmp_path / "n.sqlite") as db:
        physics = db.rollouts(scenario.content_hash).physics
    expected = [r.nominal for r in scenario.physics]  # the scenario file's nominal values
    np.testing.assert_array_equal(physics, np.tile(expected, (8, 1)))
