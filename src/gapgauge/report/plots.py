"""The report's figures of the sweep, and what every figure module shares: matplotlib on an Agg canvas
(no pyplot state), PNG bytes out, parameter axes in the parameters' own units.

A parameter axis (:class:`ParameterAxis`) spans the parameter's bounds in its declared unit, on a log
scale where the scenario says ``log = true``. Binned statistics (fall rate, mean objective) bin the
unit cube of the bounds (equal bins in log space on a log axis) and are drawn at the bins' edges and
centres mapped back to the parameter's values: a bin's value is the mean over the rollouts that fall
in it, every other parameter marginalised over the design. Nothing here reads the store or knows the
HTML; the section modules in ``report/sections/`` wire the figures.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, NullFormatter

from ..quantities import format_number

DPI = 100
STATUS_COLOURS = {"ok": "#4c78a8", "fell": "#e45756", "diverged": "#b279a2"}
WITH_PRIOR = "#1b9e77"
COLD_START = "#d95f02"
HARDWARE = "#222222"
SIMULATION = "#2166ac"
MAX_SCATTER_POINTS = 4000


@dataclass(frozen=True)
class ParameterAxis:
    """One parameter's axis: its bounds in its declared unit, log or linear as the scenario says."""

    name: str
    unit: str
    low: float
    high: float
    log: bool

    @property
    def label(self) -> str:
        return self.name if self.unit in ("", "1") else f"{self.name} ({self.unit})"

    def values(self, u: np.ndarray) -> np.ndarray:
        """Positions ``u`` in the unit cube of the bounds (log space on a log axis) as values."""
        u = np.asarray(u, dtype=float)
        if self.log:
            return np.exp(np.log(self.low) + u * (np.log(self.high) - np.log(self.low)))
        return self.low + u * (self.high - self.low)

    def apply(self, ax: Axes, which: str = "x", labelled: bool = True, fontsize: float = 8) -> None:
        """Scale, limits, ticks and (if ``labelled``) the label of ``ax``'s ``which`` axis."""
        axis = ax.xaxis if which == "x" else ax.yaxis
        (ax.set_xscale if which == "x" else ax.set_yscale)("log" if self.log else "linear")
        (ax.set_xlim if which == "x" else ax.set_ylim)(self.low, self.high)
        if self.log:
            axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
            axis.set_minor_formatter(NullFormatter())
        else:
            axis.set_major_locator(MaxNLocator(4))
        axis.set_major_formatter(FuncFormatter(lambda v, _pos: format_number(v, 2)))
        if labelled:
            (ax.set_xlabel if which == "x" else ax.set_ylabel)(self.label, fontsize=fontsize)


def figure(width: float, height: float, constrained: bool = True) -> Figure:
    """A figure on its own Agg canvas (``width`` x ``height`` inches at :data:`DPI`)."""
    # Constrained layout is slow for grids of many axes; the small multiples place theirs by hand.
    fig = Figure(figsize=(width, height), dpi=DPI, layout="constrained" if constrained else None)
    FigureCanvasAgg(fig)
    return fig


def png(fig: Figure, dpi: int = DPI) -> bytes:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi)
    return buffer.getvalue()


def grid(n: int, columns: int) -> tuple[int, int]:
    columns = max(1, min(columns, n))
    return (n + columns - 1) // columns, columns


def small_multiples(count: int, columns: int = 5, sharey: bool = True) -> tuple[Figure, np.ndarray]:
    rows, cols = grid(count, columns)
    fig = figure(2.4 * cols, 1.85 * rows + 0.3, constrained=False)
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False, sharey=sharey)).ravel()
    fig.subplots_adjust(left=0.06, right=0.99, bottom=0.16 / rows, top=1 - 0.1 / rows, wspace=0.14, hspace=0.75)
    for ax in axes[count:]:
        ax.set_axis_off()
    return fig, axes


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
    params: np.ndarray,
    axes: Sequence[ParameterAxis],
    status: np.ndarray,
    trials: np.ndarray | None = None,
) -> bytes:
    """Pairwise scatter of a few parameters in their own units, coloured by rollout status.

    params: ``(n x k)`` rollout parameters (k small, 2 to 4), scenario units; status: ``(n,)`` str;
    trials: ``(m x k)`` hardware trial parameters, drawn as black stars, or None.
    """
    k = params.shape[1]
    fig = figure(2.3 * (k - 1) + 1.3, 2.3 * (k - 1) + 0.4)
    keep = _thin(params.shape[0], MAX_SCATTER_POINTS)
    sub, sub_status = params[keep], np.asarray(status)[keep]
    grid_axes = fig.subplots(k - 1, k - 1, squeeze=False)
    for row in range(k - 1):
        for col in range(k - 1):
            ax = grid_axes[row][col]
            yi, xi = row + 1, col
            if xi >= yi:
                ax.set_axis_off()
                continue
            for name, colour in STATUS_COLOURS.items():
                mask = sub_status == name
                if mask.any():
                    ax.scatter(sub[mask, xi], sub[mask, yi], s=3, alpha=0.45, color=colour, rasterized=True,
                               linewidths=0)
            if trials is not None and len(trials):
                ax.scatter(trials[:, xi], trials[:, yi], marker="*", s=90, color=HARDWARE, zorder=3)
            axes[xi].apply(ax, "x", labelled=row == k - 2)
            axes[yi].apply(ax, "y", labelled=col == 0)
            ax.tick_params(labelsize=7)
            if row != k - 2:
                ax.tick_params(labelbottom=False)
            if col != 0:
                ax.tick_params(labelleft=False)
    handles = [
        Line2D([], [], ls="", marker="o", ms=5, color=colour, label=name)
        for name, colour in STATUS_COLOURS.items()
        if (sub_status == name).any()
    ]
    if trials is not None and len(trials):
        handles.append(Line2D([], [], ls="", marker="*", ms=10, color=HARDWARE, label="hardware trial"))
    if k > 2:
        grid_axes[0][k - 2].legend(handles=handles, loc="center", fontsize=8, frameon=False)
    else:
        grid_axes[0][0].legend(handles=handles, fontsize=7)
    return png(fig)


def fall_rate_by_parameter(unit: np.ndarray, axes: Sequence[ParameterAxis], fell: np.ndarray,
                           bins: int = 10) -> bytes:
    """Small multiples: the share of rollouts that fell, in ``bins`` bins of each parameter.

    unit: ``(n x dim)`` positions in the unit cube of the bounds (the bins); fell: ``(n,)`` bool
    (diverged rollouts left out by the caller). Each panel's x axis is the parameter in its unit.
    """
    dim = unit.shape[1]
    fig, panels = small_multiples(dim)
    edges = np.linspace(0.0, 1.0, bins + 1)
    overall = float(np.mean(fell)) if len(fell) else float("nan")
    for i, ax in enumerate(panels[:dim]):
        rate, _ = binned_mean(unit[:, i], np.asarray(fell, dtype=float), bins)
        x = axes[i].values(edges)
        ax.bar(x[:-1], rate, width=np.diff(x) * 0.9, align="edge", color=STATUS_COLOURS["fell"])
        ax.axhline(overall, color="#555555", lw=0.8, ls="--")
        axes[i].apply(ax, "x", fontsize=8)
        ax.set_ylim(0, 1)
        ax.tick_params(labelsize=7)
    panels[0].set_ylabel("fall rate", fontsize=8)
    return png(fig)


def objective_slices(unit: np.ndarray, axes: Sequence[ParameterAxis], objective: np.ndarray,
                     bins: int = 12) -> bytes:
    """1-D slices of the objective landscape: binned mean and inter-quartile band per parameter.

    unit: ``(n x dim)`` unit-cube positions of rollouts that stood; objective: ``(n,)`` (lower is better).
    """
    dim = unit.shape[1]
    fig, panels = small_multiples(dim)
    centres = (np.arange(bins) + 0.5) / bins
    for i, ax in enumerate(panels[:dim]):
        mean, _ = binned_mean(unit[:, i], objective, bins)
        index = np.clip((unit[:, i] * bins).astype(int), 0, bins - 1)
        low = np.full(bins, np.nan)
        high = np.full(bins, np.nan)
        for b in range(bins):
            values = objective[index == b]
            if values.size >= 3:
                low[b], high[b] = np.percentile(values, [25, 75])
        x = axes[i].values(centres)
        ax.fill_between(x, low, high, color=STATUS_COLOURS["ok"], alpha=0.25, lw=0)
        ax.plot(x, mean, color=STATUS_COLOURS["ok"], lw=1.5)
        axes[i].apply(ax, "x", fontsize=8)
        ax.tick_params(labelsize=7)
    panels[0].set_ylabel("objective", fontsize=8)
    return png(fig)


def objective_map(u: np.ndarray, v: np.ndarray, objective: np.ndarray, axes: tuple[ParameterAxis, ParameterAxis],
                  bins: int = 16) -> bytes:
    """A 2-D slice: binned mean objective over two parameters (in their units), others marginalised.

    u, v: ``(n,)`` unit-cube positions of the two parameters; objective: ``(n,)`` for rollouts that stood.
    """
    mean = binned_mean_2d(u, v, objective, bins)
    edges = np.linspace(0.0, 1.0, bins + 1)
    fig = figure(4.8, 3.8)
    ax = fig.subplots()
    mesh = ax.pcolormesh(axes[0].values(edges), axes[1].values(edges), np.ma.masked_invalid(mean), cmap="viridis_r")
    fig.colorbar(mesh, ax=ax, label="mean objective (lower is better)")
    axes[0].apply(ax, "x", fontsize=9)
    axes[1].apply(ax, "y", fontsize=9)
    return png(fig)
