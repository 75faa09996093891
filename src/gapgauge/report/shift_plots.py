"""Plots of the shift assessment: per feature, the simulated distribution at each trial's parameters
with the hardware value on it, and the standardised residuals against the residual limit.

Both entry points take a :class:`~gapgauge.compare.shift.ShiftReport`: :func:`shift_figures` returns
PNG bytes per feature (what the HTML report embeds), :func:`plot_shift` writes them as files.
Matplotlib draws on an Agg canvas of its own (no pyplot state, no display); values are shown in the
unit that suits the feature's size (:mod:`gapgauge.quantities`).
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from ..compare.shift import ShiftReport
from ..quantities import display_unit, feature_unit, label, to_si, with_unit
from .plots import figure, png

VERDICT_COLOURS = {
    "carries_over": "#1b7837",
    "offset_order_kept": "#b8860b",
    "does_not_carry_over": "#b2182b",
    "undecided": "#555555",
}


def feature_png(
    name: str,
    hardware: np.ndarray,
    simulated: np.ndarray | None,
    residuals: np.ndarray,
    residual_limit: float,
    verdict: str = "",
    simulated_mean: np.ndarray | None = None,
    simulated_sd: np.ndarray | None = None,
    trial_labels: list[str] | None = None,
    unit: str | None = None,
) -> bytes:
    """One feature's figure as PNG bytes.

    Args:
        name: feature name (title).
        hardware: ``(n,)`` hardware values, feature units.
        simulated: ``(n x K)`` matched simulations, feature units (NaN ignored), or None to draw
            ``simulated_mean`` +- ``simulated_sd`` instead.
        residuals: ``(n,)`` standardised residuals, dimensionless (non-finite are drawn at the edge).
        residual_limit: the band drawn on the residual panel.
        verdict: printed in the title and sets its colour.
        simulated_mean, simulated_sd: ``(n,)`` feature units, used when ``simulated`` is None.
        trial_labels: ``n`` labels for the x axis.
        unit: the feature's SI unit (default: :func:`gapgauge.quantities.feature_unit`).
    """
    unit = feature_unit(name) if unit is None else unit
    spread_values = simulated if simulated is not None else simulated_mean
    shown = display_unit(unit, np.concatenate([np.ravel(np.asarray(hardware, float)),
                                               np.ravel(np.asarray([] if spread_values is None else spread_values,
                                                                   float))]))

    def scaled(values):
        return None if values is None else shown(to_si(1.0, unit)) * np.asarray(values, float)

    hardware, simulated = scaled(hardware), scaled(simulated)
    simulated_mean, simulated_sd = scaled(simulated_mean), scaled(simulated_sd)
    n = hardware.size
    x = np.arange(n)
    labels = trial_labels or [str(i + 1) for i in range(n)]
    fig = figure(9.0, 3.2)
    ax_dist, ax_res = fig.subplots(1, 2, gridspec_kw={"width_ratios": [3, 2]})
    if simulated is not None:
        sims = np.asarray(simulated, float)
        columns = [row[np.isfinite(row)] for row in sims]
        spread = [c for c in columns if c.size > 1 and np.ptp(c) > 0]
        positions = [i for i, c in enumerate(columns) if c.size > 1 and np.ptp(c) > 0]
        if spread:
            parts = ax_dist.violinplot(spread, positions=positions, widths=0.8, showextrema=False)
            for body in parts["bodies"]:
                body.set_alpha(0.35)
        rng = np.random.default_rng(0)  # fixed jitter: the same figure every time
        for i, c in enumerate(columns):
            ax_dist.scatter(i + rng.uniform(-0.15, 0.15, c.size), c, s=6, color="#2166ac", alpha=0.6,
                            label="simulation" if i == 0 else None)
    elif simulated_mean is not None:
        sd = np.nan_to_num(np.asarray(simulated_sd if simulated_sd is not None else np.zeros(n), float))
        ax_dist.errorbar(x, simulated_mean, yerr=2 * sd, fmt="o", color="#2166ac", capsize=3,
                         label="simulation mean +- 2 sd")
    ax_dist.scatter(x, hardware, marker="D", s=36, color="#d6604d", zorder=3, label="hardware")
    ax_dist.set_xticks(x, labels)
    ax_dist.set_xlabel("trial")
    ax_dist.set_ylabel(with_unit(label(name), shown), fontsize=9)
    ax_dist.legend(loc="best", fontsize=7)
    res = np.asarray(residuals, float)
    finite = np.isfinite(res)
    edge = max(residual_limit * 1.5, float(np.max(np.abs(res[finite]))) if finite.any() else 0.0) * 1.1
    shown = np.where(finite, res, np.sign(np.nan_to_num(res, nan=0.0)) * edge)
    ax_res.axhspan(-residual_limit, residual_limit, color="#cccccc", alpha=0.5, label=f"+-{residual_limit:g}")
    ax_res.axhline(0.0, color="black", linewidth=0.6)
    ax_res.scatter(x[finite], shown[finite], marker="D", color="#d6604d")
    ax_res.scatter(x[~finite & ~np.isnan(res)], shown[~finite & ~np.isnan(res)], marker="^", color="#d6604d",
                   label="outside a zero spread")
    ax_res.set_xticks(x, labels)
    ax_res.set_xlabel("trial")
    ax_res.set_ylabel("(hardware - sim mean) / sim sd")
    ax_res.legend(loc="best", fontsize=7)
    fig.suptitle(f"{label(name)}: {verdict.replace('_', ' ')}" if verdict else label(name),
                 color=VERDICT_COLOURS.get(verdict, "black"))
    return png(fig)


def _safe_name(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name) or "feature"


def shift_figures(report: ShiftReport) -> dict[str, bytes]:
    """PNG bytes per feature name, in the report's feature order.

    Draws each trial's matched simulations from ``report.simulated_values (n x K x f)`` when the
    report carries them, otherwise the simulated mean +- 2 sd per trial.
    """
    limit = float(report.settings.residual_limit)
    simulated = report.simulated_values
    if simulated is not None and (simulated.ndim != 3 or simulated.shape[2] != len(report.features)):
        simulated = None
    out = {}
    for j, feature in enumerate(report.features):
        hardware = np.asarray(feature.hardware, float)
        labels = [str(t) for t in report.trial_ids]
        out[feature.name] = feature_png(
            feature.name, hardware, None if simulated is None else simulated[:, :, j],
            np.asarray(feature.residuals, float), limit, feature.verdict,
            np.asarray(feature.simulated_mean, float), np.asarray(feature.simulated_sd, float),
            labels if len(labels) == hardware.size else None,
        )
    return out


def plot_shift(report: ShiftReport, plots_dir: str | Path) -> list[Path]:
    """Write ``shift_<feature>.png`` per feature of ``report`` into ``plots_dir``; return the paths."""
    out_dir = Path(plots_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, image in shift_figures(report).items():
        path = out_dir / f"shift_{_safe_name(name)}.png"
        path.write_bytes(image)
        paths.append(path)
    return paths
