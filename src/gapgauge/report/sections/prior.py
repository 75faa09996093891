"""Section 4, the multi-fidelity prior: rho and its interval, the leave-one-out test against hardware
alone, and the fitted prior at the trials."""

from __future__ import annotations

from typing import Any

import numpy as np

from ...compare.prior import PriorFit
from ...quantities import format_quantity
from .. import result_plots
from ..inputs import ReportInputs
from .common import Figure, fmt, fmt_interval, number

LOO_NAMES = {
    "multi_fidelity": "multi-fidelity prior",
    "hardware_only": "hardware only",
    "simulation_only": "simulation only",
}


def loo_rmse(prior: PriorFit, model: str) -> float | None:
    """Leave-one-out RMSE of ``model`` (a key of :data:`LOO_NAMES`), None when too few trials."""
    return number(prior.loo[model]["rmse"]) if model in prior.loo else None


def _headline(prior: PriorFit) -> list[tuple[str, str]]:
    return [
        ("rho (hardware per unit of simulation)", fmt(prior.rho)),
        ("rho, 95% interval", fmt_interval(prior.rho_interval)),
        ("discrepancy scale (objective)", fmt(prior.discrepancy_scale)),
        ("offset (objective)", fmt(prior.offset)),
        ("hardware noise sd (objective)", fmt(prior.hardware_noise_sd)),
    ]


def _table(prior: PriorFit) -> list[tuple[str, str]]:
    return [
        ("fit time", format_quantity(prior.fit_seconds, "s")),
        (
            "simulation level",
            prior.simulation_level + (" (reused from the previous fit)" if prior.simulation_reused else ""),
        ),
        ("simulation rollouts used", fmt(prior.n_sim)),
        ("simulation rollouts for the fall model", fmt(prior.n_sim_fall_model)),
        ("hardware trials used", fmt(prior.n_hardware)),
        ("hardware trials for the fall model", fmt(prior.n_hardware_fall_model)),
        ("diverged rollouts left out", fmt(prior.n_diverged)),
        ("seed", str(prior.seed)),
    ]


def _loo_rows(prior: PriorFit) -> list[dict[str, Any]]:
    rows = []
    for key, label in LOO_NAMES.items():
        if key not in prior.loo:
            continue
        score = prior.loo[key]
        rows.append(
            {
                "name": label,
                "rmse": fmt(score["rmse"]),
                "lpd": fmt(score["log_predictive_density"]),
                "rmse_value": number(score["rmse"]),
                "lpd_value": number(score["log_predictive_density"]),
            }
        )
    return rows


def _fitted_at_trials(inputs: ReportInputs) -> Figure | None:
    """The fitted prior at the trials that stood, against their hardware objective."""
    prior = inputs.prior
    if prior is None or prior.objective_model is None:
        return None
    stood = [(i, t) for i, t in enumerate(inputs.trials, start=1) if not t.features.get("fell")]
    names = inputs.scenario.parameter_names
    stood = [(i, t) for i, t in stood if all(n in t.params for n in names)]
    if not stood:
        return None
    X = np.array([[t.params[n] for n in names] for _, t in stood], dtype=float)
    mean, sd = prior.predict(X, return_std=True)
    hardware = np.array([t.objective for _, t in stood], dtype=float)
    return Figure(
        "prior_vs_hardware",
        result_plots.prior_vs_hardware(
            hardware, np.asarray(mean, float).ravel(), np.asarray(sd, float).ravel(), [str(i) for i, _ in stood]
        ),
        "hardware objective against the fitted prior",
        "Each hardware trial that stood (numbered as in the trials table) against the fitted prior's "
        "prediction at its parameters, with a 95% interval. The trials are part of the fit, so this "
        "shows the fit, not a test of it; the leave-one-out table above is the test.",
    )


def prior_section(inputs: ReportInputs) -> dict[str, Any] | None:
    """The prior's figures table, its leave-one-out rows and figures, or None before a fit."""
    prior = inputs.prior
    if prior is None:
        return None
    loo = _loo_rows(prior)
    figures = []
    fitted = _fitted_at_trials(inputs)
    if fitted is not None:
        figures.append(fitted)
    usable = [r for r in loo if r["rmse_value"] is not None and r["lpd_value"] is not None]
    if usable:
        figures.append(
            Figure(
                "prior_loo",
                result_plots.loo_comparison(
                    [r["name"] for r in usable], [r["rmse_value"] for r in usable], [r["lpd_value"] for r in usable]
                ),
                "leave-one-out comparison",
                "Leave-one-out on the hardware trials: the prior against a hardware-only GP and the "
                "simulation level alone.",
            )
        )
    return {"headline": _headline(prior), "figures_table": _table(prior), "loo": loo, "figures": figures}
