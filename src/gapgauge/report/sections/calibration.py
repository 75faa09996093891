"""Section 7, the simulator calibration: each physical parameter's estimate and interval inside its
randomisation range, and the feature shift before and after."""

from __future__ import annotations

from typing import Any

import numpy as np

from ...compare.calibration import CalibrationResult
from .. import plots
from ..inputs import ReportInputs
from .common import VERDICT_WORDS, Figure, fmt, fmt_interval


def does_not_carry_over_after(calibration: CalibrationResult) -> tuple[int, int]:
    """(features that still do not carry over at the calibrated physics, features matched)."""
    verdicts = calibration.shift_after.verdicts
    return sum(1 for v in verdicts if v == "does_not_carry_over"), len(verdicts)


def pinned_down(calibration: CalibrationResult) -> list[str]:
    """The physical parameters the trials pin down."""
    return [p.name for p in calibration.parameters if p.identifiable]


def _side(shift: Any) -> dict[str, str]:
    """Feature -> "verdict (rms x sd)" of one side of the before/after, plus the discrepancy D."""
    out = {
        name: f"{VERDICT_WORDS.get(verdict, verdict)} (rms {fmt(rms)} sd)"
        for name, verdict, rms in zip(shift.features, shift.verdicts, shift.rms, strict=True)
    }
    out["discrepancy D (all features)"] = fmt(shift.total)
    return out


def _before_after(calibration: CalibrationResult) -> list[dict[str, str]]:
    before, after = _side(calibration.shift_before), _side(calibration.shift_after)
    return [
        {"name": k, "before": before.get(k, "–"), "after": after.get(k, "–")}
        for k in dict.fromkeys([*before, *after])
    ]


def _intervals_figure(calibration: CalibrationResult) -> Figure | None:
    params = calibration.parameters
    if not params:
        return None
    return Figure(
        "calibration",
        plots.calibration_intervals(
            [p.name for p in params],
            np.array([p.estimate for p in params], float),
            np.array([p.interval[0] for p in params], float),
            np.array([p.interval[1] for p in params], float),
            np.array([p.base_range[0] for p in params], float),
            np.array([p.base_range[1] for p in params], float),
            [p.identifiable for p in params],
        ),
        "calibrated physical parameters",
        "Each physical parameter's estimate (dot) and interval (bar) inside the scenario's randomisation "
        "range (shaded); grey bars: not pinned down by the trials at hand.",
    )


def _shift_figure(calibration: CalibrationResult) -> Figure | None:
    before, after = calibration.shift_before, calibration.shift_after
    rms_before = dict(zip(before.features, np.asarray(before.rms, float), strict=True))
    rms_after = dict(zip(after.features, np.asarray(after.rms, float), strict=True))
    names = [n for n in before.features if n in rms_after and np.isfinite(rms_before[n]) and np.isfinite(rms_after[n])]
    if not names:
        return None
    return Figure(
        "calibration_shift",
        plots.shift_before_after(
            names,
            np.array([rms_before[n] for n in names]),
            np.array([rms_after[n] for n in names]),
            label="rms standardised residual (in simulated spreads)",
        ),
        "feature shift before and after calibration",
        "Root-mean-square standardised residual of each matched feature at the nominal physics (before) "
        "and at the calibrated physics (after); lower is closer to the robot.",
    )


def _extra(calibration: CalibrationResult) -> list[tuple[str, str]]:
    return [
        ("hardware trials", fmt(calibration.n_trials)),
        ("discrepancy", calibration.discrepancy),
        ("optimiser", calibration.optimiser),
        ("discrepancy evaluations", fmt(calibration.evaluations)),
        ("rollouts simulated", fmt(calibration.rollouts)),
        ("seed", str(calibration.seed)),
        *((f"left out: {name}", why) for name, why in calibration.excluded_features.items()),
    ]


def calibration_section(inputs: ReportInputs) -> dict[str, Any] | None:
    """The calibration table, the before/after shift, the overlay and the figures, or None."""
    calibration = inputs.calibration
    if calibration is None:
        return None
    rows = [
        {
            "name": p.name,
            "estimate": fmt(p.estimate),
            "interval": fmt_interval(p.interval),
            "identifiable": bool(p.identifiable),
        }
        for p in calibration.parameters
    ]
    figures = [f for f in (_intervals_figure(calibration), _shift_figure(calibration)) if f is not None]
    overlay = calibration.overlay_path
    return {
        "rows": rows,
        "figures": figures,
        "before_after": _before_after(calibration),
        "overlay": None if overlay is None else str(overlay),
        "overlay_text": calibration.overlay_text(overlay),
        "extra": _extra(calibration),
    }
