"""Section 7, the simulator calibration: each physical parameter's estimate and interval against its
randomisation range (drawn even when the estimate lies outside it), the feature shift before and
after in the features' own units, and the main finding in one sentence for the first screen."""

from __future__ import annotations

from typing import Any

import numpy as np

from ...compare.calibration import CalibrationResult, PhysicalEstimate
from ...quantities import display_unit, feature_unit, format_interval, format_number, format_quantity, label
from .. import result_plots
from ..inputs import ReportInputs
from .common import VERDICT_WORDS, Figure, fmt

#: physics name -> (what it says about the robot, word when the estimate is above nominal, below)
FINDINGS: dict[str, tuple[str, str, str]] = {
    "trunk_mass_scale": ("its trunk were {change} {word} than modelled", "heavier", "lighter"),
    "servo_strength": ("its servos were {change} {word} than modelled", "stronger", "weaker"),
    "disturbance_scale": ("the disturbance were {change} {word} than modelled", "larger", "smaller"),
    "friction": ("its foot friction were {value} instead of {nominal}", "higher", "lower"),
    "joint_damping": ("its joints' passive damping were {value} instead of {nominal}", "more", "less"),
    "servo_lag": ("its servos lagged by {value} instead of {nominal}", "more", "less"),
}
SCALES = {"trunk_mass_scale", "servo_strength", "disturbance_scale"}
FINDINGS_IN_SENTENCE = 2


def does_not_carry_over_after(calibration: CalibrationResult) -> tuple[int, int]:
    """(features that still do not carry over at the calibrated physics, features matched)."""
    verdicts = calibration.shift_after.verdicts
    return sum(1 for v in verdicts if v == "does_not_carry_over"), len(verdicts)


def outside_range(p: PhysicalEstimate) -> bool:
    return not p.base_range[0] <= p.estimate <= p.base_range[1]


def _departure(p: PhysicalEstimate) -> float:
    """How far the estimate moved from nominal, in widths of the randomisation range."""
    width = p.base_range[1] - p.base_range[0]
    return abs(p.estimate - p.base_nominal) / width if width > 0 else 0.0


def _phrase(p: PhysicalEstimate) -> str:
    template, up, down = FINDINGS.get(p.name, (f"{p.name} were {{value}} instead of {{nominal}}", "", ""))
    word = up if p.estimate >= p.base_nominal else down
    change = (
        f"{format_number(100 * abs(p.estimate / p.base_nominal - 1), 2)} %"
        if p.name in SCALES and p.base_nominal
        else ""
    )
    text = template.format(
        change=change, word=word,
        value=format_quantity(p.estimate, p.unit), nominal=format_quantity(p.base_nominal, p.unit),
    )
    if outside_range(p):
        text += f" (outside the randomised range {format_interval(p.base_range, p.unit)})"
    return text


def finding(calibration: CalibrationResult | None) -> str | None:
    """The calibration's main finding in a sentence ("The robot behaves as if its trunk were 14 %
    heavier than modelled, ..."): the pinned-down parameters that moved furthest from nominal, measured
    in widths of their randomisation ranges; None without a calibration."""
    if calibration is None:
        return None
    pinned = sorted((p for p in calibration.parameters if p.identifiable), key=_departure, reverse=True)
    moved = [p for p in pinned if _departure(p) > 0.05][:FINDINGS_IN_SENTENCE]
    if not moved:
        if pinned:
            return "The trials agree with the modelled physics: no pinned-down parameter moved far from nominal."
        return "The trials at hand do not pin down any of the physical parameters calibrated."
    return "The robot behaves as if " + " and ".join(_phrase(p) for p in moved) + "."


def _before_after(calibration: CalibrationResult) -> list[dict[str, str]]:
    """Per matched feature its mean offset (feature units) and verdict before and after, then D."""
    rows = []
    scales = np.asarray(calibration.feature_scales, float)
    for j, r in enumerate(calibration.before_after()):
        unit = feature_unit(r.feature)
        before, after = r.bias_before * scales[j], r.bias_after * scales[j]
        shown = display_unit(unit, [before, after])
        rows.append(
            {
                "name": r.feature,
                "label": label(r.feature),
                "before": format_quantity(before, unit, display=shown, signed=True),
                "before_sd": fmt(r.rms_before),
                "before_verdict": VERDICT_WORDS.get(r.verdict_before, r.verdict_before),
                "after": format_quantity(after, unit, display=shown, signed=True),
                "after_sd": fmt(r.rms_after),
                "after_verdict": VERDICT_WORDS.get(r.verdict_after, r.verdict_after),
            }
        )
    return rows


def _intervals_figure(calibration: CalibrationResult) -> Figure | None:
    params = calibration.parameters
    if not params:
        return None
    return Figure(
        "calibration",
        result_plots.calibration_intervals(
            [p.name for p in params],
            [p.unit for p in params],
            np.array([p.estimate for p in params], float),
            np.array([p.interval[0] for p in params], float),
            np.array([p.interval[1] for p in params], float),
            np.array([p.base_range[0] for p in params], float),
            np.array([p.base_range[1] for p in params], float),
            np.array([p.base_nominal for p in params], float),
            [p.identifiable for p in params],
        ),
        "calibrated physical parameters",
        "Each physical parameter on its own axis, in its own unit: the scenario's randomisation range "
        "(grey band), its nominal value (dashed), the estimate (dot) and its 95% interval (bar; grey when "
        "the trials do not pin it down). An estimate outside the band is a robot the sweep never simulated.",
    )


def _shift_figure(calibration: CalibrationResult) -> Figure | None:
    rows = [r for r in calibration.before_after() if np.isfinite(r.rms_before) and np.isfinite(r.rms_after)]
    if not rows:
        return None
    return Figure(
        "calibration_shift",
        result_plots.shift_before_after(
            [label(r.feature) for r in rows],
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
    rows = []
    for p in calibration.parameters:
        shown = display_unit(p.unit, [p.estimate, *p.interval, *p.base_range, p.base_nominal])
        rows.append(
            {
                "name": p.name,
                "unit": "" if p.unit in ("", "1") else p.unit,
                "estimate": format_quantity(p.estimate, p.unit, display=shown),
                "interval": format_interval(p.interval, p.unit, display=shown),
                "range": format_interval(p.base_range, p.unit, display=shown),
                "nominal": format_quantity(p.base_nominal, p.unit, display=shown),
                "outside": outside_range(p),
                "identifiable": bool(p.identifiable),
            }
        )
    figures = [f for f in (_intervals_figure(calibration), _shift_figure(calibration)) if f is not None]
    overlay = calibration.overlay_path
    total_before, total_after = calibration.shift_before.total, calibration.shift_after.total
    return {
        "rows": rows,
        "finding": finding(calibration),
        "figures": figures,
        "before_after": _before_after(calibration),
        "discrepancy": (fmt(total_before), fmt(total_after)),
        "overlay": None if overlay is None else str(overlay),
        "overlay_text": calibration.overlay_text(overlay),
        "extra": _extra(calibration),
    }
