"""Section 6, the trial budget: trials to the target with and without the simulation prior, and the
probability of having reached it by trial n."""

from __future__ import annotations

from typing import Any

import numpy as np

from ...compare.budget import BudgetPlan
from ...quantities import feature_unit, format_number, format_percent, format_quantity, label
from ...scenario import Scenario
from .. import result_plots
from ..inputs import ReportInputs
from .common import Figure, fmt

ARMS = (("with_prior", "with the simulation prior"), ("cold_start", "cold start (no prior)"))


def p80(budget: BudgetPlan | None, arm: str) -> int | None:
    """The P80 budget of ``arm`` (``with_prior`` or ``cold_start``); None when not reached (or no budget)."""
    return None if budget is None else getattr(budget, arm).p80


def trials_text(value: int | None, budget: BudgetPlan) -> str:
    """A budget quantile; one the draws never reach within the horizon reads "> T"."""
    return fmt(value) if value is not None else f"> {budget.max_trials}"


def target_text(budget: BudgetPlan, scenario: Scenario | None = None) -> str:
    """What "reached" means, short and with units: "no fall, recovery time ≤ 2.00 s, objective ≤ 0.430"
    (the scenario's success rule and the objective level); the plan's own words for a fraction target."""
    level = getattr(budget.target, "level", None)
    if scenario is None or level is None or budget.target.kind == "fraction":
        return budget.target.definition or "the target"
    rules = [f"{label(name)} ≤ {format_quantity(limit, feature_unit(name))}"
             for name, limit in scenario.success_max.items()]
    return ", ".join(["no fall", *rules, f"objective ≤ {format_number(level)}"])


def target_sentence(budget: BudgetPlan) -> str:
    """The target as a sentence for the reader, with why it was chosen when the plan says."""
    sentence = getattr(budget.target, "sentence", "") or budget.target.definition
    why = getattr(budget.target, "why", "")
    return f"{sentence} {why}".strip()


def beyond(budget: BudgetPlan) -> str | None:
    """When the booking is beyond the horizon: what would give a number (the plan's words), else None."""
    return getattr(budget.with_prior, "beyond", None) if budget.with_prior.book is None else None


def headline(budget: BudgetPlan) -> str:
    """The budget as a number of trials at the booking level, with and without the prior."""
    level = f"P{round(100 * budget.confidence)}"
    book = trials_text(budget.with_prior.book, budget)
    cold = trials_text(budget.cold_start.book, budget)
    return f"{book} trials with the simulation prior ({level}), {cold} from a cold start"


def _extra(budget: BudgetPlan) -> list[tuple[str, str]]:
    saving = budget.saving if budget.saving is not None else budget.saving_at_least
    return [
        ("booking level", f"P{round(100 * budget.confidence)}: reached in that share of the plausible robots"),
        ("saving with the prior", "–" if saving is None else
         f"{'at least ' if budget.saving is None else ''}{fmt(saving)} trials"),
        ("draws (plausible response surfaces)", fmt(budget.draws)),
        ("trials simulated per draw at most", fmt(budget.max_trials)),
        ("candidate parameter sets", fmt(budget.n_candidates)),
        ("fall-risk limit of the policy", format_percent(budget.max_fall_risk)),
        ("hardware trials known", fmt(budget.n_hardware)),
        ("planning time", format_quantity(budget.seconds, "s")),
        ("seed", str(budget.seed)),
    ]


def budget_section(inputs: ReportInputs) -> dict[str, Any] | None:
    """The budget table, its settings and the reach curve, or None before a budget."""
    budget = inputs.budget
    if budget is None:
        return None
    rows = []
    for key, arm_name in ARMS:
        arm = getattr(budget, key)
        rows.append(
            {
                "name": arm_name,
                "p50": trials_text(arm.p50, budget),
                "p80": trials_text(arm.p80, budget),
                "p95": trials_text(arm.p95, budget),
                "falls": fmt(arm.expected_falls),
                "reached": format_percent(arm.reached_fraction),
            }
        )
    trials = np.arange(1, budget.max_trials + 1, dtype=float)
    figures = [
        Figure(
            "budget_curve",
            result_plots.budget_curve(
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
    return {
        "rows": rows,
        "figures": figures,
        "extra": _extra(budget),
        "headline": headline(budget),
        "sentence": budget.sentence,
        "target": target_sentence(budget),
        "beyond": beyond(budget),
        "notes": list(budget.notes),
    }
