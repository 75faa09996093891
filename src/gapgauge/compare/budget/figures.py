"""The figures of one arm: the reach curve, the budgets at P50, P80, P95 and the booking level, and,
when the booking is beyond the horizon, what would give a number."""

from __future__ import annotations

import numpy as np

from .policy import PolicyRuns, falls_before, trials_to_level
from .result import ArmBudget
from .target import auto_level, level_text

# the reach share counts as still rising when it gained more than this over the last half of the horizon
RISING = 0.05


def reach_curve(trials_to_target: np.ndarray, max_trials: int) -> np.ndarray:
    """``(max_trials,)``: the fraction of draws that reached the target by trial ``n = 1..max_trials``."""
    t = np.asarray(trials_to_target)
    return np.array([float(np.mean(t <= n)) for n in range(1, max_trials + 1)])


def budget_at(curve: np.ndarray, level: float) -> int | None:
    """The least ``n`` whose reach probability is at least ``level``, or None when no ``n`` in the
    curve gets there (the target is reached in fewer than ``level`` of the draws: "> T")."""
    hit = np.flatnonzero(np.asarray(curve) >= level - 1e-12)
    return int(hit[0]) + 1 if hit.size else None


def beyond_text(curve: np.ndarray, best_at_horizon: np.ndarray | None, confidence: float, draws: int,
                step: float) -> str:
    """Why a booking at ``confidence`` is beyond the horizon, and what would give a number.

    A looser target: the most ambitious level that ``confidence`` of the draws reach within the horizon
    (from ``best_at_horizon (draws,)``, the runs' best objective after the last trial). A longer
    horizon: when the reach share still rose by more than ``RISING`` over the last half of it. More
    draws: when the share is within two binomial standard errors of ``confidence``.
    """
    max_trials = len(curve)
    reached = float(curve[-1]) if max_trials else 0.0
    text = (f"{100 * reached:.0f}% of the draws reach the target within {max_trials} trials, fewer than "
            f"{100 * confidence:.0f}%")
    options = []
    if max_trials >= 2 and reached - float(curve[max_trials // 2 - 1]) > RISING:
        options.append("a longer horizon (max_trials: the share was still rising at the last trial)")
    if best_at_horizon is not None:
        looser = auto_level(best_at_horizon, confidence, step)
        if looser is not None:
            options.append(f"a looser target (target_value {level_text(looser, step)} is reached by "
                           f"{100 * confidence:.0f}% of the draws within {max_trials} trials)")
    if abs(reached - confidence) <= 2.0 * np.sqrt(confidence * (1 - confidence) / max(draws, 1)):
        options.append("more draws (the share is within Monte Carlo error of the level)")
    if not options:
        options.append("a looser target or a longer horizon")
    return f"{text}; a number needs " + ", or ".join(options)


def arm_figures(runs: PolicyRuns, target: np.ndarray, max_trials: int, confidence: float, step: float) -> ArmBudget:
    """The figures of one arm against ``target`` (``(draws,)`` level, NaN: never): P50, P80, P95 and the
    level ``confidence``, the fraction reached, expected falls (before the target, within ``max_trials``),
    the per-draw trials (None: > T), and what would give a number when the booking is beyond T."""
    t = trials_to_level(runs.best_so_far, target)
    curve = reach_curve(t, max_trials)
    reached = t <= max_trials
    book = budget_at(curve, confidence)
    return ArmBudget(
        p50=budget_at(curve, 0.5),
        p80=budget_at(curve, 0.8),
        p95=budget_at(curve, 0.95),
        book=book,
        reached_fraction=float(curve[-1]),
        expected_falls=float(np.mean(falls_before(runs.fell, t))),
        mean_trials_when_reached=float(np.mean(t[reached])) if np.any(reached) else None,
        infeasible_steps=int(runs.infeasible_steps),
        trials_to_target=[int(v) if v <= max_trials else None for v in t],
        curve=curve.tolist(),
        beyond=None if book is not None else beyond_text(curve, runs.best_so_far[:, -1], confidence, t.size, step),
    )


__all__ = ["arm_figures", "beyond_text", "budget_at", "reach_curve"]
