"""The stop rule: the probability that the current best trial is within epsilon of the best reachable.

After each hardware trial, tuning may stop when the model is sure enough that the incumbent is good
enough: ``P(f(x*) - min_{x in safe bounds} f(x) <= epsilon) >= level``, a probabilistic regret bound
(Wilson 2024, "Stopping Bayesian optimization with probabilistic regret bounds", NeurIPS), for
minimisation. Here:

- ``f`` is the latent hardware objective, ``x*`` the incumbent of ``gapgauge propose`` (the trial that
  stood with the lowest posterior mean);
- the probability is estimated from joint posterior draws of the objective and the margin of stability
  (:mod:`gapgauge.compare.budget.belief`) on a finite set: ``n_candidates`` scrambled Sobol points of
  the safe bounds, a local cloud around the incumbent (where its nearest rivals are) and the trials.
  The minimum is over the points on which the draw stands (its fall chance below one half); the trials
  stood. A finite set misses part of each draw's minimum, so the probability leans optimistic; the
  local cloud is there to keep that small;
- the Monte Carlo draws come in batches until a Clopper-Pearson interval of the estimate (exact
  binomial; Bonferroni-corrected over the batches, so the decision holds at 95% however many looks)
  lies on one side of ``level``, as Wilson (2024) decides with a sequential test rather than a fixed
  sample; if it never does within ``max_draws``, the point estimate decides and the result says so.

The posterior is the model's own, widened (never narrowed) when the trials' leave-one-out residuals
say it is too sure of itself (:func:`~gapgauge.compare.budget.belief.loo_variance_scale`, Bachoc 2013;
the factor is ``max(1, scale)``). Narrowing it, as the budget does, would make the rule stop too early:
tuning clusters the trials around the incumbent, where the model predicts well, and their residuals say
nothing of the regions it has not tried, where a better basin may hide. On the stand-in robots the
narrowed rule stopped runs whose incumbent was far from the best (benchmarks/budget_coverage.py).

``epsilon`` defaults to a share (5%) of the spread of the simulated objective over the safe bounds
(the median minus the lowest of the simulation level's mean on the Sobol points): a distance in
objective units that stays the same from one trial to the next while the sweep does. ``level``
defaults to 0.9.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import binomtest

from ..errors import ModelError
from .budget.belief import loo_variance_scale, multifidelity_belief, scaled
from .budget.plan import candidate_set
from .budget.target import standing
from .linalg import cholesky_jittered
from .prior import PriorFit

DEFAULT_STOP_LEVEL = 0.9
DEFAULT_EPSILON_SHARE = 0.05
STOP_CANDIDATES = 1024
LOCAL_CANDIDATES = 256
LOCAL_HALF_WIDTH = 0.1  # of the safe box's width, each side of the incumbent
DRAW_BATCH = 256
MAX_DRAWS = 2048
TEST_ALPHA = 0.05


@dataclass
class StopRule:
    """The stop rule after the trials so far.

    Attributes:
        probability: estimated ``P(f(incumbent) - best reachable <= epsilon)``; None before a trial stood.
        epsilon: the regret allowed, objective units.
        level: stop when the probability is at least this.
        stop: the decision (True: the rule says stop).
        decision: the decision in words ("stop: 0.91 probability the current best is within 0.02 of the
            best (rule: stop at 0.9)").
        epsilon_rule: how ``epsilon`` was set.
        interval: the Clopper-Pearson interval of ``probability`` (Bonferroni-corrected 95%), or None.
        settled: the interval lies on one side of ``level`` (else the point estimate decided).
        draws: posterior draws used.
        incumbent: the incumbent's parameters (scenario units), or None.
        incumbent_mean: its posterior mean, objective units, or None.
        best_expected: the median over the draws of the best reachable, objective units, or None.
        n_candidates: points the best reachable was taken over.
        variance_scale: the draws' covariance scale (``max(1, leave-one-out scale)``; 1: the model's own).
        seed: seed of the candidates and draws.
    """

    probability: float | None
    epsilon: float
    level: float
    stop: bool
    decision: str
    epsilon_rule: str
    interval: tuple[float, float] | None = None
    settled: bool = False
    draws: int = 0
    incumbent: dict[str, float] | None = None
    incumbent_mean: float | None = None
    best_expected: float | None = None
    n_candidates: int = 0
    variance_scale: float = 1.0
    seed: int = 0

    @property
    def sentence(self) -> str:
        """The decision in words (the same as ``decision``)."""
        return self.decision


def check_stop_options(epsilon: float | None, level: float) -> None:
    """Raise ModelError, naming the argument, when ``epsilon`` or ``level`` is out of range."""
    if epsilon is not None and not (np.isfinite(epsilon) and epsilon > 0):
        raise ModelError(f"stop_epsilon must be a positive number (objective units), got {epsilon}")
    if not 0.0 < level < 1.0:
        raise ModelError(f"stop_level must be in (0, 1), got {level}")


def default_epsilon(prior: PriorFit, candidates: np.ndarray, share: float = DEFAULT_EPSILON_SHARE) -> float:
    """``share`` of the spread of the simulated objective over ``candidates (m x dim)``: the median minus
    the lowest of the simulation level's mean there (objective units)."""
    low = prior.objective_model.predict_low(candidates)
    return float(share * max(np.median(low) - np.min(low), 1e-12))


def local_cloud(x: np.ndarray, safe: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    """``(n x dim)`` points uniform in the box of half-width ``LOCAL_HALF_WIDTH`` of the safe box
    ``safe (dim x 2)`` around ``x (dim,)``, clipped to the safe box (unit cube of the full bounds)."""
    half = LOCAL_HALF_WIDTH * (safe[:, 1] - safe[:, 0])
    low, high = np.maximum(x - half, safe[:, 0]), np.minimum(x + half, safe[:, 1])
    return low + rng.uniform(size=(n, x.size)) * (high - low)


def regret_probability(
    regret: np.ndarray, epsilon: float, level: float, batches: int
) -> tuple[float, tuple[float, float], int]:
    """``(p, interval, decided)`` from regrets ``(n,)``: the share at most ``epsilon``, its exact
    (Clopper-Pearson) interval at ``1 - TEST_ALPHA / batches``, and +1 / -1 / 0 as the interval lies
    above / below ``level`` or straddles it."""
    k = int(np.sum(regret <= epsilon))
    n = int(regret.size)
    ci = binomtest(k, n).proportion_ci(confidence_level=1.0 - TEST_ALPHA / batches, method="exact")
    interval = (float(ci.low), float(ci.high))
    decided = 1 if interval[0] >= level else -1 if interval[1] < level else 0
    return k / n, interval, decided


def estimate_probability(
    mean: np.ndarray,
    chol: np.ndarray,
    incumbent: int,
    epsilon: float,
    level: float,
    rng: np.random.Generator,
    *,
    max_draws: int = MAX_DRAWS,
    margin: tuple[np.ndarray, np.ndarray, tuple[float, float, float] | None] | None = None,
    known_standing: int = 0,
) -> tuple[float, tuple[float, float], int, int, float]:
    """``P(f[incumbent] - min f <= epsilon)`` under ``f ~ N(mean, chol chol^T)`` on a point set, by Monte
    Carlo in batches of ``DRAW_BATCH`` until the test of :func:`regret_probability` settles or
    ``max_draws`` are used.

    Args:
        mean: ``(s,)`` posterior mean of the objective at the points; chol: ``(s x s)`` a lower factor of
            its covariance.
        incumbent: index of the incumbent among the points.
        margin: ``(mean (s,), chol (s x s), link)`` of the margin of stability: the minimum is over the
            points on which a joint margin draw stands (:func:`gapgauge.compare.budget.target.standing`);
            None: over all points.
        known_standing: the first this many points stood (trials): they count as standing.

    Returns:
        ``(p, interval, decided, draws, best_median)``: the estimate, its corrected Clopper-Pearson
        interval, +1 / -1 / 0 (settled above / below ``level``, or not), the draws used, and the median
        over the draws of the best reachable.
    """
    batches = max(1, int(np.ceil(max_draws / DRAW_BATCH)))
    regrets, bests = [], []
    p, interval, decided = 0.0, (0.0, 1.0), 0
    for _ in range(batches):
        f = mean + rng.standard_normal((DRAW_BATCH, mean.size)) @ chol.T
        stands = np.ones_like(f, dtype=bool)
        if margin is not None:
            m_mean, m_chol, link = margin
            stands = standing(m_mean + rng.standard_normal((DRAW_BATCH, mean.size)) @ m_chol.T, link)
        stands[:, :known_standing] = True
        stands[:, incumbent] = True  # the incumbent is a trial that stood
        reachable = np.where(stands, f, np.inf).min(axis=1)
        regrets.append(f[:, incumbent] - reachable)
        bests.append(reachable)
        p, interval, decided = regret_probability(np.concatenate(regrets), epsilon, level, batches)
        if decided:
            break
    draws = int(sum(r.size for r in regrets))
    return p, interval, decided, draws, float(np.median(np.concatenate(bests)))


def stop_rule(
    prior: PriorFit,
    *,
    epsilon: float | None = None,
    level: float = DEFAULT_STOP_LEVEL,
    seed: int = 0,
    n_candidates: int = STOP_CANDIDATES,
    max_draws: int = MAX_DRAWS,
    calibrate: bool = True,
) -> StopRule:
    """The stop rule for the trials of ``prior`` (see the module docstring).

    Args:
        prior: the fitted prior with its models (its hardware trials are the tuning so far).
        epsilon: the regret allowed, objective units (> 0); None: :func:`default_epsilon`.
        level: the probability at which to stop, in (0, 1).
        seed: seeds the candidates, the local cloud and the draws; stored.
        n_candidates: Sobol points of the safe bounds.
        max_draws: the most posterior draws (in batches of ``DRAW_BATCH``).
        calibrate: widen the draws' covariance when the trials' leave-one-out residuals say the model is
            too sure (never narrow it).

    Raises:
        ModelError: an argument out of range, or a prior without its models.
    """
    check_stop_options(epsilon, level)
    scenario, model = prior.scenario, prior.objective_model
    if scenario is None or model is None:
        raise ModelError("the prior has no models; load it with gapgauge.app.prior.load_prior")
    rng = np.random.default_rng(seed)
    sobol = candidate_set(scenario, n_candidates, rng)
    given = epsilon is not None
    eps = float(epsilon) if given else default_epsilon(prior, sobol)
    rule = "given" if given else (f"{100 * DEFAULT_EPSILON_SHARE:.0f}% of the spread of the simulated objective "
                                  "over the safe bounds (median minus best of the simulation level)")
    X_hw = model.X_high_
    if X_hw.shape[0] == 0:
        return StopRule(None, eps, float(level), False, "stop rule: no trial has stood yet; keep tuning", rule,
                        seed=int(seed))
    at_trials = model.predict(X_hw)
    best = int(np.argmin(at_trials))
    safe = scenario.to_unit(scenario.bounds(safe=True).T).T
    points = np.vstack([X_hw, local_cloud(X_hw[best], safe, LOCAL_CANDIDATES, rng), sobol])
    objective, _ = multifidelity_belief(model, points)
    scale = max(1.0, loo_variance_scale(model)[0]) if calibrate else 1.0
    L_objective = cholesky_jittered(scaled(objective, scale).cov, eigen_fallback=True)
    margin = L_margin = link = None
    if prior.fall_model is not None:
        fall = prior.fall_model
        margin, _ = multifidelity_belief(fall.model_, points)
        margin_scale = max(1.0, loo_variance_scale(fall.model_)[0]) if calibrate else 1.0
        L_margin = cholesky_jittered(scaled(margin, margin_scale).cov, eigen_fallback=True)
        a, b = fall.calibration_
        link = (float(a), float(b), float(fall.threshold_))
    estimate = estimate_probability(objective.mean, L_objective, best, eps, level, rng, max_draws=max_draws,
                                    margin=None if margin is None else (margin.mean, L_margin, link),
                                    known_standing=X_hw.shape[0])
    p, interval, decided, draws, best_expected = estimate
    stop = decided > 0 or (decided == 0 and p >= level)
    decision = (f"{'stop' if stop else 'keep tuning'}: {p:.2f} probability the current best is within "
                f"{eps:.2g} of the best (rule: stop at {level:g})")
    if not decided:
        decision += "; within Monte Carlo error of the rule, decided by the estimate"
    return StopRule(
        probability=float(p), epsilon=eps, level=float(level), stop=bool(stop), decision=decision,
        epsilon_rule=rule, interval=interval, settled=bool(decided), draws=draws,
        incumbent=scenario.params_to_mapping(scenario.from_unit(X_hw[best][None])[0]),
        incumbent_mean=float(at_trials[best]), best_expected=best_expected,
        n_candidates=int(points.shape[0]), variance_scale=float(scale), seed=int(seed),
    )


__all__ = ["DEFAULT_EPSILON_SHARE", "DEFAULT_STOP_LEVEL", "StopRule", "check_stop_options", "default_epsilon",
           "estimate_probability", "regret_probability", "stop_rule"]
