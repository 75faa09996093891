"""propose(): the next hardware trials, inside the safe bounds and under a fall-risk limit.

Each proposal maximises expected improvement (Jones, Schonlau and Welch 1998) times the probability
of not falling (Gardner et al. 2014) over the scenario's safe bounds, with the modelled fall
probability at most ``max_fall_risk`` (:func:`~gapgauge.compare.acquisition.maximise_acquisition`).
The incumbent is the lowest posterior mean at the hardware trials so far (the "plug-in" choice for
noisy observations); before any trial it is the lowest predicted mean on the candidate set, and the
model is the simulation level plus the discrepancy prior.

Batches (``count > 1``) use the kriging believer (Ginsbourger, Le Riche and Carraro 2010): after each
pick the objective model is conditioned on its own predicted mean there, hyperparameters fixed, and
the next point is chosen under that belief. The fall model is not conditioned on beliefs (a believed
margin would shrink the fall uncertainty without any evidence). Predicted values reported for every
proposal come from the fitted prior, not from the beliefs.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ModelError
from ..scenario import Scenario
from .acquisition import maximise_acquisition
from .prior import PriorFit, _open_store, fit_prior, load_prior, write_json

BATCH_METHOD = "kriging believer (Ginsbourger, Le Riche and Carraro 2010)"


@dataclass
class Proposal:
    """One proposed hardware trial.

    ``params`` by name in scenario units; ``predicted_objective`` and ``predicted_sd`` (latent sd of
    the hardware objective) in objective units; ``fall_risk`` the modelled probability of a fall.
    """

    params: dict[str, float]
    predicted_objective: float
    predicted_sd: float
    fall_risk: float
    expected_improvement: float
    reason: str


@dataclass
class Proposals:
    """The proposals and how they were made (``to_json`` gives ``{"proposals": [...], ...}``)."""

    scenario: str
    proposals: list[dict[str, Any]]
    max_fall_risk: float
    count: int
    seed: int
    batch_method: str
    incumbent: float
    n_hardware: int
    n_sim: int
    units: dict[str, str] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2)

    def write_json(self, path: str | Path) -> None:
        """Write :meth:`to_dict` to ``path`` (``gapgauge standin --params`` reads it)."""
        write_json(path, self.to_dict())


def propose(
    scenario: Scenario,
    store: Any = None,
    *,
    prior: PriorFit | None = None,
    count: int = 1,
    max_fall_risk: float = 0.05,
    seed: int = 0,
    n_candidates: int = 1024,
    n_starts: int = 6,
) -> Proposals:
    """Propose ``count`` hardware trials for ``scenario``.

    Args:
        scenario: the loaded scenario (its safe bounds confine the proposals).
        store: ``gapgauge.store.Store`` or its path; used when ``prior`` is None: the stored prior
            if it was fitted on the store's current sweep and trials, else a new fit.
        prior: a fitted :class:`PriorFit` to use as it is.
        count: number of proposals (a batch by kriging believer when > 1).
        max_fall_risk: the highest modelled fall probability allowed, in (0, 1].
        seed: seed of the Sobol candidate sets; stored with the result.

    Raises:
        ModelError: no prior and no store, a bad count or limit, or nothing feasible.
    """
    if count < 1:
        raise ModelError(f"--count must be at least 1, got {count}")
    if not 0.0 < max_fall_risk <= 1.0:
        raise ModelError(f"--max-fall-risk must be in (0, 1], got {max_fall_risk}")
    store = None if store is None else _open_store(store)
    if prior is None:
        if store is None:
            raise ModelError("propose needs a fitted prior or a store; run `gapgauge prior` first")
        prior = _current_prior(scenario, store, seed)
    model = prior.objective_model
    unit_bounds = _safe_unit_bounds(scenario)
    X_hw, y_hw = model.X_high_, model.y_high_
    best = float(np.min(model.predict(X_hw))) if y_hw.size else None
    notes = list(prior.notes)
    if best is None:
        notes.append(
            "no hardware trials yet: proposals come from the simulation level plus the discrepancy prior"
        )
    rng = np.random.default_rng(seed)
    fall = prior.fall_model.fall_probability if prior.fall_model is not None else None
    belief = model
    out: list[dict[str, Any]] = []
    incumbent: float | None = best
    for slot in range(count):

        def predict(U: np.ndarray, m=belief) -> tuple[np.ndarray, np.ndarray]:
            return m.predict(U, return_std=True)

        result = maximise_acquisition(
            predict,
            unit_bounds,
            best,
            fall_probability=fall,
            max_fall_risk=max_fall_risk,
            seed=rng,
            n_candidates=n_candidates,
            n_starts=n_starts,
        )
        x_unit = np.clip(result.x, unit_bounds[:, 0], unit_bounds[:, 1])
        x = _inside_safe(scenario, scenario.from_unit(x_unit[None])[0])
        mean, sd = model.predict(x_unit[None], return_std=True)
        if incumbent is None:
            incumbent = result.incumbent
        out.append(
            asdict(
                Proposal(
                    params=scenario.params_to_mapping(x),
                    predicted_objective=float(mean[0]),
                    predicted_sd=float(sd[0]),
                    fall_risk=float(result.fall_risk),
                    expected_improvement=float(result.expected_improvement),
                    reason=_reason(slot, result, best, max_fall_risk),
                )
            )
        )
        if slot + 1 < count:
            X_hw = np.vstack([X_hw, x_unit])
            y_hw = np.append(y_hw, result.mean)
            belief = model.copy_with_high(X_hw, y_hw, optimize=False)
            best = result.mean if best is None else min(best, result.mean)
    proposals = Proposals(
        scenario=scenario.name,
        proposals=out,
        max_fall_risk=float(max_fall_risk),
        count=int(count),
        seed=int(seed),
        batch_method=BATCH_METHOD,
        incumbent=float(incumbent),
        n_hardware=prior.n_hardware,
        n_sim=prior.n_sim,
        units={p.name: p.unit for p in scenario.parameters},
        notes=notes,
    )
    if store is not None:  # the report reads the latest proposals back with load_model("proposals", hash)
        store.save_model("proposals", scenario.content_hash, params=proposals.to_dict())
    return proposals


def _reason(slot: int, result: Any, best: float | None, limit: float) -> str:
    against = "the best predicted mean" if best is None else f"the incumbent {best:.4g}"
    text = (
        f"largest expected improvement x P(no fall) in the safe bounds (EI {result.expected_improvement:.3g} "
        f"below {against}; P(fall) {result.fall_risk:.3f} <= {limit:g}; "
        f"{result.n_feasible} of {result.n_candidates} candidates feasible)"
    )
    if slot:
        text += f"; batch slot {slot + 1} by kriging believer"
    return text


def _safe_unit_bounds(scenario: Scenario) -> np.ndarray:
    """The safe bounds as a ``(dim x 2)`` box in the unit cube (``to_unit`` is increasing per axis)."""
    return scenario.to_unit(scenario.bounds(safe=True).T).T


def _inside_safe(scenario: Scenario, x: np.ndarray) -> np.ndarray:
    # the exp/log round trip of log axes can step a hair outside the safe bounds: clip to them
    safe = scenario.bounds(safe=True)
    return np.clip(x, safe[:, 0], safe[:, 1])


def _current_prior(scenario: Scenario, store: Any, seed: int) -> PriorFit:
    """The stored prior if it was fitted on the store's current sweep and trials, else a new fit."""
    try:
        prior = load_prior(scenario, store)
    except ModelError:
        return fit_prior(scenario, store, seed=seed, progress=False)
    batch = store.rollouts(scenario.content_hash, kinds=("sweep",))
    n_standing = int(
        np.sum((np.asarray(batch.status) == "ok") & np.isfinite(np.asarray(batch.objective, float)))
    )
    n_usable = sum(
        1
        for t in store.trials(scenario.content_hash)
        if t.objective is not None
        and np.isfinite(t.objective)
        and not (t.outcome == "fell" or t.features.get("fell"))
    )
    if prior.n_sim != n_standing or prior.n_hardware != n_usable:
        return fit_prior(scenario, store, seed=seed, progress=False)
    return prior
