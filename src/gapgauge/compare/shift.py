"""Does simulation carry over? Per-feature and joint shift statistics, and honest verdicts.

Every hardware trial has K matched simulations at exactly its parameters (row 0 nominal physics,
the others randomised physics). For each balance feature, over the matched pairs:

- standardised residual of each trial, ``(hardware - mean_sim) / sd_sim`` against its own simulated
  spread; how many exceed ``residual_limit`` is compared with how often the simulations themselves
  exceed it (leave-one-out over the K simulations; binomial tail, scipy.stats.binom);
- paired bias ``mean(hardware - mean_sim)`` with a percentile bootstrap interval (Efron and Tibshirani
  1993, ch. 13) and a Student t interval; the verdicts use the union of the two, because the
  percentile interval is too narrow with a handful of trials;
- Wasserstein-1 distance (the area between the empirical distribution functions, Vallender 1973;
  the same figure as scipy.stats.wasserstein_distance) and the Kolmogorov-Smirnov statistic (the
  largest gap between them; p-value from scipy.stats.ks_2samp) between the hardware values and the
  pooled matched simulations;
- rank agreement across trials between hardware values and simulated means: Spearman rho and
  Kendall tau, one-sided p-values from scipy.stats (exact permutation distribution of tau for small n
  without ties), intervals by the Fisher z transformation with the variances of Fieller, Hartley
  and Pearson (1957): 1.06 / (n - 3) for rho, 0.437 / (n - 4) for tau;
- the link ``hardware = a + b * mean_sim`` by ordinary least squares with Student t intervals.

Jointly, over the features with simulated spread: MMD^2_u with a restricted permutation test
(Gretton et al. 2012) and a classifier two-sample test (Lopez-Paz and Oquab 2017); see
:mod:`gapgauge.compare.two_sample`. For the objective: Kendall tau between simulated means and
hardware across the tried parameter sets, and the OLS link with t intervals.

Verdicts (:func:`decide_verdict`), with ``sd`` the pooled simulated spread of the feature and
``delta = offset_limit * sd``:

- ``carries_over``: the (1 - 2 level) bias interval lies inside ``(-delta, delta)`` (two one-sided
  tests for equivalence at the level, Schuirmann 1987) and the residual exceedances are no more
  than the simulations' own rate explains (binomial p >= level);
- otherwise, a *mismatch* is a significant offset (the (1 - level) interval excludes 0) whose size
  exceeds delta, or too many residual exceedances. A mismatch whose order carries over (Kendall
  tau >= rank_threshold and its one-sided p < level) is ``offset_order_kept``, stated with the
  offset and the link's scale; otherwise ``does_not_carry_over`` (order poor, or untested);
- anything else is ``undecided``, with the total number of trials at which a one-sample t-test of
  zero offset detects an offset of delta and the equivalence test shows equivalence within delta
  at zero offset, both with 80% power at the level (noncentral t, scipy.stats.nct), and so how many
  more trials that is. (A true bias close to delta takes more trials than that to settle.)

The planning sd of those power calculations is the larger of the observed sd of the paired
differences and the sd a draw from the simulation would have, ``sd * sqrt(1 + 1/K)``.
A feature without simulated spread (for example ``fell`` when nothing falls) gets a verdict from
how many hardware values leave the simulated value (under exchangeability each does so with
probability at most 2 / (K + 1)), never from a division by zero.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats

from ..errors import ModelError, StoreError
from ..scenario import Scenario, ShiftSettings
from .two_sample import ClassifierResult, MMDResult, classifier_matched_test, mmd_matched_test

VERDICTS = ("carries_over", "offset_order_kept", "does_not_carry_over", "undecided")
POWER = 0.8  # power targeted by the "how many more trials" calculation
MAX_TRIALS = 2000  # beyond this the power calculation answers "more than MAX_TRIALS"
RHO_CLIP = 0.9999  # Fisher z of |r| = 1 is infinite; clip so the interval stays finite
POWER_METHOD = (
    "total trials at which a two-sided one-sample t-test of zero bias detects a bias of offset_limit * sd "
    "and the two one-sided equivalence tests show equivalence within +-offset_limit * sd at zero bias, "
    "both with 80% power at the level; "
    "noncentral t (scipy.stats.nct); planning sd = max(observed sd of paired differences, sd*sqrt(1+1/K))"
)


# ---- small statistics on plain arrays ------------------------------------------------------


def wasserstein_1d(u: np.ndarray, v: np.ndarray) -> float:
    """Wasserstein-1 distance between the empirical distributions of ``u (m,)`` and ``v (n,)``.

    The area between the two empirical distribution functions (Vallender 1973), which is how
    scipy.stats.wasserstein_distance defines it; same units as the values.
    """
    u, v = np.sort(np.asarray(u, float)), np.sort(np.asarray(v, float))
    grid = np.sort(np.concatenate([u, v]))
    cdf_u = np.searchsorted(u, grid[:-1], side="right") / u.size
    cdf_v = np.searchsorted(v, grid[:-1], side="right") / v.size
    return float(np.sum(np.abs(cdf_u - cdf_v) * np.diff(grid)))


def ks_statistic(u: np.ndarray, v: np.ndarray) -> float:
    """Two-sample Kolmogorov-Smirnov statistic: the largest gap between the empirical distribution
    functions of ``u (m,)`` and ``v (n,)`` (Kolmogorov 1933, Smirnov 1948)."""
    u, v = np.sort(np.asarray(u, float)), np.sort(np.asarray(v, float))
    grid = np.concatenate([u, v])
    gap = np.searchsorted(u, grid, side="right") / u.size - np.searchsorted(v, grid, side="right") / v.size
    return float(np.max(np.abs(gap)))


def _fisher_interval(
    r: float, n: int, variance_numerator: float, lost: int, level: float
) -> tuple[float, float]:
    if not math.isfinite(r) or n - lost <= 0:
        return (math.nan, math.nan)
    z = math.atanh(max(-RHO_CLIP, min(RHO_CLIP, r)))
    half = stats.norm.ppf(1 - level / 2) * math.sqrt(variance_numerator / (n - lost))
    return (math.tanh(z - half), math.tanh(z + half))


@dataclass
class RankAgreement:
    """Rank agreement across trials between hardware values and simulated means."""

    n: int
    spearman: float
    spearman_p_value: float  # one-sided, alternative: positive association
    spearman_interval: tuple[float, float]  # Fisher z, var 1.06 / (n - 3) (Fieller et al. 1957)
    kendall: float
    kendall_p_value: float  # one-sided, exact permutation distribution for small n without ties
    kendall_interval: tuple[float, float]  # Fisher z, var 0.437 / (n - 4) (Fieller et al. 1957)

    @property
    def known(self) -> bool:
        return math.isfinite(self.kendall_p_value)


def rank_agreement(hardware: np.ndarray, simulated_mean: np.ndarray, level: float) -> RankAgreement:
    """Spearman and Kendall agreement of ``hardware (n,)`` with ``simulated_mean (n,)`` (same units).

    Unknown (NaN) with fewer than 3 trials or when either side is constant.
    """
    ok = np.isfinite(hardware) & np.isfinite(simulated_mean)
    x, y = simulated_mean[ok], hardware[ok]
    n = int(ok.sum())
    nan2 = (math.nan, math.nan)
    if n < 3 or np.ptp(x) == 0 or np.ptp(y) == 0:
        return RankAgreement(n, math.nan, math.nan, nan2, math.nan, math.nan, nan2)
    rho, rho_p = stats.spearmanr(x, y, alternative="greater")
    tau, tau_p = stats.kendalltau(x, y, alternative="greater")
    return RankAgreement(
        n,
        float(rho),
        float(rho_p),
        _fisher_interval(float(rho), n, 1.06, 3, level),
        float(tau),
        float(tau_p),
        _fisher_interval(float(tau), n, 0.437, 4, level),
    )


@dataclass
class Link:
    """``hardware = intercept + slope * simulated`` by OLS; Student t intervals at 1 - level."""

    n: int
    intercept: float
    intercept_interval: tuple[float, float]
    slope: float
    slope_interval: tuple[float, float]


def fit_link(simulated: np.ndarray, hardware: np.ndarray, level: float) -> Link:
    """OLS link of ``hardware (n,)`` on ``simulated (n,)`` (same units); NaN below 3 trials or
    when the simulated values do not vary."""
    ok = np.isfinite(simulated) & np.isfinite(hardware)
    x, y = simulated[ok], hardware[ok]
    n = int(ok.sum())
    nan2 = (math.nan, math.nan)
    if n < 3 or np.ptp(x) == 0:
        return Link(n, math.nan, nan2, math.nan, nan2)
    fit = stats.linregress(x, y)
    t = stats.t.ppf(1 - level / 2, n - 2)
    return Link(
        n,
        float(fit.intercept),
        (float(fit.intercept - t * fit.intercept_stderr), float(fit.intercept + t * fit.intercept_stderr)),
        float(fit.slope),
        (float(fit.slope - t * fit.stderr), float(fit.slope + t * fit.stderr)),
    )


def t_test_power(n: np.ndarray, offset: float, sd: float, level: float) -> np.ndarray:
    """Power of the two-sided one-sample t-test of zero mean with ``n (m,)`` trials when the true
    mean is ``offset`` and the sd ``sd`` (same units): the noncentral t distribution (scipy.stats.nct)
    with n - 1 degrees of freedom and noncentrality offset * sqrt(n) / sd."""
    n = np.asarray(n, dtype=float)
    df = n - 1
    ncp = offset * np.sqrt(n) / sd
    crit = stats.t.ppf(1 - level / 2, df)
    return stats.nct.sf(crit, df, ncp) + stats.nct.cdf(-crit, df, ncp)


def equivalence_power(n: np.ndarray, bias: float, margin: float, sd: float, level: float) -> np.ndarray:
    """Power of the two one-sided tests for equivalence within ``(-margin, margin)`` (Schuirmann 1987)
    with ``n (m,)`` trials at true mean ``bias`` and sd ``sd`` (same units).

    Uses P(both reject) >= P(first) + P(second) - 1 with each from the noncentral t, so it slightly
    understates the power (the "how many more trials" figure errs on the side of more).
    """
    n = np.asarray(n, dtype=float)
    df = n - 1
    root = np.sqrt(n) / sd
    crit = stats.t.ppf(1 - level, df)
    return np.maximum(
        stats.nct.sf(crit, df, (margin - bias) * root) + stats.nct.sf(crit, df, (margin + bias) * root) - 1.0,
        0.0,
    )


def trials_to_decide(margin: float, planning_sd: float, level: float) -> int | None:
    """Total trials at which the bias question is decided with 80% power (see :data:`POWER_METHOD`).

    The smallest n at which both the two-sided t-test of zero bias detects a bias of ``margin`` and
    the equivalence test shows equivalence within ``+-margin`` when the bias is 0, each with 80% power.

    Args:
        margin: ``offset_limit * sd``, feature units.
        planning_sd: sd of a paired difference, feature units.
        level: significance level.

    Returns None when more than :data:`MAX_TRIALS` would be needed.
    """
    if not (planning_sd > 0 and margin > 0):
        return None
    for low, high in ((2, 64), (65, MAX_TRIALS)):  # most answers are small; search those first
        n = np.arange(low, high + 1)
        ok = (t_test_power(n, margin, planning_sd, level) >= POWER) & (
            equivalence_power(n, 0.0, margin, planning_sd, level) >= POWER
        )
        hits = np.flatnonzero(ok)
        if hits.size:
            return int(n[hits[0]])
    return None


# ---- verdicts ------------------------------------------------------------------------------


@dataclass
class VerdictInputs:
    """What :func:`decide_verdict` looks at, for one feature with simulated spread.

    Units: ``bias``, intervals, ``simulated_spread`` and ``planning_sd`` in the feature's units.
    """

    n_trials: int
    simulated_spread: float  # pooled simulated sd
    bias: float
    test_interval: tuple[float, float]  # 1 - level interval of the bias
    equivalence_interval: tuple[float, float]  # 1 - 2 level interval of the bias
    residual_exceedances: int
    residual_p_value: float  # binomial tail of the exceedances at the simulations' own rate
    kendall: float  # NaN when unknown
    kendall_p_value: float  # one-sided; NaN when unknown
    slope: float  # link scale; NaN when unknown
    intercept: float
    planning_sd: float


@dataclass
class Verdict:
    verdict: str
    reason: str
    trials_to_decide: int | None = None  # total trials, for "undecided"
    more_trials: int | None = None  # trials beyond those already run


def decide_verdict(v: VerdictInputs, settings: ShiftSettings) -> Verdict:
    """The verdict rule of the module docstring, on the evidence of one feature."""
    level = settings.level
    sd = v.simulated_spread
    margin = settings.offset_limit * sd
    bias_sd = v.bias / sd if sd > 0 else math.nan
    limit_text = f"+-{settings.offset_limit:g} sd = +-{margin:.3g}"

    def undecided(why: str) -> Verdict:
        need = trials_to_decide(margin, v.planning_sd, level)
        if need is None:
            return Verdict("undecided", f"{why}; more than {MAX_TRIALS} trials would be needed", None, None)
        more = max(need - v.n_trials, 1)
        return Verdict(
            "undecided",
            f"{why}; about {more} more trial(s) would decide (power {POWER:.0%}, "
            f"level {level:g}, {need} in all)",
            need,
            more,
        )

    if v.n_trials < 2:
        return undecided(f"{v.n_trials} trial(s): a bias interval needs at least 2")
    eq_lo, eq_hi = v.equivalence_interval
    test_lo, test_hi = v.test_interval
    equivalent = -margin < eq_lo and eq_hi < margin
    residuals_ok = v.residual_p_value >= level
    offset_significant = test_lo > 0 or test_hi < 0
    material_offset = offset_significant and abs(v.bias) > margin
    order_known = math.isfinite(v.kendall_p_value)
    order_kept = order_known and v.kendall >= settings.rank_threshold and v.kendall_p_value < level
    bias_text = f"bias {v.bias:.3g} ({bias_sd:+.2f} sd)"

    if equivalent and residuals_ok:
        return Verdict(
            "carries_over",
            f"{bias_text}, {1 - 2 * level:.0%} interval [{eq_lo:.3g}, {eq_hi:.3g}] "
            f"inside {limit_text}; residuals consistent (p = {v.residual_p_value:.2g})",
        )
    if material_offset or not residuals_ok:
        problems = []
        if material_offset:
            problems.append(
                f"offset: {bias_text}, {1 - level:.0%} interval [{test_lo:.3g}, {test_hi:.3g}] "
                f"excludes 0 and the offset exceeds {limit_text}"
            )
        if not residuals_ok:
            problems.append(
                f"{v.residual_exceedances} of {v.n_trials} trials beyond the residual limit "
                f"{settings.residual_limit:g} (p = {v.residual_p_value:.2g})"
            )
        what = "; ".join(problems)
        if order_kept:
            return Verdict(
                "offset_order_kept",
                f"{what}; order kept: Kendall tau {v.kendall:.2f} "
                f"(p = {v.kendall_p_value:.2g}) >= {settings.rank_threshold:g}; "
                f"hardware ~ {v.intercept:.3g} + {v.slope:.3g} x simulation",
            )
        if order_known:
            order = (
                f"order not shown to carry over: Kendall tau {v.kendall:.2f} (p = {v.kendall_p_value:.2g}, "
                f"threshold {settings.rank_threshold:g})"
            )
        else:
            order = "order untested (needs 3 trials with distinct simulated means)"
        return Verdict("does_not_carry_over", f"{what}; {order}")
    return undecided(
        f"{bias_text}: {1 - 2 * level:.0%} interval [{eq_lo:.3g}, {eq_hi:.3g}] neither inside {limit_text} "
        f"nor a significant offset beyond it"
    )


def decide_constant(hardware: np.ndarray, value: float, n_simulations: int, level: float) -> Verdict:
    """Verdict for a feature whose simulations never vary (value ``value``, feature units).

    Under exchangeability a hardware value differs from all K simulated values with probability at
    most 2 / (K + 1); the count of differing trials is compared with that rate (binomial tail).
    """
    n = hardware.size
    differ = int(np.sum(~np.isclose(hardware, value, rtol=1e-9, atol=1e-12)))
    if n == 0:
        return Verdict("undecided", "no hardware values", None, None)
    if differ == 0:
        return Verdict(
            "carries_over", f"simulation has no spread and all {n} hardware values equal it ({value:.3g})"
        )
    rate = min(1.0, 2.0 / (n_simulations + 1))
    p = float(stats.binom.sf(differ - 1, n, rate))
    text = (
        f"simulation has no spread (always {value:.3g}) but {differ} of {n} hardware values differ "
        f"(p = {p:.2g})"
    )
    if p < level:
        return Verdict("does_not_carry_over", text)
    # same fraction of differing trials, more trials: when would the binomial tail fall below the level?
    totals = np.arange(n + 1, MAX_TRIALS + 1)
    hits = np.flatnonzero(stats.binom.sf(np.ceil(differ / n * totals) - 1, totals, rate) < level)
    if not hits.size:
        return Verdict("undecided", f"{text}; more than {MAX_TRIALS} trials would be needed")
    need = int(totals[hits[0]])
    return Verdict(
        "undecided", f"{text}; about {need - n} more trial(s) at this rate would decide", need, need - n
    )


# ---- results -------------------------------------------------------------------------------


@dataclass
class FeatureShift:
    """Shift statistics and verdict of one feature. Values in the feature's units unless noted."""

    name: str
    verdict: str
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
class ShiftReport:
    """Everything :func:`assess_shift` found; :meth:`as_dict` is the JSON form."""

    features: list[FeatureShift]
    joint: dict[str, Any]
    objective: ObjectiveShift | None
    settings: dict[str, Any]
    seed: int | None
    trial_ids: list[Any]
    scenario: dict[str, Any] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    plots: list[str] = field(default_factory=list)
    # the arrays behind it, for plots (not written to JSON: they are in the store)
    hardware_values: np.ndarray | None = field(default=None, repr=False)  # (n x p)
    simulated_values: np.ndarray | None = field(default=None, repr=False)  # (n x K x p)

    def feature(self, name: str) -> FeatureShift:
        for f in self.features:
            if f.name == name:
                return f
        raise KeyError(name)

    def as_dict(self) -> dict[str, Any]:
        def plain(obj: Any) -> Any:
            if isinstance(
                obj, (RankAgreement, Link, FeatureShift, ObjectiveShift, MMDResult, ClassifierResult)
            ):
                return {k: plain(val) for k, val in obj.__dict__.items()}
            if isinstance(obj, dict):
                return {k: plain(val) for k, val in obj.items()}
            if isinstance(obj, (list, tuple)):
                return [plain(val) for val in obj]
            if isinstance(obj, (np.floating, float)):
                return float(obj) if math.isfinite(obj) else None  # JSON has no NaN / inf: null
            if isinstance(obj, (np.integer,)):
                return int(obj)
            return obj

        return plain(
            {
                "scenario": self.scenario,
                "seed": self.seed,
                "trial_ids": self.trial_ids,
                "settings": self.settings,
                "features": self.features,
                "joint": self.joint,
                "objective": self.objective,
                "notes": self.notes,
                "plots": self.plots,
            }
        )

    def write_json(self, path: str | Path) -> Path:
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(self.as_dict(), indent=2, allow_nan=False))
        return path


# ---- the computation on plain arrays --------------------------------------------------------


def _finite_sims(values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-trial count, mean and sd (ddof 1) of ``values (n x K)`` ignoring NaN, without warnings."""
    ok = np.isfinite(values)
    count = ok.sum(axis=1)
    filled = np.where(ok, values, 0.0)
    mean = np.divide(filled.sum(axis=1), count, out=np.full(count.shape, np.nan), where=count > 0)
    dev = np.where(ok, values - mean[:, None], 0.0)
    var = np.divide((dev * dev).sum(axis=1), count - 1, out=np.full(count.shape, np.nan), where=count > 1)
    return count, mean, np.sqrt(var)


def _leave_one_out_rate(values: np.ndarray, limit: float) -> float:
    """How often a simulation, standardised against its trial's other simulations, exceeds ``limit``.

    ``values (n x K)`` feature units, NaN ignored. Counted as (exceed + 1) / (total + 1) so an
    exceedance the simulations never show is unlikely, not impossible.
    """
    exceed = total = 0
    for row in values:
        x = row[np.isfinite(row)]
        k = x.size
        if k < 3:
            continue
        others_mean = (x.sum() - x) / (k - 1)
        others_var = ((x * x).sum() - x * x - (k - 1) * others_mean**2) / (k - 2)
        others_sd = np.sqrt(np.maximum(others_var, 0.0))
        gap = np.abs(x - others_mean)
        tiny = others_sd <= 1e-12 * np.maximum(np.abs(others_mean), 1.0)
        exceed += int(
            np.sum(
                np.where(
                    tiny,
                    gap > 1e-12 * np.maximum(np.abs(others_mean), 1.0),
                    gap > limit * np.where(tiny, 1.0, others_sd),
                )
            )
        )
        total += k
    return (exceed + 1) / (total + 1)


def _bias_intervals(d: np.ndarray, level: float, bootstrap: int, rng: np.random.Generator) -> dict[str, Any]:
    n = d.size
    mean = float(d.mean())
    sd = float(d.std(ddof=1)) if n > 1 else math.nan
    out: dict[str, Any] = {"bias": mean, "sd": sd}
    if n < 2:
        nan2 = (math.nan, math.nan)
        out.update(boot=nan2, t=nan2, test=nan2, equivalence=nan2, p=math.nan)
        return out
    means = d[rng.integers(0, n, size=(bootstrap, n))].mean(axis=1)
    q = np.quantile(means, [level / 2, 1 - level / 2, level, 1 - level])
    se = sd / math.sqrt(n)
    t_test = stats.t.ppf(1 - level / 2, n - 1) * se
    t_eq = stats.t.ppf(1 - level, n - 1) * se
    out["boot"] = (float(q[0]), float(q[1]))
    out["t"] = (mean - t_test, mean + t_test)
    out["test"] = (min(q[0], mean - t_test), max(q[1], mean + t_test))
    out["equivalence"] = (min(q[2], mean - t_eq), max(q[3], mean + t_eq))
    if sd > 0:
        out["p"] = float(2 * stats.t.sf(abs(mean) / se, n - 1))
    else:  # identical differences: no spread to test against
        out["p"] = 1.0 if mean == 0 else 0.0
    return out


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
    count, mean, sd = _finite_sims(sims)
    usable = np.isfinite(hw) & (count >= 2)
    n = int(usable.sum())
    with np.errstate(divide="ignore", invalid="ignore"):
        zero_sd = sd <= 1e-12 * np.maximum(np.abs(mean), 1.0)
        same = np.isclose(hw, mean, rtol=1e-9, atol=1e-12)
        residuals = np.where(zero_sd, np.where(same, 0.0, np.sign(hw - mean) * np.inf), (hw - mean) / sd)
    residuals = np.where(usable, residuals, np.nan)
    x, m_, s_ = hw[usable], mean[usable], sd[usable]
    pooled = sims[usable][np.isfinite(sims[usable])]
    spread = float(np.sqrt(np.mean(s_**2))) if n else math.nan
    k_mean = float(count[usable].mean()) if n else math.nan
    nan2 = (math.nan, math.nan)
    base = dict(
        name=name,
        n_trials=n,
        hardware=list(hw),
        simulated_mean=list(mean),
        simulated_sd=list(sd),
        residuals=list(residuals),
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
            bias_interval_bootstrap=nan2,
            bias_interval_t=nan2,
            bias_test_interval=nan2,
            bias_equivalence_interval=nan2,
            offset_p_value=math.nan,
            wasserstein=math.nan,
            wasserstein_sd_units=math.nan,
            ks_statistic=math.nan,
            ks_p_value=math.nan,
            rank=None,
            link=None,
            planning_sd=math.nan,
        )
    d = x - m_
    b = _bias_intervals(d, level, settings.bootstrap, rng)
    wasserstein = wasserstein_1d(x, pooled)
    ks = ks_statistic(x, pooled)
    ks_p = float(stats.ks_2samp(x, pooled).pvalue)
    rank = rank_agreement(x, m_, level)
    link = fit_link(m_, x, level)
    abs_res = np.abs(residuals[usable])
    exceed = int(np.sum(abs_res > settings.residual_limit))
    if spread > 0:
        rate = _leave_one_out_rate(sims[usable], settings.residual_limit)
        res_p = float(stats.binom.sf(exceed - 1, n, rate)) if exceed else 1.0
        planning = max(b["sd"] if n > 1 else 0.0, spread * math.sqrt(1 + 1 / k_mean))
        verdict = decide_verdict(
            VerdictInputs(
                n_trials=n,
                simulated_spread=spread,
                bias=b["bias"],
                test_interval=b["test"],
                equivalence_interval=b["equivalence"],
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
    with np.errstate(divide="ignore", invalid="ignore"):
        bias_sd = b["bias"] / spread if spread > 0 else math.nan
        w_sd = wasserstein / spread if spread > 0 else math.nan
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
        bias=b["bias"],
        bias_sd_units=bias_sd,
        bias_interval_bootstrap=b["boot"],
        bias_interval_t=b["t"],
        bias_test_interval=b["test"],
        bias_equivalence_interval=b["equivalence"],
        offset_p_value=b["p"],
        wasserstein=wasserstein,
        wasserstein_sd_units=w_sd,
        ks_statistic=ks,
        ks_p_value=ks_p,
        rank=rank,
        link=link,
        planning_sd=planning,
    )


def settings_dict(settings: ShiftSettings) -> dict[str, Any]:
    """The thresholds and level, with the methods they feed, for printing next to the verdicts."""
    return {
        **settings.__dict__,
        "power": POWER,
        "power_method": POWER_METHOD,
        "bias_intervals": "union of percentile bootstrap and Student t; 1-level for the offset test, "
        "1-2*level for equivalence (Schuirmann 1987)",
        "rank_test": "Kendall tau >= rank_threshold with one-sided p < level",
    }


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
) -> ShiftReport:
    """Shift statistics and verdicts from plain arrays (what :func:`assess_shift` calls).

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
    """
    hardware = np.asarray(hardware, dtype=float)
    simulated = np.asarray(simulated, dtype=float)
    n, p = hardware.shape
    if simulated.ndim != 3 or simulated.shape[0] != n or simulated.shape[2] != p:
        raise ValueError(
            f"simulated must be (n_trials x K x n_features) = ({n} x K x {p}), got {simulated.shape}"
        )
    if len(feature_names) != p:
        raise ValueError(f"{len(feature_names)} feature names for {p} feature columns")
    seed = int(rng) if isinstance(rng, (int, np.integer)) else None
    gen = np.random.default_rng(rng) if seed is not None else rng
    features = [
        feature_shift(name, hardware[:, j], simulated[:, :, j], settings, gen)
        for j, name in enumerate(feature_names)
    ]
    joint_cols = [j for j, f in enumerate(features) if f.simulated_spread > 0]
    joint_names = [features[j].name for j in joint_cols]
    mmd = mmd_matched_test(
        hardware[:, joint_cols], simulated[:, :, joint_cols], permutations=settings.permutations, rng=gen
    )
    clf = classifier_matched_test(
        hardware[:, joint_cols],
        simulated[:, :, joint_cols],
        rng=gen,
        permutations=settings.permutations,
        level=settings.level,
        bootstrap=settings.bootstrap,
    )
    joint = {
        "features": joint_names,
        "standardisation": "each matched set by the mean and sd of its K+1 points",
        "mmd2": mmd.mmd2,
        "mmd_width": mmd.width,
        "mmd_p_value": mmd.p_value,
        "mmd_permutations": mmd.permutations,
        "classifier_auc": clf.auc,
        "classifier_auc_interval": clf.auc_interval,
        "classifier_p_value": clf.p_value,
        "classifier_permutations": clf.permutations,
        "classifier_set_aucs": clf.set_aucs,
        "classifier": clf.classifier,
        "classifier_cross_validation": clf.cross_validation,
        "classifier_class_balance": clf.class_balance,
        "mmd_shift_detected": bool(mmd.p_value < settings.level) if math.isfinite(mmd.p_value) else None,
        "classifier_shift_detected": bool(clf.p_value < settings.level)
        if math.isfinite(clf.p_value)
        else None,
    }
    objective = None
    if hardware_objective is not None and simulated_objective is not None:
        hw_obj = np.asarray(hardware_objective, dtype=float)
        _, sim_obj_mean, _ = _finite_sims(np.asarray(simulated_objective, dtype=float))
        objective = ObjectiveShift(
            n_trials=int(np.sum(np.isfinite(hw_obj) & np.isfinite(sim_obj_mean))),
            hardware=list(hw_obj),
            simulated_mean=list(sim_obj_mean),
            rank=rank_agreement(hw_obj, sim_obj_mean, settings.level),
            link=fit_link(sim_obj_mean, hw_obj, settings.level),
        )
    return ShiftReport(
        features=features,
        joint=joint,
        objective=objective,
        settings=settings_dict(settings),
        seed=seed,
        trial_ids=list(trial_ids) if trial_ids is not None else list(range(n)),
        hardware_values=hardware,
        simulated_values=simulated,
    )


# ---- the store-facing entry point ------------------------------------------------------------


def assess_shift(
    scenario: Scenario,
    store: Any,
    *,
    seed: int = 0,
    level: float | None = None,
    json_path: str | Path | None = None,
    plots_dir: str | Path | None = None,
) -> ShiftReport:
    """Assess, feature by feature, whether the scenario's simulation carries over to the hardware trials.

    Args:
        scenario: the loaded scenario (its ``[shift]`` table gives level, limits and resample counts).
        store: a :class:`gapgauge.store.Store`, or the path of its file.
        seed: seeds every bootstrap and permutation; stored in the result.
        level: overrides ``[shift] level``.
        json_path: also write every number as JSON here.
        plots_dir: also save the per-feature PNGs here.

    Raises:
        StoreError: the store file does not exist.
        ModelError: no hardware trials, or none with matched simulations.
    """
    settings = scenario.shift if level is None else replace(scenario.shift, level=float(level))
    if not 0 < settings.level < 0.5:
        raise ModelError(
            f"level {settings.level} is not a sensible significance level; use a value such as 0.05"
        )
    if isinstance(store, (str, Path)):
        if not Path(store).is_file():
            raise StoreError(
                f"{store}: store not found; run gapgauge sweep {scenario.path} --store {store} first"
            )
        from ..store import Store

        store = Store(store)
    trials = store.trials(scenario.content_hash)
    if not trials:
        raise ModelError(
            f"no hardware trials in the store for scenario {scenario.name!r}; "
            f"run gapgauge ingest {scenario.path} LOGS... first"
        )
    names = list(scenario.features.names)
    hw_rows, sim_blocks, hw_obj, sim_obj, ids, notes = [], [], [], [], [], []
    for trial in trials:
        batch = store.matches(trial.id)
        keep = np.asarray(batch.status) != "diverged" if len(batch) else np.zeros(0, bool)
        if not np.any(keep):
            notes.append(f"trial {trial.id} has no usable matched simulations; it was left out")
            continue
        if not np.all(keep):
            notes.append(
                f"trial {trial.id}: {int(np.sum(~keep))} matched simulation(s) diverged and were left out"
            )
        hw_rows.append([_as_float(trial.features.get(name)) for name in names])
        sim_blocks.append(
            np.column_stack(
                [
                    np.asarray(batch.features[name], float)[keep]
                    if name in batch.features
                    else np.full(int(keep.sum()), np.nan)
                    for name in names
                ]
            )
        )
        hw_obj.append(_as_float(trial.objective))
        sim_obj.append(np.asarray(batch.objective, float)[keep])
        ids.append(trial.id)
    if not hw_rows:
        raise ModelError(
            f"none of the {len(trials)} hardware trials has matched simulations; "
            f"run gapgauge ingest {scenario.path} again to simulate them"
        )
    k = max(b.shape[0] for b in sim_blocks)
    simulated = np.full((len(sim_blocks), k, len(names)), np.nan)
    simulated_objective = np.full((len(sim_blocks), k), np.nan)
    for i, (block, obj) in enumerate(zip(sim_blocks, sim_obj, strict=True)):
        simulated[i, : block.shape[0]] = block
        simulated_objective[i, : obj.size] = obj
    report = shift_from_arrays(
        np.asarray(hw_rows, float),
        simulated,
        names,
        settings,
        int(seed),
        hardware_objective=np.asarray(hw_obj, float),
        simulated_objective=simulated_objective,
        trial_ids=ids,
    )
    report.scenario = {"name": scenario.name, "hash": scenario.content_hash, "path": str(scenario.path)}
    report.notes.extend(notes)
    save = getattr(store, "save_model", None)
    if callable(save):  # the HTML report reads it back with load_model("shift", hash)
        save("shift", scenario.content_hash, report.as_dict(), {"hardware": report.hardware_values,
                                                                "simulated": report.simulated_values})
    if plots_dir is not None:
        from ..report.shift_plots import plot_shift  # report/ renders compare/ results; imported on demand

        report.plots = [str(p) for p in plot_shift(report, plots_dir)]
    if json_path is not None:
        report.write_json(json_path)
    return report


def _as_float(value: Any) -> float:
    if value is None:
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan
