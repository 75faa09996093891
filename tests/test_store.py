"""The SQLite store: round trips, idempotent writes, schema versions, trials, models and the health check.

Outside checks: SQLite's own ``PRAGMA integrity_check`` and row counts read with the standard
library's ``sqlite3`` directly (not through the Store), and ``numpy.load(allow_pickle=False)`` on the
stored npz blobs.
"""

from __future__ import annotations

import io
import sqlite3
import threading
from pathlib import Path

import numpy as np
import pytest

from gapgauge import StoreError, Trajectory, load_scenario
from gapgauge.records import RolloutBatch, TrialRecord
from gapgauge.store import Store, connection, schema
from gapgauge.store.codec import npz_to_arrays

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = ROOT / "scenarios" / "push_recovery.toml"


@pytest.fixture(scope="module")
def scenario():
    return load_scenario(SCENARIO)


def batch_of(scenario, indices, seed: int = 0) -> RolloutBatch:
    """Hand-made rollouts (no simulation): ok, fell and one diverged row with NaN features."""
    rng = np.random.default_rng(seed)
    indices = np.asarray(indices, dtype=np.int64)
    n = len(indices)
    status = np.array(["ok", "fell", "diverged"] * n)[:n]
    features = {name: rng.random(n) for name in scenario.features.names}
    features["fell"] = (status == "fell").astype(float)
    objective = rng.random(n)
    diverged = status == "diverged"
    objective[diverged] = np.nan
    for values in features.values():
        values[diverged] = np.nan
    return RolloutBatch(
        indices=indices, params=rng.random((n, scenario.dim)) * 1e3 - 1e-7,
        physics=rng.random((n, len(scenario.physics))), physics_names=tuple(r.name for r in scenario.physics),
        status=status, reason=np.where(diverged, "non-finite state", ""), objective=objective, features=features,
    )


def count(path: Path, sql: str, args=()):
    """First value of a query, read with sqlite3 directly (not through the Store)."""
    with sqlite3.connect(path) as conn:
        return conn.execute(sql, args).fetchone()[0]


def integrity(path: Path) -> str:
    with sqlite3.connect(path) as conn:
        return conn.execute("PRAGMA integrity_check").fetchone()[0]


def test_rollouts_read_back_exactly_as_written(tmp_path, scenario):
    path = tmp_path / "s.sqlite"
    written = batch_of(scenario, np.arange(30))
    with Store(path) as store:
        run = store.start_run("sweep", scenario, seed=1, design="sobol", planned=30, nominal=False)
        store.write_rollouts(run, written)
        back = store.rollouts(scenario.content_hash)
    # float64 values and NaN survive exactly
    np.testing.assert_array_equal(back.params, written.params)
    np.testing.assert_array_equal(back.physics, written.physics)
    np.testing.assert_array_equal(back.objective, written.objective)
    for name in scenario.features.names:
        np.testing.assert_array_equal(back.features[name], written.features[name])
    assert back.status.tolist() == written.status.tolist()
    assert back.physics_names == written.physics_names
    assert integrity(path) == "ok"  # SQLite's own check


def test_writing_the_same_rollouts_twice_stores_them_once(tmp_path, scenario):
    path = tmp_path / "s.sqlite"
    with Store(path) as store:
        run = store.start_run("sweep", scenario, seed=1, design="sobol", planned=40, nominal=False)
        first = store.write_rollouts(run, batch_of(scenario, np.arange(20)))
        again = store.write_rollouts(run, batch_of(scenario, np.arange(10, 30)))
    assert (first, again) == (20, 10)
    assert count(path, "SELECT COUNT(*) FROM rollouts") == 30
    assert count(path, "SELECT COUNT(DISTINCT idx) FROM rollouts") == 30


def test_the_same_run_settings_give_the_same_run(tmp_path, scenario):
    with Store(tmp_path / "s.sqlite") as store:
        kwargs = dict(seed=4, design="lhs", planned=100, nominal=False)
        first = store.start_run("sweep", scenario, **kwargs)
        again = store.start_run("sweep", scenario, **kwargs)
        other = store.start_run("sweep", scenario, **{**kwargs, "seed": 5})
    assert first == again != other
    assert count(tmp_path / "s.sqlite", "SELECT COUNT(*) FROM runs") == 2


def test_an_older_store_is_migrated_after_a_backup(tmp_path, scenario, monkeypatch):
    path = tmp_path / "s.sqlite"
    with Store(path) as store:
        run = store.start_run("sweep", scenario, seed=0, design="sobol", planned=12, nominal=False)
        store.write_rollouts(run, batch_of(scenario, np.arange(12)))
    # pretend the code has moved on one version, which adds a column
    now = schema.SCHEMA_VERSION
    monkeypatch.setattr(schema, "SCHEMA_VERSION", now + 1)
    monkeypatch.setitem(schema.MIGRATIONS, now, lambda c: c.execute("ALTER TABLE runs ADD COLUMN note TEXT"))
    with Store(path) as store:
        assert store.backup_path == tmp_path / f"s.sqlite.v{now}.bak"
    backup = tmp_path / f"s.sqlite.v{now}.bak"
    assert count(backup, "SELECT value FROM meta WHERE key = 'schema_version'") == str(now)
    assert count(backup, "SELECT COUNT(*) FROM rollouts") == 12
    assert integrity(backup) == "ok"
    assert count(path, "SELECT value FROM meta WHERE key = 'schema_version'") == str(now + 1)
    assert count(path, "SELECT COUNT(*) FROM pragma_table_info('runs') WHERE name = 'note'") == 1
    assert count(path, "SELECT COUNT(*) FROM rollouts") == 12


def test_a_newer_store_is_refused_naming_file_and_versions(tmp_path):
    path = tmp_path / "s.sqlite"
    Store(path).close()
    with sqlite3.connect(path) as conn:
        conn.execute("UPDATE meta SET value = '7' WHERE key = 'schema_version'")
    with pytest.raises(StoreError) as err:
        Store(path)
    text = str(err.value)
    assert str(path) in text and "version 7" in text and f"version {schema.SCHEMA_VERSION}" in text
    assert "\n" not in text


def test_a_file_that_is_not_sqlite_is_refused(tmp_path):
    path = tmp_path / "notes.sqlite"
    path.write_text("time,ankle\n0,1\n")
    with pytest.raises(StoreError, match="not a SQLite database"):
        Store(path)
    assert path.read_text() == "time,ankle\n0,1\n"  # left untouched


def test_a_sqlite_file_of_another_program_is_refused(tmp_path):
    path = tmp_path / "other.sqlite"
    with sqlite3.connect(path) as conn:
        conn.execute("CREATE TABLE photos (id INTEGER)")
    with pytest.raises(StoreError, match="not a gapgauge store"):
        Store(path)


def test_a_trial_is_stored_once_with_its_series_as_npz(tmp_path, scenario):
    t = np.linspace(0.0, 2.0, 101)
    series = Trajectory(t, {"com_x": np.sin(t), "heel_force": 392.0 + 0 * t}, onset=0.8, meta={"robot": "r1"})
    trial = TrialRecord(
        scenario_hash=scenario.content_hash, source_path="logs/t1.csv", sha256="ab" * 32,
        params=scenario.params_to_mapping(scenario.nominal_parameters()), robot_id="r1",
        recorded_at="2026-01-01T10:00:00", outcome="stood", notes="=SUM(A1) <b>", synthetic=True,
        features={"fell": 0.0, "recovery_time": 1.25}, objective=0.5, series=series,
    )
    path = tmp_path / "s.sqlite"
    with Store(path) as store:
        store.add_scenario(scenario)
        first = store.add_trial(trial)
        again = store.add_trial(trial)
        listed = store.trials(scenario.content_hash)
        loaded = store.trials(scenario.content_hash, with_series=True)[0]
    assert first[1] is True and again == (first[0], False)
    assert count(path, "SELECT COUNT(*) FROM trials") == 1
    assert listed[0].series is None and listed[0].notes == "=SUM(A1) <b>"
    np.testing.assert_array_equal(loaded.series.channels["com_x"][0], np.sin(t))
    assert loaded.series.onset == 0.8 and loaded.series.meta == {"robot": "r1"}
    with sqlite3.connect(path) as conn:
        blob = conn.execute("SELECT series_npz FROM trials").fetchone()[0]
    raw = npz_to_arrays(blob)
    with np.load(io.BytesIO(blob), allow_pickle=False) as data:  # numpy itself, no pickle
        np.testing.assert_array_equal(data["__t__"], t)
    assert set(raw) >= {"channel:com_x", "channel:heel_force"}


def test_matches_come_back_ordered_by_index(tmp_path, scenario):
    with Store(tmp_path / "s.sqlite") as store:
        store.add_scenario(scenario)
        run = store.start_run("match", scenario, seed=0, design="match", planned=8, nominal=False)
        batch = batch_of(scenario, np.arange(8))
        store.write_rollouts(run, batch)
        trial_id, _ = store.add_trial(TrialRecord(
            scenario.content_hash, "a.csv", "cd" * 32, {}, "r1", "", None, "", False, {}, float("nan")))
        store.link_matches(trial_id, run, [5, 0, 3])
        matched = store.matches(trial_id)
    assert matched.indices.tolist() == [0, 3, 5]
    np.testing.assert_array_equal(matched.params, batch.params[[0, 3, 5]])


def test_the_newest_model_is_loaded(tmp_path, scenario):
    with Store(tmp_path / "s.sqlite") as store:
        store.save_model("prior", scenario.content_hash, {"rho": 0.5}, {"alpha": np.arange(3.0)})
        store.save_model("prior", scenario.content_hash, {"rho": 0.9, "note": float("nan")}, {"alpha": np.ones(2)})
        params, arrays = store.load_model("prior", scenario.content_hash)
        missing = store.load_model("fall", scenario.content_hash)
    assert params == {"rho": 0.9, "note": None}  # strict JSON: NaN is stored as null
    np.testing.assert_array_equal(arrays["alpha"], np.ones(2))
    assert missing is None


def test_check_passes_a_healthy_store_and_names_damage(tmp_path, scenario):
    path = tmp_path / "s.sqlite"
    with Store(path) as store:
        run = store.start_run("sweep", scenario, seed=0, design="sobol", planned=9, nominal=False)
        store.write_rollouts(run, batch_of(scenario, np.arange(9)))
        store.finish_run(run)
        healthy = store.check()
    with sqlite3.connect(path) as conn:  # damage it behind the store's back
        conn.execute("DELETE FROM rollouts WHERE idx = 4")
        nan_features = np.full(len(scenario.features.names), np.nan).tobytes()
        conn.execute("UPDATE rollouts SET features = ? WHERE idx = 0", (nan_features,))
    with Store(path) as store:
        problems = store.check()
    assert healthy == []
    assert any("marked done but holds 8 of 9" in p for p in problems)
    assert any("status ok but a missing or non-finite" in p for p in problems)


def test_a_killed_run_is_resumable_not_a_problem(tmp_path, scenario):
    path = tmp_path / "s.sqlite"
    with Store(path) as store:
        run = store.start_run("sweep", scenario, seed=0, design="sobol", planned=9, nominal=False)
        store.write_rollouts(run, batch_of(scenario, np.arange(4)))
        store.finish_run(run)  # refuses to mark an incomplete run done
        assert store.run(run).status == "running" and store.run(run).done == 4
        assert store.check() == []


def test_two_writers_at_once_both_keep_every_row(tmp_path, scenario):
    path = tmp_path / "s.sqlite"
    Store(path).close()
    errors: list[BaseException] = []

    def writer(seed: int) -> None:
        try:
            with Store(path) as store:  # its own connection, as another process would have
                run = store.start_run("sweep", scenario, seed=seed, design="sobol", planned=400, nominal=False)
                for first in range(0, 400, 10):
                    store.write_rollouts(run, batch_of(scenario, np.arange(first, first + 10), seed))
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=writer, args=(s,)) for s in (1, 2)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    assert errors == []
    assert count(path, "SELECT COUNT(*) FROM rollouts") == 800
    assert integrity(path) == "ok"


def test_rollouts_of_an_unknown_scenario_say_what_to_do(tmp_path):
    with Store(tmp_path / "s.sqlite") as store, pytest.raises(StoreError, match="sweep it first"):
        store.rollouts("0123456789abcdef")


def test_a_store_in_a_missing_folder_is_refused(tmp_path):
    path = tmp_path / "missing" / "s.sqlite"
    with pytest.raises(StoreError, match="does not exist"):
        Store(path)
    assert not path.parent.exists()


def test_check_reports_a_store_whose_pages_are_overwritten(tmp_path, scenario):
    path = tmp_path / "s.sqlite"
    with Store(path) as store:
        run = store.start_run("sweep", scenario, seed=0, design="sobol", planned=600, nominal=False)
        store.write_rollouts(run, batch_of(scenario, np.arange(600)))
    with sqlite3.connect(path) as conn:
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")  # move every page into the main file
    size = path.stat().st_size
    with open(path, "r+b") as fh:  # scribble over the middle pages, as a failing disk might
        fh.seek(size // 2)
        fh.write(b"\xff" * 8192)
    try:  # SQLite's own verdict first: it must see damage too, or this test proves nothing
        with sqlite3.connect(path) as conn:
            sqlite_says = conn.execute("PRAGMA integrity_check").fetchone()[0]
    except sqlite3.DatabaseError as exc:
        sqlite_says = str(exc)
    assert sqlite_says != "ok"
    with Store(path) as store:
        problems = store.check()
    assert problems and all("restore" in p for p in problems)


def test_a_read_decoded_chunk_by_chunk_equals_the_rows_as_stored(tmp_path, scenario, monkeypatch):
    # issue 19: 10^6 rows are decoded 65,536 at a time; chunks of 7 here, so every boundary case occurs
    monkeypatch.setattr(connection, "READ_CHUNK", 7)
    path = tmp_path / "s.sqlite"
    with Store(path) as store:
        for seed, n in ((1, 30), (2, 14)):
            run = store.start_run("sweep", scenario, seed=seed, design="sobol", planned=n, nominal=False)
            store.write_rollouts(run, batch_of(scenario, np.arange(n), seed=seed))
        back = store.rollouts(scenario.content_hash)
    with sqlite3.connect(path) as conn:  # the rows as SQLite holds them, decoded here
        rows = conn.execute("SELECT run_id, idx, params, status, objective FROM rollouts"
                            " ORDER BY run_id, idx").fetchall()
    assert len(back) == len(rows) == 44
    assert back.run_ids.tolist() == [r[0] for r in rows] and back.indices.tolist() == [r[1] for r in rows]
    np.testing.assert_array_equal(back.params, np.frombuffer(b"".join(r[2] for r in rows), "<f8").reshape(44, -1))
    assert back.status.tolist() == [r[3] for r in rows]
    np.testing.assert_array_equal(back.objective, [np.nan if r[4] is None else r[4] for r in rows])
