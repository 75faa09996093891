"""Section 5, the proposed next trials: a table of parameters (rows, in their declared units) by
proposal (columns) with each proposal's prediction and modelled fall risk, the stop rule when the
proposals carry one, and a strip per parameter over its bounds showing where the proposals sit."""

from __future__ import annotations

from typing import Any

import numpy as np

from ...compare.propose import Proposals
from ...quantities import format_number, format_percent
from .. import result_plots
from ..inputs import ReportInputs
from .common import Figure, fmt, number, parameter_axes, trials_params


def highest_fall_risk(proposals: Proposals | None) -> float | None:
    """The largest modelled fall risk among the proposals, None when there are none."""
    if proposals is None or not proposals.proposals:
        return None
    return max(float(p.fall_risk) for p in proposals.proposals)


def count(proposals: Proposals | None) -> int:
    return 0 if proposals is None else len(proposals.proposals)


def stop_text(proposals: Proposals | None) -> str | None:
    """The stop rule the proposals carry, in words (None when they carry none).

    Reads ``proposals.stop`` (the stop-rule result of :mod:`gapgauge.compare.stop`): its ``sentence``
    when it has one, or its text as it is.
    """
    stop = getattr(proposals, "stop", None) if proposals is not None else None
    if stop is None:
        return None
    for key in ("sentence", "text", "summary", "rule"):
        value = stop.get(key) if isinstance(stop, dict) else getattr(stop, key, None)
        if isinstance(value, str) and value:
            return value
    return stop if isinstance(stop, str) and stop else None


def parameter_rows(inputs: ReportInputs, proposals: Proposals) -> list[dict[str, Any]]:
    """One row per parameter: its name, declared unit (shown in the row's header) and each proposal's
    value in that unit."""
    rows = []
    for p in inputs.scenario.parameters:
        unit = proposals.units.get(p.name, p.unit)
        rows.append(
            {
                "name": p.name,
                "unit": "" if unit in ("", "1") else unit,
                "cells": [format_number(x.params.get(p.name)) for x in proposals.proposals],
            }
        )
    return rows


def proposals_section(inputs: ReportInputs) -> dict[str, Any] | None:
    """The proposals table, the reasons, the stop rule and the strips figure, or None before any proposal."""
    result = inputs.proposals
    if result is None:
        return None
    scenario = inputs.scenario
    summary_rows = [
        {"name": "predicted objective (lower is better)",
         "cells": [fmt(p.predicted_objective) for p in result.proposals]},
        {"name": "predicted sd (objective)", "cells": [fmt(p.predicted_sd) for p in result.proposals]},
        {"name": "modelled fall risk", "cells": [format_percent(p.fall_risk) for p in result.proposals]},
    ]
    figures = []
    names = scenario.parameter_names
    if result.proposals:
        matrix = np.array([[float(p.params[n]) for n in names] for p in result.proposals])
        risk = np.array([float(p.fall_risk) for p in result.proposals])
        figures.append(
            Figure(
                "proposals",
                result_plots.proposals_strips(
                    parameter_axes(scenario), matrix, scenario.bounds(safe=True), risk,
                    trials_params(scenario, inputs.trials),
                ),
                "proposed parameter sets",
                "Each parameter over its bounds, in its own unit (log axes where the scenario says so): the "
                "safe bounds hardware may receive (green), the trials so far (grey ticks) and the proposals, "
                "numbered as in the table and coloured by modelled fall risk.",
            )
        )
    limit = None if number(result.max_fall_risk) is None else format_percent(result.max_fall_risk)
    return {
        "numbers": [str(i) for i in range(1, count(result) + 1)],
        "parameters": parameter_rows(inputs, result),
        "summary": summary_rows,
        "reasons": [p.reason for p in result.proposals],
        "figures": figures,
        "limit": limit,
        "incumbent": format_number(result.incumbent),
        "stop": stop_text(result),
    }
