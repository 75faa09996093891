"""Sweeps keyed by what they simulate: editing the hardware map, the shift thresholds, the success rule,
the objective weights or the description keeps every stored rollout; editing what is simulated or how
it is measured does not, and a stale run is named with why.

Outside checks: the objective recomputed by hand (numpy) from the stored features with the new weights
(its definition: sum of weight x feature, the fall value for a fall); SQLite's own view of the migrated
file (sqlite3, PRAGMA table_info, the backup copy); click's exit status.
"""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from gapgauge import load_scenario
from gapgauge.app.ingest import ingest
from gapgauge.app.shift import assess_shift
from gapgauge.app.sweep import sweep
from gapgauge.cli import main
from gapgauge.sim.standin import run_standin
from gapgauge.store import Store

ROOT = Path(__file__).resolve().parents[1]
ROLLOUTS = 12


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    for sub in ("models", "scenarios"):
        (tmp_path / sub).mkdir()
    shutil.copy(ROOT / "models" / "planar_body.xml", tmp_path / "models")
    shutil.copy(ROOT / "scenarios" / "push_recovery.toml", tmp_path / "scenarios")
    return tmp_path


def _edit(project: Path, old: str, new: str, name: str) -> Path:
    base = project / "scenarios" / "push_recovery.toml"
    text = base.read_text()
    assert old in text, f"test set-up: {old!r} not in the scenario"
    path = base.with_name(name)
    path.write_text(text.replace(old, new, 1))
    return path


KEEPS = {
    "hardware column": ('ankle_angle = { column = "ankle_pos_deg", unit = "deg" }',
                        'ankle_angle = { column = "ankle_position_deg", unit = "deg" }'),
    "bag topic": ("[hardware.plausible]", '[hardware.bag]\ncom_x = { topic = "/com", field = "x", unit = "m" }\n\n'
                  "[hardware.plausible]"),
    "shift": ("residual_limit = 2.0", "residual_limit = 2.5"),
    "success": ("recovery_time = 2.0\n\n#", "recovery_time = 1.5\n\n#"),
    "weights": ("peak_com_excursion = 10.0, recovery_time = 0.5", "peak_com_excursion = 20.0, recovery_time = 0.25"),
    "description": ("feet in place.", "feet in place, on the lab's soft floor."),
    "safe bounds": ("safe_low = 600.0", "safe_low = 650.0"),
}
CHANGES = {
    "task": ("magnitude = 65.0", "magnitude = 60.0"),
    "bounds": ("low = 450.0", "low = 500.0"),
    "physics": ("low = 0.5\nhigh = 1.2", "low = 0.6\nhigh = 1.2"),
    "fall rule": ("fall_com_height = 0.4", "fall_com_height = 0.45"),
    "logger low-pass": ("lowpass_hz = 40.0", "lowpass_hz = 30.0"),
}


@pytest.mark.parametrize("edit", list(KEEPS))
def test_editing_what_is_not_simulated_keeps_the_simulation_hash(project: Path, edit: str) -> None:
    base = load_scenario(project / "scenarios" / "push_recovery.toml")
    edited = load_scenario(_edit(project, *KEEPS[edit], f"{edit.replace(' ', '_')}.toml"))
    assert edited.content_hash != base.content_hash
    assert edited.simulation_hash == base.simulation_hash


@pytest.mark.parametrize("edit", list(CHANGES))
def test_editing_what_is_simulated_or_measured_changes_the_simulation_hash(project: Path, edit: str) -> None:
    base = load_scenario(project / "scenarios" / "push_recovery.toml")
    edited = load_scenario(_edit(project, *CHANGES[edit], f"{edit.replace(' ', '_')}.toml"))
    assert edited.simulation_hash != base.simulation_hash
    # the feature definitions (fall rule, the logger's low-pass) change the measurement, not the trajectories
    same_trajectories = edit in ("fall rule", "logger low-pass")
    assert (edited.trajectory_hash == base.trajectory_hash) is same_trajectories


def test_editing_the_model_file_changes_the_simulation_hash(project: Path) -> None:
    base = load_scenario(project / "scenarios" / "push_recovery.toml")
    model = project / "models" / "planar_body.xml"
    model.write_text(model.read_text().replace('mass="27.120"', 'mass="27.5"', 1))
    assert load_scenario(project / "scenarios" / "push_recovery.toml").simulation_hash != base.simulation_hash


def test_a_sweep_survives_a_hardware_map_edit_and_reads_back_whole(project: Path, tmp_path: Path) -> None:
    store = tmp_path / "s.sqlite"
    base = load_scenario(project / "scenarios" / "push_recovery.toml")
    first = sweep(base, ROLLOUTS, seed=3, store=store, workers=1)
    edited = load_scenario(_edit(project, *KEEPS["hardware column"], "edited.toml"))
    again = sweep(edited, ROLLOUTS, seed=3, store=store, workers=1)
    assert again.nothing_to_do and again.run_id == first.run_id and again.ran_now == 0
    with Store(store) as db:
        a, b = db.rollouts(base.content_hash), db.rollouts(edited.content_hash)
        assert len(b) == ROLLOUTS and [r.id for r in db.runs(edited.content_hash, kind="sweep")] == [first.run_id]
    np.testing.assert_array_equal(a.params, b.params)
    np.testing.assert_array_equal(a.objective, b.objective)


def test_new_objective_weights_are_applied_to_the_stored_features(project: Path, tmp_path: Path) -> None:
    store = tmp_path / "s.sqlite"
    base = load_scenario(project / "scenarios" / "push_recovery.toml")
    sweep(base, ROLLOUTS, seed=4, store=store, workers=1)
    edited = load_scenario(_edit(project, *KEEPS["weights"], "weights.toml"))
    summary = sweep(edited, ROLLOUTS, seed=4, store=store, workers=1)
    assert summary.nothing_to_do
    with Store(store) as db:
        batch = db.rollouts(edited.content_hash)
    f = batch.features
    # by hand: objective = 20 x peak excursion + 0.25 x recovery time + 0.02 x positive work; 5.0 for a fall
    expected = 20.0 * f["peak_com_excursion"] + 0.25 * f["recovery_time"] + 0.02 * f["positive_work"]
    expected = np.where(f["fell"] == 1.0, 5.0, expected)
    expected[batch.status == "diverged"] = np.nan
    np.testing.assert_allclose(batch.objective, expected, rtol=1e-12, equal_nan=True)
    ok = batch.status == "ok"
    assert summary.best_objective == pytest.approx(float(np.min(expected[ok])), rel=1e-12)


def test_a_run_measured_with_other_feature_definitions_is_stale_and_says_why(project: Path, tmp_path: Path) -> None:
    store = tmp_path / "s.sqlite"
    base = load_scenario(project / "scenarios" / "push_recovery.toml")
    first = sweep(base, ROLLOUTS, seed=5, store=store, workers=1)
    path = _edit(project, *CHANGES["logger low-pass"], "lowpass.toml")
    second = sweep(load_scenario(path), ROLLOUTS, seed=5, store=store, workers=1)
    assert second.run_id != first.run_id and second.ran_now == ROLLOUTS
    assert len(second.stale) == 1 and f"run {first.run_id} is stale" in second.stale[0]
    assert "lowpass_hz: 40.0 -> 30.0" in second.stale[0]
    result = CliRunner().invoke(main, ["info", "--store", str(store), "--scenario", str(path)])
    assert result.exit_code == 0, result.output
    assert "stale" in result.output and "lowpass_hz" in result.output and "usable" in result.output


def test_a_version_1_store_is_migrated_and_its_runs_are_found_again(project: Path, tmp_path: Path) -> None:
    store = tmp_path / "old.sqlite"
    base = load_scenario(project / "scenarios" / "push_recovery.toml")
    first = sweep(base, ROLLOUTS, seed=6, store=store, workers=1)
    # turn it into the version-1 file a previous gapgauge wrote: no identity columns in scenarios
    with sqlite3.connect(store) as conn:
        conn.execute("DROP INDEX scenarios_simulation")
        for column in ("simulation_hash", "trajectory_hash", "identity_json", "objective_json"):
            conn.execute(f"ALTER TABLE scenarios DROP COLUMN {column}")
        conn.execute("UPDATE meta SET value = '1' WHERE key = 'schema_version'")
    with Store(store) as db:
        assert db.backup_path == tmp_path / "old.sqlite.v1.bak"
    with sqlite3.connect(store) as conn:
        columns = {row[1] for row in conn.execute("PRAGMA table_info(scenarios)")}
        assert {"simulation_hash", "trajectory_hash", "identity_json", "objective_json"} <= columns
    with sqlite3.connect(tmp_path / "old.sqlite.v1.bak") as conn:
        assert conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0] == "1"
    # the unchanged scenario finds its run again (its hashes are filled in), and so does an edited one
    assert sweep(base, ROLLOUTS, seed=6, store=store, workers=1).run_id == first.run_id
    edited = load_scenario(_edit(project, *KEEPS["shift"], "shift.toml"))
    assert sweep(edited, ROLLOUTS, seed=6, store=store, workers=1).nothing_to_do


def test_trials_follow_a_weights_edit_with_their_objective_recomputed(project: Path, tmp_path: Path) -> None:
    base = load_scenario(project / "scenarios" / "push_recovery.toml")
    logs = run_standin(base, ROOT / "scenarios" / "standin" / "close.toml", design=2, out_dir=tmp_path / "logs")
    with Store(tmp_path / "t.sqlite") as store:
        ingest(base, store, logs, matches=2, seed=0)
        edited = load_scenario(_edit(project, *KEEPS["weights"], "weights.toml"))
        assert len(assess_shift(edited, store, seed=0).trial_ids) == 2  # the new version sees the trials
        for trial in store.trials(edited.content_hash):
            f = trial.features
            by_hand = 5.0 if f["fell"] == 1.0 else (20.0 * f["peak_com_excursion"] + 0.25 * f["recovery_time"]
                                                    + 0.02 * f["positive_work"])
            assert trial.objective == pytest.approx(by_hand, rel=1e-12)
