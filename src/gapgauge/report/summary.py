"""The JSON summary written beside the HTML: every figure the first screen shows (and its words, units
included), the unit and label of every feature, parameter and physical quantity, every result as
stored (SI, as computed), the trials and the provenance. Nothing here draws or renders."""

from __future__ import annotations

import dataclasses
import platform
from typing import Any

import numpy as np

from ..quantities import feature_unit, label
from ..safety import CAUTION
from ..store.codec import jsonable
from ..version import __version__
from .inputs import ReportInputs
from .sections import budget, proposals, shift
from .sections.common import interval, number
from .sections.decision import Decision
from .sections.first_screen import SectionStatus
from .sections.sweep import sweep_summary


def _figures(inputs: ReportInputs) -> dict[str, Any]:
    prior = inputs.prior
    return {
        "rollouts": sweep_summary(inputs.scenario, inputs.rollouts),
        "trials": len(inputs.trials),
        "synthetic_trials": inputs.n_synthetic,
        "rho": None if prior is None else number(prior.rho),
        "rho_interval": None if prior is None else interval(prior.rho_interval),
        "proposals": proposals.count(inputs.proposals),
        "budget_p80_with_prior": budget.p80(inputs.budget, "with_prior"),
        "budget_p80_cold_start": budget.p80(inputs.budget, "cold_start"),
        "shift_counts": None if inputs.shift is None else shift.verdict_counts(inputs.shift),
    }


def _trial(t: Any) -> dict[str, Any]:
    return {
        "source_path": t.source_path,
        "sha256": t.sha256,
        "robot_id": t.robot_id,
        "recorded_at": t.recorded_at,
        "outcome": t.outcome,
        "synthetic": t.synthetic,
        "notes": t.notes,
        "objective": t.objective,
        "params": t.params,
    }


def units(inputs: ReportInputs) -> dict[str, Any]:
    """Name -> ``{"unit", "label"}`` of each feature (SI, as stored in the results), each policy
    parameter and each physical quantity (as the scenario declares them)."""
    scenario = inputs.scenario
    return {
        "features": {n: {"unit": feature_unit(n), "label": label(n)} for n in scenario.features.names},
        "parameters": {p.name: {"unit": p.unit, "label": p.name} for p in scenario.parameters},
        "physics": {r.name: {"unit": r.unit, "label": label(r.name)} for r in scenario.physics},
    }


def summary_json(inputs: ReportInputs, decision: Decision, sections: list[SectionStatus],
                 first_screen: dict[str, Any] | None = None) -> dict[str, Any]:
    """The JSON summary (plain JSON types; non-finite numbers become null)."""
    return jsonable(
        {
            "tool_version": __version__,
            "generated_at": inputs.generated_at,
            "scenario": {
                "name": inputs.scenario.name,
                "path": str(inputs.scenario.path),
                "hash": inputs.scenario.content_hash,
            },
            "store": inputs.store_path,
            "verdict": decision.verdict,
            "level": decision.level,
            "next_step": decision.next_step,
            "next_command": decision.command,
            "reasons": list(decision.reasons),
            "first_screen": first_screen or {},
            "figures": _figures(inputs),
            "units": units(inputs),
            "sections": {s.name: {"filled": s.filled, "fill_command": s.fill_command} for s in sections},
            "results": {kind: None if r is None else r.to_dict() for kind, r in inputs.results().items()},
            "trials": [_trial(t) for t in inputs.trials],
            "provenance": {
                "runs": [dataclasses.asdict(r) for r in inputs.runs],
                "seeds": sorted({r.seed for r in inputs.runs}),
                "python": platform.python_version(),
                "numpy": np.__version__,
            },
            "caution": CAUTION,
        }
    )
