"""Figures of motion: a hardware trial's time series over the band of its matched simulations, and a
stick-figure filmstrip of the model, hardware beside simulation (poses from
:mod:`gapgauge.report.kinematics`). PNG bytes out, like every figure module of the report."""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.lines import Line2D
from matplotlib.patches import Circle, FancyArrow, Patch, Polygon

from ..quantities import display_unit, format_quantity
from .kinematics import Pose
from .plots import HARDWARE, SIMULATION, figure, grid, png

BAND = (5.0, 95.0)
DISTURBANCE = "#f4c542"
GHOST = 0.22


@dataclass(frozen=True)
class Panel:
    """One channel of a trajectory figure, already in its display unit.

    Attributes:
        title: the channel's name with its unit, e.g. ``"COM x (mm)"``.
        hardware: ``(nstep_hw,)`` the trial's series, or None.
        simulated: ``(k x nstep_sim)`` the matched simulations, or None.
    """

    title: str
    hardware: np.ndarray | None
    simulated: np.ndarray | None


def band(simulated: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Median and the 5-95% band across simulations, ``(nstep,)`` each (NaN-aware, per time step; NaN
    where no simulation has a value, e.g. the centre of pressure of a foot in the air)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN time steps are expected, not an error
        low, median, high = np.nanpercentile(simulated, [BAND[0], 50.0, BAND[1]], axis=0)
    return median, low, high


def trajectories(
    t_hardware: np.ndarray | None,
    t_simulated: np.ndarray | None,
    panels: Sequence[Panel],
    disturbance: tuple[float, float],
    disturbance_label: str,
    title: str,
    columns: int = 4,
) -> bytes:
    """Small multiples over time: per channel the hardware series (black) over the simulations' median
    (blue line) and 5-95% band (shaded), the disturbance window marked.

    t_hardware, t_simulated: ``(nstep,)`` s from the disturbance onset; disturbance: ``(start, end)`` s
    from the onset.
    """
    rows, cols = grid(len(panels), columns)
    height = 2.05 * rows + 0.55
    # placed by hand: constrained layout costs more than drawing the lines of a grid of panels
    fig = figure(3.05 * cols, height, constrained=False)
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel()
    fig.subplots_adjust(left=0.045, right=0.99, top=1 - 0.28 / height, bottom=0.72 / height, wspace=0.22,
                        hspace=0.5)
    for ax in axes[len(panels):]:
        ax.set_axis_off()
    for ax, panel in zip(axes, panels, strict=False):
        ax.axvspan(*disturbance, color=DISTURBANCE, alpha=0.45, lw=0)
        ax.axvline(0.0, color="#b8860b", lw=0.8)
        if panel.simulated is not None and t_simulated is not None:
            median, low, high = band(panel.simulated)
            ax.fill_between(t_simulated, low, high, color=SIMULATION, alpha=0.22, lw=0)
            ax.plot(t_simulated, median, color=SIMULATION, lw=1.3)
        if panel.hardware is not None and t_hardware is not None:
            ax.plot(t_hardware, panel.hardware, color=HARDWARE, lw=1.1)
        ax.set_title(panel.title, fontsize=9, loc="left")
        ax.tick_params(labelsize=7)
        ax.grid(alpha=0.25, lw=0.5)
    for ax in axes[(rows - 1) * cols: len(panels)]:
        ax.set_xlabel("time from the disturbance onset (s)", fontsize=8)
    fig.legend(
        handles=[
            Line2D([], [], color=HARDWARE, lw=1.5, label="hardware trial"),
            Line2D([], [], color=SIMULATION, lw=1.5, label="matched simulations: median"),
            Patch(color=SIMULATION, alpha=0.22, lw=0, label=f"{BAND[0]:.0f}-{BAND[1]:.0f}% of the matched simulations"),
            Patch(color=DISTURBANCE, alpha=0.45, lw=0, label=disturbance_label),
        ],
        loc="lower center", ncols=4, fontsize=8, frameon=False, bbox_to_anchor=(0.5, 0.0),
    )
    del title  # the page heads each figure; a suptitle would crowd the panels' titles
    return png(fig)


def _draw_pose(ax, pose: Pose, colour: str, alpha: float, lw_scale: float = 1.0) -> None:
    for box in pose.boxes:
        ax.add_patch(Polygon(box, closed=True, fill=False, edgecolor=colour, alpha=alpha * 0.7, lw=0.8))
    if len(pose.limbs):
        widths = np.clip(pose.limb_widths * 60.0 * lw_scale, 1.5, 9.0)
        ax.add_collection(LineCollection(pose.limbs, colors=colour, linewidths=widths, alpha=alpha,
                                         capstyle="round"))
    if len(pose.bones):
        ax.add_collection(LineCollection(pose.bones, colors=colour, linewidths=1.0, alpha=alpha))
    for x, z, r in pose.balls:
        ax.add_patch(Circle((x, z), r, fill=alpha >= 0.5, facecolor=colour, edgecolor=colour, alpha=alpha * 0.8))
    if len(pose.joints):
        ax.plot(pose.joints[:, 0], pose.joints[:, 1], "o", ms=3, color="white", mec=colour, alpha=alpha)
    ax.plot([pose.com[0]], [pose.com[1]], marker="X", ms=7, color="#d6604d" if alpha >= 0.5 else colour,
            alpha=alpha, mec="white", mew=0.6)


def filmstrip(
    hardware: Sequence[Pose],
    simulated: Sequence[Pose],
    instants: Sequence[float],
    pushing: Sequence[bool],
    title: str,
    push_direction: float = 1.0,
) -> bytes:
    """Two rows of stick figures at the same instants: the hardware trial (top) and the median of its
    matched simulations (bottom), each drawn over a faint copy of the other; the centre of mass
    marked (X), the push drawn as an arrow on the pushed body while it acts.

    instants: ``(n,)`` s from the disturbance onset; pushing: ``(n,)`` whether the push acts then.
    """
    n = len(instants)
    extents = np.array([p.extent() for p in (*hardware, *simulated)])
    x0, x1 = extents[:, 0].min(), extents[:, 1].max()
    z0, z1 = min(0.0, extents[:, 2].min()), extents[:, 3].max()
    pad = 0.12 * (z1 - z0)
    centre = 0.5 * (x0 + x1)
    half = max(0.5 * (x1 - x0) + pad, 0.3 * (z1 - z0 + 2 * pad))
    width = 1.45
    com_unit = display_unit("m", [p.com[0] for p in (*hardware, *simulated)])
    fig = figure(width * n + 0.5, 2 * width * (z1 - z0 + 2 * pad) / (2 * half) + 0.55)
    axes = fig.subplots(2, n, squeeze=False)
    rows = (("hardware", hardware, simulated, HARDWARE, SIMULATION), ("simulation", simulated, hardware,
                                                                      SIMULATION, HARDWARE))
    for r, (name, mine, other, colour, ghost) in enumerate(rows):
        for i in range(n):
            ax = axes[r][i]
            ax.axhline(0.0, color="#8c7b6b", lw=1.2)
            _draw_pose(ax, other[i], ghost, GHOST, 0.8)
            _draw_pose(ax, mine[i], colour, 0.95)
            if pushing[i] and mine[i].mark is not None:
                mx, mz = mine[i].mark
                length = 0.18 * half * 2
                ax.add_patch(FancyArrow(mx - push_direction * (length + 0.05), mz, push_direction * length, 0.0,
                                        width=0.012, head_width=0.045, head_length=0.04, color="#b8860b"))
            ax.set_xlim(centre - half, centre + half)
            ax.set_ylim(z0 - pad, z1 + pad)
            ax.set_aspect("equal")
            ax.set_xticks([])
            ax.set_yticks([])
            ax.text(0.5, 0.02, f"COM x {format_quantity(mine[i].com[0], 'm', display=com_unit)}",
                    transform=ax.transAxes, ha="center",
                    va="bottom", fontsize=7, color=colour)
            if r == 0:
                ax.set_title(f"{instants[i]:+.2f} s", fontsize=8)
            if i == 0:
                ax.set_ylabel(name, fontsize=9)
    fig.suptitle(title, fontsize=10, x=0.01, ha="left")
    return png(fig)
