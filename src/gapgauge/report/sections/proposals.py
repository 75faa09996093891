"""Section 5, the proposed next trials: each parameter set with its prediction and modelled fall risk,
drawn across the parameters inside the safe bounds."""

from __future__ import annotations

from typing import Any

import numpy as np

from ...compare.propose import Proposals
from .. import plots
from ..inputs import ReportInputs
from .common import Figure, fmt, number, trials_unit


def highest_fall_risk(proposals: Proposals | None) -> float | None:
    """The largest modelled fall risk among the proposals, None when there are none."""
    if proposals is None or not proposals.proposals:
        return None
    return max(float(p.fall_risk) for p in proposals.proposals)


def count(proposals: Proposals | None) -> int:
    return 0 if proposals is None else len(proposals.proposals)


def proposals_section(inputs: ReportInputs) -> dict[str, Any] | None:
    """The proposals table and the parallel-coordinates figure, or None before any proposal."""
    result = inputs.proposals
    if result is None:
        return None
    scenario = inputs.scenario
    units = {p.name: p.unit for p in scenario.parameters}
    rows = []
    for p in result.proposals:
        text = ", ".join(
            f"{k}={fmt(v)}{'' if units.get(k) in (None, '1') else ' ' + units[k]}" for k, v in p.params.items()
        )
        rows.append(
            {
                "predicted": fmt(p.predicted_objective),
                "sd": fmt(p.predicted_sd),
                "fall_risk": fmt(p.fall_risk),
                "params": text,
                "reason": p.reason,
            }
        )
    figures = []
    names = scenario.parameter_names
    if result.proposals:
        matrix = np.array([[float(p.params[n]) for n in names] for p in result.proposals])
        safe_unit = np.clip(scenario.to_unit(scenario.bounds(safe=True).T).T, 0, 1)
        risk = np.array([float(p.fall_risk) for p in result.proposals])
        figures.append(
            Figure(
                "proposals",
                plots.proposals_parallel(
                    np.clip(scenario.to_unit(matrix), 0, 1),
                    safe_unit,
                    names,
                    risk,
                    trials_unit(scenario, inputs.trials),
                ),
                "proposed parameter sets",
                "Each proposal as a line across the parameters (0 = low bound, 1 = high bound); green band: "
                "the safe bounds hardware may receive; grey: trials so far.",
            )
        )
    limit = None if number(result.max_fall_risk) is None else fmt(result.max_fall_risk)
    return {"rows": rows, "figures": figures, "limit": limit}
