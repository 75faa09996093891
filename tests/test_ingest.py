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
