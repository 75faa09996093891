"""The verdict rules: from one feature's shift statistics to "carries over", "offset, order kept",
"does not carry over" or "undecided", each with its reason in words.

With ``sd`` the pooled simulated spread of the feature and ``delta = offset_limit * sd``:

- ``carries_over``: the (1 - 2 level) bias interval lies inside ``(-delta, delta)`` (two one-sided
  tests for equivalence at the level, Schuirmann 1987) and the residual exceedances are no more
  than the simulations' own rate explains (binomial p >= level);
- otherwise, a *mismatch* is a significant offset (the (1 - level) interval excludes 0) whose size
  exceeds delta, or too many residual exceedances. A mismatch whose order carries over (Kendall
  tau >= rank_threshold and its one-sided p < level) is ``offset_order_kept``, stated with the
  offset and the link's scale; otherwise ``does_not_carry_over`` (order poor, or untested);
- anything else is ``undecided``, with the total number of trials at which the question would be
  decided (:func:`gapgauge.compare.shift.statistics.trials_to_decide`) and so how many more trials
  that is. (A true bias close to delta takes more trials than that to settle.)

A feature without simulated spread (for example ``fell`` when nothing falls) is judged by
:func:`decide_constant` from how many hardware values leave the simulated value.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from ...scenario import ShiftSettings
from .statistics import MAX_TRIALS, POWER, trials_to_decide

VERDICTS = ("carries_over", "offset_order_kept", "does_not_carry_over", "undecided")


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

    ``hardware (n,)`` feature units. Under exchangeability a hardware value differs from all K
    simulated values with probability at most 2 / (K + 1); the count of differing trials is compared
    with that rate (binomial tail, scipy.stats.binom).
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
