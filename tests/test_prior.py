"""fit_prior() on a real store holding a synthetic sweep and synthetic trials of push_recovery.

The synthetic truth is known: the simulated objective is a smooth bowl in the unit cube, the hardware
objective is ``RHO * simulation + OFFSET`` (the Kennedy-O'Hagan model with a constant discrepancy),
and the margin of stability is a plane.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import numpy as np
import pytest

from gapgauge.app.prior import current_prior, fit_prior, load_prior, read_prior_data
from gapgauge.compare.prior import PriorFit
from gapgauge.compare.prior import fit_prior as fit_prior_data
from gapgauge.errors import ModelError
from gapgauge.records import RolloutBatch, TrialRecord
from gapgauge.scenario import load_scenario
from gapgauge.store import Store

SCENARIO_PATH = Path(__file__).resolve().parents[1] / "scenarios" / "push_recovery.toml"
RHO, OFFSET = 1.0, 0.3
N_SIM = 200


def sim_objective(U: np.ndarray) -> np.ndarray:
    return 2.0 * (U[:, 0] - 0.6) ** 2 + 1.5 * (U[:, 1] - 0.4) ** 2 + 0.5 * U[:, 2] + 1.0


def margin(U: np.ndarray) -> np.ndarray:
    return 0.05 + 0.1 * (U[:, 0] - 0.3)  # m: negative (a fall) for U_0 below about -0.2, i.e. nowhere


def make_store(path: Path, n_trials: int, seed: int = 0) -> tuple[object, Store]:
    scenario = load_scenario(SCENARIO_PATH)
    store = Store(path)
    rng = np.random.default_rng(seed)
    U = rng.uniform(size=(N_SIM, scenario.dim))
    params = scenario.from_unit(U)
    status = np.array(["ok"] * N_SIM, dtype=object)
    status[:20] = "fell"
    status[20:25] = "diverged"
    objective = sim_objective(U) + 0.02 * rng.normal(size=N_SIM)
    objective[:20] = scenario.objective.fall_value
    objective[20:25] = np.nan
    features = {name: np.zeros(N_SIM) for name in scenario.features.names}  # the store wants them all
    features.update({"margin_of_stability": margin(U) + 0.005 * rng.normal(size=N_SIM),
                     "fell": (status == "fell").astype(float)})
    # a body that fell ends far outside its base of support (push_recovery sweeps: about -1 m)
    features["margin_of_stability"][:20] = -0.8 + 0.1 * rng.normal(size=20)
    features["margin_of_stability"][20:25] = np.nan
    run = store.start_run("sweep", scenario, seed=seed, design="sobol", planned=N_SIM, nominal=False)
    store.write_rollouts(run, RolloutBatch(
        indices=np.arange(N_SIM), params=params, physics=np.ones((N_SIM, 6)),
        physics_names=tuple(r.name for r in scenario.physics), status=status,
        reason=np.array([""] * N_SIM, dtype=object), objective=objective, features=features))
    add_trials(scenario, store, range(n_trials), rng, seed)
    return scenario, store


def add_trials(scenario, store: Store, numbers: range, rng: np.random.Generator, seed: int = 0) -> None:
    """Synthetic hardware trials inside the safe bounds: objective RHO * simulation + OFFSET plus noise."""
    safe = scenario.to_unit(scenario.bounds(safe=True).T).T
    for i in numbers:
        u = rng.uniform(safe[:, 0], safe[:, 1])[None]
        x = scenario.from_unit(u)[0]
        store.add_trial(TrialRecord(
            scenario_hash=scenario.content_hash, source_path=f"trial_{i}.csv", sha256=f"{seed}-{i}",
            params=scenario.params_to_mapping(x), robot_id="test", recorded_at="2024-01-01T00:00:00Z",
            outcome="stood", notes="", synthetic=True,
            features={"margin_of_stability": float(margin(u)[0]), "fell": 0.0},
            objective=float(RHO * sim_objective(u)[0] + OFFSET + 0.02 * rng.normal())))


@pytest.fixture(scope="module")
def fitted(tmp_path_factory: pytest.TempPathFactory):
    scenario, store = make_store(tmp_path_factory.mktemp("prior") / "store.sqlite", n_trials=6)
    return scenario, store, fit_prior(scenario, store, seed=0)


def test_prior_without_a_sweep_says_which_command_fills_the_store(tmp_path: Path) -> None:
    scenario = load_scenario(SCENARIO_PATH)
    with pytest.raises(ModelError, match="gapgauge sweep"):
        fit_prior(scenario, Store(tmp_path / "empty.sqlite"))


def test_prior_uses_standing_rollouts_for_the_objective_and_all_measured_ones_for_falls(fitted) -> None:
    _, _, prior = fitted
    assert prior.n_sim == N_SIM - 25  # 20 fell and 5 diverged left out of the objective model
    assert prior.n_sim_fall_model == N_SIM - 5  # fallen rollouts kept, diverged ones not
    assert prior.n_diverged == 5
    assert any("diverged" in note for note in prior.notes)
    assert prior.n_hardware == 6
    # N_SIM = 200 standing rollouts is below multifidelity.SPARSE_THRESHOLD (500): the exact GP
    assert prior.simulation_level == "ExactGP"


def test_the_stored_prior_json_reads_back_as_the_same_result(fitted) -> None:
    # the store's typed-result path (store.load_result) reads the prior's row without its models
    scenario, store, prior = fitted
    stored = store.load_result(PriorFit, scenario.content_hash)
    assert stored.to_dict() == prior.to_dict()
    assert stored.objective_model is None
    assert {"rho", "rho_interval", "fit_seconds", "discrepancy_scale", "loo", "simulation_key"} <= set(prior.to_dict())
    for model in ("multi_fidelity", "hardware_only", "simulation_only"):
        assert set(stored.loo[model]) == {"rmse", "log_predictive_density"}


def test_prior_finds_the_constructed_rho_within_its_interval(fitted) -> None:
    # built with hardware = 1.0 * simulation + 0.3 (Kennedy-O'Hagan with a constant discrepancy)
    _, _, prior = fitted
    low, high = prior.rho_interval
    assert low < RHO < high


def test_prior_predicts_held_out_hardware_better_than_hardware_alone(fitted) -> None:
    # leave-one-out over 6 trials in 13 dimensions: a GP on the trials alone cannot know the bowl;
    # the simulation level does, and the prior adds the offset
    _, _, prior = fitted
    assert prior.loo["multi_fidelity"]["rmse"] < prior.loo["hardware_only"]["rmse"]
    assert prior.loo["multi_fidelity"]["rmse"] < prior.loo["simulation_only"]["rmse"]


def test_stored_prior_predicts_exactly_like_the_fitted_one(fitted) -> None:
    scenario, store, prior = fitted
    loaded = load_prior(scenario, store)
    X = scenario.from_unit(np.random.default_rng(5).uniform(size=(20, scenario.dim)))
    np.testing.assert_array_equal(loaded.predict(X)[0], prior.predict(X)[0])
    np.testing.assert_array_equal(loaded.predict(X)[1], prior.predict(X)[1])
    np.testing.assert_array_equal(loaded.fall_probability(X), prior.fall_probability(X))
    assert loaded.objective_model.log_marginal_likelihood() == prior.objective_model.log_marginal_likelihood()
    assert loaded.rho == prior.rho


def test_load_prior_before_any_fit_says_to_run_prior(tmp_path: Path) -> None:
    scenario = load_scenario(SCENARIO_PATH)
    with pytest.raises(ModelError, match="gapgauge prior"):
        load_prior(scenario, Store(tmp_path / "empty.sqlite"))


def test_a_new_trial_refits_only_the_hardware_level(tmp_path: Path) -> None:
    # issue 12, bug 8: with the sweep unchanged the stored simulation level is reused; the result is the
    # one a full fit from scratch gives (the simulation level's fit is deterministic given the seed)
    scenario, store = make_store(tmp_path / "store.sqlite", n_trials=3, seed=3)
    first = fit_prior(scenario, store, seed=0)
    assert current_prior(scenario, store).fit_seconds == first.fit_seconds  # nothing changed: the stored fit
    add_trials(scenario, store, range(3, 4), np.random.default_rng(9), seed=3)
    calls: list[tuple[str, int, int]] = []
    second = current_prior(scenario, store, progress=lambda *call: calls.append(call))
    assert second.simulation_reused and second.n_hardware == first.n_hardware + 1
    assert second.simulation_key == first.simulation_key and second.hardware_key != first.hardware_key
    for new, old in ((second.objective_model, first.objective_model),
                     (second.fall_model.model_, first.fall_model.model_)):
        np.testing.assert_array_equal(new.low_.kernel_.theta, old.low_.kernel_.theta)
        assert new.low_.noise_ == old.low_.noise_
        assert new.X_high_.shape[0] == old.X_high_.shape[0] + 1
    assert second.rho != first.rho
    assert [(done, total) for _, done, total in calls] == [(1, 3), (2, 3), (3, 3)]
    scratch = fit_prior_data(scenario, read_prior_data(scenario, store), seed=0)
    X = scenario.from_unit(np.random.default_rng(6).uniform(size=(10, scenario.dim)))
    for a, b in zip(second.predict(X), scratch.predict(X), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(second.fall_probability(X), scratch.fall_probability(X), rtol=1e-10, atol=1e-12)


def test_a_new_trial_is_answered_without_reading_the_sweep(tmp_path: Path, monkeypatch) -> None:
    # issue 19: the store's run counts say the sweep is unchanged, so its 10^5-10^6 rows are neither read
    # nor hashed again; the answer is still the full fit's (outside check: a fit from scratch, same seed)
    scenario, store = make_store(tmp_path / "store.sqlite", n_trials=3, seed=4)
    first = fit_prior(scenario, store, seed=0)
    add_trials(scenario, store, range(3, 4), np.random.default_rng(2), seed=4)

    def refuse(*args, **kwargs):
        raise AssertionError("the sweep's rows were read")

    with monkeypatch.context() as patch:
        patch.setattr(Store, "rollouts", refuse)
        second = current_prior(scenario, store)
        again = fit_prior(scenario, store, seed=0)  # the prior job too
    assert second.simulation_reused and again.simulation_reused
    assert second.n_hardware == first.n_hardware + 1 and second.sweep_state == first.sweep_state
    scratch = fit_prior_data(scenario, read_prior_data(scenario, store), seed=0)
    assert (second.simulation_key, second.n_sim, second.n_sim_fall_model) == (
        scratch.simulation_key, scratch.n_sim, scratch.n_sim_fall_model)
    assert second.simulation_notes == scratch.simulation_notes
    X = scenario.from_unit(np.random.default_rng(8).uniform(size=(10, scenario.dim)))
    for a, b in zip(second.predict(X), scratch.predict(X), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(second.fall_probability(X), scratch.fall_probability(X), rtol=1e-10, atol=1e-12)


def test_a_sweep_that_grew_is_read_again_and_its_simulation_level_refitted(tmp_path: Path) -> None:
    scenario, store = make_store(tmp_path / "store.sqlite", n_trials=2, seed=5)
    first = current_prior(scenario, store)
    run = store.start_run("sweep", scenario, seed=99, design="sobol", planned=40, nominal=False)
    extra = store.rollouts(scenario.content_hash).subset(slice(30, 70))  # stood: rows 25 on are ok
    store.write_rollouts(run, RolloutBatch(np.arange(40), extra.params, extra.physics, extra.physics_names,
                                           extra.status, extra.reason, extra.objective, extra.features))
    second = current_prior(scenario, store)
    with sqlite3.connect(tmp_path / "store.sqlite") as conn:  # read past the store: what the prior must use
        standing = conn.execute("SELECT COUNT(*) FROM rollouts WHERE status = 'ok'").fetchone()[0]
    assert not second.simulation_reused and second.sweep_state != first.sweep_state
    assert (first.n_sim, second.n_sim) == (N_SIM - 25, standing) and standing == N_SIM - 25 + 40


def test_the_sweep_key_changes_when_a_sweep_row_is_added_and_only_then(tmp_path: Path) -> None:
    scenario, store = make_store(tmp_path / "store.sqlite", n_trials=0, seed=6)
    h = scenario.content_hash
    key = store.rollouts_state(h)
    sweep_run = store.runs(h, kind="sweep")[0].id
    stored = store.rollouts(h)
    def count() -> int:  # read past the store, with sqlite3
        with sqlite3.connect(tmp_path / "store.sqlite") as conn:
            return conn.execute("SELECT COUNT(*) FROM rollouts").fetchone()[0]

    store.write_rollouts(sweep_run, stored.subset(slice(0, 10)))  # already stored: INSERT OR IGNORE keeps them
    assert count() == N_SIM and store.rollouts_state(h) == key
    match = store.start_run("match", scenario, seed=1, design="match", planned=5, nominal=False)
    store.write_rollouts(match, stored.subset(slice(0, 5)))  # another kind of run: not the sweep's rows
    assert count() == N_SIM + 5 and store.rollouts_state(h) == key
    grown = store.start_run("sweep", scenario, seed=7, design="sobol", planned=1, nominal=False)
    store.write_rollouts(grown, stored.subset(slice(0, 1)))
    assert count() == N_SIM + 5 + 1 and store.rollouts_state(h) != key
