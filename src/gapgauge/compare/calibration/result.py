"""What a calibration found: one estimate per physical parameter, the feature shift before and after,
and the calibrated scenario overlay (TOML) that carries the estimates into the next sweep."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ...results import Result


@dataclass(frozen=True)
class PhysicalEstimate:
    """The calibrated value of one physical parameter.

    Attributes:
        name: physics quantity (scenario ``[physics]`` name).
        unit: its unit.
        estimate: posterior mode (minimiser of the discrepancy), in ``unit``.
        interval: approximate 95% posterior interval ``(low, high)``, clipped to the search range.
        sd: approximate posterior standard deviation, in ``unit`` (Laplace, before clipping).
        search_range: ``(low, high)`` searched (the scenario's range, widened; see
            :func:`gapgauge.compare.calibration.calibrate`).
        base_range: ``(low, high)`` of the scenario's randomisation.
        base_nominal: the scenario's nominal value.
        identifiable: whether the trials at hand pin it down (interval narrower than the threshold).
        reason: the plain-words reason for ``identifiable``.
        sensitivity: root-mean-square change of the matched standardised features when the parameter
            moves across its whole search range (linearised at the estimate), in simulated spreads.
        at_edge: the estimate sits at the edge of the search range (the robot may lie beyond it).
    """

    name: str
    unit: str
    estimate: float
    interval: tuple[float, float]
    sd: float
    search_range: tuple[float, float]
    base_range: tuple[float, float]
    base_nominal: float
    identifiable: bool
    reason: str
    sensitivity: float
    at_edge: bool


@dataclass(frozen=True)
class ShiftAtPhysics:
    """How far the hardware trials sit from simulation at one physics setting, feature by feature.

    Residuals are standardised, ``(hardware - simulated) / s_j`` with ``s_j`` the feature's simulated
    spread under the scenario's randomisation (the same scale as the discrepancy).

    Attributes:
        physics: the physics simulated, name -> value (every scenario quantity).
        features: matched feature names, ``(f,)``.
        bias: mean standardised residual over the trials, ``(f,)`` (in simulated spreads; NaN where
            no trial has the feature).
        rms: root-mean-square standardised residual over the trials, ``(f,)``.
        verdicts: per feature, the shift verdict (``carries_over``, ``offset_order_kept``,
            ``does_not_carry_over``, ``undecided``) on matched simulations at ``physics`` plus
            randomised draws around it, ``(f,)``.
        reasons: the plain-words reason for each verdict, ``(f,)``.
        total: the discrepancy D: mean squared standardised residual over trials and features.
        verdict_source: what gave the verdicts.
    """

    physics: dict[str, float]
    features: tuple[str, ...]
    bias: np.ndarray
    rms: np.ndarray
    verdicts: tuple[str, ...]
    reasons: tuple[str, ...]
    total: float
    verdict_source: str = ""

    @property
    def carried_over(self) -> list[str]:
        """Features whose verdict is ``carries_over``."""
        return [n for n, v in zip(self.features, self.verdicts, strict=True) if v == "carries_over"]


@dataclass(frozen=True)
class FeatureBeforeAfter:
    """One row of the before/after table: a matched feature at the nominal and at the calibrated physics.

    ``bias_*`` and ``rms_*`` are standardised residuals (simulated spreads), ``verdict_*`` and
    ``reason_*`` the shift verdicts (see :class:`ShiftAtPhysics`).
    """

    feature: str
    bias_before: float
    rms_before: float
    verdict_before: str
    reason_before: str
    bias_after: float
    rms_after: float
    verdict_after: str
    reason_after: str


@dataclass
class CalibrationResult(Result):
    """What :func:`gapgauge.compare.calibration.calibrate` found (stored as kind ``"calibration"``).

    Attributes:
        scenario_name, scenario_path, scenario_hash: the base scenario calibrated.
        n_trials: number of hardware trials used.
        trial_ids: the store ids of those trials, in row order (empty when the caller gave none).
        parameters: one :class:`PhysicalEstimate` per calibrated quantity, in the order asked for.
        features: matched feature names, ``(f,)``.
        feature_scales: simulated spread ``s_j`` of each matched feature, ``(f,)``, in the feature's unit.
        excluded_features: feature name -> why it was not matched.
        shift_before: :class:`ShiftAtPhysics` at the scenario's nominal physics.
        shift_after: :class:`ShiftAtPhysics` at the calibrated physics.
        noise_scale: ``tau_j``, each feature's error level in simulated spreads used for the intervals,
            ``(f,)`` (all equal for the ``standardised`` discrepancy).
        correlation: approximate posterior correlation of the parameters, ``(k x k)``, in
            ``parameters`` order.
        discrepancy, optimiser: the method names.
        seed: the seed every random choice came from.
        evaluations: discrepancy evaluations (one physics setting at every trial each).
        rollouts: simulator rollouts used in total.
        overlay_path: where the overlay was written (set by the caller that writes it), or None.
        settings: the tuning knobs used and a few figures at the estimate.
    """

    scenario_name: str
    scenario_path: Path
    scenario_hash: str
    n_trials: int
    parameters: list[PhysicalEstimate]
    features: tuple[str, ...]
    feature_scales: np.ndarray
    excluded_features: dict[str, str]
    shift_before: ShiftAtPhysics
    shift_after: ShiftAtPhysics
    noise_scale: np.ndarray
    correlation: np.ndarray
    discrepancy: str
    optimiser: str
    seed: int
    evaluations: int
    rollouts: int
    trial_ids: list[int] = field(default_factory=list)
    overlay_path: Path | None = None
    settings: dict[str, Any] = field(default_factory=dict)

    kind = "calibration"
    schema_version = 1

    @property
    def identifiable(self) -> list[str]:
        """Names of the parameters the trials pin down."""
        return [p.name for p in self.parameters if p.identifiable]

    def estimate(self, name: str) -> PhysicalEstimate:
        """The estimate of physics quantity ``name`` (KeyError if it was not calibrated)."""
        for p in self.parameters:
            if p.name == name:
                return p
        raise KeyError(name)

    def before_after(self) -> list[FeatureBeforeAfter]:
        """The per-feature table: each matched feature at the nominal physics and at the calibrated one."""
        b, a = self.shift_before, self.shift_after
        return [
            FeatureBeforeAfter(
                feature=name,
                bias_before=float(b.bias[j]), rms_before=float(b.rms[j]),
                verdict_before=b.verdicts[j], reason_before=b.reasons[j],
                bias_after=float(a.bias[j]), rms_after=float(a.rms[j]),
                verdict_after=a.verdicts[j], reason_after=a.reasons[j],
            )
            for j, name in enumerate(self.features)
        ]

    def default_overlay_path(self) -> Path:
        """``<base stem>.calibrated.toml`` beside the base scenario."""
        return default_overlay_path(self.scenario_path)

    def overlay_text(self, overlay_path: str | Path | None = None) -> str:
        """The calibrated scenario overlay (TOML) for writing at ``overlay_path``.

        It ``extends`` the base scenario (path relative to the overlay's folder) and overrides
        ``[physics.NAME]`` of each identifiable parameter: ``nominal`` = the estimate, ``low``/``high``
        = its 95% interval (within the search range), so a randomised sweep of the overlay draws from
        what the trials allow and a nominal sweep runs at the estimate. Parameters the trials do
        not pin down keep the base scenario's range and nominal (named in a comment): moving a value the
        data do not support would only look like knowledge.
        """
        target = Path(overlay_path) if overlay_path is not None else self.default_overlay_path()
        rel = os.path.relpath(self.scenario_path.resolve(), target.resolve().parent).replace(os.sep, "/")
        lines = [
            f"# Calibrated physics for scenario {self.scenario_name!r} ({self.scenario_hash}),",
            f"# from {self.n_trials} hardware trial(s) by `gapgauge calibrate` (seed {self.seed}).",
            f"# Discrepancy: {self.discrepancy}; optimiser: {self.optimiser};",
            f"# {self.evaluations} evaluations, {self.rollouts} rollouts.",
            "# Method: Kennedy and O'Hagan (2001) calibration view; ranges are approximate 95% intervals.",
        ]
        for p in self.parameters:
            if not p.identifiable:
                lines.append(f"# {p.name}: not identifiable from these trials, kept from the base ({p.reason}).")
        lines += ["", f"extends = {_toml_string(rel)}"]
        for p in self.parameters:
            if not p.identifiable:
                continue
            # 6 significant digits, and the range widened if rounding put the nominal outside it.
            nominal = float(f"{p.estimate:.6g}")
            low = min(float(f"{p.interval[0]:.6g}"), nominal)
            high = max(float(f"{p.interval[1]:.6g}"), nominal)
            lines += [
                "",
                f"[physics.{p.name}]",
                f"# was nominal {_toml_float(p.base_nominal)}, range [{_toml_float(p.base_range[0])}, "
                f"{_toml_float(p.base_range[1])}] {p.unit}",
                f"low = {_toml_float(low)}",
                f"high = {_toml_float(high)}",
                f"nominal = {_toml_float(nominal)}",
            ]
        return "\n".join(lines) + "\n"

    @property
    def overlay(self) -> str:
        """The overlay text for its default place (or for ``overlay_path`` once written)."""
        return self.overlay_text(self.overlay_path)


def default_overlay_path(scenario_path: str | Path) -> Path:
    """Where a calibrated overlay goes unless told otherwise: ``<base stem>.calibrated.toml`` beside the
    base scenario."""
    path = Path(scenario_path)
    return path.with_name(f"{path.stem}.calibrated.toml")


def _toml_float(x: float) -> str:
    text = f"{float(x):.6g}"
    return text if any(ch in text for ch in ".en") else text + ".0"


def _toml_string(text: str) -> str:
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'
