"""Section 6, the trial budget: trials to the target with and without the simulation prior, and the
probability of having reached it by trial n."""

from __future__ import annotations

from typing import Any

import numpy as np

from ...compare.budget import BudgetPlan
from .. import plots
from ..inputs import ReportInputs
from .common import Figure, fmt

ARMS = (("with_prior", "with the simulation prior"), ("cold_start", "cold start (no prior)"))


def p80(budget: BudgetPlan | None, arm: str) -> int | None:
    """The P80 budget of ``arm`` (``with_prior`` or ``cold_start``); None when not reached (or no budget)."""
    return None if budget is None else getattr(budget, arm).p80


def trials_text(value: int | None, budget: BudgetPlan) -> str:
    """A budget quantile; one the draws never reach within the horizon reads "> T"."""
    return fmt(value) if value is not None else f"> {budget.max_trials}"


def _extra(budget: BudgetPlan) -> list[tuple[str, str]]:
    return [
        ("target", budget.target.definition),
        ("booking level", f"P{round(100 * budget.confidence)}"),
        ("saving with the prior (P80)", fmt(budget.saving)),
        ("draws (response surfaces)", fmt(budget.draws)),
        ("trials simulated per draw at most", fmt(budget.max_trials)),
        ("candidate parameter sets", fmt(budget.n_candidates)),
        ("fall-risk limit", fmt(budget.max_fall_risk)),
        ("hardware trials known", fmt(budget.n_hardware)),
        ("seed", str(budget.seed)),
    ]


def budget_section(inputs: ReportInputs) -> dict[str, Any] | None:
    """The budget table, its settings and the reach curve, or None before a budget."""
    budget = inputs.budget
    if budget is None:
        return None
    rows = []
    for key, label in ARMS:
        arm = getattr(budget, key)
        rows.append(
            {
                "name": label,
                "p50": trials_text(arm.p50, budget),
                "p80": trials_text(arm.p80, budget),
                "p95": trials_text(arm.p95, budget),
                "falls": fmt(arm.expected_falls),
            }
        )
    trials = np.arange(1, budget.max_trials + 1, dtype=float)
    figures = [
        Figure(
            "budget_curve",
            plots.budget_curve(
                trials,
                np.asarray(budget.with_prior.curve, float),
                np.asarray(budget.cold_start.curve, float),
                p80=(p80(budget, "with_prior"), p80(budget, "cold_start")),
            ),
            "probability of reaching the target by trial n",
            "Probability of having reached the target by trial n, with the simulation prior and from a "
            "cold start; dashed lines: the P80 budgets, dotted: 80%.",
        )
    ]
    return {"rows": rows, "figures": figures, "extra": _extra(budget)}
