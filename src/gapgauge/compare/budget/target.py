"""What "reached" means: the budget's target, chosen or given, stated in words.

A trial reaches the target when it does not fall, meets the scenario's ``[success]`` rule and scores
the objective at or below a level (objective units, lower is better). The level is one of:

- ``value``: given, absolute;
- ``within``: given as ``x`` above the best the posterior expects for this robot, the lowest posterior
  mean among the candidates whose modelled fall risk is within the limit (:func:`reference_best`);
- ``auto`` (the default): the most ambitious level that a share ``reach_share`` (0.9) of the simulated
  tuning runs with the prior reach within the horizon, the ``reach_share`` quantile of their best
  objective after ``max_trials`` trials (:func:`auto_level`), rounded up to a readable step;
- ``fraction``: the older per-draw target, ``fraction`` of the way from the median of the candidates on
  which the draw stands to its best (:func:`draw_targets`); an extreme of an uncertain surface, often
  beyond any tuning run, kept as an option.

The simulated runs model the fall and the objective, not the other features the success rule may bound.
:func:`success_cap` reads from the sweep how far below a level the rule holds: the largest level at which
at least ``SUCCESS_SHARE`` (99%) of the simulated rollouts that stood and scored at or below it met the
rule. At or below that level a standing trial that reaches it is counted as meeting the rule; an automatic
level is never set above it, and a given level above it gets a note.
"""

from __future__ import annotations

import math

import numpy as np

from .belief import Beliefs
from .policy import fall_risk

DEFAULT_REACH_SHARE = 0.9
SUCCESS_SHARE = 0.99
KINDS = ("auto", "value", "within", "fraction")


def standing(margin: np.ndarray, fall_link: tuple[float, float, float] | None) -> np.ndarray:
    """Where a drawn margin stands: fall chance below one half under the link ``(a, b, threshold)``
    (``a + b (threshold - margin) < 0``), or ``margin >= 0`` without one (Hof's threshold)."""
    margin = np.asarray(margin, dtype=float)
    if fall_link is None:
        return margin >= 0.0
    a, b, threshold = fall_link
    return a + b * (threshold - margin) < 0.0


def draw_targets(
    objective: np.ndarray,
    margin: np.ndarray | None,
    fraction: float | None,
    value: float | None,
    fall_link: tuple[float, float, float] | None = None,
) -> np.ndarray:
    """Per-draw target ``(draws,)``: ``value`` if given, else ``median - fraction (median - best)`` over
    the candidates on which the draw stands (:func:`standing`); NaN where nothing stands.

    ``objective``, ``margin``: ``(draws x m)``; lower objective is better. The median stands for "a
    random safe parameter set", the best for the best achievable.
    """
    objective = np.atleast_2d(objective)
    if value is not None:
        return np.full(objective.shape[0], float(value))
    stands = np.ones_like(objective, dtype=bool) if margin is None else standing(np.atleast_2d(margin), fall_link)
    masked = np.where(stands, objective, np.nan)
    out = np.full(objective.shape[0], np.nan)
    some = stands.any(axis=1)
    median = np.nanmedian(masked[some], axis=1)
    best = np.nanmin(masked[some], axis=1)
    out[some] = median - fraction * (median - best)
    return out


def reference_best(beliefs: Beliefs, max_fall_risk: float) -> tuple[float, bool]:
    """The best the posterior expects for this robot: the lowest posterior mean of the objective among
    the candidates whose modelled fall risk (the margin belief's, :func:`fall_risk`) is at most
    ``max_fall_risk``; and whether any candidate was (else the lowest over all candidates)."""
    o = beliefs.objective
    mean = o.mean[o.n_known:]
    if beliefs.margin is None:
        return float(np.min(mean)), True
    m = beliefs.margin
    risk = fall_risk(m.mean[m.n_known:], np.diag(m.cov)[m.n_known:], m.noise_var, m.link)
    feasible = risk <= max_fall_risk
    if not feasible.any():
        return float(np.min(mean)), False
    return float(np.min(mean[feasible])), True


def readable_step(spread: float) -> float:
    """A round step for stating a level: the power of ten at or below a fiftieth of ``spread`` (> 0)."""
    if not np.isfinite(spread) or spread <= 0:
        return 1e-3
    return 10.0 ** math.floor(math.log10(spread / 50.0))


def auto_level(best_at_horizon: np.ndarray, reach_share: float, step: float) -> float | None:
    """The most ambitious level reached within the horizon by at least ``reach_share`` of the runs: the
    ``ceil(reach_share * n)``-th smallest best-at-horizon ``(n,)`` (``inf``: no trial stood), rounded up
    to a multiple of ``step``; None when that run never stood."""
    values = np.sort(np.asarray(best_at_horizon, dtype=float))
    k = max(int(math.ceil(reach_share * values.size - 1e-9)), 1)
    level = float(values[k - 1])
    if not np.isfinite(level):
        return None
    return math.ceil(level / step - 1e-9) * step


def success_cap(objective: np.ndarray, success: np.ndarray, share: float = SUCCESS_SHARE) -> float | None:
    """The largest level ``L`` among the simulated objectives ``(n,)`` (rollouts that stood) such that at
    least ``share`` of those scoring at or below ``L`` met the success rule (``success (n,)`` bool);
    None when no level does (not even the best rollout met it) or there is no rollout."""
    objective = np.asarray(objective, dtype=float)
    success = np.asarray(success, dtype=bool)
    keep = np.isfinite(objective)
    objective, success = objective[keep], success[keep]
    if objective.size == 0:
        return None
    order = np.argsort(objective, kind="stable")
    met = np.cumsum(success[order]) / np.arange(1, objective.size + 1)
    ok = np.flatnonzero(met >= share - 1e-12)
    return float(objective[order][ok[-1]]) if ok.size else None


def success_share_at(objective: np.ndarray, success: np.ndarray, level: float) -> float | None:
    """Share of the simulated rollouts that stood and scored at or below ``level`` that met the rule."""
    objective = np.asarray(objective, dtype=float)
    below = np.isfinite(objective) & (objective <= level)
    return float(np.mean(np.asarray(success, dtype=bool)[below])) if below.any() else None


def level_text(value: float, step: float) -> str:
    """A level printed to its step, trailing zeros dropped (``0.43``, ``1.2``, ``35``)."""
    decimals = max(0, -int(math.floor(math.log10(step)))) if step > 0 else 3
    text = f"{value:.{decimals}f}"
    text = text.rstrip("0").rstrip(".") if "." in text else text
    return "0" if text == "-0" else text


def success_rule_text(success_max: dict[str, float]) -> str:
    """The scenario's ``[success]`` bounds in words (``"recovery_time <= 2"``), "" when there are none."""
    return ", ".join(f"{name} <= {bound:g}" for name, bound in success_max.items())


def statement(
    *,
    kind: str,
    level: float | None,
    reference: float,
    step: float,
    rule: str,
    fraction: float | None = None,
    reach_share: float | None = None,
    cap: float | None = None,
    capped: bool = False,
    success_share: float | None = None,
    draws: int = 0,
    max_trials: int = 0,
    median: float | None = None,
) -> tuple[str, str, str]:
    """``(definition, sentence, why)`` of a target in words (see :class:`BudgetTarget`)."""
    rule_part = f", meets the success rule ({rule})" if rule else ""
    ref = level_text(reference, step)
    if kind == "fraction":
        definition = (f"no fall{', ' + rule if rule else ''}, objective {fraction:g} of the way from the median "
                      "of the safe candidates to the best, per draw")
        sentence = (f"A trial that does not fall{rule_part} and gets {fraction:g} of the way from a random safe "
                    f"parameter set to the best of the drawn surface (median target over draws "
                    f"{'n/a' if median is None else level_text(median, step)}).")
        why = ("Given as a fraction: each draw's own best over the candidates is an extreme of an uncertain "
               "surface, which tuning runs rarely reach; give no target to have one chosen.")
        return definition, sentence, why
    value = level_text(level, step)
    distance = level - reference
    where = (f"within {level_text(distance, step)} of {ref}" if distance >= 0
             else f"{level_text(-distance, step)} below {ref}")
    definition = f"no fall{', ' + rule if rule else ''}, objective <= {value}"
    sentence = (f"A trial that does not fall{rule_part} and scores objective <= {value}: {where}, the best "
                "the posterior expects for this robot.")
    if kind == "auto":
        why = (f"Chosen as the most ambitious level that {100 * reach_share:.0f}% of the {draws} simulated tuning "
               f"runs with the prior reach within {max_trials} trials")
        if capped and cap is not None:
            why += (f", capped at {level_text(cap, step)}, the highest level at which 99% of the simulated "
                    "rollouts at or below it met the success rule")
        why += "; give target_value or target_within to set your own."
    else:
        why = "Given as a level." if kind == "value" else "Given as a distance above the best the posterior expects."
    if rule and success_share is not None and success_share < SUCCESS_SHARE:
        why += (f" At this level only {100 * success_share:.0f}% of the simulated rollouts that stood at or below "
                "it met the success rule; the budget counts a standing trial at or below it as reached.")
    return definition, sentence, why


__all__ = [
    "DEFAULT_REACH_SHARE",
    "KINDS",
    "SUCCESS_SHARE",
    "auto_level",
    "draw_targets",
    "level_text",
    "readable_step",
    "reference_best",
    "standing",
    "statement",
    "success_cap",
    "success_rule_text",
    "success_share_at",
]
