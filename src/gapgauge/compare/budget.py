"""plan_budget(): how many hardware trials to book, with the simulation prior and without it.

The budget is a Monte Carlo over plausible hardware response surfaces (DESIGN.md section 5, "Budget"),
each tuned by the proposal policy of :mod:`gapgauge.compare.propose`:

1. Candidates: ``n_candidates`` scrambled Sobol points (scipy.stats.qmc) inside the scenario's SAFE
   bounds, in the unit cube of the full bounds; seeded from ``seed``.
2. Surfaces: joint draws of the hardware objective and the margin of stability on the candidates from
   the fitted posterior (the multi-fidelity prior of :mod:`gapgauge.compare.prior` and the fall model).
   Each draw is exact for the candidate set: the posterior covariance on all candidates (Kennedy and
   O'Hagan 2000: the hardware-level GP's, whose prior covariance is ``rho0^2 C_low + k_delta`` with the
   simulation level's posterior ``C_low``, including the basis coefficients' uncertainty, Rasmussen and
   Williams 2006 eq. 2.42) is factorised by Cholesky with
   the least jitter that works; the marginal sds are set to the models' own ``predict`` sds, so a
   draw's spread at each point is exactly what ``gapgauge propose`` sees. The objective and the margin
   are separate GPs with independent posteriors, so a draw is a pair of independent draws.
3. Tuning: on every draw, the policy of ``gapgauge propose``, expected improvement times the
   probability of not falling (Jones, Schonlau and Welch 1998; Gardner et al. 2014), with the fall-risk
   limit and the plug-in incumbent (lowest posterior mean at the trials so far), proposes one trial at
   a time for up to ``max_trials``. Two simplifications, both for speed: the maximisation is discrete,
   over the same candidates (``propose`` polishes a Sobol candidate with L-BFGS-B); and after each trial
   the model is conditioned on it with its hyperparameters fixed (exact Gaussian conditioning on the
   candidate set, R&W eq. 2.19, by a growing Cholesky factor), not refitted. A trial's outcome is the
   draw observed with the hardware noise: it falls with the fall model's chance at the draw's margin
   (its probit link, :class:`gapgauge.compare.fall.FallModel`; without one, when the margin is below
   0), and then only its margin is observed (a fallen trial's objective is not a measurement, as in
   ``fit_prior``). When no candidate meets the fall-risk limit (``propose`` would stop and say so),
   the simulated user lifts the limit for that trial (EI x P(no fall) unconstrained, as with a higher
   ``--max-fall-risk``); such trials are counted in ``infeasible_steps`` and reported in the notes.
4. Target, per draw: ``median - fraction (median - best)`` over the candidates on which the draw
   stands (fall chance below one half), the median standing for "a random safe parameter set" and the
   best for the best achievable; or an absolute ``target_value``. Reached at the first trial that stands with the
   draw's (latent) objective at or below the target.
5. Cold start: the same policy on the same draws with a hardware-only model instead of the prior,
   :func:`gapgauge.compare.prior.hardware_only_gp` (Matern 5/2 ARD, constant mean ~ N(0, 1), weak
   priors) for the objective and the same form for the margin (fall risk: the Gaussian tail below
   Hof's 0, no link, since the link is fitted to simulated falls), fitted (maximum a posteriori) on the
   trials already in the store when there are at least 3, else at its hyperpriors' medians. With
   fewer than 2 trials it borrows only the overall level and spread of the prior's predictions to set
   its output scale (a plain tuner would guess one), never their shape.

Both arms count trials from now on: the trials already in the store are known to both. The figures:
the probability of having reached the target by trial ``n`` (the curve), and the budget at level
``q``, the least ``n`` with that probability at least ``q`` (None, printed ">T", when the target is
reached in fewer than a fraction ``q`` of the draws within ``max_trials``), and the expected falls
before the target is reached. The draws come from the prior's own posterior, so the with-prior arm
tunes a surface its model describes correctly: ``benchmarks/budget_coverage.py`` checks the P80 against
tuning runs on the stand-in robot.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy.linalg import cholesky, solve_triangular
from scipy.special import ndtr
from scipy.stats import qmc
from threadpoolctl import threadpool_limits

from ..errors import ModelError
from ..scenario import Scenario
from .acquisition import log_constrained_improvement
from .gp import CHOLESKY_LOWER, FIT_BLAS_THREADS, ExactGP
from .kernels import Matern52, default_length_scale
from .multifidelity import MultiFidelityGP
from .prior import PriorFit, hardware_only_gp, write_json
from .sparse import SparseGP

MODEL_KIND = "budget"
DEFAULT_DRAWS = 128
DEFAULT_MAX_TRIALS = 20
DEFAULT_CANDIDATES = 1024
DEFAULT_MAX_FALL_RISK = 0.05  # as gapgauge propose
# draws handled at once: the conditioning state is draws x (trials + known) x candidates floats
DRAW_CHUNK = 128
# hardware-only GP's hyperprior medians (gapgauge.compare.prior.hardware_only_gp), standardised units
COLD_NOISE_VARIANCE = 0.09
COLD_CONSTANT_VARIANCE = 1.0
# relative jitter tried in turn for the Cholesky factor of a draw covariance: candidates closer than a
# length-scale make it singular in floating point; the least that works changes draws negligibly
JITTER_STEPS = (0.0, 1e-10, 1e-8, 1e-6, 1e-4)
POLICIES = ("ei", "random")


# ---- beliefs on a fixed point set --------------------------------------------------------------


@dataclass
class Belief:
    """A Gaussian belief about one response (objective or margin) at a fixed set of points.

    Attributes:
        mean: ``(s,)`` posterior mean, response units.
        cov: ``(s x s)`` posterior covariance of the latent response, units squared.
        noise_var: variance of one hardware observation around the latent response, units squared.
        n_known: the first ``n_known`` points are trials already run (already conditioned on); the
            other ``s - n_known`` are the candidates, in order.
        floor: observed values are raised to this before conditioning (the fall model's winsorising,
            :class:`gapgauge.compare.fall.FallModel`), or None.
        link: for a margin belief, ``(a, b, threshold)`` of the fall model's probit link
            ``P(fall | f) = Phi(a + b (threshold - f))``; None: a fall is ``margin < 0`` and its
            probability the Gaussian tail of a new observation (Hof's threshold).
    """

    mean: np.ndarray
    cov: np.ndarray
    noise_var: float
    n_known: int = 0
    floor: float | None = None
    link: tuple[float, float, float] | None = None

    @property
    def n_candidates(self) -> int:
        return self.mean.size - self.n_known


def condition(belief: Belief, index: np.ndarray, y: np.ndarray) -> Belief:
    """``belief`` conditioned on noisy observations ``y (k,)`` at its points ``index (k,)``.

    Gaussian conditioning with the hyperparameters fixed (Rasmussen and Williams 2006, eq. 2.19 and
    2.24 with the prior replaced by ``belief``).
    """
    index = np.asarray(index, dtype=int)
    y = np.asarray(y, dtype=float)
    if index.size == 0:
        return belief
    C = belief.cov[:, index]
    K = C[index] + belief.noise_var * np.eye(index.size)
    L = _cholesky_jittered(K, eigen_fallback=False)
    A = solve_triangular(L, C.T, lower=CHOLESKY_LOWER, check_finite=False)
    r = solve_triangular(L, y - belief.mean[index], lower=CHOLESKY_LOWER, check_finite=False)
    return Belief(belief.mean + A.T @ r, belief.cov - A.T @ A, belief.noise_var, belief.n_known, belief.floor,
                  belief.link)


class _Conditioner:
    """Posterior means and variances of one belief under ``draws`` separate streams of observations.

    Each observation extends a Cholesky factor of the observed points' covariance by one row
    (R&W eq. 2.19 in updating form): with ``c = cov0[:, i] - V^T V[:, i]`` the covariance of every
    point with the new one given the earlier observations and ``d = c_i + noise``, the mean moves by
    ``c (y - mean_i) / d``, the variance drops by ``c^2 / d`` and ``c / sqrt(d)`` becomes a row of
    ``V``. ``O(points x observations)`` per observation and draw; no ``points x points`` update.
    """

    def __init__(self, belief: Belief, draws: int, max_observations: int):
        self.cov0 = belief.cov
        self.noise = float(belief.noise_var)
        self.mean = np.tile(belief.mean, (draws, 1))
        self.var = np.tile(np.diag(belief.cov).copy(), (draws, 1))
        self.V = np.zeros((draws, max_observations, belief.mean.size))
        self.n = 0
        self.rows = np.arange(draws)
        self.link = belief.link

    def observe(self, index: np.ndarray, y: np.ndarray, mask: np.ndarray) -> None:
        """Observe ``y (draws,)`` at point ``index (draws,)`` in the draws where ``mask (draws,)``."""
        c = self.cov0[index]
        if self.n:
            past = self.V[self.rows[:, None], np.arange(self.n)[None, :], index[:, None]]
            c = c - np.einsum("dk,dks->ds", past, self.V[:, : self.n])
        d = np.maximum(c[self.rows, index] + self.noise, 1e-300)
        v = c / np.sqrt(d)[:, None]
        v[~mask] = 0.0
        residual = np.where(mask, y - self.mean[self.rows, index], 0.0)
        self.mean += v * (residual / np.sqrt(d))[:, None]
        self.var = np.maximum(self.var - v**2, 0.0)
        self.V[:, self.n] = v
        self.n += 1


# ---- the policy on draws -----------------------------------------------------------------------


@dataclass
class PolicyRuns:
    """What the policy did on each draw.

    Attributes:
        trials_to_target: ``(draws,)`` int, the trial at which the target was first reached, or
            ``max_trials + 1`` when it was not reached within ``max_trials``.
        falls: ``(draws,)`` int, falls before the target was reached (within ``max_trials``).
        chosen: ``(draws x max_trials)`` candidate index of each trial.
        fell: ``(draws x max_trials)`` bool, whether each trial fell.
        infeasible_steps: trials for which no candidate met the fall-risk limit.
    """

    trials_to_target: np.ndarray
    falls: np.ndarray
    chosen: np.ndarray
    fell: np.ndarray
    infeasible_steps: int


def run_policy(
    objective_truth: np.ndarray,
    margin_truth: np.ndarray | None,
    target: np.ndarray,
    objective_belief: Belief,
    margin_belief: Belief | None,
    *,
    max_trials: int,
    objective_noise_sd: float,
    margin_noise_sd: float = 0.0,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    rng: np.random.Generator | int = 0,
    policy: str = "ei",
    on_step: Callable[[], None] | None = None,
    fall_link: tuple[float, float, float] | None = None,
) -> PolicyRuns:
    """Tune each draw with the proposal policy for ``max_trials`` trials.

    Args:
        objective_truth: ``(draws x m)`` latent hardware objective of each draw at the candidates.
        margin_truth: ``(draws x m)`` latent margin of stability (m); a trial falls where it is < 0.
            None: nothing falls and the policy has no fall model.
        target: ``(draws,)`` objective to reach in each draw (NaN: unreachable).
        objective_belief: the policy's model of the objective (its candidates are the truth's columns).
        margin_belief: the policy's fall model (margin), or None.
        max_trials: trials per draw.
        objective_noise_sd, margin_noise_sd: sd of the hardware's observation noise (response units).
        max_fall_risk: the fall-risk limit of ``gapgauge propose``.
        rng: seed or Generator of the observation noise (and of the random policy).
        policy: ``"ei"``, the policy of ``gapgauge propose``; ``"random"``, a uniformly random candidate
            each trial (with replacement), a reference with a known answer.
        on_step: called after each trial (all draws), for a progress bar.
        fall_link: ``(a, b, threshold)``: a trial at latent margin ``f`` falls with probability
            ``Phi(a + b (threshold - f))`` (the fall model's probit link); None: it falls when ``f < 0``.
    """
    if policy not in POLICIES:
        raise ValueError(f"policy must be one of {POLICIES}, got {policy!r}")
    objective_truth = np.atleast_2d(np.asarray(objective_truth, dtype=float))
    draws, m = objective_truth.shape
    if objective_belief.n_candidates != m:
        raise ValueError(f"the objective belief has {objective_belief.n_candidates} candidates, the truth {m}")
    rng = np.random.default_rng(rng)
    # every random number up front, so that nothing depends on how the draws are chunked
    z_objective = rng.standard_normal((draws, max_trials))
    z_margin = rng.standard_normal((draws, max_trials))
    random_choice = rng.integers(m, size=(draws, max_trials))
    u_fall = rng.uniform(size=(draws, max_trials))
    target = np.broadcast_to(np.asarray(target, dtype=float), (draws,))
    out_trials = np.full(draws, max_trials + 1)
    out_falls = np.zeros(draws, dtype=int)
    out_chosen = np.zeros((draws, max_trials), dtype=int)
    out_fell = np.zeros((draws, max_trials), dtype=bool)
    infeasible = 0
    with threadpool_limits(limits=FIT_BLAS_THREADS, user_api="blas"):
        for start in range(0, draws, DRAW_CHUNK):
            block = slice(start, min(start + DRAW_CHUNK, draws))
            runs = _run_block(
                objective_truth[block],
                None if margin_truth is None else np.atleast_2d(margin_truth)[block],
                target[block], objective_belief, margin_belief, max_trials, objective_noise_sd,
                margin_noise_sd, max_fall_risk, policy, z_objective[block], z_margin[block],
                random_choice[block], on_step if start == 0 else None, fall_link, u_fall[block],
            )
            out_trials[block], out_falls[block], out_chosen[block], out_fell[block] = runs[:4]
            infeasible += runs[4]
    return PolicyRuns(out_trials, out_falls, out_chosen, out_fell, infeasible)


def _run_block(
    objective_truth: np.ndarray,
    margin_truth: np.ndarray | None,
    target: np.ndarray,
    objective_belief: Belief,
    margin_belief: Belief | None,
    max_trials: int,
    objective_noise_sd: float,
    margin_noise_sd: float,
    max_fall_risk: float,
    policy: str,
    z_objective: np.ndarray,
    z_margin: np.ndarray,
    random_choice: np.ndarray,
    on_step: Callable[[], None] | None,
    fall_link: tuple[float, float, float] | None,
    u_fall: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, int]:
    draws, m = objective_truth.shape
    rows = np.arange(draws)
    off_o = objective_belief.n_known
    objective = _Conditioner(objective_belief, draws, max_trials)
    observed = np.zeros((draws, objective_belief.mean.size), dtype=bool)
    observed[:, :off_o] = True
    margin = None if margin_belief is None else _Conditioner(margin_belief, draws, max_trials)
    off_m = 0 if margin_belief is None else margin_belief.n_known
    trials = np.full(draws, max_trials + 1)
    falls = np.zeros(draws, dtype=int)
    chosen = np.zeros((draws, max_trials), dtype=int)
    fell_all = np.zeros((draws, max_trials), dtype=bool)
    infeasible = 0
    for n in range(max_trials):
        if policy == "random":
            choice = random_choice[:, n]
        else:
            choice, none_feasible = _choose(objective, observed, off_o, margin, off_m, max_fall_risk)
            infeasible += int(none_feasible.sum())
        truth = objective_truth[rows, choice]
        fell = np.zeros(draws, dtype=bool)
        if margin_truth is not None:
            truth_margin = margin_truth[rows, choice]
            if fall_link is None:
                fell = truth_margin < 0.0
            else:
                a, b, threshold = fall_link
                fell = u_fall[:, n] < ndtr(a + b * (threshold - truth_margin))
            if margin is not None:
                y_margin = truth_margin + margin_noise_sd * z_margin[:, n]
                if margin_belief.floor is not None:
                    y_margin = np.maximum(y_margin, margin_belief.floor)
                margin.observe(off_m + choice, y_margin, np.ones(draws, dtype=bool))
        stood = ~fell
        objective.observe(off_o + choice, truth + objective_noise_sd * z_objective[:, n], stood)
        observed[rows[stood], off_o + choice[stood]] = True
        waiting = trials > max_trials
        falls += waiting & fell
        trials[waiting & stood & (truth <= target)] = n + 1
        chosen[:, n] = choice
        fell_all[:, n] = fell
        if on_step is not None:
            on_step()
    return trials, falls, chosen, fell_all, infeasible


def _choose(
    objective: _Conditioner,
    observed: np.ndarray,
    off_o: int,
    margin: _Conditioner | None,
    off_m: int,
    max_fall_risk: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Each draw's next candidate under the ``propose`` policy, and whether none met the risk limit."""
    mean = objective.mean[:, off_o:]
    sd = np.sqrt(objective.var[:, off_o:])
    if margin is None:
        risk = np.zeros_like(mean)
    else:
        # as FallModel.fall_probability: P(margin < 0) of a new trial (latent variance plus noise)
        mu, var = margin.mean[:, off_m:], margin.var[:, off_m:]
        if margin.link is None:
            risk = ndtr(-mu / np.maximum(np.sqrt(var + margin.noise), 1e-12))
        else:  # as FallModel.fall_probability: the probit link integrated over the latent margin
            a, b, threshold = margin.link
            risk = ndtr((a + b * (threshold - mu)) / np.sqrt(1.0 + b**2 * var))
    feasible = risk <= max_fall_risk
    none_feasible = ~feasible.any(axis=1)
    # the plug-in incumbent of propose: lowest posterior mean at the trials so far; before any
    # trial, the lowest predicted mean among the feasible candidates
    at_trials = np.where(observed, objective.mean, np.inf).min(axis=1)
    among = np.where(feasible | none_feasible[:, None], mean, np.inf).min(axis=1)
    incumbent = np.where(np.isfinite(at_trials), at_trials, among)
    score = log_constrained_improvement(mean, sd, incumbent[:, None], risk)
    # with no candidate under the limit, EI x P(no fall) unconstrained (as if the user raised
    # --max-fall-risk): taking the least risky candidate instead repeats one trial and learns nothing
    score = np.where(feasible | none_feasible[:, None], score, -np.inf)
    return np.argmax(score, axis=1), none_feasible


# ---- draws, targets, summaries -----------------------------------------------------------------


def draw_surfaces(mean: np.ndarray, cov: np.ndarray, draws: int, rng: np.random.Generator) -> np.ndarray:
    """``(draws x m)`` joint draws from ``N(mean (m,), cov (m x m))`` (Cholesky with the least jitter)."""
    L = _cholesky_jittered(cov)
    z = rng.standard_normal((draws, mean.size))
    return mean[None, :] + z @ L.T


def draw_targets(
    objective: np.ndarray,
    margin: np.ndarray | None,
    fraction: float | None,
    value: float | None,
    fall_link: tuple[float, float, float] | None = None,
) -> np.ndarray:
    """Per-draw target ``(draws,)``: ``value`` if given, else ``median - fraction (median - best)`` over
    the candidates on which the draw stands (``margin >= 0``, or with ``fall_link = (a, b, threshold)``
    a fall chance below one half, ``a + b (threshold - margin) < 0``); NaN where nothing stands.

    ``objective``, ``margin``: ``(draws x m)``; lower objective is better.
    """
    objective = np.atleast_2d(objective)
    if value is not None:
        return np.full(objective.shape[0], float(value))
    if margin is None:
        stands = np.ones_like(objective, dtype=bool)
    elif fall_link is None:
        stands = np.atleast_2d(margin) >= 0.0
    else:
        a, b, threshold = fall_link
        stands = a + b * (threshold - np.atleast_2d(margin)) < 0.0
    masked = np.where(stands, objective, np.nan)
    out = np.full(objective.shape[0], np.nan)
    some = stands.any(axis=1)
    median = np.nanmedian(masked[some], axis=1)
    best = np.nanmin(masked[some], axis=1)
    out[some] = median - fraction * (median - best)
    return out


def reach_curve(trials_to_target: np.ndarray, max_trials: int) -> np.ndarray:
    """``(max_trials,)``: the fraction of draws that reached the target by trial ``n = 1..max_trials``."""
    t = np.asarray(trials_to_target)
    return np.array([float(np.mean(t <= n)) for n in range(1, max_trials + 1)])


def budget_at(curve: np.ndarray, level: float) -> int | None:
    """The least ``n`` whose reach probability is at least ``level``, or None when no ``n`` in the
    curve gets there (the target is reached in fewer than ``level`` of the draws: "> T")."""
    hit = np.flatnonzero(np.asarray(curve) >= level - 1e-12)
    return int(hit[0]) + 1 if hit.size else None


def summarise(runs: PolicyRuns, max_trials: int, confidence: float) -> dict[str, Any]:
    """The JSON figures of one arm: P50, P80, P95 and the level ``confidence``, the fraction reached,
    expected falls (before the target, within ``max_trials``), and the per-draw trials (None: > T)."""
    curve = reach_curve(runs.trials_to_target, max_trials)
    t = runs.trials_to_target
    return {
        "p50": budget_at(curve, 0.5),
        "p80": budget_at(curve, 0.8),
        "p95": budget_at(curve, 0.95),
        "book": budget_at(curve, confidence),
        "reached_fraction": float(curve[-1]),
        "expected_falls": float(np.mean(runs.falls)),
        "mean_trials_when_reached": float(np.mean(t[t <= max_trials])) if np.any(t <= max_trials) else None,
        "infeasible_steps": int(runs.infeasible_steps),
        "trials_to_target": [int(v) if v <= max_trials else None for v in t],
        "curve": curve.tolist(),
    }


# ---- the result --------------------------------------------------------------------------------


@dataclass
class BudgetPlan:
    """Trials to book, with the simulation prior and from a cold start (``to_json`` for every number).

    ``with_prior`` / ``cold_start``: ``{"p50", "p80", "p95", "book", "reached_fraction",
    "expected_falls", ...}`` (a budget is None when not reached by that share of draws within
    ``max_trials``); ``curve``: ``[{"trial": n, "with_prior": p, "cold_start": p}, ...]``.
    """

    scenario: str
    with_prior: dict[str, Any]
    cold_start: dict[str, Any]
    curve: list[dict[str, float]]
    saving: int | None
    saving_at_least: int | None
    sentence: str
    target: dict[str, Any]
    confidence: float
    max_trials: int
    draws: int
    seed: int
    max_fall_risk: float
    n_candidates: int
    n_hardware: int
    seconds: float = 0.0
    method: dict[str, str] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        return asdict(self)

    def write_json(self, path: str | Path) -> None:
        write_json(path, self.to_json())


def book_text(value: int | None, max_trials: int) -> str:
    """A budget as text: the number, or ``">T"`` when not reached."""
    return str(value) if value is not None else f">{max_trials}"


def _plan(
    prior_runs: PolicyRuns,
    cold_runs: PolicyRuns,
    *,
    scenario: str,
    target: dict[str, Any],
    confidence: float,
    max_trials: int,
    draws: int,
    seed: int,
    max_fall_risk: float,
    n_candidates: int,
    n_hardware: int,
    notes: list[str],
) -> BudgetPlan:
    with_prior = summarise(prior_runs, max_trials, confidence)
    cold = summarise(cold_runs, max_trials, confidence)
    curve = [
        {"trial": n + 1, "with_prior": with_prior["curve"][n], "cold_start": cold["curve"][n]}
        for n in range(max_trials)
    ]
    p, c = with_prior["p80"], cold["p80"]
    saving = c - p if p is not None and c is not None else None
    saving_at_least = max_trials + 1 - p if p is not None and c is None else None
    level = f"P{round(100 * confidence)}"
    sentence = (
        f"Book {book_text(with_prior['book'], max_trials)} trials ({level} with the simulation prior), "
        f"{book_text(cold['book'], max_trials)} without it."
    )
    return BudgetPlan(
        scenario=scenario,
        with_prior=with_prior,
        cold_start=cold,
        curve=curve,
        saving=saving,
        saving_at_least=saving_at_least,
        sentence=sentence,
        target=target,
        confidence=float(confidence),
        max_trials=int(max_trials),
        draws=int(draws),
        seed=int(seed),
        max_fall_risk=float(max_fall_risk),
        n_candidates=int(n_candidates),
        n_hardware=int(n_hardware),
        method=dict(METHOD),
        notes=notes,
    )


METHOD = {
    "draws": "joint posterior draws on the candidate set: Cholesky of the full posterior covariance "
    "(least jitter), marginal sds equal to the models' predict",
    "candidates": "scrambled Sobol points inside the safe bounds (scipy.stats.qmc)",
    "policy": "expected improvement x P(no fall) under the fall-risk limit, plug-in incumbent, maximised "
    "over the candidate set (discrete)",
    "update": "exact Gaussian conditioning on each trial, hyperparameters fixed (no refit)",
    "cold_start": "hardware-only GP (Matern 5/2 ARD, constant mean, weak priors) for objective and margin",
    "budget": "least n with P(reached by n) >= level; None means > max_trials",
}


def budget_from_beliefs(
    objective_belief: Belief,
    margin_belief: Belief | None,
    cold_objective: Belief,
    cold_margin: Belief | None,
    *,
    objective_noise_sd: float,
    margin_noise_sd: float = 0.0,
    target_fraction: float = 0.95,
    target_value: float | None = None,
    confidence: float = 0.8,
    max_trials: int = DEFAULT_MAX_TRIALS,
    draws: int = DEFAULT_DRAWS,
    seed: int = 0,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    scenario: str = "",
    n_hardware: int = 0,
    notes: list[str] | None = None,
    on_step: Callable[[], None] | None = None,
) -> BudgetPlan:
    """The budget from beliefs on a candidate set (the array core of :func:`plan_budget`).

    The surfaces are drawn from ``objective_belief`` and ``margin_belief`` (their candidates' part);
    the with-prior arm tunes them with those beliefs, the cold start with ``cold_objective`` and
    ``cold_margin``. Observation noise: ``objective_noise_sd``, ``margin_noise_sd`` (response units).
    """
    rng = np.random.default_rng(seed)
    draw_rng, prior_rng, cold_rng = (np.random.default_rng(s) for s in rng.bit_generator.seed_seq.spawn(3))
    k_o = objective_belief.n_known
    objective = draw_surfaces(objective_belief.mean[k_o:], objective_belief.cov[k_o:, k_o:], draws, draw_rng)
    margin = None
    if margin_belief is not None:
        k_m = margin_belief.n_known
        margin = draw_surfaces(margin_belief.mean[k_m:], margin_belief.cov[k_m:, k_m:], draws, draw_rng)
    fall_link = None if margin_belief is None else margin_belief.link
    target = draw_targets(objective, margin, target_fraction, target_value, fall_link)
    common = dict(
        max_trials=max_trials, objective_noise_sd=objective_noise_sd, margin_noise_sd=margin_noise_sd,
        max_fall_risk=max_fall_risk, on_step=on_step, fall_link=fall_link,
    )
    prior_runs = run_policy(objective, margin, target, objective_belief, margin_belief, rng=prior_rng, **common)
    cold_runs = run_policy(objective, margin, target, cold_objective, cold_margin, rng=cold_rng, **common)
    notes = list(notes or [])
    unreachable = int(np.sum(~np.isfinite(target)))
    if unreachable:
        notes.append(f"{unreachable} of {draws} draws fall on every candidate: counted as never reached")
    for name, runs in (("with the prior", prior_runs), ("cold start", cold_runs)):
        share = runs.infeasible_steps / max(draws * max_trials, 1)
        if share > 0.05:
            notes.append(
                f"{name}: in {100 * share:.0f}% of simulated trials no candidate met the fall-risk limit "
                f"{max_fall_risk:g} (gapgauge propose would stop and say so); there the limit was lifted"
            )
    target_info = {
        "kind": "value" if target_value is not None else "fraction",
        "fraction": None if target_value is not None else float(target_fraction),
        "value": None if target_value is None else float(target_value),
        "definition": (
            f"objective <= {target_value:g}" if target_value is not None else
            f"{target_fraction:g} of the way from the median of random safe parameter sets to the best, per draw"
        ),
        "median_over_draws": float(np.nanmedian(target)) if np.any(np.isfinite(target)) else None,
    }
    return _plan(
        prior_runs, cold_runs, scenario=scenario, target=target_info, confidence=confidence,
        max_trials=max_trials, draws=draws, seed=seed, max_fall_risk=max_fall_risk,
        n_candidates=objective_belief.n_candidates, n_hardware=n_hardware, notes=notes,
    )


# ---- beliefs from the fitted models ------------------------------------------------------------


def posterior_covariance(model: ExactGP | SparseGP, X: np.ndarray, basis: np.ndarray | None = None) -> np.ndarray:
    """Posterior covariance ``(n x n)`` of the latent function at ``X (n x dim)``, in the model's
    output units squared.

    ExactGP: ``k(X, X) - V^T V``, ``V = L \\ k(X_train, X)`` (Rasmussen and Williams 2006, Algorithm 2.1
    line 5), with the basis functions' prior ``H^T B H`` added to every covariance (R&W section 2.7)
    when the model has them (``basis (n x p)``). SparseGP: ``k(X, X) - t1^T t1 + t2^T t2`` (Titsias
    2009, the covariance form of :meth:`SparseGP.predict`'s variance).
    """
    X = np.atleast_2d(np.asarray(X, dtype=float))
    if isinstance(model, SparseGP):
        t1 = solve_triangular(model.L_uu_, model.kernel_(model.inducing_, X), lower=True, check_finite=False)
        t2 = solve_triangular(model.L_B_, t1, lower=True, check_finite=False)
        cov = model.kernel_(X) - t1.T @ t1 + t2.T @ t2
    else:
        Ks = model.kernel_(X, model.X_train_)
        cov = model.kernel_(X)
        if model.basis_train_ is not None:
            _, B = model.basis_prior
            Ks = Ks + basis @ B @ model.basis_train_.T
            cov = cov + basis @ B @ basis.T
        if model.L_.size:
            V = solve_triangular(model.L_, Ks.T, lower=CHOLESKY_LOWER, check_finite=False)
            cov = cov - V.T @ V
    return cov * model._y_std**2


def multifidelity_belief(model: MultiFidelityGP, X: np.ndarray, n_known: int = 0) -> tuple[Belief, float]:
    """The hardware-level belief of a fitted :class:`MultiFidelityGP` at ``X (s x dim)`` (unit cube).

    Covariance: the hardware-level GP's posterior covariance ``y_std^2 Cov_high``, its prior covariance
    ``rho0^2 C_low + k_delta`` (plus the basis prior) already holding the simulation level's posterior
    ``C_low`` (Kennedy and O'Hagan 2000; see :class:`MultiFidelityGP`), so it is not added again; then
    rescaled so its diagonal is ``predict``'s variance exactly. Returns the belief (noise: the hardware
    noise) and the largest relative difference between the two sds before rescaling (a check; 0 up to
    rounding).
    """
    mean, sd = model.predict(X, return_std=True)
    mu_low = model.predict_low(X)
    mu_low_std = (mu_low - model.y_mean_) / model.y_std_
    basis = model._basis(X, mu_low_std)
    cov = posterior_covariance(model.delta_, X, basis) * model.y_std_**2
    cov = 0.5 * (cov + cov.T)
    own = np.sqrt(np.maximum(np.diag(cov), 0.0))
    check = float(np.max(np.abs(own - sd) / np.maximum(sd, 1e-12))) if sd.size else 0.0
    scale = np.where(own > 0, sd / np.maximum(own, 1e-300), 0.0)
    cov = cov * np.outer(scale, scale)
    return Belief(mean, cov, model.hardware_noise_sd_**2, n_known), check


def hardware_only_belief(
    points: np.ndarray,
    n_known: int,
    y_known: np.ndarray,
    scale_hint: tuple[float, float],
    seed: int,
    floor: float | None = None,
) -> Belief:
    """The cold start's belief at ``points (s x dim)`` (unit cube), conditioned on the trials already
    run (the first ``n_known`` points, observed ``y_known (n_known,)``).

    :func:`gapgauge.compare.prior.hardware_only_gp`: fitted by maximum a posteriori with 3 trials or
    more; else its hyperpriors' medians (signal sd 1, length-scale ``default_length_scale(dim)``, noise
    sd 0.3, standardised units), standardised by the trials (2) or by ``scale_hint = (level, spread)``.
    """
    dim = points.shape[1]
    y_known = np.asarray(y_known, dtype=float)
    if n_known >= 3:
        gp = hardware_only_gp(dim, seed).fit(points[:n_known], y_known, basis=np.ones((n_known, 1)))
        kernel, noise, level, spread = gp.kernel_, gp.noise_, gp._y_mean, gp._y_std
    else:
        kernel = Matern52(1.0, np.full(dim, default_length_scale(dim)))
        noise = COLD_NOISE_VARIANCE
        if n_known == 2 and np.std(y_known) > 0:
            level, spread = float(np.mean(y_known)), float(np.std(y_known))
        else:
            level, spread = scale_hint
    cov = (kernel(points) + COLD_CONSTANT_VARIANCE) * spread**2
    belief = Belief(np.full(points.shape[0], float(level)), cov, noise * spread**2, n_known, floor)
    return condition(belief, np.arange(n_known), y_known)


def candidate_set(scenario: Scenario, n_candidates: int, seed: int | np.random.Generator) -> np.ndarray:
    """``(n x dim)`` scrambled Sobol points (scipy.stats.qmc) inside the safe bounds, unit cube of the
    full bounds; ``n`` is ``n_candidates`` rounded up to a power of two."""
    bounds = scenario.to_unit(scenario.bounds(safe=True).T).T
    sobol = qmc.Sobol(scenario.dim, scramble=True, seed=np.random.default_rng(seed))
    U = sobol.random_base2(int(np.ceil(np.log2(max(n_candidates, 2)))))
    return bounds[:, 0] + U * (bounds[:, 1] - bounds[:, 0])


def beliefs_from_prior(prior: PriorFit, candidates: np.ndarray, seed: int = 0) -> dict[str, Any]:
    """The four beliefs of :func:`budget_from_beliefs` from a fitted prior at ``candidates (m x dim)``
    (unit cube), with the observation noise sds and a covariance check."""
    obj = prior.objective_model
    X_o = np.vstack([obj.X_high_, candidates])
    objective, check_o = multifidelity_belief(obj, X_o, n_known=obj.X_high_.shape[0])
    spread_o = float(np.sqrt(np.var(objective.mean[objective.n_known:]) + np.mean(np.diag(objective.cov))))
    cold_objective = hardware_only_belief(
        X_o, obj.X_high_.shape[0], obj.y_high_, (float(np.mean(objective.mean)), spread_o), seed
    )
    out: dict[str, Any] = {
        "objective_belief": objective,
        "cold_objective": cold_objective,
        "objective_noise_sd": float(obj.hardware_noise_sd_),
        "margin_belief": None,
        "cold_margin": None,
        "margin_noise_sd": 0.0,
        "covariance_check": check_o,
    }
    if prior.fall_model is not None:
        fm = prior.fall_model.model_
        floor = getattr(prior.fall_model, "floor_", None)
        X_m = np.vstack([fm.X_high_, candidates])
        margin, check_m = multifidelity_belief(fm, X_m, n_known=fm.X_high_.shape[0])
        margin.floor = floor
        if hasattr(prior.fall_model, "calibration_"):
            a, b = prior.fall_model.calibration_
            margin.link = (float(a), float(b), float(getattr(prior.fall_model, "threshold_", 0.0)))
        spread_m = float(np.sqrt(np.var(margin.mean[margin.n_known:]) + np.mean(np.diag(margin.cov))))
        out.update(
            margin_belief=margin,
            cold_margin=hardware_only_belief(
                X_m, fm.X_high_.shape[0], fm.y_high_, (float(np.mean(margin.mean)), spread_m), seed, floor
            ),
            margin_noise_sd=float(fm.hardware_noise_sd_),
            covariance_check=max(check_o, check_m),
        )
    return out


def budget_from_prior(
    prior: PriorFit,
    candidates: np.ndarray,
    *,
    seed: int = 0,
    progress: bool = False,
    **options: Any,
) -> BudgetPlan:
    """:func:`budget_from_beliefs` with the beliefs of a fitted prior at ``candidates (m x dim)`` (unit
    cube, inside the safe bounds). ``options`` as for :func:`budget_from_beliefs`."""
    with threadpool_limits(limits=FIT_BLAS_THREADS, user_api="blas"):
        beliefs = beliefs_from_prior(prior, candidates, seed)
    check = beliefs.pop("covariance_check")
    notes = list(options.pop("notes", []) or [])
    if check > 1e-6:
        notes.append(f"posterior covariance rescaled to the models' sds (largest relative difference {check:.2g})")
    max_trials = int(options.get("max_trials", DEFAULT_MAX_TRIALS))
    with _progress_bar(progress, 2 * max_trials, prior.scenario.name) as step:
        plan = budget_from_beliefs(
            **beliefs, seed=seed, scenario=prior.scenario.name, n_hardware=prior.n_hardware, notes=notes,
            on_step=step, **options,
        )
    return plan


def plan_budget(
    scenario: Scenario,
    store: Any = None,
    *,
    target_fraction: float = 0.95,
    target_value: float | None = None,
    confidence: float = 0.8,
    max_trials: int = DEFAULT_MAX_TRIALS,
    draws: int = DEFAULT_DRAWS,
    seed: int = 0,
    progress: bool = True,
    prior: PriorFit | None = None,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    n_candidates: int = DEFAULT_CANDIDATES,
    save: bool = True,
) -> BudgetPlan:
    """How many hardware trials to book to reach the target, with the simulation prior and without.

    Args:
        scenario: the loaded scenario (its safe bounds confine the candidates).
        store: ``gapgauge.store.Store`` or its path: the prior is taken from it as ``gapgauge propose``
            does (the stored prior if current, else a new fit); the result is stored there as model
            kind ``"budget"``.
        target_fraction: target ``fraction`` of the way from a random safe set's objective (median) to
            the best, in (0, 1]; ignored when ``target_value`` is given.
        target_value: an absolute objective to reach instead (objective units, lower is better).
        confidence: the level of the booked figure (the ``book`` entry and the sentence), in (0, 1).
        max_trials: trials per simulated tuning run (T).
        draws: plausible hardware surfaces (S).
        seed: seeds the candidates, the draws and the observation noise; stored.
        progress: a progress bar on stderr.
        prior: a fitted prior to use as it is (then ``store`` is only where the result is saved).
        max_fall_risk: the fall-risk limit of the policy (as ``gapgauge propose --max-fall-risk``).
        n_candidates: candidate points (rounded up to a power of two).
        save: store the result when there is a store.

    Raises:
        ModelError: an argument out of range, or no prior and no store.
    """
    _check(target_fraction, target_value, confidence, max_trials, draws, max_fall_risk, n_candidates, seed)
    started = time.perf_counter()
    opened = None
    if prior is None:
        if store is None:
            raise ModelError("budget needs a fitted prior or a store; run `gapgauge prior` first")
        from .prior import _open_store
        from .propose import _current_prior

        opened = _open_store(store)
        prior = _current_prior(scenario, opened, seed)
    seeds = np.random.default_rng(seed).bit_generator.seed_seq.spawn(2)
    candidates = candidate_set(scenario, n_candidates, np.random.default_rng(seeds[0]))
    plan = budget_from_prior(
        prior, candidates, seed=int(seeds[1].generate_state(1)[0]), progress=progress,
        target_fraction=target_fraction, target_value=target_value, confidence=confidence,
        max_trials=max_trials, draws=draws, max_fall_risk=max_fall_risk, notes=list(prior.notes),
    )
    plan.seed = int(seed)
    plan.seconds = time.perf_counter() - started
    if save and store is not None:
        target_store = opened if opened is not None else store
        if isinstance(target_store, (str, Path)):
            from .prior import _open_store

            target_store = _open_store(target_store)
        target_store.save_model(MODEL_KIND, scenario.content_hash, params=json.loads(json.dumps(plan.to_json())))
    return plan


def _check(
    target_fraction: float, target_value: float | None, confidence: float, max_trials: int, draws: int,
    max_fall_risk: float, n_candidates: int, seed: int,
) -> None:
    if target_value is None and not 0.0 < target_fraction <= 1.0:
        raise ModelError(f"--target must be in (0, 1], got {target_fraction}")
    if target_value is not None and not np.isfinite(target_value):
        raise ModelError(f"--target-value must be a finite number, got {target_value}")
    if not 0.0 < confidence < 1.0:
        raise ModelError(f"--confidence must be in (0, 1), got {confidence}")
    if not 1 <= max_trials <= 500:
        raise ModelError(f"--max-trials must be between 1 and 500, got {max_trials}")
    if not 1 <= draws <= 100_000:
        raise ModelError(f"--draws must be between 1 and 100000, got {draws}")
    if not 0.0 < max_fall_risk <= 1.0:
        raise ModelError(f"--max-fall-risk must be in (0, 1], got {max_fall_risk}")
    if not 2 <= n_candidates <= 8192:
        raise ModelError(f"the candidate set must have 2 to 8192 points, got {n_candidates}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ModelError(f"--seed must be a non-negative integer, got {seed!r}")


class _progress_bar:  # noqa: N801 - used as a context manager like a function
    """A rich progress bar over the simulated trials of both arms (stderr); a no-op when disabled."""

    def __init__(self, enabled: bool, total: int, name: str):
        self.enabled, self.total, self.name = enabled, total, name
        self.bar = None

    def __enter__(self) -> Callable[[], None]:
        if not self.enabled:
            return lambda: None
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

        self.bar = Progress(
            TextColumn("[dim]budget:[/] {task.description}"), BarColumn(), MofNCompleteColumn(),
            TimeRemainingColumn(), console=Console(stderr=True), transient=True,
        )
        self.bar.start()
        task = self.bar.add_task(f"{self.name}: simulated trials (prior, then cold start)", total=self.total)
        return lambda: self.bar.advance(task)

    def __exit__(self, *exc: Any) -> None:
        if self.bar is not None:
            self.bar.stop()


def _cholesky_jittered(K: np.ndarray, eigen_fallback: bool = True) -> np.ndarray:
    """A square root ``L`` of ``K (n x n)`` with ``L L^T = K + jitter I``: lower-triangular Cholesky with the
    least jitter of :data:`JITTER_STEPS` that works; else (``eigen_fallback``) a non-triangular root."""
    scale = float(np.mean(np.abs(np.diag(K)))) or 1.0
    for jitter in JITTER_STEPS:
        try:
            return cholesky(K + jitter * scale * np.eye(K.shape[0]), lower=CHOLESKY_LOWER, check_finite=False)
        except np.linalg.LinAlgError:
            continue
    if not eigen_fallback:
        raise ModelError("a covariance is not positive definite even with jitter; refit the prior (gapgauge prior)")
    # still not positive definite: the symmetric eigen-decomposition with negative eigenvalues clipped
    # to 0 gives a square root of the nearest positive semi-definite matrix
    w, Q = np.linalg.eigh(0.5 * (K + K.T))
    return Q * np.sqrt(np.maximum(w, 0.0))
