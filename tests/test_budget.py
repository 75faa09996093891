"""The trial budget (gapgauge.compare.budget, gapgauge.app.budget): its Monte Carlo machinery against
outside references."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.stats import norm, qmc
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern

from gapgauge.app.budget import plan_budget
from gapgauge.cli import main
from gapgauge.compare.budget import (
    Belief,
    Beliefs,
    BudgetPlan,
    Conditioner,
    auto_level,
    budget_at,
    budget_from_beliefs,
    draw_targets,
    hardware_only_belief,
    loo_variance_scale,
    multifidelity_belief,
    reach_curve,
    reference_best,
    run_policy,
    success_cap,
    trials_to_level,
)
from gapgauge.compare.kernels import Matern52
from gapgauge.compare.multifidelity import MultiFidelityGP
from gapgauge.compare.prior import hardware_only_gp
from gapgauge.store import Store
from test_prior import SCENARIO_PATH, make_store


def branin(U: np.ndarray) -> np.ndarray:
    """Branin (Dixon and Szego 1978) on the unit square mapped to x1 in [-5, 10], x2 in [0, 15]."""
    x1, x2 = -5.0 + 15.0 * U[:, 0], 15.0 * U[:, 1]
    b, c = 5.1 / (4 * np.pi**2), 5.0 / np.pi
    return (x2 - b * x1**2 + c * x1 - 6.0) ** 2 + 10.0 * (1 - 1 / (8 * np.pi)) * np.cos(x1) + 10.0


def sobol(n_log2: int, dim: int, seed: int) -> np.ndarray:
    return qmc.Sobol(dim, scramble=True, seed=np.random.default_rng(seed)).random_base2(n_log2)


class SklearnHardwareLevel:
    """The surface of a hardware level that :func:`loo_variance_scale` uses (``X_high_``, ``y_high_``,
    ``copy_with_high``, ``predict(..., observation=True)``), on scikit-learn's GaussianProcessRegressor
    with a fixed kernel."""

    def __init__(self, kernel, noise: float, X: np.ndarray, y: np.ndarray):
        self.kernel, self.noise, self.X_high_, self.y_high_ = kernel, noise, X, y
        self.gp = GaussianProcessRegressor(kernel, alpha=noise, optimizer=None).fit(X, y)

    def copy_with_high(self, X: np.ndarray, y: np.ndarray, optimize: bool) -> SklearnHardwareLevel:
        return SklearnHardwareLevel(self.kernel, self.noise, X, y)

    def predict(self, X: np.ndarray, return_std: bool = False, observation: bool = False):
        mean, sd = self.gp.predict(X, return_std=True)
        return mean, np.sqrt(sd**2 + (self.noise if observation else 0.0))


def matern_belief(X: np.ndarray, length_scale: float, noise_var: float, mean: float = 0.0) -> Belief:
    return Belief(np.full(X.shape[0], mean), Matern52(1.0, length_scale)(X), noise_var)


def _random_search_on_branin(draws: int = 4000, T: int = 15):
    U = sobol(8, 2, 1)
    f = branin(U)
    runs = run_policy(np.tile(f, (draws, 1)), None, None, matern_belief(U, 0.3, 1e-2), None, max_trials=T,
                      objective_noise_sd=0.0, rng=3, policy="random")
    return f, runs


def test_random_search_reach_curve_matches_the_geometric_formula():
    # random search with replacement reaches a level met by a fraction q of the candidates by trial
    # n with probability 1 - (1 - q)^n exactly (geometric distribution); Branin as the surface, q
    # computed directly from it, for two levels read from the same runs (the policy never sees a target)
    f, runs = _random_search_on_branin()
    draws, T = runs.best_so_far.shape
    for level in (draw_targets(f[None], None, 0.95, None)[0], float(np.quantile(f, 0.3))):
        q = float(np.mean(f <= level))
        assert 0.0 < q < 0.4
        curve = reach_curve(trials_to_level(runs.best_so_far, level), T)
        exact = 1.0 - (1.0 - q) ** np.arange(1, T + 1)
        tolerance = 4.0 * np.sqrt(exact * (1 - exact) / draws) + 1e-9
        assert np.all(np.abs(curve - exact) <= tolerance)


def test_automatic_level_is_the_reach_share_quantile_of_the_best_after_the_horizon():
    # random search: P(best after T trials <= v) = 1 - (1 - F(v))^T with F the candidates' distribution
    # function (the minimum of T independent uniform picks); the automatic level at share 0.9 is where
    # that exact probability crosses 0.9, up to Monte Carlo error
    f, runs = _random_search_on_branin()
    draws, T = runs.best_so_far.shape
    level = auto_level(runs.best_so_far[:, -1], 0.9, 1e-9)

    def exact(v: float) -> float:
        return 1.0 - (1.0 - np.mean(f <= v + 1e-12)) ** T

    below = np.max(f[f < level - 1e-9])  # the next candidate value below the level
    error = 4.0 * np.sqrt(0.9 * 0.1 / draws)
    assert exact(level) >= 0.9 - error
    assert exact(below) <= 0.9 + error
    assert np.mean(runs.best_so_far[:, -1] <= level) >= 0.9


def test_success_cap_is_the_highest_level_at_which_the_rule_still_holds():
    # by hand from the definition: sorted objectives 0.1 .. 1.0, the rule fails at 0.6 and 0.9; at or below
    # 0.5 every rollout met it (5 of 5), at 0.6 5 of 6; with share 0.8: 0.8 (7 of 8 = 0.875; 0.9 gives 7/9)
    objective = np.array([0.5, 0.1, 0.9, 0.3, 0.6, 0.2, 0.4, 0.7, 0.8, 1.0])
    met = np.array([True, True, False, True, False, True, True, True, True, True])
    assert success_cap(objective, met, share=0.99) == 0.5
    assert success_cap(objective, met, share=0.8) == 1.0  # 8 of 10 at 1.0
    assert success_cap(objective, met, share=0.85) == 0.8
    assert success_cap(objective, np.zeros(10, dtype=bool)) is None


def test_best_the_posterior_expects_is_the_lowest_mean_within_the_fall_risk_limit():
    # fall risk of a new trial without a link: P(margin < 0) = Phi(-mu / sqrt(var + noise)) (scipy.stats.norm)
    mean = np.array([0.2, 0.5, 0.1, 0.9])
    m_mean, m_var, noise = np.array([0.02, 0.2, -0.01, 0.3]), np.full(4, 0.02**2), 0.01**2
    risk = norm.cdf(-m_mean / np.sqrt(m_var + noise))
    beliefs = Beliefs(Belief(mean, 0.01 * np.eye(4), 1e-4), Belief(mean, np.eye(4), 1e-4), 0.01,
                      margin=Belief(m_mean, np.diag(m_var), noise))
    best, feasible = reference_best(beliefs, 0.05)
    assert feasible and best == float(np.min(mean[risk <= 0.05])) == 0.5
    assert reference_best(beliefs, 0.5)[0] == 0.2  # with a looser limit the candidate at 0.2 counts


def test_leave_one_out_scale_is_the_closed_form_cross_validation_variance():
    # a GP with fixed hyperparameters: the leave-one-out residuals are y_i - mu_-i = [K^-1 y]_i / [K^-1]_ii
    # with variance 1 / [K^-1]_ii (Rasmussen and Williams 2006, eq. 5.12); Bachoc (2013): mean(z^2)
    rng = np.random.default_rng(6)
    X = rng.uniform(size=(7, 2))
    y = np.sin(4 * X[:, 0]) + X[:, 1]
    kernel, noise = ConstantKernel(1.0, "fixed") * Matern(0.4, "fixed", nu=2.5), 0.01
    model = SklearnHardwareLevel(kernel, noise, X, y)
    scale, z = loo_variance_scale(model, prior_trials=0.0)
    K_inv = np.linalg.inv(kernel(X) + noise * np.eye(7))
    z_exact = (K_inv @ y) / np.diag(K_inv) * np.sqrt(np.diag(K_inv))
    np.testing.assert_allclose(z, z_exact, rtol=1e-6)
    assert scale == pytest.approx(np.mean(z_exact**2))
    # one pseudo-trial at scale 1 shrinks it: (1 + sum z^2) / (1 + k)
    assert loo_variance_scale(model)[0] == pytest.approx((1 + np.sum(z_exact**2)) / 8)


def test_surfaces_are_drawn_with_the_scaled_covariance():
    # Var(sqrt(c) Z) = c Var(Z): the draws' variance at each point is the scale times the belief's
    U = sobol(5, 2, 4)
    belief = Belief(np.zeros(U.shape[0]), Matern52(1.0, 0.3)(U), 1e-3)
    beliefs = Beliefs(belief, belief, 0.03, objective_scale=0.25)
    draws = 4000
    objective, margin = beliefs.surfaces(draws, np.random.default_rng(0))
    assert margin is None and objective.shape == (draws, U.shape[0])
    variance = objective.var(axis=0)
    # sample variance of n normal draws: relative sd sqrt(2 / (n - 1))
    assert np.all(np.abs(variance / 0.25 - 1.0) <= 5 * np.sqrt(2 / (draws - 1)))


def test_target_is_the_stated_fraction_between_median_and_best_of_standing_candidates():
    f = np.array([[5.0, 1.0, 3.0, 4.0, 2.0, 0.0]])
    margin = np.array([[1.0, 1.0, 1.0, 1.0, 1.0, -1.0]])  # the 0.0 candidate falls: not achievable
    # standing values 5, 1, 3, 4, 2: median 3, best 1; 95% of the way: 3 - 0.95 * 2 = 1.1
    assert draw_targets(f, margin, 0.95, None)[0] == pytest.approx(1.1)
    assert draw_targets(f, margin, 0.95, 2.5)[0] == 2.5


def test_budget_is_the_least_trial_count_reaching_the_level():
    trials = np.array([1, 2, 2, 3, 5, 21, 21, 4, 2, 1])  # 21: not reached within 20
    curve = reach_curve(trials, 20)
    assert curve[:5].tolist() == [0.2, 0.5, 0.6, 0.7, 0.8]
    assert (budget_at(curve, 0.5), budget_at(curve, 0.8), budget_at(curve, 0.95)) == (2, 5, None)


def test_sequential_conditioning_matches_scikit_learn_gp_posterior():
    # conditioning one observation at a time (growing Cholesky factor) equals the batch GP posterior
    # of scikit-learn's GaussianProcessRegressor with the same fixed kernel and noise
    X = sobol(6, 2, 2)
    y_at = np.array([3, 17, 40, 8, 55])
    y = np.sin(6 * X[y_at, 0]) + X[y_at, 1]
    ell, noise = 0.35, 0.01
    cond = Conditioner(matern_belief(X, ell, noise), draws=1, max_observations=len(y_at))
    for i, value in zip(y_at, y, strict=True):
        cond.observe(np.array([i]), np.array([value]), np.array([True]))
    sk = GaussianProcessRegressor(ConstantKernel(1.0, "fixed") * Matern(ell, "fixed", nu=2.5), alpha=noise,
                                  optimizer=None).fit(X[y_at], y)
    mean, sd = sk.predict(X, return_std=True)
    np.testing.assert_allclose(cond.mean[0], mean, atol=1e-8)
    np.testing.assert_allclose(np.sqrt(cond.var[0]), sd, atol=1e-7)


def test_cold_start_belief_with_three_trials_is_scikit_learn_gp_posterior():
    # the cold start's belief after 3 trials is the posterior of its GP with the fitted hyperparameters:
    # scikit-learn's GaussianProcessRegressor with normalize_y (same standardisation), the kernel fixed
    # at those values, the constant mean ~ N(0, 1) as ConstantKernel(1) added, the noise as alpha
    rng = np.random.default_rng(4)
    points = rng.uniform(size=(15, 3))
    y_known = points[:3] @ np.array([1.0, -2.0, 0.5]) + 0.1 * rng.standard_normal(3)
    belief = hardware_only_belief(points, 3, y_known, (0.0, 1.0), seed=0)
    fitted = hardware_only_gp(3, 0).fit(points[:3], y_known, basis=np.ones((3, 1)))
    kernel = (ConstantKernel(fitted.kernel_.variance, "fixed") * Matern(fitted.kernel_.length_scale, "fixed", nu=2.5)
              + ConstantKernel(1.0, "fixed"))
    sk = GaussianProcessRegressor(kernel, alpha=fitted.noise_, normalize_y=True, optimizer=None)
    sk.fit(points[:3], y_known)
    mean, cov = sk.predict(points, return_cov=True)
    np.testing.assert_allclose(belief.mean, mean, atol=1e-8)
    np.testing.assert_allclose(belief.cov, cov, atol=1e-8)
    assert belief.n_known == 3


def test_multifidelity_covariance_agrees_with_its_predictive_sd():
    # Forrester et al. (2007) functions and their worked design: the covariance built from the fitted
    # levels has on its diagonal the variance that MultiFidelityGP.predict reports
    def high(x):
        return (6 * x - 2) ** 2 * np.sin(12 * x - 4)

    x_low, x_high = np.linspace(0, 1, 11), np.array([0.0, 0.4, 0.6, 1.0])
    model = MultiFidelityGP(random_state=0).fit(
        x_low[:, None], 0.5 * high(x_low) + 10 * (x_low - 0.5) - 5, x_high[:, None], high(x_high)
    )
    belief, check = multifidelity_belief(model, np.linspace(0, 1, 41)[:, None])
    assert check < 1e-6
    assert np.all(np.linalg.eigvalsh(belief.cov) > -1e-8 * np.max(np.diag(belief.cov)))


def _one_dimensional_problem(prior_knows: bool, seed: int = 0):
    x = np.linspace(0, 1, 101)[:, None]
    f = (x[:, 0] - 0.83) ** 2  # optimum at x = 0.83
    if prior_knows:  # the prior's mean is the surface itself and it is nearly sure of it
        belief = Belief(f.copy(), 1e-4 * Matern52(1.0, 0.2)(x), 1e-6)
    else:
        belief = hardware_only_belief(x, 0, np.zeros(0), (float(np.mean(f)), float(np.std(f))), seed)
    return x, f, belief


def test_prior_that_favours_the_optimum_reaches_the_target_sooner_than_a_cold_start():
    x, f, prior = _one_dimensional_problem(True)
    _, _, cold = _one_dimensional_problem(False)
    target = draw_targets(f[None], None, 0.99, None)
    kwargs = dict(max_trials=20, objective_noise_sd=1e-3, rng=0)
    with_prior = run_policy(f[None], None, target, prior, None, **kwargs).trials_to_target[0]
    cold_start = run_policy(f[None], None, target, cold, None, **kwargs).trials_to_target[0]
    assert with_prior == 1
    assert cold_start > with_prior


def _synthetic_plan(seed: int, draws: int = 48, **target) -> BudgetPlan:
    U = sobol(7, 2, 5)
    mean = branin(U) / 50.0
    beliefs = Beliefs(
        objective=Belief(mean, 0.05 * Matern52(1.0, 0.3)(U), 1e-3),
        cold_objective=hardware_only_belief(U, 0, np.zeros(0), (float(np.mean(mean)), float(np.std(mean))), 1),
        objective_noise_sd=0.03,
        margin=Belief(0.3 - 0.4 * U[:, 0] * U[:, 1], 0.01 * Matern52(1.0, 0.4)(U), 1e-4),
        cold_margin=hardware_only_belief(U, 0, np.zeros(0), (0.2, 0.2), 1),
        margin_noise_sd=0.01,
    )
    return budget_from_beliefs(beliefs, max_trials=12, draws=draws, seed=seed, **target)


def test_budget_is_reproducible_from_its_seed():
    a, b, c = _synthetic_plan(7).to_dict(), _synthetic_plan(7).to_dict(), _synthetic_plan(8).to_dict()
    assert a == b
    assert a["with_prior"]["trials_to_target"] != c["with_prior"]["trials_to_target"]


def test_default_target_gives_a_finite_budget_and_says_what_it_chose():
    plan = _synthetic_plan(0, draws=64)
    t = plan.target
    assert t.kind == "auto" and t.level is not None
    assert t.reach_share >= 0.9  # the level is the one 90% of the runs with the prior reach (rounded up)
    assert plan.with_prior.reached_fraction == pytest.approx(t.reach_share)
    assert plan.with_prior.p80 is not None and plan.with_prior.book is not None
    assert t.within == pytest.approx(t.level - t.reference_best)
    assert "90%" in t.why and "objective <=" in t.sentence
    assert plan.with_prior.beyond is None


def test_beyond_the_horizon_names_a_looser_target_that_gives_a_number():
    plan = _synthetic_plan(0, draws=64, target_fraction=1.0)  # each draw's own best: rarely reached
    arm = plan.with_prior if plan.with_prior.book is None else plan.cold_start
    assert arm.book is None and "target_value" in arm.beyond
    looser = float(arm.beyond.split("target_value ")[1].split(" ")[0])
    # the same draws and runs (same seed; the policy never sees the target) with that level: a number
    again = _synthetic_plan(0, draws=64, target_value=looser)
    arm_again = again.with_prior if arm is plan.with_prior else again.cold_start
    assert arm_again.book is not None and arm_again.reached_fraction >= 0.8


def test_budget_plan_round_trips_through_strict_json_with_ordered_percentiles():
    plan = _synthetic_plan(0, draws=64)
    data = json.loads(json.dumps(plan.to_dict(), allow_nan=False))  # strict JSON (RFC 8259): no NaN
    assert (data["kind"], data["schema_version"]) == ("budget", 2)
    assert BudgetPlan.from_dict(data) == plan
    for arm in (plan.with_prior, plan.cold_start):
        p = [v if v is not None else np.inf for v in (arm.p50, arm.p80, arm.p95)]
        assert p[0] <= p[1] <= p[2]
    assert [c.trial for c in plan.curve] == list(range(1, 13))
    assert plan.sentence.startswith("Book ")


@pytest.mark.slow
def test_budget_job_on_a_small_real_store_stores_the_plan_it_returns(tmp_path):
    from gapgauge.app.ingest import ingest
    from gapgauge.app.sweep import sweep
    from gapgauge.scenario import load_scenario
    from gapgauge.sim.standin import run_standin
    from gapgauge.store import Store

    root = Path(__file__).resolve().parents[1]
    path = root / "scenarios" / "push_recovery.toml"
    store_path = tmp_path / "s.sqlite"
    sweep(path, 160, store=store_path, seed=0, workers=2)
    logs = run_standin(path, root / "scenarios" / "standin" / "close.toml", design=3, out_dir=tmp_path, seed=0)
    ingest(path, store_path, logs, matches=2, seed=0)
    calls: list[tuple[str, int, int]] = []
    plan = plan_budget(path, store_path, draws=16, max_trials=6, n_candidates=512,
                       progress=lambda *call: calls.append(call))
    assert plan.draws == 16 and len(plan.curve) == 6
    assert plan.sentence.startswith("Book ") and "without it" in plan.sentence
    # the budget's own stages (the prior's fit reports too): each arm's simulated trials, ending at the total
    assert [c for c in calls if c[0].startswith("budget:") and c[1] == c[2]] == [
        ("budget: simulated trials, with the prior", 6, 6), ("budget: simulated trials, cold start", 6, 6)
    ]
    with Store(store_path, create=False) as store:
        stored = store.load_result(BudgetPlan, load_scenario(path).content_hash)
    assert stored == plan


@pytest.fixture(scope="module")
def synthetic_store(tmp_path_factory: pytest.TempPathFactory):
    path = tmp_path_factory.mktemp("budget") / "store.sqlite"
    scenario, store = make_store(path, n_trials=4, seed=2)
    return scenario, store, path


def test_budget_job_states_the_success_rule_and_the_sweep_evidence_for_it(synthetic_store):
    scenario, store, _ = synthetic_store
    plan = plan_budget(scenario, store, draws=24, max_trials=8, seed=1, n_candidates=512)
    # the scenario's [success] rule (push_recovery: recovery_time <= 2.0 s) is part of the target; the
    # synthetic sweep's rollouts all recover at once (features 0), so the sweep shows it holds at the level
    assert plan.target.success_rule == "recovery_time <= 2"
    assert plan.target.success_share == 1.0
    assert "meets the success rule (recovery_time <= 2)" in plan.target.sentence
    assert plan.objective_scale != 1.0 and any("leave-one-out" in n for n in plan.notes)
    with Store(synthetic_store[2], create=False) as reopened:
        assert reopened.load_result(BudgetPlan, scenario.content_hash) == plan


def test_budget_command_says_what_it_chose_and_why(synthetic_store):
    _, _, path = synthetic_store
    run = CliRunner().invoke(main, ["budget", str(SCENARIO_PATH), "--store", str(path), "--draws", "24",
                                    "--max-trials", "8", "--candidates", "512", "--within", "0.05"])
    assert run.exit_code == 0, run.output
    text = " ".join(run.output.split())  # the console wraps long lines
    assert "target: A trial that does not fall" in text and "within 0.05 of" in text
    assert "why: Given as a distance above the best the posterior expects." in text
    assert "Book " in text and "without it" in text
    both = CliRunner().invoke(main, ["budget", str(SCENARIO_PATH), "--store", str(path), "--within", "0.1",
                                     "--target-value", "1.0"])
    assert both.exit_code == 2 and "at most one of" in both.output
