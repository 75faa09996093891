"""Does simulation carry over? Per-feature and joint shift statistics, and honest verdicts.

Every hardware trial has K matched simulations at exactly its parameters (row 0 nominal physics,
the others randomised physics). For each balance feature, over the matched pairs:

- standardised residual of each trial, ``(hardware - mean_sim) / sd_sim`` against its own simulated
  spread; how many exceed ``residual_limit`` is compared with how often the simulations themselves
  exceed it (leave-one-out over the K simulations; binomial tail, scipy.stats.binom);
- paired bias ``mean(hardware - mean_sim)`` with a percentile bootstrap and a Student t interval
  (:mod:`.statistics`);
- Wasserstein-1 distance (scipy.stats.wasserstein_distance) and the Kolmogorov-Smirnov statistic
  and p-value (scipy.stats.ks_2samp) between the hardware values and the pooled matched simulations;
- rank agreement across trials between hardware values and simulated means (Spearman, Kendall) and
  the link ``hardware = a + b * mean_sim`` by least squares (:mod:`.statistics`).

Jointly, over the features with simulated spread: MMD^2_u with a restricted permutation test
(Gretton et al. 2012) and a classifier two-sample test (Lopez-Paz and Oquab 2017); see
:mod:`gapgauge.compare.two_sample`. For the objective: Kendall tau between simulated means and
hardware across the tried parameter sets, and the least-squares link with t intervals.

The verdict rules are in :mod:`.verdicts`. The planning sd of their power calculations is the larger
of the observed sd of the paired differences and the sd a draw from the simulation would have,
``sd * sqrt(1 + 1/K)``. A feature without simulated spread (for example ``fell`` when nothing falls)
gets a verdict from how many hardware values leave the simulated value, never from a division by zero.

:func:`shift_from_arrays` is the pure entry point (arrays in, :class:`ShiftReport` out); the job that
reads the store and saves the result is :func:`gapgauge.app.shift.assess_shift`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import stats

from ...progress import Progress, or_silent
from ...scenario import ShiftSettings
from ..two_sample import classifier_matched_test, mmd_matched_test
from .result import FeatureShift, JointShift, ObjectiveShift, ScenarioRef, SettingsUsed, ShiftReport
from .statistics import (
    BIAS_INTERVALS_METHOD,
    MAX_TRIALS,
    NAN_PAIR,
    POWER,
    POWER_METHOD,
    RANK_TEST_METHOD,
    BiasIntervals,
    Link,
    RankAgreement,
    equivalence_power,
    fit_link,
    leave_one_out_rate,
    matched_summary,
    paired_bias_intervals,
    rank_agreement,
    t_test_power,
    trials_to_decide,
)
from .verdicts import VERDICTS, Verdict, VerdictInputs, decide_constant, decide_verdict

__all__ = [
    "BiasIntervals",
    "FeatureShift",
    "JointShift",
    "Link",
    "MAX_TRIALS",
    "ObjectiveShift",
    "POWER",
    "POWER_METHOD",
    "RankAgreement",
    "ScenarioRef",
    "SettingsUsed",
    "ShiftReport",
    "VERDICTS",
    "Verdict",
    "VerdictInputs",
    "decide_constant",
    "decide_verdict",
    "equivalence_power",
    "feature_shift",
    "fit_link",
    "joint_shift",
    "rank_agreement",
    "settings_used",
    "shift_from_arrays",
    "t_test_power",
    "trials_to_decide",
]

STANDARDISATION = "each matched set by the mean and sd of its K+1 points"


def feature_shift(
    name: str, hw: np.ndarray, sims: np.ndarray, settings: ShiftSettings, rng: np.random.Generator
) -> FeatureShift:
    """Per-feature statistics and verdict (module docstring) of one feature.

    Args:
        name: feature name.
        hw: ``(n,)`` hardware values, feature units (NaN = missing).
        sims: ``(n x K)`` matched simulations, feature units (NaN ignored).
        settings: level, limits and bootstrap count.
        rng: source of the bootstrap.
    """
    level = settings.level
    count, mean, sd = matched_summary(sims)
    usable = np.isfinite(hw) & (count >= 2)
    n = int(usable.sum())
    with np.errstate(divide="ignore", invalid="ignore"):
        # a zero simulated spread makes any departure infinitely unlikely, and no departure 0
        zero_sd = sd <= 1e-12 * np.maximum(np.abs(mean), 1.0)
        same = np.isclose(hw, mean, rtol=1e-9, atol=1e-12)
        residuals = np.where(zero_sd, np.where(same, 0.0, np.sign(hw - mean) * np.inf), (hw - mean) / sd)
    residuals = np.where(usable, residuals, np.nan)
    x, m_, s_ = hw[usable], mean[usable], sd[usable]
    pooled = sims[usable][np.isfinite(sims[usable])]
    spread = float(np.sqrt(np.mean(s_**2))) if n else math.nan
    k_mean = float(count[usable].mean()) if n else math.nan
    base = dict(
        name=name,
        n_trials=n,
        hardware=np.asarray(hw, float).tolist(),
        simulated_mean=mean.tolist(),
        simulated_sd=sd.tolist(),
        residuals=residuals.tolist(),
        simulated_spread=spread,
    )
    if n == 0:
        return FeatureShift(
            **base,
            verdict="undecided",
            reason="no trial with a hardware value and 2 simulations",
            trials_to_decide=None,
            more_trials=None,
            max_abs_residual=math.nan,
            residual_exceedances=0,
            residual_expected_rate=math.nan,
            residual_p_value=math.nan,
            bias=math.nan,
            bias_sd_units=math.nan,
            bias_interval_bootstrap=NAN_PAIR,
            bias_interval_t=NAN_PAIR,
            bias_test_interval=NAN_PAIR,
            bias_equivalence_interval=NAN_PAIR,
            offset_p_value=math.nan,
            wasserstein=math.nan,
            wasserstein_sd_units=math.nan,
            ks_statistic=math.nan,
            ks_p_value=math.nan,
            rank=None,
            link=None,
            planning_sd=math.nan,
        )
    b = paired_bias_intervals(x - m_, level, settings.bootstrap, rng)
    wasserstein = float(stats.wasserstein_distance(x, pooled))
    ks = stats.ks_2samp(x, pooled)
    rank = rank_agreement(x, m_, level)
    link = fit_link(m_, x, level)
    abs_res = np.abs(residuals[usable])
    exceed = int(np.sum(abs_res > settings.residual_limit))
    if spread > 0:
        rate = leave_one_out_rate(sims[usable], settings.residual_limit)
        res_p = float(stats.binom.sf(exceed - 1, n, rate)) if exceed else 1.0
        planning = max(b.sd if n > 1 else 0.0, spread * math.sqrt(1 + 1 / k_mean))
        verdict = decide_verdict(
            VerdictInputs(
                n_trials=n,
                simulated_spread=spread,
                bias=b.bias,
                test_interval=b.test,
                equivalence_interval=b.equivalence,
                residual_exceedances=exceed,
                residual_p_value=res_p,
                kendall=rank.kendall,
                kendall_p_value=rank.kendall_p_value,
                slope=link.slope,
                intercept=link.intercept,
                planning_sd=planning,
            ),
            settings,
        )
    else:
        rate, res_p, planning = math.nan, math.nan, math.nan
        verdict = decide_constant(x, float(m_[0]), int(count[usable].min()), level)
    return FeatureShift(
        **base,
        verdict=verdict.verdict,
        reason=verdict.reason,
        trials_to_decide=verdict.trials_to_decide,
        more_trials=verdict.more_trials,
        max_abs_residual=float(abs_res.max()),
        residual_exceedances=exceed,
        residual_expected_rate=rate,
        residual_p_value=res_p,
        bias=b.bias,
        bias_sd_units=b.bias / spread if spread > 0 else math.nan,
        bias_interval_bootstrap=b.bootstrap,
        bias_interval_t=b.t,
        bias_test_interval=b.test,
        bias_equivalence_interval=b.equivalence,
        offset_p_value=b.p_value,
        wasserstein=wasserstein,
        wasserstein_sd_units=wasserstein / spread if spread > 0 else math.nan,
        ks_statistic=float(ks.statistic),
        ks_p_value=float(ks.pvalue),
        rank=rank,
        link=link,
        planning_sd=planning,
    )


def settings_used(settings: ShiftSettings) -> SettingsUsed:
    """The thresholds and level, with the methods they feed, for printing next to the verdicts."""
    return SettingsUsed(
        level=float(settings.level),
        residual_limit=float(settings.residual_limit),
        offset_limit=float(settings.offset_limit),
        rank_threshold=float(settings.rank_threshold),
        bootstrap=int(settings.bootstrap),
        permutations=int(settings.permutations),
        power=POWER,
        power_method=POWER_METHOD,
        bias_intervals=BIAS_INTERVALS_METHOD,
        rank_test=RANK_TEST_METHOD,
    )


def _detected(p_value: float, level: float) -> bool | None:
    return bool(p_value < level) if math.isfinite(p_value) else None


def joint_shift(
    names: Sequence[str], hardware: np.ndarray, simulated: np.ndarray, settings: ShiftSettings,
    rng: np.random.Generator,
) -> JointShift:
    """Both joint tests on the features ``names`` of ``hardware (n x f)`` and ``simulated (n x K x f)``
    (feature units; columns in the order of ``names``)."""
    mmd = mmd_matched_test(hardware, simulated, permutations=settings.permutations, rng=rng)
    clf = classifier_matched_test(
        hardware, simulated, rng=rng, permutations=settings.permutations, level=settings.level,
        bootstrap=settings.bootstrap,
    )
    return JointShift(
        features=list(names),
        standardisation=STANDARDISATION,
        mmd2=mmd.mmd2,
        mmd_width=mmd.width,
        mmd_p_value=mmd.p_value,
        mmd_permutations=mmd.permutations,
        classifier_auc=clf.auc,
        classifier_auc_interval=clf.auc_interval,
        classifier_p_value=clf.p_value,
        classifier_permutations=clf.permutations,
        classifier_set_aucs=list(clf.set_aucs),
        classifier=clf.classifier,
        classifier_cross_validation=clf.cross_validation,
        classifier_class_balance=clf.class_balance,
        mmd_shift_detected=_detected(mmd.p_value, settings.level),
        classifier_shift_detected=_detected(clf.p_value, settings.level),
    )


def shift_from_arrays(
    hardware: np.ndarray,
    simulated: np.ndarray,
    feature_names: list[str] | tuple[str, ...],
    settings: ShiftSettings,
    rng: np.random.Generator | int = 0,
    *,
    hardware_objective: np.ndarray | None = None,
    simulated_objective: np.ndarray | None = None,
    trial_ids: list[Any] | None = None,
    progress: Progress | None = None,
) -> ShiftReport:
    """Shift statistics and verdicts from plain arrays.

    Args:
        hardware: ``(n_trials x n_features)`` hardware feature values, feature units; NaN = missing.
        simulated: ``(n_trials x K x n_features)`` matched simulations at each trial's parameters,
            feature units; NaN rows (diverged, or padding when trials have different K) are ignored.
        feature_names: the ``n_features`` names, in column order.
        settings: level, limits and resample counts (scenario ``[shift]``).
        rng: a Generator, or an integer seed (stored in the result).
        hardware_objective: ``(n_trials,)`` hardware objective (lower is better), or None.
        simulated_objective: ``(n_trials x K)`` simulated objective, or None.
        trial_ids: labels of the trials, for the report.
        progress: ``progress("shift: features", done, n_features)`` per feature, then once for the
            joint tests.

    Raises:
        ValueError: the arrays' shapes do not agree with each other or with ``feature_names``.
    """
    report_progress = or_silent(progress)
    hardware = np.asarray(hardware, dtype=float)
    simulated = np.asarray(simulated, dtype=float)
    if hardware.ndim != 2:
        raise ValueError(f"hardware must be (n_trials x n_features), got shape {hardware.shape}")
    n, p = hardware.shape
    if simulated.ndim != 3 or simulated.shape[0] != n or simulated.shape[2] != p:
        raise ValueError(
            f"simulated must be (n_trials x K x n_features) = ({n} x K x {p}), got {simulated.shape}"
        )
    if len(feature_names) != p:
        raise ValueError(f"{len(feature_names)} feature names for {p} feature columns")
    seed = int(rng) if isinstance(rng, (int, np.integer)) else None
    gen = np.random.default_rng(rng) if seed is not None else rng
    features = []
    for j, name in enumerate(feature_names):
        report_progress("shift: features", j, p)
        features.append(feature_shift(name, hardware[:, j], simulated[:, :, j], settings, gen))
    report_progress("shift: features", p, p)
    # a feature without simulated spread has nothing for the joint tests to standardise by
    joint_cols = [j for j, f in enumerate(features) if f.simulated_spread > 0]
    report_progress("shift: joint tests", 0, 1)
    joint = joint_shift(
        [features[j].name for j in joint_cols], hardware[:, joint_cols], simulated[:, :, joint_cols], settings, gen
    )
    report_progress("shift: joint tests", 1, 1)
    objective = None
    if hardware_objective is not None and simulated_objective is not None:
        hw_obj = np.asarray(hardware_objective, dtype=float)
        _, sim_obj_mean, _ = matched_summary(np.asarray(simulated_objective, dtype=float))
        objective = ObjectiveShift(
            n_trials=int(np.sum(np.isfinite(hw_obj) & np.isfinite(sim_obj_mean))),
            hardware=hw_obj.tolist(),
            simulated_mean=sim_obj_mean.tolist(),
            rank=rank_agreement(hw_obj, sim_obj_mean, settings.level),
            link=fit_link(sim_obj_mean, hw_obj, settings.level),
        )
    return ShiftReport(
        features=features,
        joint=joint,
        objective=objective,
        settings=settings_used(settings),
        seed=seed,
        trial_ids=list(trial_ids) if trial_ids is not None else list(range(n)),
        scenario=ScenarioRef(),
        hardware_values=hardware,
        simulated_values=simulated,
    )
