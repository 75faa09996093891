"""The budget's entry point: draws, targets, both arms, and the figures of the plan.

:func:`plan_from_prior` (a fitted prior in, a :class:`BudgetPlan` out) makes the candidate set, the
beliefs (:mod:`.belief`), the surfaces, runs the policy (:mod:`.policy`) with the prior and from a cold
start, sets the target (:mod:`.target`) and summarises the two arms (:mod:`.figures`);
:func:`budget_from_beliefs` is its array core.
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
from .belief import Beliefs, beliefs_from_prior
from .figures import arm_figures
from .policy import DEFAULT_MAX_FALL_RISK, STAGE, run_policy
from .result import BudgetPlan, BudgetTarget, CurvePoint, book_text
from .target import (
    DEFAULT_REACH_SHARE,
    auto_level,
    draw_targets,
    readable_step,
    reference_best,
    statement,
    success_cap,
    success_rule_text,
    success_share_at,
)

DEFAULT_DRAWS = 128
DEFAULT_MAX_TRIALS = 20
# the simulated tuner picks among a fixed set where propose polishes 1,024 Sobol points by local search:
# it needs the finer set to get as low (measured on the stand-ins: benchmarks/budget_coverage.py)
DEFAULT_CANDIDATES = 4096
DEFAULT_TARGET_FRACTION = 0.95  # the per-draw fraction target, when asked for
DEFAULT_CONFIDENCE = 0.8
# a belief covariance whose diagonal differs from its model's predictive sd by more than this
# (relative) is rescaled with a note; below it the difference is rounding
COVARIANCE_CHECK_TOLERANCE = 1e-6
# a share of simulated trials above this with no candidate under the fall-risk limit gets a note
INFEASIBLE_NOTE_SHARE = 0.05

METHOD = {
    "draws": "joint posterior draws on the candidate set: Cholesky of the full posterior covariance "
    "(least jitter), marginal sds equal to the models' predict, the covariance scaled by the hardware "
    "trials' leave-one-out residuals (Bachoc 2013), shrunk towards 1",
    "candidates": "scrambled Sobol points inside the safe bounds (scipy.stats.qmc)",
    "policy": "expected improvement x P(no fall) under the fall-risk limit, plug-in incumbent, maximised "
    "over the candidate set (discrete)",
    "update": "exact Gaussian conditioning on each trial, hyperparameters fixed (no refit)",
    "cold_start": "hardware-only GP (Matern 5/2 ARD, constant mean, weak priors) for objective and margin",
    "target": "no fall, the success rule and an objective level; by default the most ambitious level that "
    "90% of the simulated runs with the prior reach within max_trials",
    "budget": "least n with P(reached by n) >= level; None means > max_trials",
}


# ---- candidates ---------------------------------------------------------------------------------


def candidate_set(scenario: Scenario, n_candidates: int, seed: int | np.random.Generator) -> np.ndarray:
    """``(n x dim)`` scrambled Sobol points (scipy.stats.qmc) inside the safe bounds, unit cube of the
    full bounds; ``n`` is ``n_candidates`` rounded up to a power of two."""
    bounds = scenario.to_unit(scenario.bounds(safe=True).T).T
    sobol = qmc.Sobol(scenario.dim, scramble=True, seed=np.random.default_rng(seed))
    U = sobol.random_base2(int(np.ceil(np.log2(max(n_candidates, 2)))))
    return bounds[:, 0] + U * (bounds[:, 1] - bounds[:, 0])


# ---- the plan ----------------------------------------------------------------------------------


def check_options(
    *,
    target_fraction: float | None = None,
    target_value: float | None = None,
    target_within: float | None = None,
    reach_share: float = DEFAULT_REACH_SHARE,
    confidence: float = DEFAULT_CONFIDENCE,
    max_trials: int = DEFAULT_MAX_TRIALS,
    draws: int = DEFAULT_DRAWS,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    seed: int = 0,
    n_candidates: int = DEFAULT_CANDIDATES,
) -> None:
    """Refuse arguments out of range, naming the argument.

    Raises:
        ModelError: the first argument out of range, with its allowed range.
    """
    given = [name for name, v in (("target_fraction", target_fraction), ("target_value", target_value),
                                  ("target_within", target_within)) if v is not None]
    if len(given) > 1:
        raise ModelError(f"give at most one of target_fraction, target_value and target_within, got {given}")
    if target_fraction is not None and not 0.0 < target_fraction <= 1.0:
        raise ModelError(f"target_fraction must be in (0, 1], got {target_fraction}")
    if target_value is not None and not np.isfinite(target_value):
        raise ModelError(f"target_value must be a finite number, got {target_value}")
    if target_within is not None and not (np.isfinite(target_within) and target_within >= 0):
        raise ModelError(f"target_within must be a non-negative number (objective units), got {target_within}")
    if not 0.0 < reach_share < 1.0:
        raise ModelError(f"reach_share must be in (0, 1), got {reach_share}")
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


def _target(
    kind: str,
    beliefs: Beliefs,
    objective: np.ndarray,
    margin: np.ndarray | None,
    best_at_horizon: np.ndarray,
    *,
    target_fraction: float | None,
    target_value: float | None,
    target_within: float | None,
    reach_share: float,
    max_fall_risk: float,
    max_trials: int,
    success_rule: str,
    success: tuple[np.ndarray, np.ndarray] | None,
) -> tuple[np.ndarray, BudgetTarget, float, list[str]]:
    """The per-draw target ``(draws,)``, its statement, the readable step of its level, and notes."""
    notes: list[str] = []
    reference, any_feasible = reference_best(beliefs, max_fall_risk)
    if not any_feasible:
        notes.append(f"no candidate is within the fall-risk limit {max_fall_risk:g}: the best the posterior "
                     "expects is taken over all candidates")
    o = beliefs.objective
    spread = float(np.median(o.mean[o.n_known:])) - reference
    step = readable_step(spread)
    fall_link = None if beliefs.margin is None else beliefs.margin.link
    if kind == "fraction":
        target = draw_targets(objective, margin, target_fraction, None, fall_link)
        median = float(np.nanmedian(target)) if np.any(np.isfinite(target)) else None
        definition, sentence, why = statement(kind=kind, level=None, reference=reference, step=step,
                                              rule=success_rule, fraction=target_fraction, median=median)
        return target, BudgetTarget(kind, None, None, reference, float(target_fraction), None, success_rule, None,
                                    definition, sentence, why, median), step, notes
    cap = None if success is None or not success_rule else success_cap(*success)
    capped = False
    if kind == "value":
        level = float(target_value)
    elif kind == "within":
        level = reference + float(target_within)
    else:
        level = auto_level(best_at_horizon, reach_share, step)
        if level is None:
            level = reference
            notes.append(f"fewer than {100 * reach_share:.0f}% of the simulated runs with the prior had a trial "
                         "that stood: the target falls back on the best the posterior expects")
        if cap is not None and level > cap:
            level, capped = cap, True
    share = None if success is None or not success_rule else success_share_at(*success, level)
    definition, sentence, why = statement(
        kind=kind, level=level, reference=reference, step=step, rule=success_rule,
        reach_share=reach_share, cap=cap, capped=capped, success_share=share, draws=objective.shape[0],
        max_trials=max_trials,
    )
    reached = float(np.mean(best_at_horizon <= level))
    info = BudgetTarget(kind, float(level), float(level - reference), reference, None,
                        reached if kind == "auto" else None, success_rule, share, definition, sentence, why,
                        float(level))
    return np.full(objective.shape[0], float(level)), info, step, notes


def budget_from_beliefs(
    beliefs: Beliefs,
    *,
    target_fraction: float | None = None,
    target_value: float | None = None,
    target_within: float | None = None,
    reach_share: float = DEFAULT_REACH_SHARE,
    confidence: float = DEFAULT_CONFIDENCE,
    max_trials: int = DEFAULT_MAX_TRIALS,
    draws: int = DEFAULT_DRAWS,
    seed: int = 0,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    scenario: str = "",
    n_hardware: int = 0,
    success_rule: str = "",
    success: tuple[np.ndarray, np.ndarray] | None = None,
    notes: list[str] | None = None,
    progress: Progress | None = None,
) -> BudgetPlan:
    """The budget from beliefs on a candidate set (the array core of :func:`plan_from_prior`).

    The surfaces are drawn from ``beliefs.objective`` and ``beliefs.margin`` (their candidates' part,
    with their variance scales, :meth:`Beliefs.surfaces`); the with-prior arm tunes them with those
    beliefs (unscaled, as ``propose`` does), the cold start with ``beliefs.cold_objective`` and
    ``beliefs.cold_margin``. The target (:mod:`.target`): ``target_value``, ``target_within`` (above the
    best the posterior expects), ``target_fraction`` (per draw), or none of them: the most ambitious
    level that ``reach_share`` of the runs with the prior reach within ``max_trials``. ``success_rule``:
    the scenario's rule in words; ``success``: ``(objective (n,), met (n,) bool)`` of the simulated
    rollouts that stood, the sweep's evidence of the level at which the rule holds. ``seed`` seeds the
    draws and both arms' observation noise; ``progress(stage, done, total)`` is called after each
    simulated trial of each arm.
    """
    rng = np.random.default_rng(seed)
    draw_rng, prior_rng, cold_rng = (np.random.default_rng(s) for s in rng.bit_generator.seed_seq.spawn(3))
    objective, margin = beliefs.surfaces(draws, draw_rng)
    fall_link = None if beliefs.margin is None else beliefs.margin.link
    common = dict(
        max_trials=max_trials, objective_noise_sd=beliefs.objective_noise_sd,
        margin_noise_sd=beliefs.margin_noise_sd, max_fall_risk=max_fall_risk, fall_link=fall_link,
        progress=progress,
    )
    prior_runs = run_policy(objective, margin, None, beliefs.objective, beliefs.margin, rng=prior_rng,
                            stage=f"{STAGE}, with the prior", **common)
    cold_runs = run_policy(objective, margin, None, beliefs.cold_objective, beliefs.cold_margin, rng=cold_rng,
                           stage=f"{STAGE}, cold start", **common)
    kind = ("fraction" if target_fraction is not None else "value" if target_value is not None
            else "within" if target_within is not None else "auto")
    target, target_info, step, target_notes = _target(
        kind, beliefs, objective, margin, prior_runs.best_so_far[:, -1], target_fraction=target_fraction,
        target_value=target_value, target_within=target_within, reach_share=reach_share,
        max_fall_risk=max_fall_risk, max_trials=max_trials, success_rule=success_rule, success=success,
    )
    notes = list(notes or []) + target_notes
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
    with_prior = arm_figures(prior_runs, target, max_trials, confidence, step)
    cold = arm_figures(cold_runs, target, max_trials, confidence, step)
    curve = [CurvePoint(n + 1, with_prior.curve[n], cold.curve[n]) for n in range(max_trials)]
    p, c = with_prior.p80, cold.p80
    return BudgetPlan(
        scenario=scenario,
        with_prior=with_prior,
        cold_start=cold,
        curve=curve,
        saving=c - p if p is not None and c is not None else None,
        saving_at_least=max_trials + 1 - p if p is not None and c is None else None,
        sentence=_sentence(with_prior.book, cold.book, confidence, max_trials),
        target=target_info,
        confidence=float(confidence),
        max_trials=int(max_trials),
        draws=int(draws),
        seed=int(seed),
        max_fall_risk=float(max_fall_risk),
        n_candidates=int(beliefs.objective.n_candidates),
        n_hardware=int(n_hardware),
        objective_scale=float(beliefs.objective_scale),
        margin_scale=float(beliefs.margin_scale),
        method=dict(METHOD),
        notes=notes,
    )


def _sentence(book: int | None, cold: int | None, confidence: float, max_trials: int) -> str:
    level = f"P{round(100 * confidence)}"
    text = (f"Book {book_text(book, max_trials)} trials ({level}) with the simulation prior to reach the target, "
            f"{book_text(cold, max_trials)} without it")
    if book is not None and cold is not None and cold > book:
        text += f": the prior saves {cold - book}"
    elif book is not None and cold is None:
        text += f": the prior saves at least {max_trials + 1 - book}"
    return text + "."


def plan_from_prior(
    prior: PriorFit,
    *,
    candidates: np.ndarray | None = None,
    target_fraction: float | None = None,
    target_value: float | None = None,
    target_within: float | None = None,
    reach_share: float = DEFAULT_REACH_SHARE,
    confidence: float = DEFAULT_CONFIDENCE,
    max_trials: int = DEFAULT_MAX_TRIALS,
    draws: int = DEFAULT_DRAWS,
    seed: int = 0,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    n_candidates: int = DEFAULT_CANDIDATES,
    success: tuple[np.ndarray, np.ndarray] | None = None,
    calibrate: bool = True,
    progress: Progress | None = None,
) -> BudgetPlan:
    """How many hardware trials to book to reach the target, with the simulation prior and without.

    Args:
        prior: the fitted prior (:func:`gapgauge.compare.prior.fit_prior`); its scenario's safe bounds
            confine the candidates, its ``[success]`` rule is part of the target, and its hardware
            trials are known to both arms.
        candidates: ``(m x dim)`` candidate points (unit cube of the full bounds, inside the safe
            bounds); None: ``n_candidates`` scrambled Sobol points (:func:`candidate_set`).
        target_fraction: the per-draw target, this fraction of the way from a random safe set's objective
            (median) to the draw's best, in (0, 1].
        target_value: an absolute objective level to reach (objective units, lower is better).
        target_within: a level this far above the best the posterior expects (objective units, >= 0).
        reach_share: with none of the three, the level is the most ambitious one that this share of the
            simulated runs with the prior reach within ``max_trials``, in (0, 1).
        confidence: the level of the booked figure (``book`` and the sentence), in (0, 1).
        max_trials: trials per simulated tuning run (T), 1 to 500.
        draws: plausible hardware surfaces (S), 1 to 100000.
        seed: non-negative; two streams are spawned from it (numpy ``SeedSequence.spawn``), one for
            the candidate set and one for the cold start's fit, the draws and the observation noise.
            Stored in the plan.
        max_fall_risk: the fall-risk limit of the policy (as ``gapgauge propose``), in (0, 1].
        n_candidates: candidate points when ``candidates`` is None, 2 to 8192 (rounded up to a power
            of two).
        success: ``(objective (n,), met (n,) bool)`` of the sweep's rollouts that stood: whether each met
            the success rule (:func:`gapgauge.features.success`); the evidence of the levels at which the
            rule holds (None: not used).
        calibrate: scale the surfaces' variance by the trials' leave-one-out residuals (the default);
            False: draw from the posterior as it is.
        progress: called as ``progress(stage, done, total)`` as the simulated trials go.

    Raises:
        ModelError: an argument out of range (named), or a prior without its fitted models.
    """
    check_options(target_fraction=target_fraction, target_value=target_value, target_within=target_within,
                  reach_share=reach_share, confidence=confidence, max_trials=max_trials, draws=draws,
                  max_fall_risk=max_fall_risk, seed=seed, n_candidates=n_candidates)
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
        beliefs = beliefs_from_prior(prior, candidates, inner_seed, calibrate=calibrate)
    notes = list(prior.notes)
    if beliefs.covariance_check > COVARIANCE_CHECK_TOLERANCE:
        notes.append(
            f"posterior covariance rescaled to the models' sds (largest relative difference "
            f"{beliefs.covariance_check:.2g})"
        )
    if calibrate and beliefs.objective_residuals is not None and beliefs.objective_residuals.size:
        notes.append(
            f"surfaces drawn with the posterior sd scaled by {np.sqrt(beliefs.objective_scale):.2f} (objective) "
            f"and {np.sqrt(beliefs.margin_scale):.2f} (margin), from the leave-one-out residuals of the "
            f"{beliefs.objective_residuals.size} hardware trial(s)"
        )
    elif calibrate:
        notes.append("fewer than 2 hardware trials: the surfaces are drawn from the posterior unscaled")
    plan = budget_from_beliefs(
        beliefs, target_fraction=target_fraction, target_value=target_value, target_within=target_within,
        reach_share=reach_share, confidence=confidence, max_trials=max_trials, draws=draws, seed=inner_seed,
        max_fall_risk=max_fall_risk, scenario=scenario.name, n_hardware=prior.n_hardware,
        success_rule=success_rule_text(scenario.success_max), success=success, notes=notes, progress=progress,
    )
    plan.seed = int(seed)
    plan.seconds = time.perf_counter() - started
    return plan
