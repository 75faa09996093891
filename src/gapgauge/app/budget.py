"""The trial budget as a job: the store's current prior in, the stored :class:`BudgetPlan` out.

The prior is the one ``gapgauge propose`` would use (:func:`gapgauge.app.prior.current_prior`: the
stored fit when it is current, else a new one); the sweep's rollouts that stood say at which objective
levels the scenario's ``[success]`` rule holds (:func:`success_evidence`); the Monte Carlo is
:func:`gapgauge.compare.budget.plan_from_prior`; the plan is saved as kind ``"budget"`` for the report.
"""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path

import numpy as np

from ..compare.budget import (
    DEFAULT_CANDIDATES,
    DEFAULT_CONFIDENCE,
    DEFAULT_DRAWS,
    DEFAULT_MAX_FALL_RISK,
    DEFAULT_MAX_TRIALS,
    DEFAULT_REACH_SHARE,
    BudgetPlan,
    check_options,
    plan_from_prior,
)
from ..features import success
from ..progress import Progress
from ..scenario import Scenario
from ..store import Store
from .common import as_scenario, open_store
from .prior import current_prior


def success_evidence(scenario: Scenario, store: Store) -> tuple[np.ndarray, np.ndarray] | None:
    """``(objective (n,), met (n,) bool)`` of the sweep's rollouts that stood with a finite objective:
    whether each met the scenario's success rule (:func:`gapgauge.features.success`). None when the rule
    bounds nothing beyond falling, or a feature it bounds was not computed in the sweep."""
    if not scenario.success_max:
        return None
    batch = store.rollouts(scenario.content_hash, status="ok")
    objective = np.asarray(batch.objective, dtype=float)
    try:
        met = success(batch.features, scenario)
    except KeyError:
        return None
    keep = np.isfinite(objective)
    return objective[keep], np.asarray(met, dtype=bool)[keep]


def plan_budget(
    scenario: Scenario | str | Path,
    store: Store | str | Path,
    *,
    target_fraction: float | None = None,
    target_value: float | None = None,
    target_within: float | None = None,
    reach_share: float = DEFAULT_REACH_SHARE,
    confidence: float = DEFAULT_CONFIDENCE,
    max_trials: int = DEFAULT_MAX_TRIALS,
    draws: int = DEFAULT_DRAWS,
    seed: int = 0,
    max_fall_risk: float = DEFAULT_MAX_FALL_RISK,
    n_candidates: int = DEFAULT_CANDIDATES,
    progress: Progress | None = None,
) -> BudgetPlan:
    """How many hardware trials to book to reach the target, with the simulation prior and without;
    the plan is stored in ``store`` (kind ``"budget"``) and returned.

    Args:
        scenario: a Scenario or the path of its TOML.
        store: a :class:`Store` (left open) or the path of one (opened and closed here).
        target_fraction, target_value, target_within, reach_share, confidence, max_trials, draws,
            max_fall_risk, n_candidates: as for :func:`gapgauge.compare.budget.plan_from_prior`
            (checked before the prior is read); none of the three targets: one is chosen and said why.
        seed: seeds the prior's fit when one is needed, the candidates, the draws and the noise.
        progress: called as ``progress(stage, done, total)`` by the prior's fit (when one is needed) and
            as the simulated trials go.

    Raises:
        ModelError: an argument out of range (named), or no prior can be fitted.
        StoreError: no store at the path.
    """
    options = dict(target_fraction=target_fraction, target_value=target_value, target_within=target_within,
                   reach_share=reach_share, confidence=confidence, max_trials=max_trials, draws=draws,
                   max_fall_risk=max_fall_risk, n_candidates=n_candidates)
    check_options(seed=seed, **options)
    started = time.perf_counter()
    scenario = as_scenario(scenario)
    with open_store(store, scenario=scenario) as opened:
        prior = current_prior(scenario, opened, seed=seed, progress=progress)
        evidence = success_evidence(scenario, opened)
        plan = plan_from_prior(prior, seed=seed, success=evidence, progress=progress, **options)
        # the wall time of the job, the prior's loading or fit included
        plan = dataclasses.replace(plan, seconds=time.perf_counter() - started)
        opened.save_result(scenario.content_hash, plan)
    return plan


__all__ = ["plan_budget", "success_evidence"]
