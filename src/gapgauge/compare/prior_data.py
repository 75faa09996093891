"""The arrays a prior is fitted on: the simulated rows of a sweep and the hardware trials.

- simulation: the sweep's rollouts that neither fell nor diverged carry the objective (a fallen
  rollout's objective is the scenario's ``fall_value``, a flag rather than a measurement, so it is left
  to the fall model); every non-diverged rollout with a margin of stability feeds the fall model.
- hardware: the trials that did not fall, with a finite objective; every trial with a margin.

The two sides are kept apart (:class:`PriorData` holds both, :class:`HardwareData` the trials alone)
because they change at different rates: a sweep is written once overnight, trials arrive one by one.
Each side has a key (sha256 of its rows) so that a fit knows what it was fitted on; a refit after a new
trial needs the trials only (:func:`hardware_data`), never the sweep's 10^5 to 10^6 rows.

Inputs are scaled to the unit cube of the scenario's full bounds (``scenario.to_unit``).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np

from ..errors import ModelError
from ..records import RolloutBatch, TrialRecord
from ..scenario import Scenario

MARGIN = "margin_of_stability"


def _rows(X: np.ndarray | None, dim: int) -> np.ndarray:
    return np.asarray([] if X is None else X, dtype=float).reshape(-1, dim)


def _values(y: np.ndarray | None, dtype: type = float) -> np.ndarray:
    return np.asarray([] if y is None else y, dtype=dtype).ravel()


def _check(pairs: tuple[tuple[str, np.ndarray, np.ndarray], ...]) -> None:
    for name, X, y in pairs:
        if X.shape[0] != y.size:
            raise ValueError(f"X_{name} has {X.shape[0]} rows but its targets have {y.size}")


def _digest(arrays: list[np.ndarray]) -> str:
    h = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a, dtype=float)
        h.update(repr(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()


@dataclass
class HardwareData:
    """The hardware trials' arrays, inputs in the unit cube of the scenario's full bounds.

    Attributes:
        X_hw, y_hw: ``(k x dim)`` and ``(k,)`` objective units, the trials that stood with a finite objective.
        X_hw_margin, margin_hw: ``(k_m x dim)``, ``(k_m,)`` m, the trials with a margin of stability.
        notes: what was left out and why.
    """

    X_hw: np.ndarray
    y_hw: np.ndarray
    X_hw_margin: np.ndarray
    margin_hw: np.ndarray
    notes: list[str] = field(default_factory=list)

    def hardware_key(self) -> str:
        """sha256 of the hardware rows (objective and margin): what the hardware levels depend on."""
        return _digest([self.X_hw, self.y_hw, self.X_hw_margin, self.margin_hw])


@dataclass
class PriorData:
    """The arrays a prior is fitted on, inputs in the unit cube of the scenario's full bounds.

    Attributes:
        X_sim, y_sim: ``(n x dim)`` and ``(n,)`` objective units, the rollouts that stood.
        X_hw, y_hw: ``(k x dim)`` and ``(k,)``, the hardware trials that stood with a finite objective.
        X_sim_margin, margin_sim, fell_sim_margin: ``(n_m x dim)``, ``(n_m,)`` m and ``(n_m,)`` bool, the
            rollouts with a measured margin of stability (fallen ones included).
        X_hw_margin, margin_hw: ``(k_m x dim)``, ``(k_m,)`` m, the trials with a margin.
        n_diverged: rollouts left out for having diverged.
        notes: what was left out of the sweep and why.
        hardware_notes: what was left out of the trials and why.
    """

    X_sim: np.ndarray
    y_sim: np.ndarray
    X_hw: np.ndarray
    y_hw: np.ndarray
    X_sim_margin: np.ndarray | None = None
    margin_sim: np.ndarray | None = None
    fell_sim_margin: np.ndarray | None = None
    X_hw_margin: np.ndarray | None = None
    margin_hw: np.ndarray | None = None
    n_diverged: int = 0
    notes: list[str] = field(default_factory=list)
    hardware_notes: list[str] = field(default_factory=list)

    def __post_init__(self) -> None:
        dim = np.atleast_2d(self.X_sim).shape[1]
        self.X_sim, self.y_sim = _rows(self.X_sim, dim), _values(self.y_sim)
        self.X_hw, self.y_hw = _rows(self.X_hw, dim), _values(self.y_hw)
        self.X_sim_margin, self.margin_sim = _rows(self.X_sim_margin, dim), _values(self.margin_sim)
        fell = np.zeros(self.margin_sim.size) if self.fell_sim_margin is None else self.fell_sim_margin
        self.fell_sim_margin = _values(fell, bool)
        self.X_hw_margin, self.margin_hw = _rows(self.X_hw_margin, dim), _values(self.margin_hw)
        _check((("sim", self.X_sim, self.y_sim), ("hw", self.X_hw, self.y_hw),
                ("sim_margin", self.X_sim_margin, self.margin_sim), ("hw_margin", self.X_hw_margin, self.margin_hw)))

    def simulation_key(self, max_inducing: int) -> str:
        """sha256 of the simulated rows (objective and margin) and ``max_inducing``: what the simulation
        levels depend on (about 0.3 s for 10^6 rollouts)."""
        return _digest([self.X_sim, self.y_sim, self.X_sim_margin, self.margin_sim,
                        self.fell_sim_margin.astype(float), np.array([float(max_inducing)])])

    def hardware(self) -> HardwareData:
        """The hardware side alone."""
        return HardwareData(self.X_hw, self.y_hw, self.X_hw_margin, self.margin_hw, list(self.hardware_notes))

    def hardware_key(self) -> str:
        """sha256 of the hardware rows (objective and margin): :meth:`HardwareData.hardware_key`."""
        return self.hardware().hardware_key()


def hardware_data(scenario: Scenario, trials: list[TrialRecord]) -> HardwareData:
    """The :class:`HardwareData` of a scenario's hardware trials (no sweep needed).

    A trial that fell (its outcome, or its ``fell`` feature) is left out of the objective and kept for
    the fall model when it has a margin of stability.
    """
    dim = scenario.dim
    X_hw, y_hw, X_hm, m_hw = [], [], [], []
    n_fell = 0
    for trial in trials:
        x = scenario.params_from_mapping(trial.params, source=f"trial {trial.source_path}")
        fell = trial.outcome == "fell" or bool(trial.features.get("fell", 0.0) or 0.0)
        if fell:
            n_fell += 1
        elif trial.objective is not None and np.isfinite(trial.objective):
            X_hw.append(x)
            y_hw.append(float(trial.objective))
        value = trial.features.get(MARGIN)
        if value is not None and np.isfinite(value):
            X_hm.append(x)
            m_hw.append(float(value))
    notes = [f"{n_fell} hardware trial(s) that fell left out of the objective model"] if n_fell else []
    return HardwareData(
        X_hw=scenario.to_unit(np.array(X_hw).reshape(-1, dim)), y_hw=_values(y_hw),
        X_hw_margin=scenario.to_unit(np.array(X_hm).reshape(-1, dim)), margin_hw=_values(m_hw), notes=notes,
    )


def prior_data(scenario: Scenario, sweep: RolloutBatch | None, trials: list[TrialRecord]) -> PriorData:
    """The :class:`PriorData` of a scenario from its sweep rollouts and its hardware trials.

    Raises:
        ModelError: no sweep rollouts, or none that stood.
    """
    if sweep is None or len(sweep) == 0:
        raise ModelError(f"the store has no sweep for scenario {scenario.name!r}; run a sweep of {scenario.path} "
                         "into this store first (gapgauge sweep)")
    notes: list[str] = []
    status = np.asarray(sweep.status)
    diverged = status == "diverged"
    n_diverged = int(diverged.sum())
    if n_diverged:
        notes.append(f"{n_diverged} diverged rollout(s) left out (no measurement)")
    objective = np.asarray(sweep.objective, dtype=float)
    ok = (status == "ok") & np.isfinite(objective)
    n_fell = int((status == "fell").sum())
    if n_fell:
        notes.append(f"{n_fell} fallen rollout(s) left out of the objective model (kept in the fall model)")
    if not ok.any():
        raise ModelError(f"the sweep of {scenario.name!r} has no rollout that stood; widen the bounds or run a "
                         "larger sweep (gapgauge sweep)")
    margin = np.asarray(sweep.features.get(MARGIN, np.full(len(sweep), np.nan)), dtype=float)
    has_margin = ~diverged & np.isfinite(margin)
    used = ok | has_margin
    unit = np.empty(np.shape(sweep.params))
    unit[used] = scenario.to_unit(np.asarray(sweep.params, dtype=float)[used])  # once: 10^6 rows take seconds
    hardware = hardware_data(scenario, trials)
    return PriorData(
        X_sim=unit[ok], y_sim=objective[ok],
        X_hw=hardware.X_hw, y_hw=hardware.y_hw,
        X_sim_margin=unit[has_margin], margin_sim=margin[has_margin],
        fell_sim_margin=(status == "fell")[has_margin],
        X_hw_margin=hardware.X_hw_margin, margin_hw=hardware.margin_hw,
        n_diverged=n_diverged, notes=notes, hardware_notes=hardware.notes,
    )


__all__ = ["MARGIN", "HardwareData", "PriorData", "hardware_data", "prior_data"]
