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


def _verdict_text(verdict: str, rms: float) -> str:
    return f"{VERDICT_WORDS.get(verdict, verdict)} (rms {fmt(rms)} sd)"


def _before_after(calibration: CalibrationResult) -> list[dict[str, str]]:
    """Per matched feature its verdict and rms residual before and after, then the discrepancy D."""
    rows = [
        {
            "name": r.feature,
            "before": _verdict_text(r.verdict_before, r.rms_before),
            "after": _verdict_text(r.verdict_after, r.rms_after),
        }
        for r in calibration.before_after()
    ]
    rows.append(
        {
            "name": "discrepancy D (all features)",
            "before": fmt(calibration.shift_before.total),
            "after": fmt(calibration.shift_after.total),
        }
    )
    return rows


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
    rows = [r for r in calibration.before_after() if np.isfinite(r.rms_before) and np.isfinite(r.rms_after)]
    if not rows:
        return None
    return Figure(
        "calibration_shift",
        plots.shift_before_after(
            [r.feature for r in rows],
            np.array([r.rms_before for r in rows]),
            np.array([r.rms_after for r in rows]),
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
