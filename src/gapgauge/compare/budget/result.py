"""The budget's typed result: trials to book with the simulation prior and from a cold start.

Stored as kind ``"budget"`` (``store.save_result``) and handed to the report as it is; every number
round-trips through strict JSON with :meth:`BudgetPlan.to_dict` / :meth:`BudgetPlan.from_dict`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

from ...results import Result


@dataclass
class ArmBudget:
    """The figures of one arm (with the prior, or cold start) over the draws.

    Attributes:
        p50, p80, p95: least trial count ``n`` whose probability of having reached the target by
            trial ``n`` is at least 0.5, 0.8, 0.95; None when the target is reached in fewer than
            that share of the draws within ``max_trials`` (printed ``>T``).
        book: the same at the plan's ``confidence``.
        reached_fraction: share of the draws that reached the target within ``max_trials``.
        expected_falls: mean falls per draw before the target was reached (within ``max_trials``).
        mean_trials_when_reached: mean trials to target over the draws that reached it, or None.
        infeasible_steps: simulated trials at which no candidate met the fall-risk limit.
        trials_to_target: per draw, the trial at which the target was reached, or None (> T).
        curve: ``(max_trials,)`` probability of having reached the target by trial ``n = 1..T``.
        beyond: when ``book`` is None, what would give a number (a longer horizon, a looser target,
            more draws), in words; else None.
    """

    p50: int | None
    p80: int | None
    p95: int | None
    book: int | None
    reached_fraction: float
    expected_falls: float
    mean_trials_when_reached: float | None
    infeasible_steps: int
    trials_to_target: list[int | None]
    curve: list[float]
    beyond: str | None = None


@dataclass
class CurvePoint:
    """Probability of having reached the target by ``trial``, in both arms."""

    trial: int
    with_prior: float
    cold_start: float


@dataclass
class BudgetTarget:
    """What "reached" means (:mod:`gapgauge.compare.budget.target`).

    Attributes:
        kind: ``"auto"`` (the level most simulated runs with the prior reach within the horizon),
            ``"value"`` (a given level), ``"within"`` (a given distance above ``reference_best``) or
            ``"fraction"`` (per draw, a fraction of the way from a random safe set to the draw's best).
        level: the objective to reach, objective units (lower is better); None for ``"fraction"``.
        within: ``level - reference_best``, objective units; None for ``"fraction"``.
        reference_best: the best the posterior expects for this robot (the lowest posterior mean among
            the candidates within the fall-risk limit), objective units.
        fraction: the fraction of a ``"fraction"`` target, else None.
        reach_share: for ``"auto"``, the share of the simulated runs with the prior that reach the level
            within the horizon (the level is the most ambitious one that this share reaches); else None.
        success_rule: the scenario's ``[success]`` rule in words ("" when it bounds nothing but falls).
        success_share: share of the simulated rollouts that stood at or below the level and met the
            success rule (the sweep's evidence that the level implies the rule), or None.
        definition: the rule in words, short ("no fall, recovery_time <= 2, objective <= 0.43").
        sentence: the target as a sentence for the reader.
        why: why this target (how an automatic one was chosen, or what to keep in mind).
        median_over_draws: the median of the per-draw targets (objective units), None when every draw
            falls on every candidate.
    """

    kind: str
    level: float | None
    within: float | None
    reference_best: float | None
    fraction: float | None
    reach_share: float | None
    success_rule: str
    success_share: float | None
    definition: str
    sentence: str
    why: str
    median_over_draws: float | None


@dataclass
class BudgetPlan(Result):
    """Trials to book, with the simulation prior and from a cold start.

    Attributes:
        scenario: the scenario's name.
        with_prior, cold_start: the two arms' figures.
        curve: per trial ``n = 1..max_trials``, the probability of having reached the target in each arm.
        saving: cold-start P80 minus with-prior P80, when both are within ``max_trials``; else None.
        saving_at_least: ``max_trials + 1 -`` with-prior P80 when only the cold start is beyond
            ``max_trials`` (the saving is at least that); else None.
        sentence: the booking in one sentence ("Book 6 trials (P80) with the simulation prior to reach
            the target, 14 without it.").
        target: what "reached" means.
        confidence: the level of ``book`` and the sentence, in (0, 1).
        max_trials: trials per simulated tuning run (T).
        draws: plausible hardware surfaces (S).
        seed: the seed the plan is reproducible from.
        max_fall_risk: the policy's fall-risk limit.
        n_candidates: candidate points the policy chose among.
        n_hardware: hardware trials already known to both arms.
        objective_scale, margin_scale: the variance scales of the drawn surfaces, from the hardware
            trials' leave-one-out residuals (:func:`gapgauge.compare.budget.belief.loo_variance_scale`).
        seconds: wall time, s.
        method: the method's choices in words, by topic.
        notes: what the user should know (the prior's notes, lifted fall-risk limits, ...).
    """

    kind: ClassVar[str] = "budget"
    schema_version: ClassVar[int] = 2

    scenario: str
    with_prior: ArmBudget
    cold_start: ArmBudget
    curve: list[CurvePoint]
    saving: int | None
    saving_at_least: int | None
    sentence: str
    target: BudgetTarget
    confidence: float
    max_trials: int
    draws: int
    seed: int
    max_fall_risk: float
    n_candidates: int
    n_hardware: int
    objective_scale: float = 1.0
    margin_scale: float = 1.0
    seconds: float = 0.0
    method: dict[str, str] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def book_text(value: int | None, max_trials: int) -> str:
    """A budget as text: the number, or ``">T"`` when not reached."""
    return str(value) if value is not None else f">{max_trials}"
