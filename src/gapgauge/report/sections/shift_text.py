"""The shift table's "why" column: each feature's verdict in words, with its figures in the feature's
own unit (the rules themselves are those of :mod:`gapgauge.compare.shift.verdicts`; this module only
states the evidence they looked at)."""

from __future__ import annotations

import math

from ...compare.shift import FeatureShift
from ...compare.shift.result import SettingsUsed
from ...quantities import display_unit, feature_unit, format_interval, format_number, format_quantity


def _finite(value: float | None) -> bool:
    return value is not None and math.isfinite(value)


def detail(f: FeatureShift, settings: SettingsUsed) -> str:
    """One or two sentences: the bias and its interval against the offset margin, the residuals, the
    order, and for an undecided feature how many more trials would decide."""
    unit = feature_unit(f.name)
    spread = f.simulated_spread
    if not _finite(spread) or spread <= 0:
        return f.reason  # no simulated spread: the rule compares values only (see decide_constant)
    margin = settings.offset_limit * spread
    test, equivalence = f.bias_test_interval, f.bias_equivalence_interval
    shown = display_unit(unit, [f.bias, margin, *test, *equivalence])
    level = settings.level
    bias = format_quantity(f.bias, unit, display=shown, signed=True)
    limit = f"±{format_quantity(margin, unit, display=shown)} (±{format_number(settings.offset_limit)} sim sd)"
    residuals = (
        f"{f.residual_exceedances} of {f.n_trials} trials beyond ±{format_number(settings.residual_limit)} sim sd"
        f" (p = {format_number(f.residual_p_value, 2)})"
    )
    residuals_ok = _finite(f.residual_p_value) and f.residual_p_value >= level
    tau = None if f.rank is None else f.rank.kendall
    order = (
        f"order kept: Kendall tau {format_number(tau, 2)}"
        if f.verdict == "offset_order_kept"
        else f"order not shown to carry over (Kendall tau {format_number(tau, 2)})"
        if _finite(tau)
        else "order untested"
    )
    if f.verdict == "carries_over":
        return (
            f"bias {bias}, {1 - 2 * level:.0%} interval {format_interval(equivalence, unit, display=shown)} "
            f"inside {limit}; residuals consistent"
        )
    if f.verdict in ("offset_order_kept", "does_not_carry_over"):
        problems = []
        offset = (test[0] > 0 or test[1] < 0) and abs(f.bias) > margin
        if offset:
            problems.append(
                f"offset {bias}, {1 - level:.0%} interval {format_interval(test, unit, display=shown)}, "
                f"beyond {limit}"
            )
        if not residuals_ok:
            problems.append(residuals)
        return "; ".join([*problems, order]) if problems else f"{f.reason}"
    more = (
        f"about {format_number(f.more_trials)} more trials would decide"
        if f.more_trials is not None
        else "more trials than planned for would be needed to decide"
    )
    return (
        f"bias {bias}, {1 - 2 * level:.0%} interval {format_interval(equivalence, unit, display=shown)}: neither "
        f"inside {limit} nor a clear offset beyond it; {more}"
    )
