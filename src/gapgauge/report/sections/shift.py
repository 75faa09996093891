"""Section 3, the feature shift: per feature the verdict and its statistics, the joint tests over all
features, whether simulation ranks the tried parameter sets, and one figure per feature."""

from __future__ import annotations

from typing import Any

import numpy as np

from ...compare.shift import FeatureShift, ShiftReport
from ...quantities import display_unit, feature_unit, format_interval, format_quantity, label
from .. import shift_plots
from ..inputs import ReportInputs
from .common import VERDICT_WORDS, Figure, fmt, fmt_interval
from .shift_text import detail

COLUMNS = (
    "hardware mean",
    "simulated mean",
    "bias",
    "bias interval",
    "bias / sim sd",
    "max |residual| (sd)",
    "Kendall tau",
    "more trials to decide",
)


def verdict_counts(shift: ShiftReport) -> dict[str, int]:
    """Verdict -> number of features with it (every verdict present, zeros included)."""
    counts = dict.fromkeys(VERDICT_WORDS, 0)
    for feature in shift.features:
        if feature.verdict in counts:
            counts[feature.verdict] += 1
    return counts


def names_with(shift: ShiftReport, verdict: str) -> list[str]:
    return [f.name for f in shift.features if f.verdict == verdict]


def trials_to_decide(shift: ShiftReport) -> int | None:
    """The largest 'more trials would decide' figure among the undecided features, if any gives one."""
    more = [f.more_trials for f in shift.features if f.verdict == "undecided" and f.more_trials is not None]
    return max(more) if more else None


def level(shift: ShiftReport) -> float:
    return float(shift.settings.level)


def mmd_p_value(shift: ShiftReport) -> float:
    """The joint MMD test's p-value (NaN when it could not be run)."""
    return float(shift.joint.mmd_p_value)


def _mean(values: list[float]) -> float | None:
    finite = [v for v in values if v is not None and np.isfinite(v)]
    return float(np.mean(finite)) if finite else None


def _cells(f: FeatureShift) -> list[str]:
    """One row of the shift table, in the order of :data:`COLUMNS`: values in the feature's unit (one
    display unit for the row), ratios in simulated spreads, counts as counts."""
    unit = feature_unit(f.name)
    hardware, simulated = _mean(f.hardware), _mean(f.simulated_mean)
    shown = display_unit(unit, [v for v in (hardware, simulated, f.bias, *f.bias_test_interval) if v is not None])
    return [
        format_quantity(hardware, unit, display=shown),
        format_quantity(simulated, unit, display=shown),
        format_quantity(f.bias, unit, display=shown, signed=True),
        format_interval(f.bias_test_interval, unit, display=shown),
        fmt(f.bias_sd_units),
        fmt(f.max_abs_residual),
        fmt(None if f.rank is None else f.rank.kendall),
        fmt(f.more_trials),
    ]


def _joint_rows(shift: ShiftReport) -> list[tuple[str, str]]:
    j = shift.joint
    return [
        ("features tested", fmt(len(j.features))),
        ("MMD² (unbiased, on standardised features)", fmt(j.mmd2)),
        ("MMD kernel width (standardised units)", fmt(j.mmd_width)),
        ("MMD p-value", fmt(j.mmd_p_value)),
        ("MMD permutations", fmt(j.mmd_permutations)),
        ("classifier AUC", fmt(j.classifier_auc)),
        ("classifier AUC interval", fmt_interval(j.classifier_auc_interval)),
        ("classifier p-value", fmt(j.classifier_p_value)),
        ("classifier", j.classifier),
        ("cross-validation", j.classifier_cross_validation),
    ]


def _objective_rows(shift: ShiftReport) -> list[tuple[str, str]]:
    o = shift.objective
    if o is None:
        return []
    return [
        ("trials", fmt(o.n_trials)),
        ("Kendall tau", fmt(o.rank.kendall)),
        ("Kendall p-value (one-sided)", fmt(o.rank.kendall_p_value)),
        ("Kendall tau interval", fmt_interval(o.rank.kendall_interval)),
        ("Spearman rho", fmt(o.rank.spearman)),
        ("Spearman interval", fmt_interval(o.rank.spearman_interval)),
        ("link slope (hardware per simulated)", fmt(o.link.slope)),
        ("link slope interval", fmt_interval(o.link.slope_interval)),
        ("link intercept (objective)", fmt(o.link.intercept)),
    ]


def _settings_text(shift: ShiftReport) -> str:
    s = shift.settings
    return (
        f"significance level {fmt(s.level)}; a residual within ±{fmt(s.residual_limit)} simulated sd is "
        f"consistent; an offset within ±{fmt(s.offset_limit)} simulated sd is none; the order carries over "
        f"at Kendall tau ≥ {fmt(s.rank_threshold)}; {fmt(s.bootstrap)} bootstrap resamples, "
        f"{fmt(s.permutations)} permutations, power {fmt(s.power)}"
    )


def _figures(shift: ShiftReport) -> list[Figure]:
    """One figure per feature: the simulated spread at each trial's parameters with the hardware values."""
    labels = [str(t) for t in shift.trial_ids]
    out = []
    for j, feature in enumerate(shift.features):
        simulated = None if shift.simulated_values is None else np.asarray(shift.simulated_values)[:, :, j]
        hardware = np.asarray(feature.hardware, float)
        png = shift_plots.feature_png(
            feature.name,
            hardware,
            simulated,
            np.asarray(feature.residuals, float),
            float(shift.settings.residual_limit),
            feature.verdict,
            np.asarray(feature.simulated_mean, float),
            np.asarray(feature.simulated_sd, float),
            labels if len(labels) == hardware.size else None,
        )
        out.append(
            Figure(
                f"shift_{feature.name}",
                png,
                f"shift of {label(feature.name)}",
                f"{label(feature.name)}: the matched simulations at each trial's parameters (violins, dots) "
                "with the hardware value (diamond); right: the standardised residual against the limit.",
            )
        )
    return out


def shift_section(inputs: ReportInputs) -> dict[str, Any] | None:
    """The shift table, the joint and objective tests and the per-feature figures, or None."""
    shift = inputs.shift
    if shift is None:
        return None
    rows = [
        {
            "name": f.name,
            "label": label(f.name),
            "unit": feature_unit(f.name) or "",
            "verdict": VERDICT_WORDS.get(f.verdict, f.verdict),
            "verdict_class": f.verdict if f.verdict in VERDICT_WORDS else "undecided",
            "cells": _cells(f),
            "detail": detail(f, shift.settings),
        }
        for f in shift.features
    ]
    return {
        "columns": [f"{1 - level(shift):.0%} bias interval" if c == "bias interval" else c for c in COLUMNS],
        "rows": rows,
        "joint": _joint_rows(shift),
        "objective": _objective_rows(shift),
        "settings": _settings_text(shift),
        "figures": _figures(shift),
        "n_trials": fmt(max((f.n_trials for f in shift.features), default=0)),
    }
