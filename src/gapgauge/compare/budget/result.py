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


@dataclass
class CurvePoint:
    """Probability of having reached the target by ``trial``, in both arms."""

    trial: int
    with_prior: float
    cold_start: float


@dataclass
class BudgetTarget:
    """What "reached" means.

    Attributes:
        kind: ``"fraction"`` (per draw, a fraction of the way from a random safe set to the best) or
            ``"value"`` (an absolute objective).
        fraction: the fraction, or None for a value target.
        value: the objective to reach (objective units, lower is better), or None.
        definition: the rule in words.
        median_over_draws: the median of the per-draw targets (objective units), None when every draw
            falls on every candidate.
    """

    kind: str
    fraction: float | None
    value: float | None
    definition: str
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
        sentence: the booking in one sentence ("Book 6 trials (P80 with the simulation prior), ...").
        target: what "reached" means.
        confidence: the level of ``book`` and the sentence, in (0, 1).
        max_trials: trials per simulated tuning run (T).
        draws: plausible hardware surfaces (S).
        seed: the seed the plan is reproducible from.
        max_fall_risk: the policy's fall-risk limit.
        n_candidates: candidate points the policy chose among.
        n_hardware: hardware trials already known to both arms.
        seconds: wall time, s.
        method: the method's choices in words, by topic.
        notes: what the user should know (the prior's notes, lifted fall-risk limits, ...).
    """

    kind: ClassVar[str] = "budget"
    schema_version: ClassVar[int] = 1

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
    seconds: float = 0.0
    method: dict[str, str] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def book_text(value: int | None, max_trials: int) -> str:
    """A budget as text: the number, or ``">T"`` when not reached."""
    return str(value) if value is not None else f">{max_trials}"
