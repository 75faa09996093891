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

Pure: :func:`propose` takes a fitted :class:`~gapgauge.compare.prior.PriorFit` (with its models) and
the scenario; :func:`gapgauge.app.propose.propose` reads the prior from the store and saves the result.
Every :class:`Proposals` carries the caution of :mod:`gapgauge.safety` in its JSON, and, when made by
the propose job, the stop rule after the trials so far (:mod:`gapgauge.compare.stop`, field ``stop``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from ..errors import ModelError
from ..results import Result
from ..safety import CAUTION
from ..scenario import Scenario
from .acquisition import AcquisitionResult, maximise_acquisition
from .prior import PriorFit
from .stop import StopRule

BATCH_METHOD = "kriging believer (Ginsbourger, Le Riche and Carraro 2010)"
DEFAULT_CANDIDATES = 1024
DEFAULT_STARTS = 6


@dataclass
class Proposal:
    """One proposed hardware trial.

    Attributes:
        params: parameter name -> value, scenario units.
        predicted_objective: the prior's mean of the hardware objective there, objective units.
        predicted_sd: the latent sd of the hardware objective there, objective units.
        fall_risk: the modelled probability of a fall.
        expected_improvement: EI below the incumbent, objective units.
        reason: why this point, in words.
    """

    params: dict[str, float]
    predicted_objective: float
    predicted_sd: float
    fall_risk: float
    expected_improvement: float
    reason: str


@dataclass
class Proposals(Result):
    """The proposals and how they were made (``to_dict`` gives ``{"proposals": [...], ...}``, which
    ``gapgauge.sim.standin`` reads as a parameter file).

    Attributes:
        scenario: the scenario's name.
        proposals: the proposed trials, in order.
        max_fall_risk: the fall-risk limit used. count: proposals asked for. seed: seed of the candidates.
        batch_method: how a batch was made. incumbent: the objective EI improved on, objective units.
        n_hardware, n_sim: hardware trials and simulated rollouts the prior was fitted on.
        units: parameter name -> unit. notes: what the reader should know.
        caution: the safety caution (:data:`gapgauge.safety.CAUTION`).
        stop: the stop rule after the trials so far (probability the current best is within epsilon of
            the best, epsilon, level, the decision in words; :func:`gapgauge.compare.stop.stop_rule`), or
            None when it was not evaluated.
    """

    kind: ClassVar[str] = "proposals"
    schema_version: ClassVar[int] = 1

    scenario: str
    proposals: list[Proposal]
    max_fall_risk: float
    count: int
    seed: int
    batch_method: str
    incumbent: float
    n_hardware: int
    n_sim: int
    units: dict[str, str] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    caution: str = CAUTION
    stop: StopRule | None = None


def check_arguments(count: int, max_fall_risk: float, seed: int) -> None:
    """Raise ModelError, naming the argument, when ``count``, ``max_fall_risk`` or ``seed`` is out of range."""
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 1:
        raise ModelError(f"count must be an integer of at least 1, got {count!r}")
    if not 0.0 < max_fall_risk <= 1.0:
        raise ModelError(f"max_fall_risk must be in (0, 1], got {max_fall_risk}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ModelError(f"seed must be a non-negative integer, got {seed!r}")


def propose(
    scenario: Scenario,
    prior: PriorFit,
    *,
    count: int = 1,
    max_fall_risk: float = 0.05,
    seed: int = 0,
    n_candidates: int = DEFAULT_CANDIDATES,
    n_starts: int = DEFAULT_STARTS,
) -> Proposals:
    """Propose ``count`` hardware trials for ``scenario`` from a fitted ``prior`` (with its models).

    Args:
        scenario: the scenario (its safe bounds confine the proposals).
        prior: the fitted prior (:func:`gapgauge.compare.prior.fit_prior` or
            :func:`gapgauge.app.prior.load_prior`).
        count: number of proposals (a batch by kriging believer when > 1).
        max_fall_risk: the highest modelled fall probability allowed, in (0, 1].
        seed: seed of the Sobol candidate sets; stored with the result.
        n_candidates: Sobol candidates per proposal (rounded up to a power of two).
        n_starts: local searches per proposal.

    Raises:
        ModelError: a bad argument, a prior without its models, or no candidate under the limit.
    """
    check_arguments(count, max_fall_risk, seed)
    if prior.objective_model is None:
        raise ModelError("the prior has no models; load it with gapgauge.app.prior.load_prior")
    model = prior.objective_model
    unit_bounds = safe_unit_bounds(scenario)
    X_hw, y_hw = model.X_high_, model.y_high_
    best = float(np.min(model.predict(X_hw))) if y_hw.size else None
    notes = list(prior.notes)
    if best is None:
        notes.append("no hardware trials yet: proposals come from the simulation level plus the discrepancy prior")
    rng = np.random.default_rng(seed)
    fall = prior.fall_model.fall_probability if prior.fall_model is not None else None
    belief = model
    out: list[Proposal] = []
    incumbent: float | None = best
    for slot in range(count):

        def predict(U: np.ndarray, m: Any = belief) -> tuple[np.ndarray, np.ndarray]:
            return m.predict(U, return_std=True)

        result = maximise_acquisition(predict, unit_bounds, best, fall_probability=fall, max_fall_risk=max_fall_risk,
                                      seed=rng, n_candidates=n_candidates, n_starts=n_starts)
        x_unit = np.clip(result.x, unit_bounds[:, 0], unit_bounds[:, 1])
        x = _inside_safe(scenario, scenario.from_unit(x_unit[None])[0])
        mean, sd = model.predict(x_unit[None], return_std=True)
        if incumbent is None:
            incumbent = result.incumbent
        out.append(Proposal(
            params=scenario.params_to_mapping(x),
            predicted_objective=float(mean[0]),
            predicted_sd=float(sd[0]),
            fall_risk=float(result.fall_risk),
            expected_improvement=float(result.expected_improvement),
            reason=_reason(slot, result, best, max_fall_risk),
        ))
        if slot + 1 < count:
            X_hw = np.vstack([X_hw, x_unit])
            y_hw = np.append(y_hw, result.mean)
            belief = model.copy_with_high(X_hw, y_hw, optimize=False)
            best = result.mean if best is None else min(best, result.mean)
    return Proposals(
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


def _reason(slot: int, result: AcquisitionResult, best: float | None, limit: float) -> str:
    against = "the best predicted mean" if best is None else f"the incumbent {best:.4g}"
    text = (
        f"largest expected improvement x P(no fall) in the safe bounds (EI {result.expected_improvement:.3g} "
        f"below {against}; P(fall) {result.fall_risk:.3f} <= {limit:g}; "
        f"{result.n_feasible} of {result.n_candidates} candidates feasible)"
    )
    if slot:
        text += f"; batch slot {slot + 1} by kriging believer"
    return text


def safe_unit_bounds(scenario: Scenario) -> np.ndarray:
    """The safe bounds as a ``(dim x 2)`` box in the unit cube (``to_unit`` is increasing per axis)."""
    return scenario.to_unit(scenario.bounds(safe=True).T).T


def _inside_safe(scenario: Scenario, x: np.ndarray) -> np.ndarray:
    # the exp/log round trip of log axes can step a hair outside the safe bounds: clip to them
    safe = scenario.bounds(safe=True)
    return np.clip(x, safe[:, 0], safe[:, 1])


__all__ = ["BATCH_METHOD", "Proposal", "Proposals", "check_arguments", "propose", "safe_unit_bounds"]
