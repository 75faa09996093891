"""`gapgauge store check`: each of gapgauge's own checks fails on a store damaged on purpose, says what
to do and exits 1; a healthy or merely unfinished store exits 0; a store too damaged to open is still
a finding (exit 1), while a file that is no store at all is a usage error (exit 2).

The damage is done with the standard library's ``sqlite3`` behind the Store's back; SQLite's own
``PRAGMA integrity_check`` is the outside verdict wherever pages are overwritten.
"""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from gapgauge import load_scenario
from gapgauge.cli import main
from gapgauge.records import TrialRecord
from gapgauge.store import Store, check_store
from test_robust_support import ROOT, fake_batch

PLANNED = 24
MATCHES = 4


@pytest.fixture(scope="module")
def scenario():
    return load_scenario(ROOT / "scenarios" / "push_recovery.toml")


@pytest.fixture(scope="module")
def healthy(scenario, tmp_path_factory) -> Path:
    """A complete sweep (run 1) and one trial (id 1) with its complete match run (run 2), all written
    through the Store's own methods."""
    path = tmp_path_factory.mktemp("healthy") / "store.sqlite"
    with Store(path) as store:
        run = store.start_run("sweep", scenario, seed=0, design="sobol", planned=PLANNED, nominal=False)
        store.write_rollouts(run, fake_batch(scenario, np.arange(PLANNED)))
        store.finish_run(run)
        x = scenario.nominal_parameters()
        trial_id, _ = store.add_trial(TrialRecord(
            scenario_hash=scenario.content_hash, source_path="/lab/trial_001.csv", sha256="ab" * 32,
            params=scenario.params_to_mapping(x), robot_id="biped-02", recorded_at="2024-05-01T09:30:00+00:00",
            outcome="stood", notes="", synthetic=True, features={"fell": 0.0}, objective=1.0))
        match = store.start_run("match", scenario, seed=0, design="match:" + "ab" * 32, planned=MATCHES,
                                nominal=False)
        store.write_rollouts(match, fake_batch(scenario, np.arange(MATCHES), params=np.tile(x, (MATCHES, 1))))
        store.finish_run(match)
        store.link_matches(trial_id, match, range(MATCHES))
    return path


def damaged_copy(healthy: Path, tmp_path: Path, *statements: str, foreign_keys: bool = True) -> Path:
    path = tmp_path / "damaged.sqlite"
    with sqlite3.connect(healthy) as src, sqlite3.connect(path) as dst:
        src.backup(dst)
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute(f"PRAGMA foreign_keys = {'ON' if foreign_keys else 'OFF'}")
    for sql in statements:
        conn.execute(sql)
    conn.close()
    return path


def check(path: Path):
    return CliRunner().invoke(main, ["store", "check", "--store", str(path)])


# A rollouts table without its UNIQUE(run_id, idx), as a hand-made merge of two stores might leave it
NO_UNIQUE = (
    "ALTER TABLE rollouts RENAME TO rollouts_old",
    "CREATE TABLE rollouts (run_id INTEGER NOT NULL REFERENCES runs(id), idx INTEGER NOT NULL, params BLOB NOT NULL,"
    " physics BLOB NOT NULL, status TEXT NOT NULL, reason TEXT NOT NULL DEFAULT '', objective REAL,"
    " features BLOB NOT NULL)",
    "INSERT INTO rollouts SELECT * FROM rollouts_old",
    "DROP TABLE rollouts_old",
)


def test_a_healthy_store_passes_sqlite_and_every_own_check(healthy):
    result = check(healthy)
    assert integrity(healthy) == "ok"  # the outside verdict agrees
    assert result.exit_code == 0, result.output
    assert "healthy" in result.output
    assert check_store(healthy) == ([], [])


def integrity(path: Path) -> str:
    with sqlite3.connect(path) as conn:
        return conn.execute("PRAGMA integrity_check").fetchone()[0]


@pytest.mark.parametrize(
    "statements, expected, advice",
    [
        pytest.param((*NO_UNIQUE, "INSERT INTO rollouts SELECT * FROM rollouts WHERE run_id = 1 AND idx = 5"),
                     "run 1 index 5 is stored 2 times", "restore", id="duplicate-rollout"),
        pytest.param(("UPDATE rollouts SET idx = 99 WHERE run_id = 1 AND idx = 3",),
                     "run 1 holds 1 rollout(s) with an index outside 0..23", "restore", id="index-outside-plan"),
        pytest.param(("DELETE FROM rollouts WHERE run_id = 2 AND idx = 2",),
                     "trial 1 lacks 1 matched simulation(s)", "gapgauge ingest", id="matched-rollout-missing"),
        pytest.param(("DELETE FROM matches",),
                     "trial 1 has no matched simulations", "gapgauge ingest", id="trial-without-matches"),
        pytest.param(("UPDATE rollouts SET objective = NULL WHERE run_id = 1 AND idx = 0",),
                     "run 1 has 1 rollout(s) with status ok but a missing or non-finite", "restore",
                     id="ok-row-without-objective"),
        pytest.param(("UPDATE rollouts SET features = x'0011' WHERE run_id = 1 AND idx = 1",),
                     "run 1 has 1 rollout(s) with status ok but a missing or non-finite", "restore",
                     id="ok-row-with-truncated-features"),
        pytest.param(("DELETE FROM rollouts WHERE run_id = 1 AND idx = 7",),
                     "run 1 is marked done but holds 23 of 24 rollouts", "gapgauge sweep", id="done-run-short"),
    ],
)
def test_each_own_check_fails_on_its_damage_and_says_what_to_do(healthy, tmp_path, statements, expected, advice):
    path = damaged_copy(healthy, tmp_path, *statements)
    assert integrity(path) == "ok"  # SQLite sees nothing wrong: only our checks can find this
    result = check(path)
    assert result.exit_code == 1, result.output
    line = next(line for line in result.output.splitlines() if expected in line)
    assert advice in line


def test_rollouts_of_a_deleted_run_are_found_by_the_foreign_key_check(healthy, tmp_path):
    path = damaged_copy(healthy, tmp_path, "DELETE FROM runs WHERE id = 1", foreign_keys=False)
    with sqlite3.connect(path) as conn:  # SQLite's own foreign-key check is the outside truth
        assert conn.execute("PRAGMA foreign_key_check").fetchall()
    result = check(path)
    assert result.exit_code == 1
    assert "points at a missing row of runs" in result.output


def test_an_unfinished_run_is_resumable_and_healthy(healthy, tmp_path, scenario):
    path = damaged_copy(healthy, tmp_path)
    with Store(path) as store:  # a sweep killed after its first chunk
        run = store.start_run("sweep", scenario, seed=1, design="sobol", planned=10, nominal=False)
        store.write_rollouts(run, fake_batch(scenario, np.arange(4)))
    result = check(path)
    assert result.exit_code == 0, result.output
    assert f"run {run} (sweep) holds 4 of 10 rollouts: resumable" in result.output


@pytest.mark.parametrize("page", [1, 2], ids=["header-page", "meta-table-page"])
def test_a_store_too_damaged_to_open_is_a_finding_with_exit_1(healthy, tmp_path, page):
    path = tmp_path / "scribbled.sqlite"
    shutil.copy(healthy, path)
    with sqlite3.connect(path) as conn:
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        page_size = conn.execute("PRAGMA page_size").fetchone()[0]
    with open(path, "r+b") as fh:  # keep the 100-byte file header, overwrite the rest of the page
        fh.seek((page - 1) * page_size + (100 if page == 1 else 0))
        fh.write(b"\xff" * 2000)
    try:
        sqlite_says = integrity(path)
    except sqlite3.DatabaseError as exc:
        sqlite_says = str(exc)
    assert sqlite_says != "ok"  # SQLite's own verdict: damaged
    result = check(path)
    assert result.exit_code == 1, result.output
    assert "restore" in result.output and "Traceback" not in result.output
    other = CliRunner().invoke(main, ["info", "--store", str(path)])  # every other command refuses it plainly
    assert other.exit_code == 2 and "store check" in other.output and "not a gapgauge store" not in other.output


def test_a_sqlite_file_of_another_program_is_a_usage_error_not_damage(tmp_path):
    path = tmp_path / "photos.sqlite"
    with sqlite3.connect(path) as conn:
        conn.execute("CREATE TABLE meta (a, b)")
    result = check(path)
    assert result.exit_code == 2 and isinstance(result.exception, SystemExit)
    assert "not a gapgauge store" in result.output


def test_a_missing_store_is_a_usage_error_and_is_not_created(tmp_path):
    result = check(tmp_path / "nowhere.sqlite")
    assert result.exit_code == 2 and "no store here" in result.output
    assert not (tmp_path / "nowhere.sqlite").exists()
