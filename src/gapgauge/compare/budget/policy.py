"""The simulated tuning runs: the proposal policy of ``gapgauge propose`` on many drawn surfaces at once.

On every draw the policy proposes one trial at a time for up to ``max_trials``: expected improvement
times the probability of not falling (Jones, Schonlau and Welch 1998; Gardner et al. 2014), under the
fall-risk limit, with the plug-in incumbent (lowest posterior mean at the trials so far). Two
simplifications, both for speed: the maximisation is discrete, over the candidate set (``propose``
polishes a Sobol candidate with L-BFGS-B); and after each trial the belief is conditioned on it with
its hyperparameters fixed (:class:`~gapgauge.compare.budget.belief.Conditioner`), not refitted.

A trial's outcome is the draw observed with the hardware noise: it falls with the fall model's chance
at the draw's margin (its probit link, :class:`gapgauge.compare.fall.FallModel`; without one, when the
margin is below 0), and then only its margin is observed (a fallen trial's objective is not a
measurement, as in ``fit_prior``). When no candidate meets the fall-risk limit (``propose`` would stop
and say so), the simulated user lifts the limit for that trial (EI x P(no fall) unconstrained, as with
a higher ``max_fall_risk``); such trials are counted in ``infeasible_steps``.

The policy never looks at the target, so one run serves every target: each draw's best latent
objective among the trials that stood so far (``best_so_far``) gives the trials to any level
(:func:`trials_to_level`), and the falls before it (:func:`falls_before`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr
from threadpoolctl import threadpool_limits

from ...progress import Progress, or_silent
from ..acquisition import log_constrained_improvement
from ..linalg import FIT_BLAS_THREADS
from .belief import Belief, Conditioner

DEFAULT_MAX_FALL_RISK = 0.05  # as gapgauge propose
# draws handled at once: the conditioning state is draws x (trials + known) x candidates floats
DRAW_CHUNK = 128
POLICIES = ("ei", "random")
STAGE = "budget: simulated trials"


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
        best_so_far: ``(draws x max_trials)`` the lowest latent objective among the trials that stood up
            to and including each trial (``inf`` before one stood), objective units.
    """

    trials_to_target: np.ndarray
    falls: np.ndarray
    chosen: np.ndarray
    fell: np.ndarray
    infeasible_steps: int
    best_so_far: np.ndarray | None = None


def trials_to_level(best_so_far: np.ndarray, target: np.ndarray | float) -> np.ndarray:
    """``(draws,)`` int: the first trial (1-based) whose best-so-far latent objective is at or below
    ``target`` (a scalar or ``(draws,)``; NaN: never), ``max_trials + 1`` when none within the run."""
    best = np.atleast_2d(best_so_far)
    draws, max_trials = best.shape
    target = np.broadcast_to(np.asarray(target, dtype=float), (draws,))
    with np.errstate(invalid="ignore"):
        hit = best <= target[:, None]
    return np.where(hit.any(axis=1), np.argmax(hit, axis=1) + 1, max_trials + 1)


def falls_before(fell: np.ndarray, trials: np.ndarray) -> np.ndarray:
    """``(draws,)`` falls among the trials before ``trials (draws,)`` (the trial that reached the target
    stood; a draw that never reached it counts every fall of its run)."""
    fell = np.atleast_2d(fell)
    before = np.arange(1, fell.shape[1] + 1)[None, :] < np.asarray(trials)[:, None]
    return np.sum(fell & before, axis=1)


def fall_risk(mean: np.ndarray, var: np.ndarray, noise: float, link: tuple[float, float, float] | None) -> np.ndarray:
    """The modelled fall probability of a new trial from a margin belief's ``mean`` and latent ``var``
    (any shape, m and m^2), as :meth:`gapgauge.compare.fall.FallModel.fall_probability`: with the probit
    link ``(a, b, threshold)`` integrated over the latent margin, ``Phi((a + b (threshold - mu)) /
    sqrt(1 + b^2 var))``; without one, ``P(margin < 0)`` of a new observation (latent variance plus
    ``noise``)."""
    if link is None:
        return ndtr(-mean / np.maximum(np.sqrt(var + noise), 1e-12))
    a, b, threshold = link
    return ndtr((a + b * (threshold - mean)) / np.sqrt(1.0 + b**2 * var))


def run_policy(
    objective_truth: np.ndarray,
    margin_truth: np.ndarray | None,
    target: np.ndarray | None,
    objective_belief: Belief,
    margin_belief: Belief | None,
    *,
    max_trials: int,
    objective_noise_sd: float,
    margin_noise_sd: float = 0.0,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    rng: np.random.Generator | int = 0,
    policy: str = "ei",
    fall_link: tuple[float, float, float] | None = None,
    progress: Progress | None = None,
    stage: str = STAGE,
) -> PolicyRuns:
    """Tune each draw with the proposal policy for ``max_trials`` trials.

    Args:
        objective_truth: ``(draws x m)`` latent hardware objective of each draw at the candidates.
        margin_truth: ``(draws x m)`` latent margin of stability (m); a trial falls where it is < 0.
            None: nothing falls and the policy has no fall model.
        target: ``(draws,)`` objective to reach in each draw (NaN: unreachable); None: no target (the
            runs' ``best_so_far`` then gives the trials to any level, :func:`trials_to_level`).
        objective_belief: the policy's model of the objective (its candidates are the truth's columns).
        margin_belief: the policy's fall model (margin), or None.
        max_trials: trials per draw.
        objective_noise_sd, margin_noise_sd: sd of the hardware's observation noise (response units).
        max_fall_risk: the fall-risk limit of ``gapgauge propose``.
        rng: seed or Generator of the observation noise (and of the random policy).
        policy: ``"ei"``, the policy of ``gapgauge propose``; ``"random"``, a uniformly random candidate
            each trial (with replacement), a reference with a known answer.
        fall_link: ``(a, b, threshold)``: a trial at latent margin ``f`` falls with probability
            ``Phi(a + b (threshold - f))`` (the fall model's probit link); None: it falls when ``f < 0``.
        progress: called as ``progress(stage, done, total)`` after each simulated trial of a block of
            draws (``total`` = blocks x ``max_trials``).
        stage: the stage name given to ``progress``.

    Raises:
        ValueError: an unknown ``policy``, or a belief whose candidates are not the truth's columns.
    """
    if policy not in POLICIES:
        raise ValueError(f"policy must be one of {POLICIES}, got {policy!r}")
    objective_truth = np.atleast_2d(np.asarray(objective_truth, dtype=float))
    draws, m = objective_truth.shape
    if objective_belief.n_candidates != m:
        raise ValueError(f"the objective belief has {objective_belief.n_candidates} candidates, the truth {m}")
    report = or_silent(progress)
    rng = np.random.default_rng(rng)
    # every random number up front, so that nothing depends on how the draws are chunked
    z_objective = rng.standard_normal((draws, max_trials))
    z_margin = rng.standard_normal((draws, max_trials))
    random_choice = rng.integers(m, size=(draws, max_trials))
    u_fall = rng.uniform(size=(draws, max_trials))
    target = np.full(draws, np.nan) if target is None else np.broadcast_to(np.asarray(target, dtype=float), (draws,))
    margin_truth = None if margin_truth is None else np.atleast_2d(margin_truth)
    out = PolicyRuns(
        trials_to_target=np.full(draws, max_trials + 1),
        falls=np.zeros(draws, dtype=int),
        chosen=np.zeros((draws, max_trials), dtype=int),
        fell=np.zeros((draws, max_trials), dtype=bool),
        infeasible_steps=0,
        best_so_far=np.full((draws, max_trials), np.inf),
    )
    starts = range(0, draws, DRAW_CHUNK)
    total = len(starts) * max_trials
    with threadpool_limits(limits=FIT_BLAS_THREADS, user_api="blas"):
        for number, start in enumerate(starts):
            block = slice(start, min(start + DRAW_CHUNK, draws))
            done = number * max_trials

            def step(n: int, done: int = done) -> None:
                report(stage, done + n, total)

            runs = _run_block(
                objective_truth[block],
                None if margin_truth is None else margin_truth[block],
                target[block], objective_belief, margin_belief, max_trials, objective_noise_sd,
                margin_noise_sd, max_fall_risk, policy, z_objective[block], z_margin[block],
                random_choice[block], fall_link, u_fall[block], step,
            )
            out.trials_to_target[block] = runs.trials_to_target
            out.falls[block] = runs.falls
            out.chosen[block] = runs.chosen
            out.fell[block] = runs.fell
            out.infeasible_steps += runs.infeasible_steps
            out.best_so_far[block] = runs.best_so_far
    return out


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
    fall_link: tuple[float, float, float] | None,
    u_fall: np.ndarray,
    step: Callable[[int], None],
) -> PolicyRuns:
    draws, m = objective_truth.shape
    rows = np.arange(draws)
    off_o = objective_belief.n_known
    objective = Conditioner(objective_belief, draws, max_trials)
    observed = np.zeros((draws, objective_belief.mean.size), dtype=bool)
    observed[:, :off_o] = True
    margin = None if margin_belief is None else Conditioner(margin_belief, draws, max_trials)
    off_m = 0 if margin_belief is None else margin_belief.n_known
    trials = np.full(draws, max_trials + 1)
    falls = np.zeros(draws, dtype=int)
    chosen = np.zeros((draws, max_trials), dtype=int)
    fell_all = np.zeros((draws, max_trials), dtype=bool)
    best_so_far = np.full((draws, max_trials), np.inf)
    best = np.full(draws, np.inf)
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
        with np.errstate(invalid="ignore"):
            trials[waiting & stood & (truth <= target)] = n + 1
        best = np.where(stood, np.minimum(best, truth), best)
        best_so_far[:, n] = best
        chosen[:, n] = choice
        fell_all[:, n] = fell
        step(n + 1)
    return PolicyRuns(trials, falls, chosen, fell_all, infeasible, best_so_far)


def _choose(
    objective: Conditioner,
    observed: np.ndarray,
    off_o: int,
    margin: Conditioner | None,
    off_m: int,
    max_fall_risk: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Each draw's next candidate under the ``propose`` policy, and whether none met the risk limit."""
    mean = objective.mean[:, off_o:]
    sd = np.sqrt(objective.var[:, off_o:])
    if margin is None:
        risk = np.zeros_like(mean)
    else:
        risk = fall_risk(margin.mean[:, off_m:], margin.var[:, off_m:], margin.noise, margin.link)
    feasible = risk <= max_fall_risk
    none_feasible = ~feasible.any(axis=1)
    # the plug-in incumbent of propose: lowest posterior mean at the trials so far; before any
    # trial, the lowest predicted mean among the feasible candidates
    at_trials = np.where(observed, objective.mean, np.inf).min(axis=1)
    among = np.where(feasible | none_feasible[:, None], mean, np.inf).min(axis=1)
    incumbent = np.where(np.isfinite(at_trials), at_trials, among)
    score = log_constrained_improvement(mean, sd, incumbent[:, None], risk)
    # with no candidate under the limit, EI x P(no fall) unconstrained (as if the user raised
    # max_fall_risk): taking the least risky candidate instead repeats one trial and learns nothing
    score = np.where(feasible | none_feasible[:, None], score, -np.inf)
    return np.argmax(score, axis=1), none_feasible
