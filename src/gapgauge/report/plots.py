"""The report's figures: matplotlib (Agg canvas, no pyplot state), each returned as PNG bytes.

Every function takes plain numpy arrays (parameters already mapped to the unit cube of the scenario's
bounds, log axes in log space, see :meth:`gapgauge.scenario.Scenario.to_unit`) and returns the bytes
of one PNG. Nothing here reads the store or knows the HTML; the section modules in ``report/sections/`` wire them.

Binned statistics (fall rate, mean objective) are plain histograms of the sweep: a bin's value is
the mean over the rollouts that fall in it, every other parameter marginalised over the design.
"""

from __future__ import annotations

import io
from collections.abc import Sequence

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

DPI = 100
STATUS_COLOURS = {"ok": "#4c78a8", "fell": "#e45756", "diverged": "#b279a2"}
WITH_PRIOR = "#1b9e77"
COLD_START = "#d95f02"
HARDWARE = "#222222"
MAX_SCATTER_POINTS = 4000


def _figure(width: float, height: float, constrained: bool = True) -> Figure:
    # Constrained layout is slow for grids of many axes; the small multiples place theirs by hand.
    fig = Figure(figsize=(width, height), dpi=DPI, layout="constrained" if constrained else None)
    FigureCanvasAgg(fig)
    return fig


def _small_multiples(count: int, columns: int = 5) -> tuple[Figure, np.ndarray]:
    rows, cols = _grid(count, columns)
    fig = _figure(2.3 * cols, 1.75 * rows + 0.3, constrained=False)
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False, sharey=True)).ravel()
    fig.subplots_adjust(
        left=0.06, right=0.99, bottom=0.1 / rows, top=1 - 0.12 / rows, wspace=0.12, hspace=0.45
    )
    for ax in axes[count:]:
        ax.set_axis_off()
    return fig, axes


def _png(fig: Figure) -> bytes:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI)
    return buffer.getvalue()


def _grid(n: int, columns: int) -> tuple[int, int]:
    columns = max(1, min(columns, n))
    return (n + columns - 1) // columns, columns


def _thin(n: int, limit: int, seed: int = 0) -> np.ndarray:
    """Indices of at most ``limit`` of ``n`` points, the same for the same ``n`` (seeded)."""
    if n <= limit:
        return np.arange(n)
    return np.sort(np.random.default_rng(seed).choice(n, size=limit, replace=False))


def binned_mean(u: np.ndarray, values: np.ndarray, bins: int) -> tuple[np.ndarray, np.ndarray]:
    """Mean of ``values (n,)`` in ``bins`` equal bins of ``u (n,)`` on [0, 1]; NaN for an empty bin.

    Returns ``(mean (bins,), count (bins,))``.
    """
    index = np.clip((np.asarray(u, dtype=float) * bins).astype(int), 0, bins - 1)
    values = np.asarray(values, dtype=float)
    count = np.bincount(index, minlength=bins).astype(float)
    total = np.bincount(index, weights=values, minlength=bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(count > 0, total / np.maximum(count, 1), np.nan)
    return mean, count


def binned_mean_2d(u: np.ndarray, v: np.ndarray, values: np.ndarray, bins: int) -> np.ndarray:
    """Mean of ``values (n,)`` on a ``bins x bins`` grid of ``(u, v)`` in the unit square (rows: v)."""
    i = np.clip((np.asarray(u) * bins).astype(int), 0, bins - 1)
    j = np.clip((np.asarray(v) * bins).astype(int), 0, bins - 1)
    flat = j * bins + i
    count = np.bincount(flat, minlength=bins * bins).astype(float)
    total = np.bincount(flat, weights=np.asarray(values, dtype=float), minlength=bins * bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(count > 0, total / np.maximum(count, 1), np.nan)
    return mean.reshape(bins, bins)


def coverage_pairs(
    unit: np.ndarray,
    names: Sequence[str],
    status: np.ndarray,
    trials_unit: np.ndarray | None = None,
) -> bytes:
    """Pairwise scatter of a few parameters in the unit cube, coloured by rollout status.

    unit: ``(n x k)`` rollout parameters in the unit cube (k small, 2 to 4); status: ``(n,)`` str;
    trials_unit: ``(m x k)`` hardware trial parameters, drawn as black stars, or None.
    """
    k = unit.shape[1]
    fig = _figure(2.2 * (k - 1) + 1.2, 2.2 * (k - 1) + 0.4)
    keep = _thin(unit.shape[0], MAX_SCATTER_POINTS)
    sub, sub_status = unit[keep], np.asarray(status)[keep]
    axes = fig.subplots(k - 1, k - 1, squeeze=False)
    for row in range(k - 1):
        for col in range(k - 1):
            ax = axes[row][col]
            yi, xi = row + 1, col
            if xi >= yi:
                ax.set_axis_off()
                continue
            for name, colour in STATUS_COLOURS.items():
                mask = sub_status == name
                if mask.any():
                    ax.scatter(
                        sub[mask, xi],
                        sub[mask, yi],
                        s=3,
                        alpha=0.45,
                        color=colour,
                        label=name,
                        rasterized=True,
                        linewidths=0,
                    )
            if trials_unit is not None and len(trials_unit):
                ax.scatter(
                    trials_unit[:, xi],
                    trials_unit[:, yi],
                    marker="*",
                    s=90,
                    color=HARDWARE,
                    label="hardware trial",
                    zorder=3,
                )
            ax.set_xlim(0, 1)
            ax.set_ylim(0, 1)
            ax.tick_params(labelsize=7)
            if row == k - 2:
                ax.set_xlabel(names[xi], fontsize=8)
            if col == 0:
                ax.set_ylabel(names[yi], fontsize=8)
    handles = [
        Line2D([], [], ls="", marker="o", ms=5, color=colour, label=name)
        for name, colour in STATUS_COLOURS.items()
        if (sub_status == name).any()
    ]
    if trials_unit is not None and len(trials_unit):
        handles.append(Line2D([], [], ls="", marker="*", ms=10, color=HARDWARE, label="hardware trial"))
    if k > 2:
        axes[0][k - 2].legend(handles=handles, loc="center", fontsize=8, frameon=False)
    else:
        axes[0][0].legend(handles=handles, fontsize=7)
    return _png(fig)


def fall_rate_by_parameter(unit: np.ndarray, names: Sequence[str], fell: np.ndarray, bins: int = 10) -> bytes:
    """Small multiples: the share of rollouts that fell, in ``bins`` bins of each parameter.

    unit: ``(n x dim)`` unit-cube parameters; fell: ``(n,)`` bool (diverged rollouts left out by the caller).
    """
    dim = unit.shape[1]
    fig, axes = _small_multiples(dim)
    centres = (np.arange(bins) + 0.5) / bins
    overall = float(np.mean(fell)) if len(fell) else float("nan")
    for i, ax in enumerate(axes[:dim]):
        rate, _ = binned_mean(unit[:, i], np.asarray(fell, dtype=float), bins)
        ax.bar(centres, rate, width=1.0 / bins * 0.9, color=STATUS_COLOURS["fell"])
        ax.axhline(overall, color="#555555", lw=0.8, ls="--")
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1)
        ax.set_title(names[i], fontsize=8)
        ax.tick_params(labelsize=7)
    axes[0].set_ylabel("fall rate", fontsize=8)
    return _png(fig)


def objective_slices(unit: np.ndarray, names: Sequence[str], objective: np.ndarray, bins: int = 12) -> bytes:
    """1-D slices of the objective landscape: binned mean and inter-quartile band per parameter.

    unit: ``(n x dim)`` unit-cube parameters of rollouts that stood; objective: ``(n,)`` (lower is better).
    """
    dim = unit.shape[1]
    fig, axes = _small_multiples(dim)
    centres = (np.arange(bins) + 0.5) / bins
    for i, ax in enumerate(axes[:dim]):
        mean, count = binned_mean(unit[:, i], objective, bins)
        index = np.clip((unit[:, i] * bins).astype(int), 0, bins - 1)
        low = np.full(bins, np.nan)
        high = np.full(bins, np.nan)
        for b in range(bins):
            values = objective[index == b]
            if values.size >= 3:
                low[b], high[b] = np.percentile(values, [25, 75])
        ax.fill_between(centres, low, high, color=STATUS_COLOURS["ok"], alpha=0.25, lw=0)
        ax.plot(centres, mean, color=STATUS_COLOURS["ok"], lw=1.5)
        ax.set_xlim(0, 1)
        ax.set_title(names[i], fontsize=8)
        ax.tick_params(labelsize=7)
    axes[0].set_ylabel("objective", fontsize=8)
    return _png(fig)


def objective_map(
    u: np.ndarray, v: np.ndarray, objective: np.ndarray, names: tuple[str, str], bins: int = 16
) -> bytes:
    """A 2-D slice: binned mean objective over two parameters (unit cube), others marginalised.

    u, v: ``(n,)`` unit-cube values of the two parameters; objective: ``(n,)`` for rollouts that stood.
    """
    grid = binned_mean_2d(u, v, objective, bins)
    fig = _figure(4.6, 3.8)
    ax = fig.subplots()
    image = ax.imshow(
        np.ma.masked_invalid(grid), origin="lower", extent=(0, 1, 0, 1), aspect="auto", cmap="viridis_r"
    )
    fig.colorbar(image, ax=ax, label="mean objective (lower is better)")
    ax.set_xlabel(names[0])
    ax.set_ylabel(names[1])
    return _png(fig)


def prior_vs_hardware(
    hardware: np.ndarray, predicted: np.ndarray, sd: np.ndarray, labels: Sequence[str] | None = None
) -> bytes:
    """Hardware objective against the prior's prediction, with 95% intervals (1.96 sd).

    hardware, predicted, sd: ``(m,)`` objective values of the hardware trials.
    """
    fig = _figure(4.6, 3.8)
    ax = fig.subplots()
    ax.errorbar(
        predicted,
        hardware,
        xerr=1.96 * np.asarray(sd),
        fmt="o",
        color=HARDWARE,
        ecolor="#888888",
        capsize=3,
        ms=5,
    )
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
    return _png(fig)


def loo_comparison(names: Sequence[str], rmse: Sequence[float], lpd: Sequence[float]) -> bytes:
    """Leave-one-out error (RMSE, lower is better) and log predictive density (higher is better)."""
    fig = _figure(6.4, 2.6)
    left, right = fig.subplots(1, 2)
    colours = [WITH_PRIOR, "#7570b3", COLD_START][: len(names)]
    left.barh(names, rmse, color=colours)
    left.set_xlabel("LOO RMSE (lower is better)")
    right.barh(names, lpd, color=colours)
    right.set_xlabel("LOO log predictive density (higher is better)")
    right.set_yticklabels([])
    for ax in (left, right):
        ax.invert_yaxis()
        ax.tick_params(labelsize=8)
    return _png(fig)


def proposals_parallel(
    unit: np.ndarray,
    safe_unit: np.ndarray,
    names: Sequence[str],
    fall_risk: np.ndarray,
    trials_unit: np.ndarray | None = None,
) -> bytes:
    """Parallel coordinates of the proposed parameter sets in the unit cube, inside the safe band.

    unit: ``(k x dim)`` proposals; safe_unit: ``(dim x 2)`` safe bounds in the unit cube;
    fall_risk: ``(k,)`` modelled fall probability (line colour); trials_unit: ``(m x dim)`` or None.
    """
    dim = unit.shape[1]
    fig = _figure(max(6.0, 0.62 * dim + 1.5), 3.3)
    ax = fig.subplots()
    x = np.arange(dim)
    ax.fill_between(
        x, safe_unit[:, 0], safe_unit[:, 1], color="#a1d99b", alpha=0.45, step=None, label="safe bounds"
    )
    if trials_unit is not None:
        for row in trials_unit:
            ax.plot(x, row, color="#bbbbbb", lw=0.8)
    cmap = colormaps["plasma"]
    top = max(0.05, float(np.nanmax(fall_risk)) if len(fall_risk) else 0.05)
    for number, (row, risk) in enumerate(zip(unit, fall_risk, strict=True), start=1):
        ax.plot(
            x,
            row,
            marker="o",
            ms=3,
            lw=1.6,
            color=cmap(0.85 * float(risk) / top),
            label=f"#{number} fall risk {risk:.3f}",
        )
    ax.set_xticks(x)
    ax.set_xticklabels(names, rotation=40, ha="right", fontsize=7)
    ax.set_ylim(-0.02, 1.02)
    ax.set_ylabel("position in bounds (0 to 1)")
    ax.legend(fontsize=7, loc="center left", bbox_to_anchor=(1.0, 0.5), frameon=False)
    return _png(fig)


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
    fig = _figure(6.0, 3.2)
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
    return _png(fig)


def calibration_intervals(
    names: Sequence[str],
    estimate: np.ndarray,
    low: np.ndarray,
    high: np.ndarray,
    range_low: np.ndarray,
    range_high: np.ndarray,
    identifiable: Sequence[bool],
) -> bytes:
    """Each calibrated physical parameter: estimate and interval, drawn inside the scenario's range.

    All arrays ``(p,)`` in the parameter's own unit; the x axis of each row is its randomisation range.
    """
    p = len(names)
    fig = _figure(6.0, 0.55 * p + 0.9)
    ax = fig.subplots()
    span = np.where(range_high > range_low, range_high - range_low, 1.0)
    y = np.arange(p)
    for i in range(p):
        colour = WITH_PRIOR if identifiable[i] else "#999999"
        lo = (low[i] - range_low[i]) / span[i]
        hi = (high[i] - range_low[i]) / span[i]
        ax.plot([lo, hi], [y[i], y[i]], color=colour, lw=3, solid_capstyle="butt")
        ax.plot([(estimate[i] - range_low[i]) / span[i]], [y[i]], "o", color=HARDWARE, ms=5)
    ax.set_yticks(y)
    ax.set_yticklabels(
        [f"{n}{'' if ok else ' (not pinned)'}" for n, ok in zip(names, identifiable, strict=True)], fontsize=8
    )
    ax.invert_yaxis()
    ax.set_xlim(-0.25, 1.25)
    ax.axvspan(0, 1, color="#eeeeee", zorder=0)
    ax.set_xlabel("position in the randomisation range (0 = low, 1 = high)")
    return _png(fig)


def shift_before_after(names: Sequence[str], before: np.ndarray, after: np.ndarray, label: str) -> bytes:
    """Per-feature shift statistic before and after calibration (paired bars)."""
    fig = _figure(6.4, 0.35 * len(names) + 1.0)
    ax = fig.subplots()
    y = np.arange(len(names))
    ax.barh(y - 0.2, before, height=0.4, color=COLD_START, label="before calibration")
    ax.barh(y + 0.2, after, height=0.4, color=WITH_PRIOR, label="after calibration")
    ax.set_yticks(y)
    ax.set_yticklabels(names, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel(label)
    ax.legend(fontsize=8)
    return _png(fig)
