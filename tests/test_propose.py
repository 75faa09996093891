"""propose() and the prior/propose commands on a real store with a synthetic sweep (see test_prior)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from gapgauge.app.prior import fit_prior
from gapgauge.app.propose import propose
from gapgauge.cli import main
from gapgauge.compare.propose import Proposal, Proposals
from gapgauge.compare.propose import propose as propose_from_prior
from gapgauge.errors import ModelError
from gapgauge.safety import CAUTION
from gapgauge.sim.standin import load_params_file
from test_prior import SCENARIO_PATH, make_store


@pytest.fixture(scope="module")
def with_trials(tmp_path_factory: pytest.TempPathFactory):
    path = tmp_path_factory.mktemp("propose") / "store.sqlite"
    scenario, store = make_store(path, n_trials=3, seed=1)
    return scenario, store, path, fit_prior(scenario, store, seed=0)


def test_proposals_stay_in_the_safe_bounds_under_the_fall_limit(with_trials) -> None:
    scenario, _, _, prior = with_trials
    result = propose_from_prior(scenario, prior, count=3, max_fall_risk=0.05, seed=0)
    safe = scenario.bounds(safe=True)
    assert len(result.proposals) == 3
    for p in result.proposals:
        assert isinstance(p, Proposal)
        x = scenario.params_from_mapping(p.params)
        assert np.all(x >= safe[:, 0]) and np.all(x <= safe[:, 1])
        assert p.fall_risk <= 0.05
        assert prior.fall_probability(x[None])[0] <= 0.05  # the model's own figure at the point


def test_a_batch_by_kriging_believer_gives_distinct_trials_and_says_so(with_trials) -> None:
    scenario, _, _, prior = with_trials
    result = propose_from_prior(scenario, prior, count=3, seed=0)
    points = np.array([scenario.params_from_mapping(p.params) for p in result.proposals])
    assert len({tuple(np.round(scenario.to_unit(points), 6)[i]) for i in range(3)}) == 3
    assert "kriging believer" in result.proposals[1].reason


def test_proposals_json_is_what_the_standin_reads(with_trials, tmp_path: Path) -> None:
    # the contract: gapgauge standin --params takes propose's {"proposals": [{"params": ...}]}
    scenario, _, _, prior = with_trials
    result = propose_from_prior(scenario, prior, count=2, seed=0)
    out = tmp_path / "proposals.json"
    result.write_json(out)
    sets = load_params_file(out)
    assert [scenario.params_from_mapping(s).tolist() for s in sets] == [
        scenario.params_from_mapping(p.params).tolist() for p in result.proposals]
    # the caution travels with the proposals (DESIGN.md section 7; the text of gapgauge.safety)
    assert json.loads(out.read_text())["caution"] == CAUTION


def test_propose_stores_its_result_for_the_report(with_trials) -> None:
    scenario, store, _, _ = with_trials
    result = propose(scenario, store, count=1, seed=4)
    stored = store.load_result(Proposals, scenario.content_hash)
    assert stored == result


def test_a_bad_count_is_refused_naming_the_argument(with_trials) -> None:
    scenario, store, _, _ = with_trials
    with pytest.raises(ModelError, match="^count must be"):
        propose(scenario, store, count=0)
    with pytest.raises(ModelError, match="^max_fall_risk must be"):
        propose(scenario, store, max_fall_risk=0.0)


def test_without_hardware_trials_proposals_come_from_the_simulation_level(tmp_path: Path) -> None:
    scenario, store = make_store(tmp_path / "store.sqlite", n_trials=0, seed=2)
    result = propose(scenario, store, count=1, seed=0)
    assert result.n_hardware == 0
    assert any("no hardware trials yet" in note for note in result.notes)
    assert len(result.proposals) == 1


def test_propose_command_prints_the_table_writes_json_and_the_caution(with_trials, tmp_path: Path) -> None:
    _, _, path, _ = with_trials
    out = tmp_path / "p.json"
    run = CliRunner().invoke(main, ["propose", str(SCENARIO_PATH), "--store", str(path), "--out", str(out)])
    assert run.exit_code == 0, run.output
    assert " ".join(CAUTION.split()) in " ".join(run.output.split())
    assert "ankle_kp" in run.output and "N m/rad" in run.output
    assert len(json.loads(out.read_text())["proposals"]) == 1


def test_prior_command_prints_rho_and_writes_the_documented_json(with_trials, tmp_path: Path) -> None:
    _, _, path, _ = with_trials
    out = tmp_path / "prior.json"
    run = CliRunner().invoke(main, ["prior", str(SCENARIO_PATH), "--store", str(path), "--json", str(out)])
    assert run.exit_code == 0, run.output
    assert "rho =" in run.output and "leave-one-out" in run.output
    data = json.loads(out.read_text())
    assert {"rho", "rho_interval", "fit_seconds", "loo"} <= set(data)
    assert set(data["loo"]) == {"multi_fidelity", "hardware_only", "simulation_only"}


def test_prior_command_on_a_store_without_a_sweep_exits_2_naming_the_sweep_command(tmp_path: Path) -> None:
    from gapgauge.scenario import load_scenario
    from gapgauge.store import Store

    Store(tmp_path / "s.sqlite").add_scenario(load_scenario(SCENARIO_PATH))
    run = CliRunner().invoke(main, ["prior", str(SCENARIO_PATH), "--store", str(tmp_path / "s.sqlite")])
    assert run.exit_code == 2
    assert "gapgauge sweep" in run.output
