"""End to end on the stand-in robot: stand-in logs -> ingest (16 matches) -> assess_shift / gapgauge shift.

The sweep is not built: the shift assessment reads only the trials and their matched simulations.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from gapgauge.app.ingest import ingest
from gapgauge.app.shift import assess_shift
from gapgauge.cli import main
from gapgauge.scenario import load_scenario
from gapgauge.sim.standin import run_standin
from gapgauge.store import Store

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = ROOT / "scenarios" / "push_recovery.toml"
PROFILES = ROOT / "scenarios" / "standin"


def _store_with_trials(tmp_path: Path, profile: str):
    scenario = load_scenario(SCENARIO)
    logs = run_standin(scenario, PROFILES / f"{profile}.toml", design=5, out_dir=tmp_path / "logs", seed=1)
    store_path = tmp_path / "store.sqlite"
    store = Store(store_path)
    ingest(scenario, store, logs, matches=16, seed=0)
    return scenario, store, store_path


@pytest.fixture(scope="module")
def close_case(tmp_path_factory):
    case = _store_with_trials(tmp_path_factory.mktemp("close"), "close")
    yield case
    case[1].close()


@pytest.fixture(scope="module")
def heavy_case(tmp_path_factory):
    case = _store_with_trials(tmp_path_factory.mktemp("heavy"), "heavy_slippery")
    yield case
    case[1].close()


def test_close_standin_has_no_feature_that_does_not_carry_over(close_case):
    # close.toml runs the scenario's nominal physics with small sensor noise: the simulation is the truth.
    scenario, store, _ = close_case
    report = assess_shift(scenario, store, seed=0)
    bad = [f.name for f in report.features if f.verdict == "does_not_carry_over"]
    assert not bad, [(f.name, f.reason) for f in report.features if f.verdict == "does_not_carry_over"]


def test_heavy_slippery_standin_flags_the_joint_torque(tmp_path, heavy_case):
    # Physics: the trunk is 15% heavier than nominal (outside the randomised 0.9-1.1), so the torque that
    # holds the body up and stops the push grows with the mass; the peak joint torque must not carry over.
    scenario, store, _ = heavy_case
    report = assess_shift(scenario, store, seed=0)
    torque = report.feature("peak_joint_torque")
    assert torque.verdict != "carries_over", torque.reason


def test_heavy_slippery_standin_flags_the_work_that_grows_with_the_mass(heavy_case):
    # Physics: positive work of the joints (lifting and stopping the trunk) scales with the mass moved; a
    # trunk 15% heavier than nominal, outside the randomised 0.9-1.1, must not read as carrying over.
    scenario, store, _ = heavy_case
    report = assess_shift(scenario, store, seed=0)
    work = report.feature("positive_work")
    assert work.verdict != "carries_over", work.reason


def test_heavy_slippery_standin_leaves_the_kinematic_features_unflagged(heavy_case):
    # Physics (impulse = mass x velocity change): the trunk carries 68% of the body mass, so +15% trunk
    # mass is about +10% total mass and about 10% less centre-of-mass velocity from the same push. The
    # sweep randomises the push size by +-15% and the trunk mass by +-10%, so the kinematic features stay
    # inside the simulated spread; friction 0.6 changes nothing while the feet do not slip (no fall at
    # these safe parameter sets). None of them may be called "does not carry over".
    scenario, store, _ = heavy_case
    report = assess_shift(scenario, store, seed=0)
    for name in ("peak_com_excursion", "margin_of_stability", "recovery_time"):
        feature = report.feature(name)
        assert feature.verdict != "does_not_carry_over", (name, feature.reason)


def test_shift_command_prints_verdicts_and_writes_json_and_plots(tmp_path, close_case):
    _, _, store_path = close_case
    json_path, plots = tmp_path / "shift.json", tmp_path / "plots"
    result = CliRunner().invoke(main, ["shift", str(SCENARIO), "--store", str(store_path), "--json",
                                       str(json_path), "--plots", str(plots), "--seed", "3"])
    assert result.exit_code == 0, result.output
    assert "level 0.05" in result.output
    data = json.loads(json_path.read_text())
    assert data["seed"] == 3 and len(data["features"]) == len(load_scenario(SCENARIO).features.names)
    assert all((plots / f"shift_{f['name']}.png").read_bytes()[:4] == b"\x89PNG" for f in data["features"])


def test_shift_command_on_a_missing_store_exits_2(tmp_path):
    result = CliRunner().invoke(main, ["shift", str(SCENARIO), "--store", str(tmp_path / "none.sqlite")])
    assert result.exit_code == 2
    assert "store not found" in result.output
