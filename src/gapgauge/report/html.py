"""The transfer report: one self-contained HTML file and a JSON summary beside it.

The HTML is rendered with jinja2, autoescape on, so every string that comes from a user or a file
(robot ids, notes, file names, reasons) shows as text. Figures are PNG data URIs; styles are inline;
a Content-Security-Policy meta tag forbids scripts and every fetch, so the file opens the same from
a laptop, a mail attachment or a printer, and a string that slipped past escaping still cannot run.
"""

from __future__ import annotations

import base64
import json
import platform
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import jinja2
import numpy as np

from ..version import __version__
from ..errors import GapgaugeError, StoreError
from ..scenario import Scenario
from . import plots
from .summary import (
    VERDICT_WORDS,
    Decision,
    ReportData,
    SectionStatus,
    budget_figure,
    collect,
    decide,
    interval,
    number,
    overlay_path,
    section_statuses,
    summary_json,
    sweep_summary,
)

COVERAGE_PARAMETERS = 4
MAX_SHIFT_COLUMNS = 6
# (heading, key path) of the shift table, in the shift assessment's names (compare/shift.py)
SHIFT_COLUMNS = (
    ("trials", "n_trials"),
    ("max |residual|", "max_abs_residual"),
    ("bias", "bias"),
    ("bias interval", "bias_test_interval"),
    ("bias / sim sd", "bias_sd_units"),
    ("Wasserstein / sim sd", "wasserstein_sd_units"),
    ("Kendall tau", "rank.kendall"),
    ("more trials to decide", "more_trials"),
)
LOO_NAMES = {
    "multi_fidelity": "multi-fidelity prior",
    "hardware_only": "hardware only",
    "simulation_only": "simulation only",
}


@dataclass(frozen=True)
class ReportResult:
    """Where the report went and which sections have their data."""

    path: Path
    json_path: Path
    sections: list[SectionStatus]
    decision: Decision


@dataclass(frozen=True)
class Figure:
    name: str
    png: bytes
    alt: str
    caption: str

    @property
    def uri(self) -> str:
        return "data:image/png;base64," + base64.b64encode(self.png).decode("ascii")


def caution_text() -> str:
    """The caution of DESIGN.md section 7, the same words the command line prints."""
    from ..cli import CAUTION

    return CAUTION


def fmt(value: Any, digits: int = 3) -> str:
    """A number for a table: thousands separated when large, ``digits`` significant figures otherwise."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    x = number(value)
    if x is None:
        return "–" if value is None or isinstance(value, (int, float)) else str(value)
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    if abs(x) >= 1000:
        return f"{x:,.0f}"
    return f"{x:.{digits}g}"


def fmt_interval(value: Any) -> str:
    iv = interval(value)
    return "–" if iv is None else f"[{fmt(iv[0])}, {fmt(iv[1])}]"


def _is_interval_key(key: str) -> bool:
    return "interval" in key or key.endswith("_ci")


def _scalars(d: dict[str, Any], skip: tuple[str, ...] = (), prefix: str = "") -> list[tuple[str, str]]:
    """(key, formatted value) rows for the scalars and intervals of a result dict, nested one level."""
    rows = []
    for key, value in d.items():
        if key in skip:
            continue
        label = (prefix + key).replace("_", " ")
        if (
            isinstance(value, bool)
            or number(value) is not None
            or (isinstance(value, str) and len(value) < 120)
        ):
            rows.append((label, fmt(value)))
        elif _is_interval_key(key) and interval(value) is not None:
            rows.append((label, fmt_interval(value)))
        elif isinstance(value, dict) and not prefix:
            rows += _scalars(value, prefix=f"{key} ")
    return rows


def _lookup(d: dict[str, Any], path: str) -> Any:
    for part in path.split("."):
        if not isinstance(d, dict):
            return None
        d = d.get(part)
    return d


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


def _ranked_parameters(unit: np.ndarray, target: np.ndarray, count: int) -> list[int]:
    """Indices (in scenario order) of the ``count`` parameters with the largest main effect on ``target``."""
    scores = main_effects(unit, np.asarray(target, dtype=float))
    return sorted(np.argsort(-scores, kind="stable")[:count].tolist())


# ---- sections --------------------------------------------------------------------------------


def _sweep_section(data: ReportData) -> dict[str, Any] | None:
    batch = data.rollouts
    if batch is None:
        return None
    scenario = data.scenario
    names = scenario.parameter_names
    summary = sweep_summary(data)
    status = np.asarray(batch.status).astype(str)
    unit = np.clip(scenario.to_unit(batch.params), 0.0, 1.0)
    settled = status != "diverged"
    ok = status == "ok"
    fell = status == "fell"
    trials_unit = None
    if data.trials:
        trials_unit = np.clip(
            scenario.to_unit(np.array([[t.params.get(n, np.nan) for n in names] for t in data.trials])), 0, 1
        )
    if ok.sum() >= 10:
        picked = _ranked_parameters(unit[ok], np.asarray(batch.objective)[ok], COVERAGE_PARAMETERS)
        why = "the parameters with the largest main effect on the objective"
    else:
        picked = _ranked_parameters(unit[settled], fell[settled].astype(float), COVERAGE_PARAMETERS)
        why = "the parameters with the largest main effect on falling"
    picked_names = [names[i] for i in picked]
    figures = []
    if len(picked) >= 2:
        figures.append(
            Figure(
                "sweep_coverage",
                plots.coverage_pairs(
                    unit[:, picked],
                    picked_names,
                    status,
                    None if trials_unit is None else trials_unit[:, picked],
                ),
                "pairwise coverage of the parameter space",
                f"Coverage: pairwise scatter of {', '.join(picked_names)} ({why}) in the unit cube of "
                f"their bounds "
                f"(log axes in log space); colour is the rollout's status, stars are hardware trials.",
            )
        )
    if settled.any():
        figures.append(
            Figure(
                "sweep_fall_rate",
                plots.fall_rate_by_parameter(unit[settled], names, fell[settled]),
                "fall rate by parameter",
                "Where falls happen: the share of rollouts that fell, in ten bins of each parameter "
                "(0 = low bound, 1 = high bound), all other parameters and physics draws marginalised; "
                "dashed: overall fall rate.",
            )
        )
    if ok.sum() >= 10:
        figures.append(
            Figure(
                "sweep_objective_slices",
                plots.objective_slices(unit[ok], names, np.asarray(batch.objective)[ok]),
                "objective along each parameter",
                "Slices of the objective landscape (rollouts that stood): binned mean (line) and "
                "inter-quartile band "
                "along each parameter, lower is better.",
            )
        )
        best_two = _ranked_parameters(unit[ok], np.asarray(batch.objective)[ok], 2)
        if len(best_two) == 2:
            i, j = best_two
            figures.append(
                Figure(
                    "sweep_objective_map",
                    plots.objective_map(
                        unit[ok, i], unit[ok, j], np.asarray(batch.objective)[ok], (names[i], names[j])
                    ),
                    f"objective over {names[i]} and {names[j]}",
                    f"A 2-D slice: mean objective over {names[i]} and {names[j]} (unit cube), "
                    "other parameters "
                    "marginalised; blank cells hold no rollout that stood.",
                )
            )
    best = None
    if "best_objective" in summary:
        best = fmt(summary["best_objective"])
    return {
        **{k: fmt(v) for k, v in summary.items() if k in ("total", "ok", "fell", "diverged")},
        "best": best,
        "figures": figures,
    }


def _trial_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for t in data.trials:
        rows.append(
            {
                "file": Path(t.source_path).name or t.source_path,
                "source_path": t.source_path,
                "sha256": t.sha256,
                "sha_short": t.sha256[:12],
                "robot_id": t.robot_id,
                "recorded_at": t.recorded_at,
                "outcome": t.outcome or "not given",
                "synthetic": bool(t.synthetic),
                "objective": fmt(t.objective),
                "notes": t.notes,
                "ingested_at": t.ingested_at,
                "tool_version": t.tool_version,
            }
        )
    return rows


def _shift_images(data: ReportData) -> list[Figure]:
    """Per-feature shift plots from report/shift_plots.py (owned by the shift assessment), if present."""
    try:
        from . import shift_plots  # type: ignore[attr-defined]
    except ImportError:
        return []
    make = getattr(shift_plots, "shift_figures", None) or getattr(shift_plots, "feature_plots", None)
    if make is None:
        return []
    out = []
    produced = make(data.scenario, data.results["shift"], data.trials, data.arrays.get("shift", {}))
    items = produced.items() if isinstance(produced, dict) else enumerate(produced)
    for name, png in items:
        if isinstance(png, (bytes, bytearray)) and png[:8] == b"\x89PNG\r\n\x1a\n":
            out.append(
                Figure(
                    f"shift_{name}",
                    bytes(png),
                    f"shift of {name}",
                    f"{name}: the simulated distribution at the trials' parameters with the hardware values.",
                )
            )
    return out


def _shift_section(data: ReportData) -> dict[str, Any] | None:
    shift = data.results.get("shift")
    if shift is None:
        return None
    features = [f for f in shift.get("features", []) or [] if isinstance(f, dict)]
    columns = [
        (label, path) for label, path in SHIFT_COLUMNS if any(_lookup(f, path) is not None for f in features)
    ]
    if not columns:  # a writer with other names: its plain numbers, as they come
        seen: list[str] = []
        for f in features:
            seen += [
                k
                for k, v in f.items()
                if k not in seen
                and k not in ("name", "verdict")
                and (number(v) is not None or (_is_interval_key(k) and interval(v) is not None))
            ]
        columns = [(k.replace("_", " "), k) for k in seen[:MAX_SHIFT_COLUMNS]]
    rows = []
    for f in features:
        verdict = f.get("verdict")
        cells = []
        for _, path in columns:
            value = _lookup(f, path)
            cells.append(fmt_interval(value) if _is_interval_key(path) else fmt(value))
        detail = next(
            (
                f[k]
                for k in ("reason", "explanation", "detail", "message", "summary")
                if isinstance(f.get(k), str)
            ),
            "",
        )
        rows.append(
            {
                "name": f.get("name", "?"),
                "verdict": VERDICT_WORDS.get(verdict, str(verdict)),
                "verdict_class": verdict if verdict in VERDICT_WORDS else "undecided",
                "cells": cells,
                "detail": detail,
            }
        )
    joint = shift.get("joint") if isinstance(shift.get("joint"), dict) else {}
    objective = shift.get("objective") if isinstance(shift.get("objective"), dict) else {}
    settings = shift.get("settings") or shift.get("thresholds")
    settings_text = (
        ", ".join(f"{k.replace('_', ' ')} {fmt(v)}" for k, v in settings.items() if number(v) is not None)
        if isinstance(settings, dict)
        else ""
    )
    return {
        "columns": [label for label, _ in columns],
        "rows": rows,
        "joint": _scalars(joint),
        "objective": _scalars(objective),
        "settings": settings_text,
        "figures": _shift_images(data),
    }


def _prior_points(
    data: ReportData, prior: dict[str, Any]
) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """(hardware, predicted, sd) per trial from the stored prior, under the names a writer may use."""
    arrays = data.arrays.get("prior", {})
    for hw_key, mean_key, sd_key in (
        ("hardware", "loo_mean", "loo_sd"),
        ("y_hardware", "loo_mean", "loo_sd"),
        ("hardware", "predicted", "predicted_sd"),
    ):
        if mean_key in arrays and sd_key in arrays and hw_key in arrays:
            return (
                np.asarray(arrays[hw_key], float),
                np.asarray(arrays[mean_key], float),
                np.asarray(arrays[sd_key], float),
            )
    table = prior.get("trials") or (prior.get("loo") or {}).get("multi_fidelity", {}).get("predictions")
    if isinstance(table, list) and table and all(isinstance(r, dict) for r in table):

        def pick(row: dict, keys: tuple[str, ...]) -> float:
            return next((float(row[k]) for k in keys if number(row.get(k)) is not None), np.nan)

        hw = np.array([pick(r, ("hardware", "observed", "objective", "y")) for r in table])
        mean = np.array([pick(r, ("predicted", "mean", "predicted_objective", "loo_mean")) for r in table])
        sd = np.array([pick(r, ("sd", "predicted_sd", "std", "loo_sd")) for r in table])
        if np.isfinite(hw).any() and np.isfinite(mean).any():
            return hw, mean, np.nan_to_num(sd)
    return None


def _prior_fitted_points(data: ReportData) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]] | None:
    """(hardware, predicted, sd, labels) at the trials that stood, from the stored prior, if it loads."""
    if data.store is None or not data.trials:
        return None
    try:
        from ..compare.prior import load_prior

        fit = load_prior(data.scenario, data.store)
        names = data.scenario.parameter_names
        stood = [(i, t) for i, t in enumerate(data.trials, start=1) if not t.features.get("fell")]
        if not stood:
            return None
        X = np.array([[t.params[n] for n in names] for _, t in stood], dtype=float)
        mean, sd = fit.predict(X, return_std=True)
    except (ImportError, GapgaugeError, KeyError):  # no prior module yet, or no stored prior
        return None
    hw = np.array([t.objective for _, t in stood], dtype=float)
    return hw, np.asarray(mean, float).ravel(), np.asarray(sd, float).ravel(), [str(i) for i, _ in stood]


def _prior_section(data: ReportData) -> dict[str, Any] | None:
    prior = data.results.get("prior")
    if prior is None:
        return None
    table = [
        ("rho", fmt(prior.get("rho"))),
        ("rho interval", fmt_interval(prior.get("rho_interval"))),
        ("fit time", f"{fmt(prior.get('fit_seconds'))} s"),
    ]
    table += _scalars(
        prior,
        skip=("rho", "rho_interval", "fit_seconds", "loo", "trials", "model_state_keys", "scenario", "notes"),
    )
    loo = prior.get("loo") or {}
    loo_rows = []
    for key, label in LOO_NAMES.items():
        entry = loo.get(key)
        if isinstance(entry, dict):
            loo_rows.append(
                {
                    "name": label,
                    "rmse": fmt(entry.get("rmse")),
                    "lpd": fmt(entry.get("log_predictive_density")),
                    "rmse_value": number(entry.get("rmse")),
                    "lpd_value": number(entry.get("log_predictive_density")),
                }
            )
    figures = []
    points = _prior_points(data, prior)
    fitted = _prior_fitted_points(data) if points is None else None
    if fitted is not None:
        hw, mean, sd, labels = fitted
        figures.append(
            Figure(
                "prior_vs_hardware",
                plots.prior_vs_hardware(hw, mean, sd, labels),
                "hardware objective against the fitted prior",
                "Each hardware trial that stood (numbered as in the trials table) against the fitted prior's "
                "prediction at its parameters, with a 95% interval. The trials are part of the fit, so this "
                "shows the fit, not a test of it; the leave-one-out table above is the test.",
            )
        )
    if points is not None:
        hw, mean, sd = points
        figures.append(
            Figure(
                "prior_vs_hardware",
                plots.prior_vs_hardware(hw, mean, sd, [str(i + 1) for i in range(len(hw))]),
                "hardware objective against the prior's prediction",
                "Each hardware trial (numbered as in the trials table) against the prior's leave-one-out "
                "prediction with its 95% interval; the dashed line is perfect agreement.",
            )
        )
    usable = [r for r in loo_rows if r["rmse_value"] is not None and r["lpd_value"] is not None]
    if usable:
        figures.append(
            Figure(
                "prior_loo",
                plots.loo_comparison(
                    [r["name"] for r in usable],
                    [r["rmse_value"] for r in usable],
                    [r["lpd_value"] for r in usable],
                ),
                "leave-one-out comparison",
                "Leave-one-out on the hardware trials: the prior against a "
                "hardware-only GP and the simulation level alone.",
            )
        )
    return {"figures_table": table, "loo": loo_rows, "figures": figures}


def _proposal_section(data: ReportData) -> dict[str, Any] | None:
    result = data.results.get("proposals")
    if result is None:
        return None
    scenario = data.scenario
    proposals = [p for p in result.get("proposals", []) or [] if isinstance(p, dict)]
    units = {p.name: p.unit for p in scenario.parameters}
    rows = []
    for p in proposals:
        params = p.get("params") or {}
        text = ", ".join(
            f"{k}={fmt(v)}{'' if units.get(k) in (None, '1') else ' ' + units[k]}" for k, v in params.items()
        )
        rows.append(
            {
                "predicted": fmt(p.get("predicted_objective")),
                "sd": fmt(p.get("predicted_sd")),
                "fall_risk": fmt(p.get("fall_risk")),
                "params": text,
                "reason": str(p.get("reason", "")),
            }
        )
    figures = []
    names = scenario.parameter_names
    try:
        matrix = np.array([[float(p["params"][n]) for n in names] for p in proposals])
    except (KeyError, TypeError, ValueError):
        matrix = np.empty((0, len(names)))
    if len(matrix):
        safe_unit = np.clip(scenario.to_unit(scenario.bounds(safe=True).T).T, 0, 1)
        trials_unit = None
        if data.trials:
            trials_unit = np.clip(
                scenario.to_unit(np.array([[t.params.get(n, np.nan) for n in names] for t in data.trials])),
                0,
                1,
            )
        risk = np.array([number(p.get("fall_risk")) or 0.0 for p in proposals])
        figures.append(
            Figure(
                "proposals",
                plots.proposals_parallel(
                    np.clip(scenario.to_unit(matrix), 0, 1), safe_unit, names, risk, trials_unit
                ),
                "proposed parameter sets",
                "Each proposal as a line across the parameters (0 = low bound, "
                "1 = high bound); green band: the safe bounds hardware may receive; grey: trials so far.",
            )
        )
    limit = result.get("max_fall_risk")
    return {"rows": rows, "figures": figures, "limit": fmt(limit) if number(limit) is not None else None}


def _curve(budget: dict[str, Any]) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None] | None:
    """The budget curve as (trials, P(reached) with prior, P(reached) cold start), tolerant of shapes."""
    curve = budget.get("curve")
    if isinstance(curve, dict):
        curve = [dict(zip(curve, values, strict=True)) for values in zip(*curve.values(), strict=True)]
    if isinstance(curve, list) and curve and all(isinstance(c, dict) for c in curve):

        def column(keys: tuple[str, ...]) -> np.ndarray | None:
            for k in keys:
                if all(number(c.get(k)) is not None for c in curve):
                    return np.array([float(c[k]) for c in curve])
            return None

        n = column(("trials", "n", "trial"))
        n = np.arange(1, len(curve) + 1, dtype=float) if n is None else n
        return (
            n,
            column(("with_prior", "p_with_prior", "prior")),
            column(("cold_start", "p_cold_start", "cold")),
        )
    if isinstance(curve, list) and curve and all(number(c) is not None for c in curve):
        values = np.array(curve, dtype=float)
        cold = (budget.get("cold_start") or {}).get("curve")
        cold_values = (
            np.array(cold, dtype=float) if isinstance(cold, list) and len(cold) == len(values) else None
        )
        return np.arange(1, len(values) + 1, dtype=float), values, cold_values
    return None


def _budget_section(data: ReportData) -> dict[str, Any] | None:
    budget = data.results.get("budget")
    if budget is None:
        return None
    rows = []
    for key, label in (("with_prior", "with the simulation prior"), ("cold_start", "cold start (no prior)")):
        arm = budget.get(key) or {}
        rows.append(
            {
                "name": label,
                "p50": _trials(number(arm.get("p50")), budget),
                "p80": _trials(number(arm.get("p80")), budget),
                "p95": _trials(number(arm.get("p95")), budget),
                "falls": fmt(arm.get("expected_falls")),
            }
        )
    figures = []
    curve = _curve(budget)
    if curve is not None and (curve[1] is not None or curve[2] is not None):
        figures.append(
            Figure(
                "budget_curve",
                plots.budget_curve(
                    *curve,
                    p80=(
                        budget_figure(budget, "with_prior", "p80"),
                        budget_figure(budget, "cold_start", "p80"),
                    ),
                ),
                "probability of reaching the target by trial n",
                "Probability of having reached the target by trial n, with the simulation prior and from a "
                "cold start; dashed lines: the P80 budgets, dotted: 80%.",
            )
        )
    return {
        "rows": rows,
        "figures": figures,
        "extra": _scalars(budget, skip=("with_prior", "cold_start", "curve")),
    }


def _shift_by_feature(shift: Any) -> dict[str, str]:
    """Feature -> text of one side of a calibration's before/after shift, from the shapes a writer may use."""
    if isinstance(shift, dict) and isinstance(shift.get("features"), dict):  # compare/calibration.py
        out = {}
        for name, entry in shift["features"].items():
            entry = entry if isinstance(entry, dict) else {}
            verdict = VERDICT_WORDS.get(entry.get("verdict"), str(entry.get("verdict", "–")))
            out[str(name)] = f"{verdict} (rms {fmt(entry.get('rms'))} sd)"
        if number(shift.get("total")) is not None:
            out["discrepancy D (all features)"] = fmt(shift["total"])
        return out
    if isinstance(shift, dict) and isinstance(shift.get("features"), list):  # compare/shift.py form
        return {
            str(f.get("name")): VERDICT_WORDS.get(f.get("verdict"), fmt(f.get("verdict")))
            for f in shift["features"]
            if isinstance(f, dict)
        }
    if isinstance(shift, dict):
        return {str(k).replace("_", " "): fmt(v) for k, v in shift.items() if number(v) is not None}
    if number(shift) is not None:
        return {"shift statistic": fmt(shift)}
    return {}


def _before_after(before: Any, after: Any) -> list[dict[str, str]]:
    b, a = _shift_by_feature(before), _shift_by_feature(after)
    return [{"name": k, "before": b.get(k, "–"), "after": a.get(k, "–")} for k in dict.fromkeys([*b, *a])]


def _rms_before_after(before: Any, after: Any) -> tuple[list[str], np.ndarray, np.ndarray] | None:
    if not (isinstance(before, dict) and isinstance(after, dict)):
        return None
    fb, fa = before.get("features"), after.get("features")
    if not (isinstance(fb, dict) and isinstance(fa, dict)):
        return None
    names = [
        n
        for n in fb
        if n in fa
        and isinstance(fb[n], dict)
        and isinstance(fa[n], dict)
        and number(fb[n].get("rms")) is not None
        and number(fa[n].get("rms")) is not None
    ]
    if not names:
        return None
    return (
        names,
        np.array([fb[n]["rms"] for n in names], float),
        np.array([fa[n]["rms"] for n in names], float),
    )


def _calibration_section(data: ReportData) -> dict[str, Any] | None:
    calibration = data.results.get("calibration")
    if calibration is None:
        return None
    params = [p for p in calibration.get("parameters", []) or [] if isinstance(p, dict)]
    rows = [
        {
            "name": p.get("name", "?"),
            "estimate": fmt(p.get("estimate")),
            "interval": fmt_interval(p.get("interval")),
            "identifiable": bool(p.get("identifiable")),
        }
        for p in params
    ]
    figures = []
    plotted = []
    for p in params:
        iv = interval(p.get("interval"))
        est = number(p.get("estimate"))
        base = interval(p.get("base_range"))
        if base is None:
            try:
                found = data.scenario.physics_range(str(p.get("name")))
            except KeyError:
                continue
            base = (found.low, found.high)
        if iv is not None and est is not None:
            plotted.append((str(p["name"]), est, iv, base, bool(p.get("identifiable"))))
    if plotted:
        figures.append(
            Figure(
                "calibration",
                plots.calibration_intervals(
                    [x[0] for x in plotted],
                    np.array([x[1] for x in plotted]),
                    np.array([x[2][0] for x in plotted]),
                    np.array([x[2][1] for x in plotted]),
                    np.array([x[3][0] for x in plotted]),
                    np.array([x[3][1] for x in plotted]),
                    [x[4] for x in plotted],
                ),
                "calibrated physical parameters",
                "Each physical parameter's estimate (dot) and interval (bar) inside the scenario's "
                "randomisation range "
                "(shaded); grey bars: not pinned down by the trials at hand.",
            )
        )
    rms = _rms_before_after(calibration.get("shift_before"), calibration.get("shift_after"))
    if rms is not None:
        figures.append(
            Figure(
                "calibration_shift",
                plots.shift_before_after(*rms, label="rms standardised residual (in simulated spreads)"),
                "feature shift before and after calibration",
                "Root-mean-square standardised residual of each matched feature at the nominal physics "
                "(before) and at the calibrated physics (after); lower is closer to the robot.",
            )
        )
    text = calibration.get("overlay")
    return {
        "rows": rows,
        "figures": figures,
        "before_after": _before_after(calibration.get("shift_before"), calibration.get("shift_after")),
        "overlay": overlay_path(calibration),
        "overlay_text": text if isinstance(text, str) and "\n" in text else None,
        "extra": _scalars(
            calibration,
            skip=(
                "parameters",
                "shift_before",
                "shift_after",
                "overlay",
                "overlay_path",
                "scenario",
                "correlation",
                "feature_scales",
                "settings",
            ),
        ),
    }


def _trials(value: float | None, budget: dict[str, Any]) -> str:
    """A budget quantile; one the draws never reach within the horizon reads "> T"."""
    if value is not None:
        return fmt(value)
    horizon = number(budget.get("max_trials"))
    return "–" if horizon is None else f"> {horizon:.0f}"


def _cards(data: ReportData) -> list[dict[str, str]]:
    prior = data.results.get("prior") or {}
    budget = data.results.get("budget")
    proposals = (data.results.get("proposals") or {}).get("proposals") or []
    p80 = budget_figure(budget, "with_prior", "p80")
    cold = budget_figure(budget, "cold_start", "p80")
    rho = number(prior.get("rho"))
    iv = interval(prior.get("rho_interval"))
    sweep = sweep_summary(data)
    n_syn = sum(1 for t in data.trials if t.synthetic)
    risk = [number(p.get("fall_risk")) for p in proposals if isinstance(p, dict)]
    risk = [r for r in risk if r is not None]
    return [
        {
            "label": "Trial budget (P80)",
            "value": "–" if budget is None else f"{_trials(p80, budget)} trials",
            "sub": "run gapgauge budget"
            if budget is None
            else (
                f"cold start {fmt(cold)}; saving {fmt(cold - p80)}"
                if cold is not None and p80 is not None
                else f"with the prior; cold start {_trials(cold, budget)}"
            ),
        },
        {
            "label": "rho (sim to hardware)",
            "value": fmt(rho),
            "sub": "run gapgauge prior"
            if not prior
            else (f"95% interval {fmt_interval(iv)}" if iv else "no interval"),
        },
        {
            "label": "Hardware trials",
            "value": fmt(len(data.trials)),
            "sub": f"{n_syn} synthetic (stand-in)"
            if n_syn
            else "all from hardware"
            if data.trials
            else "none yet",
        },
        {
            "label": "Sweep rollouts",
            "value": fmt(sweep.get("total", 0)),
            "sub": f"{fmt(sweep.get('fell', 0))} fell, {fmt(sweep.get('diverged', 0))} diverged"
            if sweep.get("total")
            else "none yet",
        },
        {
            "label": "Proposed trials",
            "value": fmt(len(proposals)),
            "sub": f"max fall risk {fmt(max(risk))}" if risk else "run gapgauge propose",
        },
        {"label": "Verdicts", "value": _verdict_tally(data), "sub": "features carrying over / of all"},
    ]


def _verdict_tally(data: ReportData) -> str:
    shift = data.results.get("shift")
    if not shift:
        return "–"
    features = [f for f in shift.get("features", []) if isinstance(f, dict)]
    good = sum(1 for f in features if f.get("verdict") in ("carries_over", "offset_order_kept"))
    return f"{good} / {len(features)}"


def _cautions(data: ReportData) -> list[str]:
    out = []
    n_syn = sum(1 for t in data.trials if t.synthetic)
    if n_syn:
        out.append(
            f"{n_syn} of the {len(data.trials)} trials are synthetic, written by the stand-in robot: "
            "they show the "
            "path, not the behaviour of a real machine."
        )
    if 0 < len(data.trials) < 5:
        out.append(
            f"Only {len(data.trials)} hardware trials: verdicts and the prior's link are uncertain; "
            "read the intervals."
        )
    out.append(
        "Predictions hold inside the swept bounds and the physics ranges simulated; proposals are "
        "confined to the "
        "safe bounds, but a modelled fall risk is an estimate, not a limit the robot obeys."
    )
    out.append("The simulated body is planar: sideways falls, foot roll and stepping are outside the model.")
    return out


def _provenance(data: ReportData, json_name: str) -> dict[str, Any]:
    import matplotlib

    try:
        import mujoco

        mujoco_version = mujoco.__version__
    except ImportError:  # pragma: no cover - mujoco is a core dependency
        mujoco_version = "not installed"
    scenario = data.scenario
    table = [
        ("store", data.store_path),
        ("scenario file", str(scenario.path)),
        ("scenario hash", scenario.content_hash),
        ("model file", str(scenario.model_path)),
        ("gapgauge", __version__),
        ("python", platform.python_version()),
        ("numpy", np.__version__),
        ("mujoco", mujoco_version),
        ("matplotlib", matplotlib.__version__),
        ("generated", data.generated_at),
    ]
    columns = ["id", "kind", "seed", "design", "planned", "done", "status", "created_at"]
    present = [c for c in columns if any(c in r for r in data.runs)]
    runs = [
        [
            fmt(r.get(c))
            if isinstance(r.get(c), (int, float)) and c not in ("id", "seed")
            else str(r.get(c, "–"))
            for c in present
        ]
        for r in data.runs
    ]
    models = []
    for kind in ("shift", "prior", "proposals", "budget", "calibration"):
        result = data.results.get(kind)
        seed = None if result is None else result.get("seed")
        models.append(
            {
                "kind": kind,
                "stored": "yes" if result is not None else "no",
                "seed": "–" if seed is None else str(seed),
            }
        )
    return {"table": table, "runs": runs, "run_columns": present, "models": models, "json_name": json_name}


# ---- the writer ------------------------------------------------------------------------------


def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.PackageLoader("gapgauge.report", "templates"),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def render(
    data: ReportData, json_name: str = "report.json"
) -> tuple[str, Decision, list[SectionStatus], list[Figure]]:
    """The HTML text of the report, the decision, the section statuses and the figures drawn."""
    decision = decide(data)
    sections = section_statuses(data)
    caution = caution_text()
    context = {
        "sweep": _sweep_section(data),
        "shift": _shift_section(data),
        "prior": _prior_section(data),
        "proposals": _proposal_section(data),
        "budget": _budget_section(data),
        "calibration": _calibration_section(data),
    }
    figures = [fig for part in context.values() if part for fig in part.get("figures", [])]
    trials = _trial_rows(data)
    html = (
        _environment()
        .get_template("report.html")
        .render(
            **context,
            scenario={
                "name": data.scenario.name,
                "description": data.scenario.description,
                "hash_short": data.scenario.content_hash[:12],
            },
            tool_version=__version__,
            generated_at=data.generated_at,
            decision=decision,
            cards=_cards(data),
            caution_body=caution.removeprefix("CAUTION:").strip(),
            sections=sections,
            trials=trials,
            n_synthetic=sum(1 for t in trials if t["synthetic"]),
            cautions=_cautions(data),
            provenance=_provenance(data, json_name),
            json_name=json_name,
        )
    )
    return html, decision, sections, figures


def write_report(
    scenario: Scenario,
    store: Any,
    out: str | Path = "report.html",
    *,
    plots_dir: str | Path | None = None,
) -> ReportResult:
    """Write the transfer report for ``scenario`` from ``store``: ``out`` (HTML) and the same stem ``.json``.

    Args:
        scenario: the loaded scenario (its content hash selects the store's rows).
        store: an open :class:`gapgauge.Store`.
        out: the HTML file to write; the JSON summary goes beside it with the suffix ``.json``.
        plots_dir: if given, every figure is also written there as ``NAME.png`` (for slides).

    Sections whose results are missing say which command fills them. Raises :class:`StoreError`
    when the output cannot be written.
    """
    out = Path(out)
    if out.suffix.lower() not in (".html", ".htm"):
        raise StoreError(f"{out}: the report is an HTML file; give --out a name ending in .html")
    json_path = out.with_suffix(".json")
    data = collect(scenario, store)
    html, decision, sections, figures = render(data, json_name=json_path.name)
    summary = summary_json(data, decision, sections, caution_text())
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(html, encoding="utf-8")
        json_path.write_text(json.dumps(summary, indent=2, allow_nan=False) + "\n", encoding="utf-8")
        if plots_dir is not None:
            folder = Path(plots_dir)
            folder.mkdir(parents=True, exist_ok=True)
            for fig in figures:
                (folder / f"{fig.name}.png").write_bytes(fig.png)
    except OSError as exc:
        raise StoreError(
            f"{exc.filename or out}: cannot write the report ({exc.strerror}); check the folder exists "
            "and is writable"
        ) from None
    return ReportResult(out, json_path, sections, decision)
