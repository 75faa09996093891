"""The stop rule (gapgauge.compare.stop): the probability that the current best is within epsilon of the
best, against closed forms and a direct Monte Carlo, and its place in the propose job and command."""

from __future__ import annotations

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.stats import beta, norm
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern

from gapgauge.app.prior import current_prior
from gapgauge.app.propose import propose
from gapgauge.cli import main
from gapgauge.compare.budget import candidate_set, loo_variance_scale
from gapgauge.compare.propose import Proposals
from gapgauge.compare.stop import (
    DRAW_BATCH,
    StopRule,
    check_stop_options,
    estimate_probability,
    regret_probability,
    stop_rule,
)
from gapgauge.errors import ModelError
from gapgauge.scenario import load_scenario
from gapgauge.store import Store
from test_prior import SCENARIO_PATH, make_store


def test_two_independent_normals_match_the_closed_form():
    # with two points, regret = f1 - min(f1, f2) = max(0, f1 - f2), so
    # P(regret <= eps) = P(f1 - f2 <= eps) = Phi((eps - (mu1 - mu2)) / sqrt(s1^2 + s2^2)) (scipy.stats.norm)
    mean, sd = np.array([0.3, 0.5]), np.array([0.2, 0.1])
    chol = np.diag(sd)
    for eps in (0.0, 0.05, 0.2):
        exact = norm.cdf((eps - (mean[0] - mean[1])) / np.hypot(*sd))
        # the level at the exact value keeps the sequential test from settling early: all draws are used
        p, interval, decided, draws, _ = estimate_probability(mean, chol, 0, eps, exact, np.random.default_rng(1),
                                                              max_draws=8192)
        assert abs(p - exact) <= 4.0 * np.sqrt(exact * (1 - exact) / draws) + 1e-9
        assert interval[0] <= exact <= interval[1]


def test_gp_posterior_on_a_grid_matches_direct_monte_carlo():
    # a GP posterior on a 1-D grid (scikit-learn, fixed Matern 5/2 kernel); the reference is a direct
    # Monte Carlo of P(f[i*] - min f <= eps) with numpy's own multivariate normal sampler (SVD-based)
    x = np.linspace(0.0, 1.0, 60)[:, None]
    X = np.array([[0.1], [0.35], [0.6], [0.9]])
    y = np.sin(6.0 * X[:, 0])
    kernel = ConstantKernel(1.0, "fixed") * Matern(0.25, "fixed", nu=2.5)
    gp = GaussianProcessRegressor(kernel, alpha=1e-4, optimizer=None).fit(X, y)
    mean, cov = gp.predict(x, return_cov=True)
    cov = 0.5 * (cov + cov.T) + 1e-10 * np.eye(x.shape[0])
    incumbent = int(np.argmin(np.abs(x[:, 0] - 0.9)))  # the trial at 0.9 has the lowest observation
    eps = 0.2
    ref_draws = np.random.default_rng(2).multivariate_normal(mean, cov, size=200_000, method="svd")
    exact = float(np.mean(ref_draws[:, incumbent] - ref_draws.min(axis=1) <= eps))
    p, _, _, draws, _ = estimate_probability(mean, np.linalg.cholesky(cov), incumbent, eps, exact,
                                             np.random.default_rng(3), max_draws=4096)
    assert 0.05 < exact < 0.95
    assert abs(p - exact) <= 4.0 * np.sqrt(exact * (1 - exact) / draws)


def test_the_decision_waits_until_the_exact_interval_clears_the_level():
    # Clopper-Pearson (1934) limits from the beta distribution: Beta(a/2; k, n-k+1), Beta(1-a/2; k+1, n-k)
    k, n, batches = 93, 100, 4
    a = 0.05 / batches
    low, high = beta.ppf(a / 2, k, n - k + 1), beta.ppf(1 - a / 2, k + 1, n - k)
    regret = np.r_[np.zeros(k), np.ones(n - k)]
    p, interval, decided = regret_probability(regret, 0.5, 0.9, batches)
    assert p == pytest.approx(0.93)
    assert interval == pytest.approx((low, high), abs=1e-9)
    assert decided == (1 if low >= 0.9 else -1 if high < 0.9 else 0) == 0  # 0.93 of 100 does not settle 0.9
    assert regret_probability(np.zeros(400), 0.5, 0.9, batches)[2] == 1
    assert regret_probability(np.r_[np.zeros(300), np.ones(100)], 0.5, 0.9, batches)[2] == -1


def test_a_certain_incumbent_at_the_minimum_stops_after_one_batch():
    # a nearly deterministic surface whose minimum is the incumbent: regret 0 in every draw
    mean = np.array([0.0, 1.0, 2.0])
    p, interval, decided, draws, best = estimate_probability(mean, 1e-6 * np.eye(3), 0, 0.01, 0.9,
                                                             np.random.default_rng(0))
    assert (p, decided, draws) == (1.0, 1, DRAW_BATCH)
    assert best == pytest.approx(0.0, abs=1e-4)


def test_stop_options_are_refused_by_name():
    with pytest.raises(ModelError, match="stop_epsilon"):
        check_stop_options(0.0, 0.9)
    with pytest.raises(ModelError, match="stop_level"):
        check_stop_options(None, 1.0)


@pytest.fixture(scope="module")
def store_with_trials(tmp_path_factory: pytest.TempPathFactory):
    path = tmp_path_factory.mktemp("stop") / "store.sqlite"
    scenario, store = make_store(path, n_trials=4, seed=3)
    return scenario, store, path


def test_propose_job_stores_the_stop_rule_with_the_proposals(store_with_trials):
    scenario, store, _ = store_with_trials
    result = propose(scenario, store, seed=0, stop_epsilon=0.05, stop_level=0.8)
    assert isinstance(result.stop, StopRule)
    assert (result.stop.epsilon, result.stop.level) == (0.05, 0.8)
    assert 0.0 <= result.stop.probability <= 1.0
    assert result.stop.interval[0] <= result.stop.probability <= result.stop.interval[1]
    assert result.stop.stop == (result.stop.decision.startswith("stop"))
    assert "probability the current best is within 0.05 of the best" in result.stop.decision
    assert set(result.stop.incumbent) == set(scenario.parameter_names)
    stored = store.load_result(Proposals, scenario.content_hash)
    assert stored.stop == result.stop


def test_stop_rule_default_epsilon_is_the_stated_share_of_the_simulated_spread(store_with_trials):
    scenario, store, _ = store_with_trials
    prior = current_prior(scenario, store, seed=0)
    rule = stop_rule(prior, seed=5)
    # the same Sobol points as the rule's (seeded alike): 5% of median minus best of the simulation level
    low = prior.objective_model.predict_low(candidate_set(scenario, 1024, np.random.default_rng(5)))
    assert rule.epsilon == pytest.approx(0.05 * (np.median(low) - np.min(low)))
    assert "5% of the spread" in rule.epsilon_rule


def test_stop_rule_widens_the_posterior_but_never_narrows_it(store_with_trials):
    # the leave-one-out scale of these trials is below 1 (the model is wider than its residuals): the
    # rule keeps the model's own posterior; with calibrate=False it is the model's own by definition
    scenario, store, _ = store_with_trials
    prior = current_prior(scenario, store, seed=0)
    scale, z = loo_variance_scale(prior.objective_model)
    assert scale < 1.0 and z.size == 4
    assert stop_rule(prior, seed=1).variance_scale == 1.0
    assert stop_rule(prior, seed=1, calibrate=False).variance_scale == 1.0


def test_propose_command_prints_the_stop_line(store_with_trials):
    _, _, path = store_with_trials
    run = CliRunner().invoke(main, ["propose", str(SCENARIO_PATH), "--store", str(path), "--stop-epsilon", "0.1",
                                    "--stop-level", "0.85"])
    assert run.exit_code == 0, run.output
    text = " ".join(run.output.split())  # the console wraps long lines
    assert "probability the current best is within 0.1 of the best (rule: stop at 0.85)" in text
    with Store(path, create=False) as store:
        assert store.load_result(Proposals, load_scenario(SCENARIO_PATH).content_hash).stop is not None
