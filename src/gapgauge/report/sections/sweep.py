"""Section 1, the simulation sweep: counts by status, coverage of the space, where falls happen, the
objective landscape."""

from __future__ import annotations

from typing import Any

import numpy as np

from ...quantities import format_count, format_number
from ...records import RolloutBatch
from ...scenario import Scenario
from .. import plots
from ..inputs import ReportInputs
from .common import Figure, parameter_axes, trials_params

COVERAGE_PARAMETERS = 4
MIN_STOOD_FOR_LANDSCAPE = 10  # fewer rollouts that stood than this: rank parameters by falling instead


def sweep_summary(scenario: Scenario, batch: RolloutBatch | None) -> dict[str, Any]:
    """Counts by status and the best rollout that stood: ``{"total", "ok", "fell", "diverged",
    "best_objective", "best_params"}`` (``{"total": 0}`` without a sweep)."""
    if batch is None:
        return {"total": 0}
    status = np.asarray(batch.status)
    out: dict[str, Any] = {
        "total": int(len(batch)),
        "ok": int(np.sum(status == "ok")),
        "fell": int(np.sum(status == "fell")),
        "diverged": int(np.sum(status == "diverged")),
    }
    ok = status == "ok"
    if ok.any():
        best = int(np.argmin(np.where(ok, batch.objective, np.inf)))
        out["best_objective"] = float(batch.objective[best])
        out["best_params"] = scenario.params_to_mapping(batch.params[best])
    return out


def main_effects(unit: np.ndarray, target: np.ndarray, bins: int = 10) -> np.ndarray:
    """First-order sensitivity of ``target (n,)`` to each column of ``unit (n x dim)``, by binning.

    The share of the variance explained by the conditional mean over ``bins`` equal bins of the
    parameter, Var(E[y | x_i]) / Var(y): the first-order Sobol index (Saltelli et al. 2008, ch. 4),
    estimated from the sweep itself. Unlike a rank correlation it sees a U-shaped effect too.
    """
    total = float(np.var(target))
    if unit.shape[0] < 2 * bins or total == 0.0:
        return np.zeros(unit.shape[1])
    out = np.empty(unit.shape[1])
    for i in range(unit.shape[1]):
        mean, count = plots.binned_mean(unit[:, i], target, bins)
        used = count > 0
        out[i] = float(np.sum(count[used] * (mean[used] - target.mean()) ** 2) / count.sum()) / total
    return out


def ranked_parameters(unit: np.ndarray, target: np.ndarray, count: int) -> list[int]:
    """Indices (in scenario order) of the ``count`` parameters with the largest main effect on ``target``."""
    scores = main_effects(unit, np.asarray(target, dtype=float))
    return sorted(np.argsort(-scores, kind="stable")[:count].tolist())


def sweep_section(inputs: ReportInputs) -> dict[str, Any] | None:
    """The sweep's counts and figures, or None before any sweep."""
    batch = inputs.rollouts
    if batch is None:
        return None
    scenario = inputs.scenario
    names = scenario.parameter_names
    axes = parameter_axes(scenario)
    summary = sweep_summary(scenario, batch)
    status = np.asarray(batch.status).astype(str)
    objective = np.asarray(batch.objective, dtype=float)
    unit = np.clip(scenario.to_unit(batch.params), 0.0, 1.0)
    settled = status != "diverged"
    ok = status == "ok"
    fell = status == "fell"
    trials = trials_params(scenario, inputs.trials)
    landscape = ok.sum() >= MIN_STOOD_FOR_LANDSCAPE
    if landscape:
        picked = ranked_parameters(unit[ok], objective[ok], COVERAGE_PARAMETERS)
        why = "the parameters with the largest main effect on the objective"
    else:
        picked = ranked_parameters(unit[settled], fell[settled].astype(float), COVERAGE_PARAMETERS)
        why = "the parameters with the largest main effect on falling"
    picked_names = [names[i] for i in picked]
    figures = []
    if len(picked) >= 2:
        figures.append(
            Figure(
                "sweep_coverage",
                plots.coverage_pairs(
                    batch.params[:, picked], [axes[i] for i in picked], status,
                    None if trials is None else trials[:, picked],
                ),
                "pairwise coverage of the parameter space",
                f"Coverage: pairwise scatter of {', '.join(picked_names)} ({why}) over their bounds, in "
                "their own units (log axes where the scenario says so); colour is the rollout's status, "
                "stars are hardware trials.",
            )
        )
    if settled.any():
        figures.append(
            Figure(
                "sweep_fall_rate",
                plots.fall_rate_by_parameter(unit[settled], axes, fell[settled]),
                "fall rate by parameter",
                "Where falls happen: the share of rollouts that fell, in ten bins of each parameter over "
                "its bounds, all other parameters and physics draws marginalised; dashed: overall fall rate.",
            )
        )
    if landscape:
        figures.append(
            Figure(
                "sweep_objective_slices",
                plots.objective_slices(unit[ok], axes, objective[ok]),
                "objective along each parameter",
                "Slices of the objective landscape (rollouts that stood): binned mean (line) and "
                "inter-quartile band along each parameter, lower is better.",
            )
        )
        best_two = ranked_parameters(unit[ok], objective[ok], 2)
        if len(best_two) == 2:
            i, j = best_two
            figures.append(
                Figure(
                    "sweep_objective_map",
                    plots.objective_map(unit[ok, i], unit[ok, j], objective[ok], (axes[i], axes[j])),
                    f"objective over {names[i]} and {names[j]}",
                    f"A 2-D slice: mean objective over {names[i]} and {names[j]}, other parameters "
                    "marginalised; blank cells hold no rollout that stood.",
                )
            )
    return {
        **{k: format_count(summary[k]) for k in ("total", "ok", "fell", "diverged")},
        "best": format_number(summary["best_objective"]) if "best_objective" in summary else None,
        "figures": figures,
    }
