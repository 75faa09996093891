"""The report's figures of the analysis results: the prior against the trials, the leave-one-out test,
the proposals across their parameters, the budget's reach curve, the calibrated physics and the
shift before and after calibration. Each takes plain arrays and returns PNG bytes (see
:mod:`gapgauge.report.plots` for the shared canvas and the parameter axes)."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from matplotlib import colormaps

from ..quantities import format_number, format_percent
from .plots import COLD_START, HARDWARE, WITH_PRIOR, ParameterAxis, figure, grid, png

SAFE = "#a1d99b"


def prior_vs_hardware(
    hardware: np.ndarray, predicted: np.ndarray, sd: np.ndarray, labels: Sequence[str] | None = None
) -> bytes:
    """Hardware objective against the prior's prediction, with 95% intervals (1.96 sd).

    hardware, predicted, sd: ``(m,)`` objective values of the hardware trials (a weighted sum of
    features, no unit).
    """
    fig = figure(4.6, 3.8)
    ax = fig.subplots()
    ax.errorbar(predicted, hardware, xerr=1.96 * np.asarray(sd), fmt="o", color=HARDWARE, ecolor="#888888",
                capsize=3, ms=5)
    both = np.concatenate([np.asarray(hardware, float), np.asarray(predicted, float)])
    both = both[np.isfinite(both)]
    if both.size:
        lo, hi = float(both.min()), float(both.max())
        pad = 0.1 * (hi - lo or 1.0)
        ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color="#999999", lw=0.8, ls="--")
    if labels is not None:
        for x, y, text in zip(predicted, hardware, labels, strict=True):
            ax.annotate(str(text), (x, y), fontsize=7, xytext=(3, 3), textcoords="offset points")
    ax.set_xlabel("predicted objective (95% interval)")
    ax.set_ylabel("hardware objective")
    return png(fig)


def loo_comparison(names: Sequence[str], rmse: Sequence[float], lpd: Sequence[float]) -> bytes:
    """Leave-one-out error (RMSE, lower is better) and log predictive density (higher is better)."""
    fig = figure(6.4, 2.4)
    left, right = fig.subplots(1, 2)
    colours = [WITH_PRIOR, "#7570b3", COLD_START][: len(names)]
    left.barh(names, rmse, color=colours)
    left.set_xlabel("LOO RMSE of the objective (lower is better)")
    right.barh(names, lpd, color=colours)
    right.set_xlabel("LOO log predictive density (higher is better)")
    right.set_yticklabels([])
    for ax in (left, right):
        ax.invert_yaxis()
        ax.tick_params(labelsize=8)
    return png(fig)


def proposals_strips(
    axes: Sequence[ParameterAxis],
    proposals: np.ndarray,
    safe: np.ndarray,
    fall_risk: np.ndarray,
    trials: np.ndarray | None = None,
) -> bytes:
    """One strip per parameter, in its own unit over its bounds: the safe band, the trials so far and
    the proposals numbered 1..k, coloured by modelled fall risk.

    proposals: ``(k x dim)`` scenario units; safe: ``(dim x 2)`` safe bounds; fall_risk: ``(k,)``
    probabilities; trials: ``(m x dim)`` or None.
    """
    dim = len(axes)
    rows, cols = grid(dim, 2 if dim > 6 else 1)
    fig = figure(5.2 * cols, 0.5 * rows + 0.7, constrained=False)
    panels = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).T.ravel()
    fig.subplots_adjust(left=0.03, right=0.99, bottom=0.55 / (0.5 * rows + 0.7), top=1 - 0.12 / (0.5 * rows + 0.7),
                        wspace=0.12, hspace=1.6)
    cmap = colormaps["plasma"]
    top = max(0.05, float(np.nanmax(fall_risk)) if len(fall_risk) else 0.05)
    for i, ax in enumerate(panels):
        if i >= dim:
            ax.set_axis_off()
            continue
        ax.axvspan(safe[i, 0], safe[i, 1], color=SAFE, alpha=0.55, lw=0)
        if trials is not None and len(trials):
            ax.plot(trials[:, i], np.zeros(len(trials)), "|", color="#777777", ms=12, mew=1.5)
        for number, (row, risk) in enumerate(zip(proposals, fall_risk, strict=True), start=1):
            ax.plot(row[i], 0.0, "o", ms=11, color=cmap(0.85 * float(risk) / top), alpha=0.85)
            ax.annotate(str(number), (row[i], 0.0), ha="center", va="center", fontsize=7, color="white",
                        fontweight="bold")
        axes[i].apply(ax, "x", labelled=False)
        ax.set_yticks([])
        ax.set_ylim(-1, 1)
        ax.set_title(axes[i].label, fontsize=8, loc="left", pad=2)
        ax.tick_params(labelsize=7, pad=1)
        for side in ("left", "right", "top"):
            ax.spines[side].set_visible(False)
    risks = ", ".join(f"#{n} {format_percent(r)}" for n, r in enumerate(fall_risk, start=1))
    fig.text(0.01, 0.01, f"green: safe bounds; grey ticks: trials so far; modelled fall risk {risks}", fontsize=7)
    return png(fig)


def budget_curve(
    trials: np.ndarray,
    with_prior: np.ndarray | None,
    cold_start: np.ndarray | None,
    p80: tuple[float | None, float | None] = (None, None),
) -> bytes:
    """Probability of having reached the target by trial n, with and without the simulation prior.

    trials: ``(t,)`` trial counts; with_prior, cold_start: ``(t,)`` probabilities or None;
    p80: the two P80 budgets, marked as vertical lines.
    """
    fig = figure(6.0, 3.0)
    ax = fig.subplots()
    if with_prior is not None:
        ax.step(trials, with_prior, where="post", color=WITH_PRIOR, lw=2, label="with the simulation prior")
    if cold_start is not None:
        ax.step(trials, cold_start, where="post", color=COLD_START, lw=2, label="cold start")
    for value, colour in zip(p80, (WITH_PRIOR, COLD_START), strict=True):
        if value is not None and np.isfinite(value):
            ax.axvline(value, color=colour, lw=0.8, ls="--")
    ax.axhline(0.8, color="#999999", lw=0.8, ls=":")
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("hardware trials")
    ax.set_ylabel("P(target reached)")
    ax.legend(fontsize=8, loc="lower right")
    return png(fig)


def calibration_intervals(
    names: Sequence[str],
    units: Sequence[str],
    estimate: np.ndarray,
    low: np.ndarray,
    high: np.ndarray,
    range_low: np.ndarray,
    range_high: np.ndarray,
    nominal: np.ndarray,
    identifiable: Sequence[bool],
) -> bytes:
    """Each calibrated physical parameter on its own axis in its own unit: the randomisation range
    (shaded), the nominal value (dashed), the interval (bar) and the estimate (dot), the axis wide
    enough to show an estimate or interval outside the range.

    All arrays ``(p,)`` in the parameter's unit.
    """
    p = len(names)
    fig = figure(6.4, 0.62 * p + 0.5, constrained=False)
    panels = np.atleast_1d(fig.subplots(p, 1, squeeze=False)).ravel()
    fig.subplots_adjust(left=0.03, right=0.98, top=1 - 0.25 / (0.62 * p + 0.5), bottom=0.3 / (0.62 * p + 0.5),
                        hspace=1.9)
    for i, ax in enumerate(panels):
        lo_all = min(low[i], estimate[i], range_low[i])
        hi_all = max(high[i], estimate[i], range_high[i])
        pad = 0.08 * ((hi_all - lo_all) or abs(hi_all) or 1.0)
        ax.axvspan(range_low[i], range_high[i], color="#e4e4e4", lw=0)
        ax.axvline(nominal[i], color="#888888", lw=1, ls="--")
        colour = WITH_PRIOR if identifiable[i] else "#999999"
        ax.plot([low[i], high[i]], [0, 0], color=colour, lw=4, solid_capstyle="butt")
        ax.plot([estimate[i]], [0], "o", color=HARDWARE, ms=6)
        ax.set_xlim(lo_all - pad, hi_all + pad)
        ax.set_ylim(-1, 1)
        ax.set_yticks([])
        outside = not range_low[i] <= estimate[i] <= range_high[i]
        unit = "" if units[i] in ("", "1") else f" ({units[i]})"
        title = f"{names[i]}{unit}: {format_number(estimate[i])}"
        title += " – outside the randomised range" if outside else ""
        title += "" if identifiable[i] else " – not pinned down by the trials"
        ax.set_title(title, fontsize=8, loc="left", pad=2, color="#b3261e" if outside else "black")
        ax.tick_params(labelsize=7, pad=1)
        for side in ("left", "right", "top"):
            ax.spines[side].set_visible(False)
    return png(fig)


def shift_before_after(names: Sequence[str], before: np.ndarray, after: np.ndarray, label: str) -> bytes:
    """Per-feature shift statistic before and after calibration (paired bars)."""
    fig = figure(6.4, 0.32 * len(names) + 1.0)
    ax = fig.subplots()
    y = np.arange(len(names))
    ax.barh(y - 0.2, before, height=0.4, color=COLD_START, label="before calibration")
    ax.barh(y + 0.2, after, height=0.4, color=WITH_PRIOR, label="after calibration")
    ax.set_yticks(y)
    ax.set_yticklabels(names, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel(label)
    ax.legend(fontsize=8)
    return png(fig)
