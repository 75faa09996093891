"""ingest(): trials stored once with provenance, K matched simulations each, bad files listed not stored."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
from click.testing import CliRunner

from gapgauge.app.ingest import ingest
from gapgauge.cli import main
from gapgauge.sim.physics import draw_physics
from gapgauge.sim.standin import run_standin
from gapgauge.store import Store
from test_logs_support import ROOT, make_scenario

ZERO_PROFILE = """
name = "zero"
robot_id = "standin-zero"
[logging]
rate_hz = 500.0
"""


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    return make_scenario(tmp_path_factory.mktemp("ingest_sc"))  # no low-pass, so a clean log is not smoothed


@pytest.fixture(scope="module")
def logs(tmp_path_factory, scenario):
    """Two zero-noise, zero-perturbation stand-in logs: the nominal parameters and one other set."""
    folder = tmp_path_factory.mktemp("ingest_logs")
    profile = folder / "zero.toml"
    profile.write_text(ZERO_PROFILE)
    nominal = scenario.params_to_mapping(scenario.nominal_parameters())
    other = dict(nominal, ankle_kp=900.0, hip_kd=40.0)
    return run_standin(scenario, profile, params_list=[nominal, other], out_dir=folder / "logs", seed=0)


def copy_log(src, folder, name):
    folder.mkdir(parents=True, exist_ok=True)
    shutil.copy(src, folder / f"{name}.csv")
    shutil.copy(src.with_suffix(".json"), folder / f"{name}.json")
    return folder / f"{name}.csv"


def test_zero_noise_standin_trial_has_the_features_of_its_matched_nominal_simulation(
    tmp_path, scenario, logs
):
    store = Store(tmp_path / "store.sqlite")
    summary = ingest(scenario, store, logs, matches=2, seed=0, progress=False)
    assert not summary.failed and len(summary.stored) == 2
    for trial in store.trials(scenario.content_hash):
        nominal_match = store.matches(trial.id)  # row 0: the nominal physics, as the stand-in used
        for name, value in trial.features.items():
            # outside reference: the matched nominal simulation computes the same features from MuJoCo
            assert value == pytest.approx(float(nominal_match.features[name][0]), rel=1e-6, abs=1e-9), name
        assert trial.objective == pytest.approx(float(nominal_match.objective[0]), rel=1e-6, abs=1e-9)


def test_each_trial_gets_k_matches_at_its_parameters_nominal_first(tmp_path, scenario, logs):
    store = Store(tmp_path / "store.sqlite")
    summary = ingest(scenario, store, logs[:1], matches=4, seed=5, progress=False)
    (trial,) = store.trials(scenario.content_hash)
    batch = store.matches(trial.id)
    assert summary.matched == {trial.id: 4} and len(batch) == 4
    np.testing.assert_array_equal(batch.params, np.tile(scenario.params_from_mapping(trial.params), (4, 1)))
    np.testing.assert_array_equal(batch.physics[0], draw_physics(scenario, 5, np.array([0]), nominal=True)[0])
    np.testing.assert_array_equal(batch.physics[1:], draw_physics(scenario, 5, np.arange(1, 4)))


def test_ingesting_the_same_files_again_changes_nothing_and_says_so(tmp_path, scenario, logs):
    store = Store(tmp_path / "store.sqlite")
    first = ingest(scenario, store, logs, matches=2, progress=False)
    again = ingest(scenario, store, logs, matches=2, progress=False)
    assert (len(again.stored), len(again.skipped_duplicates), again.simulated) == (0, 2, 0)
    assert [i.trial_id for i in again.skipped_duplicates] == [i.trial_id for i in first.stored]
    assert len(store.trials(scenario.content_hash)) == 2


def test_a_batch_stores_the_good_files_and_lists_the_bad_with_nothing_stored_for_them(
    tmp_path, scenario, logs
):
    good = copy_log(logs[0], tmp_path / "in", "good")
    cut = copy_log(logs[1], tmp_path / "in", "cut")
    cut.write_bytes(cut.read_bytes()[:-40])  # the last row loses its end: a truncated file
    lonely = copy_log(logs[1], tmp_path / "in", "lonely")
    lonely.with_suffix(".json").unlink()
    bad_params = copy_log(logs[1], tmp_path / "in", "badparams")
    side = json.loads(bad_params.with_suffix(".json").read_text())
    side["params"]["ankle_kp"] = 1e6
    bad_params.with_suffix(".json").write_text(json.dumps(side))
    store = Store(tmp_path / "store.sqlite")
    summary = ingest(scenario, store, [good, cut, lonely, bad_params], matches=1, progress=False)
    assert [p for p, _ in summary.failed] == [str(cut), str(lonely), str(bad_params)]
    assert "truncated" in summary.failed[0][1] and "cut.csv:" in summary.failed[0][1]
    assert [t.source_path for t in store.trials(scenario.content_hash)] == [str(good.resolve())]


def test_a_ros2_bag_goes_in(tmp_path):
    from test_logs_bag import BAG_TABLE, write_bag

    scenario = make_scenario(tmp_path / "sc", append=BAG_TABLE)
    bag = write_bag(tmp_path / "trial_bag", scenario, n=500)
    store = Store(tmp_path / "store.sqlite")
    summary = ingest(scenario, store, [bag], matches=1, progress=False)
    assert not summary.failed and len(summary.stored) == 1
    assert len(store.trials(scenario.content_hash)) == 1


def test_cli_ingest_lists_a_failed_file_and_exits_2(tmp_path, scenario, logs):
    good = copy_log(logs[0], tmp_path / "in", "good")
    broken = tmp_path / "in" / "broken.csv"
    broken.write_bytes(b"\x00\x01binary")
    shutil.copy(good.with_suffix(".json"), broken.with_suffix(".json"))
    result = CliRunner().invoke(
        main,
        [
            "ingest",
            str(scenario.path),
            str(good),
            str(broken),
            "--store",
            str(tmp_path / "s.sqlite"),
            "--matches",
            "1",
        ],
    )
    assert result.exit_code == 2, result.output
    text = " ".join(result.output.split())  # the table wraps long cells at the terminal width
    assert "1 stored, 0 already stored, 1 failed" in text and "Traceback" not in text


def test_cli_standin_writes_logs_labelled_synthetic(tmp_path):
    result = CliRunner().invoke(
        main,
        [
            "standin",
            str(ROOT / "scenarios/push_recovery.toml"),
            "--profile",
            str(ROOT / "scenarios/standin/weak_laggy.toml"),
            "--design",
            "1",
            "--out",
            str(tmp_path),
        ],
    )
    assert result.exit_code == 0, result.output
    assert "SYNTHETIC" in result.output
    assert json.loads(next(tmp_path.glob("*.json")).read_text())["synthetic"] is True


# ---- one transaction per trial; flags and placement carried to info and shift -------------------------


class Recorder:
    """The store's connection, recording each write transaction's statements (BEGIN IMMEDIATE .. COMMIT)."""

    def __init__(self, conn):
        self._conn, self.transactions, self._open = conn, [], None

    def execute(self, sql, *args):
        if sql == "BEGIN IMMEDIATE":
            self._open = []
        elif sql == "COMMIT" and self._open is not None:
            self.transactions.append(self._open)
            self._open = None
        elif self._open is not None:
            self._open.append(sql)
        return self._conn.execute(sql, *args)

    def executemany(self, sql, *args):
        if self._open is not None:
            self._open.append(sql)
        return self._conn.executemany(sql, *args)

    def __getattr__(self, name):
        return getattr(self._conn, name)


def test_a_trial_is_written_in_the_same_transaction_as_its_matched_rollouts_and_links(tmp_path, scenario, logs):
    store = Store(tmp_path / "store.sqlite")
    store._conn = recorder = Recorder(store._conn)
    ingest(scenario, store, logs, matches=3, progress=False)
    with_trial = [tx for tx in recorder.transactions if any("INTO trials" in sql for sql in tx)]
    assert len(with_trial) == 2  # one per trial
    for tx in with_trial:
        assert any("INTO rollouts" in sql for sql in tx) and any("INTO matches" in sql for sql in tx)
    assert not any("INTO matches" in sql for tx in recorder.transactions if tx not in with_trial for sql in tx)


def flagged_copy(src, folder, name):
    """A copy of a stand-in log whose heel force reads 5000 N in one sample (beyond [-50, 3000] N)."""
    from test_logs_support import convert_log

    def spike(values):
        values = values.copy()
        values[len(values) // 2] = 5000.0
        return values

    return convert_log(src, folder / f"{name}.csv", {"heel_fz": spike})


@pytest.fixture(scope="module")
def mixed_store(tmp_path_factory, scenario, logs):
    """A store with the two stand-in trials, a copy of one with a flagged heel force, and a ROS 2 bag whose
    onset cannot be placed (a still log: nothing like the push in it)."""
    from test_logs_bag import BAG_TABLE, write_bag

    folder = tmp_path_factory.mktemp("mixed")
    bag_scenario = make_scenario(folder / "sc", append=BAG_TABLE)
    bag = write_bag(folder / "still_bag", bag_scenario, n=1600)
    flagged = flagged_copy(logs[1], folder, "flagged")
    path = folder / "store.sqlite"
    with Store(path) as store:
        summary = ingest(bag_scenario, store, [*logs, flagged, bag], matches=3, progress=False)
    assert not summary.failed, summary.failed
    return bag_scenario, path, summary


def test_an_unusual_value_and_an_unplaced_onset_are_stored_and_said_at_ingest(mixed_store):
    _, _, summary = mixed_store
    flagged, bag = summary.stored[2], summary.stored[3]
    assert any("heel_force: 1 sample(s) beyond the plausible range" in f for f in flagged.flags)
    assert "onset not placed" in bag.alignment and any("left out of the shift" in w for w in bag.warnings)


def test_shift_leaves_out_the_unplaced_trial_with_the_reason_and_flagged_channels_on_request(mixed_store):
    from gapgauge.app.shift import assess_shift

    sc, path, summary = mixed_store
    bag_id, flagged_id = summary.stored[3].trial_id, summary.stored[2].trial_id
    kept = assess_shift(sc, path, seed=0)
    assert bag_id not in kept.trial_ids and flagged_id in kept.trial_ids
    assert any(f"trial {bag_id} was left out" in n and "give disturbance_at" in n for n in kept.notes)
    assert any(f"{flagged_id} (heel_force)" in n for n in kept.notes)
    row = kept.trial_ids.index(flagged_id)
    names = list(sc.features.names)
    assert np.isfinite(kept.hardware_values[row, names.index("cop_path_length")])
    dropped = assess_shift(sc, path, seed=0, leave_out_flagged=True)
    assert dropped.leave_out_flagged and np.isnan(dropped.hardware_values[row, names.index("cop_path_length")])
    assert np.isfinite(dropped.hardware_values[row, names.index("peak_com_excursion")])  # reads com_x only
    assert any(f"trial {flagged_id}:" in n and "cop_path_length" in n for n in dropped.notes)


def test_cli_info_lists_the_flagged_and_the_unplaced_trials(mixed_store):
    _, path, summary = mixed_store
    result = CliRunner().invoke(main, ["info", "--store", str(path)])
    assert result.exit_code == 0, result.output
    text = " ".join(result.output.split())
    # the still bag is flagged too: its constant joint torques are far from the simulation's
    assert "2 flagged, 1 not placed in time" in text, [i.flags for i in summary.stored]
    assert "flagged.csv" in text and "still_bag" in text and "not placed" in text
