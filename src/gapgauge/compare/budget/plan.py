"""The budget's entry point: draws, targets, both arms, and the figures of the plan.

:func:`plan_from_prior` (a fitted prior in, a :class:`BudgetPlan` out) makes the candidate set, the
beliefs (:mod:`.belief`), the surfaces and their targets, runs the policy (:mod:`.policy`) with the
prior and from a cold start, and summarises the two arms; :func:`budget_from_beliefs` is its array core.
"""

from __future__ import annotations

import time

import numpy as np
from scipy.stats import qmc
from threadpoolctl import threadpool_limits

from ...errors import ModelError
from ...progress import Progress
from ...scenario import Scenario
from ..linalg import FIT_BLAS_THREADS
from ..prior import PriorFit
from .belief import Beliefs, beliefs_from_prior, draw_surfaces
from .policy import DEFAULT_MAX_FALL_RISK, STAGE, PolicyRuns, run_policy
from .result import ArmBudget, BudgetPlan, BudgetTarget, CurvePoint, book_text

DEFAULT_DRAWS = 128
DEFAULT_MAX_TRIALS = 20
DEFAULT_CANDIDATES = 1024
DEFAULT_TARGET_FRACTION = 0.95
DEFAULT_CONFIDENCE = 0.8
# a belief covariance whose diagonal differs from its model's predictive sd by more than this
# (relative) is rescaled with a note; below it the difference is rounding
COVARIANCE_CHECK_TOLERANCE = 1e-6
# a share of simulated trials above this with no candidate under the fall-risk limit gets a note
INFEASIBLE_NOTE_SHARE = 0.05

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


# ---- candidates, targets, curves ---------------------------------------------------------------


def candidate_set(scenario: Scenario, n_candidates: int, seed: int | np.random.Generator) -> np.ndarray:
    """``(n x dim)`` scrambled Sobol points (scipy.stats.qmc) inside the safe bounds, unit cube of the
    full bounds; ``n`` is ``n_candidates`` rounded up to a power of two."""
    bounds = scenario.to_unit(scenario.bounds(safe=True).T).T
    sobol = qmc.Sobol(scenario.dim, scramble=True, seed=np.random.default_rng(seed))
    U = sobol.random_base2(int(np.ceil(np.log2(max(n_candidates, 2)))))
    return bounds[:, 0] + U * (bounds[:, 1] - bounds[:, 0])


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

    ``objective``, ``margin``: ``(draws x m)``; lower objective is better. The median stands for "a
    random safe parameter set", the best for the best achievable.
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


def summarise(runs: PolicyRuns, max_trials: int, confidence: float) -> ArmBudget:
    """The figures of one arm: P50, P80, P95 and the level ``confidence``, the fraction reached,
    expected falls (before the target, within ``max_trials``), and the per-draw trials (None: > T)."""
    curve = reach_curve(runs.trials_to_target, max_trials)
    t = runs.trials_to_target
    reached = t <= max_trials
    return ArmBudget(
        p50=budget_at(curve, 0.5),
        p80=budget_at(curve, 0.8),
        p95=budget_at(curve, 0.95),
        book=budget_at(curve, confidence),
        reached_fraction=float(curve[-1]),
        expected_falls=float(np.mean(runs.falls)),
        mean_trials_when_reached=float(np.mean(t[reached])) if np.any(reached) else None,
        infeasible_steps=int(runs.infeasible_steps),
        trials_to_target=[int(v) if v <= max_trials else None for v in t],
        curve=curve.tolist(),
    )


# ---- the plan ----------------------------------------------------------------------------------


def check_options(
    *,
    target_fraction: float,
    target_value: float | None,
    confidence: float,
    max_trials: int,
    draws: int,
    max_fall_risk: float,
    seed: int,
    n_candidates: int = DEFAULT_CANDIDATES,
) -> None:
    """Refuse arguments out of range, naming the argument.

    Raises:
        ModelError: the first argument out of range, with its allowed range.
    """
    if target_value is None and not 0.0 < target_fraction <= 1.0:
        raise ModelError(f"target_fraction must be in (0, 1], got {target_fraction}")
    if target_value is not None and not np.isfinite(target_value):
        raise ModelError(f"target_value must be a finite number, got {target_value}")
    if not 0.0 < confidence < 1.0:
        raise ModelError(f"confidence must be in (0, 1), got {confidence}")
    if not 1 <= max_trials <= 500:
        raise ModelError(f"max_trials must be between 1 and 500, got {max_trials}")
    if not 1 <= draws <= 100_000:
        raise ModelError(f"draws must be between 1 and 100000, got {draws}")
    if not 0.0 < max_fall_risk <= 1.0:
        raise ModelError(f"max_fall_risk must be in (0, 1], got {max_fall_risk}")
    if not 2 <= n_candidates <= 8192:
        raise ModelError(f"n_candidates must be between 2 and 8192, got {n_candidates}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ModelError(f"seed must be a non-negative integer, got {seed!r}")


def budget_from_beliefs(
    beliefs: Beliefs,
    *,
    target_fraction: float = DEFAULT_TARGET_FRACTION,
    target_value: float | None = None,
    confidence: float = DEFAULT_CONFIDENCE,
    max_trials: int = DEFAULT_MAX_TRIALS,
    draws: int = DEFAULT_DRAWS,
    seed: int = 0,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    scenario: str = "",
    n_hardware: int = 0,
    notes: list[str] | None = None,
    progress: Progress | None = None,
) -> BudgetPlan:
    """The budget from beliefs on a candidate set (the array core of :func:`plan_from_prior`).

    The surfaces are drawn from ``beliefs.objective`` and ``beliefs.margin`` (their candidates' part);
    the with-prior arm tunes them with those beliefs, the cold start with ``beliefs.cold_objective``
    and ``beliefs.cold_margin``. ``seed`` seeds the draws and both arms' observation noise;
    ``progress(stage, done, total)`` is called after each simulated trial of each arm.
    """
    rng = np.random.default_rng(seed)
    draw_rng, prior_rng, cold_rng = (np.random.default_rng(s) for s in rng.bit_generator.seed_seq.spawn(3))
    objective = draw_surfaces(beliefs.objective, draws, draw_rng)
    margin = None if beliefs.margin is None else draw_surfaces(beliefs.margin, draws, draw_rng)
    fall_link = None if beliefs.margin is None else beliefs.margin.link
    target = draw_targets(objective, margin, target_fraction, target_value, fall_link)
    common = dict(
        max_trials=max_trials, objective_noise_sd=beliefs.objective_noise_sd,
        margin_noise_sd=beliefs.margin_noise_sd, max_fall_risk=max_fall_risk, fall_link=fall_link,
        progress=progress,
    )
    prior_runs = run_policy(objective, margin, target, beliefs.objective, beliefs.margin, rng=prior_rng,
                            stage=f"{STAGE}, with the prior", **common)
    cold_runs = run_policy(objective, margin, target, beliefs.cold_objective, beliefs.cold_margin, rng=cold_rng,
                           stage=f"{STAGE}, cold start", **common)
    notes = list(notes or [])
    unreachable = int(np.sum(~np.isfinite(target)))
    if unreachable:
        notes.append(f"{unreachable} of {draws} draws fall on every candidate: counted as never reached")
    for name, runs in (("with the prior", prior_runs), ("cold start", cold_runs)):
        share = runs.infeasible_steps / max(draws * max_trials, 1)
        if share > INFEASIBLE_NOTE_SHARE:
            notes.append(
                f"{name}: in {100 * share:.0f}% of simulated trials no candidate met the fall-risk limit "
                f"{max_fall_risk:g} (gapgauge propose would stop and say so); there the limit was lifted"
            )
    target_info = BudgetTarget(
        kind="value" if target_value is not None else "fraction",
        fraction=None if target_value is not None else float(target_fraction),
        value=None if target_value is None else float(target_value),
        definition=(
            f"objective <= {target_value:g}" if target_value is not None else
            f"{target_fraction:g} of the way from the median of random safe parameter sets to the best, per draw"
        ),
        median_over_draws=float(np.nanmedian(target)) if np.any(np.isfinite(target)) else None,
    )
    with_prior = summarise(prior_runs, max_trials, confidence)
    cold = summarise(cold_runs, max_trials, confidence)
    curve = [CurvePoint(n + 1, with_prior.curve[n], cold.curve[n]) for n in range(max_trials)]
    p, c = with_prior.p80, cold.p80
    level = f"P{round(100 * confidence)}"
    return BudgetPlan(
        scenario=scenario,
        with_prior=with_prior,
        cold_start=cold,
        curve=curve,
        saving=c - p if p is not None and c is not None else None,
        saving_at_least=max_trials + 1 - p if p is not None and c is None else None,
        sentence=(
            f"Book {book_text(with_prior.book, max_trials)} trials ({level} with the simulation prior), "
            f"{book_text(cold.book, max_trials)} without it."
        ),
        target=target_info,
        confidence=float(confidence),
        max_trials=int(max_trials),
        draws=int(draws),
        seed=int(seed),
        max_fall_risk=float(max_fall_risk),
        n_candidates=int(beliefs.objective.n_candidates),
        n_hardware=int(n_hardware),
        method=dict(METHOD),
        notes=notes,
    )


def plan_from_prior(
    prior: PriorFit,
    *,
    candidates: np.ndarray | None = None,
    target_fraction: float = DEFAULT_TARGET_FRACTION,
    target_value: float | None = None,
    confidence: float = DEFAULT_CONFIDENCE,
    max_trials: int = DEFAULT_MAX_TRIALS,
    draws: int = DEFAULT_DRAWS,
    seed: int = 0,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    n_candidates: int = DEFAULT_CANDIDATES,
    progress: Progress | None = None,
) -> BudgetPlan:
    """How many hardware trials to book to reach the target, with the simulation prior and without.

    Args:
        prior: the fitted prior (:func:`gapgauge.compare.prior.fit_prior`); its scenario's safe bounds
            confine the candidates and its hardware trials are known to both arms.
        candidates: ``(m x dim)`` candidate points (unit cube of the full bounds, inside the safe
            bounds); None: ``n_candidates`` scrambled Sobol points (:func:`candidate_set`).
        target_fraction: target ``fraction`` of the way from a random safe set's objective (median) to
            the best, in (0, 1]; ignored when ``target_value`` is given.
        target_value: an absolute objective to reach instead (objective units, lower is better).
        confidence: the level of the booked figure (``book`` and the sentence), in (0, 1).
        max_trials: trials per simulated tuning run (T), 1 to 500.
        draws: plausible hardware surfaces (S), 1 to 100000.
        seed: non-negative; two streams are spawned from it (numpy ``SeedSequence.spawn``), one for
            the candidate set and one for the cold start's fit, the draws and the observation noise.
            Stored in the plan.
        max_fall_risk: the fall-risk limit of the policy (as ``gapgauge propose``), in (0, 1].
        n_candidates: candidate points when ``candidates`` is None, 2 to 8192 (rounded up to a power
            of two).
        progress: called as ``progress(stage, done, total)`` as the simulated trials go.

    Raises:
        ModelError: an argument out of range (named), or a prior without its fitted models.
    """
    check_options(target_fraction=target_fraction, target_value=target_value, confidence=confidence,
                  max_trials=max_trials, draws=draws, max_fall_risk=max_fall_risk, seed=seed,
                  n_candidates=n_candidates)
    started = time.perf_counter()
    scenario = prior.scenario
    if scenario is None or prior.objective_model is None:
        raise ModelError(
            "the prior has no scenario or fitted models (a prior read back from its JSON summary carries "
            "none); take it from gapgauge.app.prior.current_prior or gapgauge.compare.prior.fit_prior"
        )
    candidate_seed, monte_carlo_seed = np.random.default_rng(seed).bit_generator.seed_seq.spawn(2)
    if candidates is None:
        candidates = candidate_set(scenario, n_candidates, np.random.default_rng(candidate_seed))
    candidates = np.asarray(candidates, dtype=float)
    if candidates.ndim != 2 or candidates.shape[1] != scenario.dim or candidates.shape[0] < 2:
        raise ModelError(
            f"candidates must be an (m x {scenario.dim}) array with m >= 2 (unit cube of the bounds of "
            f"{scenario.name}), got shape {candidates.shape}"
        )
    inner_seed = int(monte_carlo_seed.generate_state(1)[0])
    with threadpool_limits(limits=FIT_BLAS_THREADS, user_api="blas"):
        beliefs = beliefs_from_prior(prior, candidates, inner_seed)
    notes = list(prior.notes)
    if beliefs.covariance_check > COVARIANCE_CHECK_TOLERANCE:
        notes.append(
            f"posterior covariance rescaled to the models' sds (largest relative difference "
            f"{beliefs.covariance_check:.2g})"
        )
    plan = budget_from_beliefs(
        beliefs, target_fraction=target_fraction, target_value=target_value, confidence=confidence,
        max_trials=max_trials, draws=draws, seed=inner_seed, max_fall_risk=max_fall_risk,
        scenario=scenario.name, n_hardware=prior.n_hardware, notes=notes, progress=progress,
    )
    plan.seed = int(seed)
    plan.seconds = time.perf_counter() - started
    return plan
