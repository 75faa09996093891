"""The typed result of the shift assessment: :class:`ShiftReport` (stored under the kind "shift") and
the dataclasses it nests. Every figure is in the feature's units unless its comment says otherwise;
NaN marks a figure that could not be computed (too few trials, no spread)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np

from ...results import Result
from .statistics import Link, RankAgreement


@dataclass
class FeatureShift:
    """Shift statistics and verdict of one feature. Values in the feature's units unless noted."""

    name: str
    verdict: str  # one of gapgauge.compare.shift.verdicts.VERDICTS
    reason: str
    n_trials: int
    trials_to_decide: int | None
    more_trials: int | None
    hardware: list[float]  # per trial
    simulated_mean: list[float]  # per trial
    simulated_sd: list[float]  # per trial
    residuals: list[float]  # per trial, dimensionless (non-finite where the simulated sd is 0)
    max_abs_residual: float
    residual_exceedances: int
    residual_expected_rate: float  # how often a simulation exceeds the limit against its siblings
    residual_p_value: float
    simulated_spread: float  # pooled simulated sd
    bias: float
    bias_sd_units: float
    bias_interval_bootstrap: tuple[float, float]  # 1 - level, percentile
    bias_interval_t: tuple[float, float]  # 1 - level, Student t
    bias_test_interval: tuple[float, float]  # union of the two, used by the verdict
    bias_equivalence_interval: tuple[float, float]  # 1 - 2 level, union of bootstrap and t
    offset_p_value: float  # one-sample t-test of zero bias
    wasserstein: float
    wasserstein_sd_units: float
    ks_statistic: float
    ks_p_value: float
    rank: RankAgreement | None
    link: Link | None
    planning_sd: float


@dataclass
class ObjectiveShift:
    """How simulation ranks the tried parameter sets by the objective (lower is better)."""

    n_trials: int
    hardware: list[float]
    simulated_mean: list[float]
    rank: RankAgreement
    link: Link


@dataclass
class JointShift:
    """The joint two-sample tests over the features with simulated spread
    (:mod:`gapgauge.compare.two_sample`); ``*_shift_detected`` is None when the test could not run."""

    features: list[str]
    standardisation: str
    mmd2: float  # unbiased MMD^2_u, dimensionless
    mmd_width: float  # Gaussian kernel width, standardised units
    mmd_p_value: float
    mmd_permutations: int
    classifier_auc: float
    classifier_auc_interval: tuple[float, float]
    classifier_p_value: float
    classifier_permutations: int
    classifier_set_aucs: list[float]
    classifier: str
    classifier_cross_validation: str
    classifier_class_balance: str
    mmd_shift_detected: bool | None
    classifier_shift_detected: bool | None


@dataclass
class SettingsUsed:
    """The scenario's ``[shift]`` thresholds and level as applied, with the methods they feed."""

    level: float
    residual_limit: float
    offset_limit: float
    rank_threshold: float
    bootstrap: int
    permutations: int
    power: float
    power_method: str
    bias_intervals: str
    rank_test: str


@dataclass
class ScenarioRef:
    """Which scenario version the assessment is of."""

    name: str = ""
    hash: str = ""
    path: str = ""


@dataclass
class ShiftReport(Result):
    """Everything the shift assessment found, feature by feature and jointly.

    ``hardware_values (n x f)`` and ``simulated_values (n x K x f)`` are the arrays behind it, in
    feature units (NaN where missing, diverged or padding), columns in the order of ``features``.
    """

    kind: ClassVar[str] = "shift"
    schema_version: ClassVar[int] = 1

    features: list[FeatureShift]
    joint: JointShift
    objective: ObjectiveShift | None
    settings: SettingsUsed
    seed: int | None
    trial_ids: list[str | int]
    scenario: ScenarioRef = field(default_factory=ScenarioRef)
    notes: list[str] = field(default_factory=list)
    plots: list[str] = field(default_factory=list)
    #: the features that read a channel flagged as unusual were left out, trial by trial
    leave_out_flagged: bool = False
    hardware_values: np.ndarray | None = field(default=None, repr=False)
    simulated_values: np.ndarray | None = field(default=None, repr=False)

    def feature(self, name: str) -> FeatureShift:
        """The entry of the feature called ``name``; KeyError when there is none."""
        for f in self.features:
            if f.name == name:
                return f
        raise KeyError(name)
