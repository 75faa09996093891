"""The shift statistics on plain arrays: per-trial summaries of the matched simulations, the paired
bias and its intervals, rank agreement, the link, and the power behind "how many more trials".

Sources, one per figure:

- paired bias ``mean(hardware - mean_sim)``: a percentile bootstrap interval (Efron and Tibshirani
  1993, ch. 13; scipy.stats.bootstrap) and a Student t interval (scipy.stats.ttest_1samp); the
  verdicts use the union of the two, because the percentile interval is too narrow with a handful
  of trials;
- rank agreement across trials: Spearman rho and Kendall tau with one-sided p-values from
  scipy.stats (exact permutation distribution of tau for small n without ties), intervals by the
  Fisher z transformation with the variances of Fieller, Hartley and Pearson (1957): 1.06 / (n - 3)
  for rho, 0.437 / (n - 4) for tau;
- the link ``hardware = a + b * mean_sim``: ordinary least squares (scipy.stats.linregress) with
  Student t intervals;
- power: the noncentral t distribution (scipy.stats.nct) for the one-sample t-test and for the two
  one-sided tests of equivalence (Schuirmann 1987).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

POWER = 0.8  # power targeted by the "how many more trials" calculation
MAX_TRIALS = 2000  # beyond this the power calculation answers "more than MAX_TRIALS"
RHO_CLIP = 0.9999  # Fisher z of |r| = 1 is infinite; clip so the interval stays finite
POWER_METHOD = (
    "total trials at which a two-sided one-sample t-test of zero bias detects a bias of offset_limit * sd "
    "and the two one-sided equivalence tests show equivalence within +-offset_limit * sd at zero bias, "
    "both with 80% power at the level; "
    "noncentral t (scipy.stats.nct); planning sd = max(observed sd of paired differences, sd*sqrt(1+1/K))"
)
BIAS_INTERVALS_METHOD = (
    "union of percentile bootstrap and Student t; 1-level for the offset test, 1-2*level for equivalence "
    "(Schuirmann 1987)"
)
RANK_TEST_METHOD = "Kendall tau >= rank_threshold with one-sided p < level"

NAN_PAIR = (math.nan, math.nan)


# ---- the matched simulations of each trial --------------------------------------------------


def matched_summary(values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-trial count, mean and sd (ddof 1) of ``values (n x K)`` ignoring NaN, without warnings.

    Returns three ``(n,)`` arrays: the count (int), the mean and the sd (feature units; NaN where the
    count is too small).
    """
    ok = np.isfinite(values)
    count = ok.sum(axis=1)
    filled = np.where(ok, values, 0.0)
    mean = np.divide(filled.sum(axis=1), count, out=np.full(count.shape, np.nan), where=count > 0)
    dev = np.where(ok, values - mean[:, None], 0.0)
    var = np.divide((dev * dev).sum(axis=1), count - 1, out=np.full(count.shape, np.nan), where=count > 1)
    return count, mean, np.sqrt(var)


def leave_one_out_rate(values: np.ndarray, limit: float) -> float:
    """How often a simulation, standardised against its trial's other simulations, exceeds ``limit``.

    ``values (n x K)`` feature units, NaN ignored; rows with fewer than 3 values are skipped. Counted
    as (exceed + 1) / (total + 1) so an exceedance the simulations never show is unlikely, not
    impossible.
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
        # siblings without spread: any gap at all (beyond round-off) is an exceedance
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


# ---- the paired bias ------------------------------------------------------------------------


@dataclass
class BiasIntervals:
    """The paired bias of one feature and its intervals (feature units).

    Attributes:
        bias: mean of the paired differences ``hardware - mean_sim``.
        sd: sample sd (ddof 1) of the differences; NaN below 2 trials.
        bootstrap: 1 - level percentile bootstrap interval.
        t: 1 - level Student t interval.
        test: union of the two, the interval of the offset test.
        equivalence: 1 - 2 level union of bootstrap and t, the interval of the equivalence test.
        p_value: two-sided one-sample t-test of zero bias.
    """

    bias: float
    sd: float
    bootstrap: tuple[float, float] = NAN_PAIR
    t: tuple[float, float] = NAN_PAIR
    test: tuple[float, float] = NAN_PAIR
    equivalence: tuple[float, float] = NAN_PAIR
    p_value: float = math.nan


def _pair(interval: Any) -> tuple[float, float]:
    """A scipy ConfidenceInterval (low, high) as plain floats."""
    low, high = interval
    return (float(low), float(high))


def _union(a: tuple[float, float], b: tuple[float, float]) -> tuple[float, float]:
    return (min(a[0], b[0]), max(a[1], b[1]))


def paired_bias_intervals(
    differences: np.ndarray, level: float, bootstrap: int, rng: np.random.Generator
) -> BiasIntervals:
    """Bias of ``differences (n,)`` (feature units) with its bootstrap, t and union intervals.

    Both bootstrap intervals (1 - level and 1 - 2 level) come from one set of ``bootstrap``
    resamples drawn from ``rng``. Identical differences (sd 0) give zero-width intervals and a
    p-value of 1 (bias 0) or 0 (any other bias): there is no spread to test against.
    """
    d = np.asarray(differences, dtype=float)
    n = d.size
    mean = float(d.mean())
    if n < 2:
        return BiasIntervals(mean, math.nan)
    sd = float(d.std(ddof=1))
    if sd == 0:
        point = (mean, mean)
        return BiasIntervals(mean, sd, point, point, point, point, 1.0 if mean == 0 else 0.0)
    boot = stats.bootstrap(
        (d,), np.mean, n_resamples=bootstrap, confidence_level=1 - level, method="percentile", rng=rng
    )
    # the same resamples at the equivalence level: n_resamples=0 reuses the distribution drawn above
    boot_eq = stats.bootstrap(
        (d,), np.mean, n_resamples=0, confidence_level=1 - 2 * level, method="percentile", bootstrap_result=boot
    )
    t_test = stats.ttest_1samp(d, 0.0)
    boot_pair, boot_eq_pair = _pair(boot.confidence_interval), _pair(boot_eq.confidence_interval)
    t_pair = _pair(t_test.confidence_interval(1 - level))
    t_eq_pair = _pair(t_test.confidence_interval(1 - 2 * level))
    return BiasIntervals(
        bias=mean,
        sd=sd,
        bootstrap=boot_pair,
        t=t_pair,
        test=_union(boot_pair, t_pair),
        equivalence=_union(boot_eq_pair, t_eq_pair),
        p_value=float(t_test.pvalue),
    )


# ---- rank agreement and the link ------------------------------------------------------------


def _fisher_interval(r: float, n: int, variance_numerator: float, lost: int, level: float) -> tuple[float, float]:
    if not math.isfinite(r) or n - lost <= 0:
        return NAN_PAIR
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
    if n < 3 or np.ptp(x) == 0 or np.ptp(y) == 0:
        return RankAgreement(n, math.nan, math.nan, NAN_PAIR, math.nan, math.nan, NAN_PAIR)
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
    if n < 3 or np.ptp(x) == 0:
        return Link(n, math.nan, NAN_PAIR, math.nan, NAN_PAIR)
    fit = stats.linregress(x, y)
    t = stats.t.ppf(1 - level / 2, n - 2)
    return Link(
        n,
        float(fit.intercept),
        (float(fit.intercept - t * fit.intercept_stderr), float(fit.intercept + t * fit.intercept_stderr)),
        float(fit.slope),
        (float(fit.slope - t * fit.stderr), float(fit.slope + t * fit.stderr)),
    )


# ---- power and the trials that would decide -------------------------------------------------


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
