"""Store schema versions from the command line and when a migration fails: an older store is migrated
after a backup copy, a newer one is refused in one line, and a failed migration changes nothing.

(tests/test_store.py covers the Store API's own migration and refusal; these add the command line and
the failure paths.) Outside checks: the files read with the standard library's ``sqlite3``, SQLite's
``PRAGMA integrity_check``, and click's exit status.
"""

from __future__ import annotations

import sqlite3

import numpy as np
import pytest
from click.testing import CliRunner

from gapgauge import StoreError, load_scenario
from gapgauge.cli import main
from gapgauge.store import Store, schema
from test_robust_support import ROOT, fake_batch, integrity, scalar


@pytest.fixture
def old_store(tmp_path):
    """A store of the current version (NOW) with 12 rollouts; the tests move the code on to NOW + 1."""
    scenario = load_scenario(ROOT / "scenarios" / "push_recovery.toml")
    path = tmp_path / "lab.sqlite"
    with Store(path) as store:
        run = store.start_run("sweep", scenario, seed=0, design="sobol", planned=12, nominal=False)
        store.write_rollouts(run, fake_batch(scenario, np.arange(12)))
    return path


def version(path) -> str:
    return scalar(path, "SELECT value FROM meta WHERE key = 'schema_version'")


NOW = schema.SCHEMA_VERSION


def test_info_on_an_older_store_migrates_it_after_a_backup(old_store, monkeypatch):
    monkeypatch.setattr(schema, "SCHEMA_VERSION", NOW + 1)
    monkeypatch.setitem(schema.MIGRATIONS, NOW, lambda c: c.execute("ALTER TABLE runs ADD COLUMN note TEXT"))
    result = CliRunner().invoke(main, ["info", "--store", str(old_store)])
    assert result.exit_code == 0, result.output
    backup = old_store.with_name(f"lab.sqlite.v{NOW}.bak")
    assert version(backup) == str(NOW) and scalar(backup, "SELECT COUNT(*) FROM rollouts") == 12
    assert integrity(backup) == "ok"
    assert version(old_store) == str(NOW + 1) and scalar(old_store, "SELECT COUNT(*) FROM rollouts") == 12


def test_a_migration_that_fails_leaves_the_store_as_it_was_and_a_backup(old_store, monkeypatch):
    def broken_step(conn: sqlite3.Connection) -> None:
        conn.execute("ALTER TABLE runs ADD COLUMN note TEXT")  # a first change, then the step dies
        raise sqlite3.OperationalError("disk I/O error")

    monkeypatch.setattr(schema, "SCHEMA_VERSION", NOW + 1)
    monkeypatch.setitem(schema.MIGRATIONS, NOW, broken_step)
    with pytest.raises(StoreError):
        Store(old_store)
    assert version(old_store) == str(NOW)  # rolled back: no half-migrated store
    assert scalar(old_store, "SELECT COUNT(*) FROM pragma_table_info('runs') WHERE name = 'note'") == 0
    assert scalar(old_store, "SELECT COUNT(*) FROM rollouts") == 12 and integrity(old_store) == "ok"
    assert version(old_store.with_name(f"lab.sqlite.v{NOW}.bak")) == str(NOW)


def test_a_store_with_no_migration_path_names_the_backup(old_store, monkeypatch):
    monkeypatch.setattr(schema, "SCHEMA_VERSION", NOW + 2)
    monkeypatch.setitem(schema.MIGRATIONS, NOW, lambda c: None)  # NOW -> NOW + 1 known, then none
    monkeypatch.delitem(schema.MIGRATIONS, NOW + 1, raising=False)
    result = CliRunner().invoke(main, ["info", "--store", str(old_store)])
    assert result.exit_code == 2 and isinstance(result.exception, SystemExit)
    assert f"no migration from store schema version {NOW + 1}" in result.output
    assert f"lab.sqlite.v{NOW}.bak" in result.output
    assert version(old_store) == str(NOW)


@pytest.mark.parametrize("command", [["info"], ["store", "check"], ["sweep", "SCENARIO", "--rollouts", "1"]])
def test_a_newer_store_is_refused_by_every_command_in_one_line(old_store, command):
    with sqlite3.connect(old_store) as conn:
        conn.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    argv = [str(ROOT / "scenarios" / "push_recovery.toml") if a == "SCENARIO" else a for a in command]
    result = CliRunner().invoke(main, [*argv, "--store", str(old_store)])
    assert result.exit_code == 2 and isinstance(result.exception, SystemExit)
    assert "version 99 is newer" in result.output and "upgrade gapgauge" in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert version(old_store) == "99" and scalar(old_store, "SELECT COUNT(*) FROM rollouts") == 12
