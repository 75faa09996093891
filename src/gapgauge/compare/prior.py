"""fit_prior(): from a sweep's and the hardware trials' arrays to the fitted multi-fidelity prior.

The objective prior is :class:`~gapgauge.compare.multifidelity.MultiFidelityGP` (Kennedy and
O'Hagan 2000, fitted recursively as in Le Gratiet and Garnier 2014) on

- simulation: the sweep's rollouts that neither fell nor diverged (a fallen rollout's objective is
  the scenario's ``fall_value``, a flag rather than a measurement, so it is left to the fall model);
- hardware: the trials that did not fall, with a finite objective.

The fall model (:class:`~gapgauge.compare.fall.FallModel`) takes the margin of stability of every
non-diverged rollout and every trial that has one. Diverged rollouts carry no measurement and are
left out, with a note. Beside the prior, on the same trials, a hardware-only GP (the same Matern 5/2
ARD kernel, weak priors, no simulation) and the simulation level alone are compared by leave-one-out
over the hardware trials: root-mean-square error and mean log predictive density of the left-out
trial's objective, so the user sees whether the simulation helps.

Inputs are scaled to the unit cube of the scenario's full bounds (``scenario.to_unit``). The simulation
level is the sparse GP above ``multifidelity.SPARSE_THRESHOLD`` (500) points of a model, the exact GP
at or below it.

Reuse. The simulation level depends on the sweep alone; :attr:`PriorFit.simulation_key` is a hash of
the simulated rows the fit used (and ``max_inducing``). Given a previous fit with the same key
(``simulation_level``), :func:`fit_prior` keeps its simulation levels and refits the hardware levels
only: the result is the one a full fit with that fit's seed gives (the objective and the fall model
draw from separate seed streams), in a fraction of the time.

This module is pure: the store is read and written by :mod:`gapgauge.app.prior`. A :class:`PriorFit`
is a :class:`~gapgauge.results.Result` whose models travel as unstored fields; :meth:`PriorFit.to_state`
/ :meth:`PriorFit.from_state` add the models' JSON parameters and npz arrays (no pickle).
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from ..errors import ModelError
from ..progress import Progress, or_silent
from ..records import RolloutBatch, TrialRecord
from ..results import Result
from ..scenario import Scenario
from .fall import FallModel
from .gp import ExactGP
from .kernels import Matern52, default_length_scale
from .multifidelity import MultiFidelityGP

MODEL_KIND = "prior"
MARGIN = "margin_of_stability"
LOG2PI = np.log(2.0 * np.pi)
STAGE = "prior"
DEFAULT_MAX_INDUCING = 300
UNSTORED = {"stored": False}


# ---- data ----------------------------------------------------------------------------------


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
        notes: what was left out and why.
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

    def __post_init__(self) -> None:
        dim = np.atleast_2d(self.X_sim).shape[1]

        def rows(X: np.ndarray | None) -> np.ndarray:
            return np.asarray([] if X is None else X, dtype=float).reshape(-1, dim)

        def values(y: np.ndarray | None, dtype: type = float) -> np.ndarray:
            return np.asarray([] if y is None else y, dtype=dtype).ravel()

        self.X_sim, self.y_sim = rows(self.X_sim), values(self.y_sim)
        self.X_hw, self.y_hw = rows(self.X_hw), values(self.y_hw)
        self.X_sim_margin, self.margin_sim = rows(self.X_sim_margin), values(self.margin_sim)
        fell = np.zeros(self.margin_sim.size) if self.fell_sim_margin is None else self.fell_sim_margin
        self.fell_sim_margin = values(fell, bool)
        self.X_hw_margin, self.margin_hw = rows(self.X_hw_margin), values(self.margin_hw)
        for name, X, y in (("sim", self.X_sim, self.y_sim), ("hw", self.X_hw, self.y_hw),
                           ("sim_margin", self.X_sim_margin, self.margin_sim),
                           ("hw_margin", self.X_hw_margin, self.margin_hw)):
            if X.shape[0] != y.size:
                raise ValueError(f"X_{name} has {X.shape[0]} rows but its targets have {y.size}")

    def simulation_key(self, max_inducing: int) -> str:
        """sha256 of the simulated rows (objective and margin) and ``max_inducing``: what the simulation
        levels depend on."""
        return _digest([self.X_sim, self.y_sim, self.X_sim_margin, self.margin_sim,
                        self.fell_sim_margin.astype(float), np.array([float(max_inducing)])])

    def hardware_key(self) -> str:
        """sha256 of the hardware rows (objective and margin): what the hardware levels depend on."""
        return _digest([self.X_hw, self.y_hw, self.X_hw_margin, self.margin_hw])


def _digest(arrays: list[np.ndarray]) -> str:
    h = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a, dtype=float)
        h.update(repr(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()


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
    params = np.asarray(sweep.params, dtype=float)
    X_hw, y_hw, X_hm, m_hw = [], [], [], []
    n_fell_hw = 0
    for trial in trials:
        x = scenario.params_from_mapping(trial.params, source=f"trial {trial.source_path}")
        fell = trial.outcome == "fell" or bool(trial.features.get("fell", 0.0) or 0.0)
        if fell:
            n_fell_hw += 1
        elif trial.objective is not None and np.isfinite(trial.objective):
            X_hw.append(x)
            y_hw.append(float(trial.objective))
        value = trial.features.get(MARGIN)
        if value is not None and np.isfinite(value):
            X_hm.append(x)
            m_hw.append(float(value))
    if n_fell_hw:
        notes.append(f"{n_fell_hw} hardware trial(s) that fell left out of the objective model")
    dim = scenario.dim
    return PriorData(
        X_sim=scenario.to_unit(params[ok]), y_sim=objective[ok],
        X_hw=scenario.to_unit(np.array(X_hw).reshape(-1, dim)), y_hw=np.array(y_hw),
        X_sim_margin=scenario.to_unit(params[has_margin]), margin_sim=margin[has_margin],
        fell_sim_margin=(status == "fell")[has_margin],
        X_hw_margin=scenario.to_unit(np.array(X_hm).reshape(-1, dim)), margin_hw=np.array(m_hw),
        n_diverged=n_diverged, notes=notes,
    )


# ---- the result ----------------------------------------------------------------------------


@dataclass
class PriorFit(Result):
    """The fitted multi-fidelity prior of one scenario, its fall model and its diagnostics.

    Attributes:
        scenario_name, scenario_hash, parameter_names: what it was fitted for.
        rho: posterior mean of rho (hardware = rho * simulation + discrepancy).
        rho_interval: its 95% interval (Gaussian posterior given the discrepancy hyperparameters).
        discrepancy_scale: sd of the discrepancy GP, objective units.
        offset: posterior mean of the constant offset, objective units.
        hardware_noise_sd: the hardware level's noise sd, objective units.
        loo: leave-one-out over hardware trials: ``{"multi_fidelity" | "hardware_only" |
            "simulation_only": {"rmse", "log_predictive_density"}}`` (values None when too few trials).
        fit_seconds: wall time of the fit, s.
        n_sim, n_sim_fall_model, n_hardware, n_hardware_fall_model, n_diverged: points used.
        simulation_level: class of the objective's simulation-level GP (``SparseGP`` above
            ``SPARSE_THRESHOLD`` rollouts, else ``ExactGP``).
        simulation_key, hardware_key: hashes of the simulated and hardware rows used
            (:meth:`PriorData.simulation_key`, :meth:`PriorData.hardware_key`).
        simulation_reused: the simulation levels were those of a previous fit on the same sweep.
        seed, max_inducing: the fit's settings.
        notes: what was left out and why.
        scenario, objective_model, fall_model: the live scenario and models (not stored in the JSON;
            :meth:`to_state` / :meth:`from_state` carry the models); ``fall_model`` is None when no
            margin of stability was available.
        model_id: the store's id of the saved prior, when saved (not stored).
    """

    kind: ClassVar[str] = "prior"
    schema_version: ClassVar[int] = 1

    scenario_name: str
    scenario_hash: str
    parameter_names: list[str]
    rho: float
    rho_interval: tuple[float, float]
    discrepancy_scale: float
    offset: float
    hardware_noise_sd: float
    loo: dict[str, dict[str, float | None]]
    n_sim: int
    n_sim_fall_model: int
    n_hardware: int
    n_hardware_fall_model: int
    n_diverged: int
    simulation_level: str
    simulation_key: str
    hardware_key: str
    seed: int
    max_inducing: int
    simulation_reused: bool = False
    fit_seconds: float = 0.0
    notes: list[str] = field(default_factory=list)
    scenario: Scenario | None = field(default=None, metadata=UNSTORED)
    objective_model: MultiFidelityGP | None = field(default=None, metadata=UNSTORED)
    fall_model: FallModel | None = field(default=None, metadata=UNSTORED)
    model_id: int | None = field(default=None, metadata=UNSTORED)

    def _models(self) -> tuple[Scenario, MultiFidelityGP]:
        if self.scenario is None or self.objective_model is None:
            raise ModelError("this prior was read without its models; load it with gapgauge.app.prior.load_prior")
        return self.scenario, self.objective_model

    def predict(self, X: np.ndarray, return_std: bool = True) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Hardware objective at parameters ``X (n x dim)`` in scenario units: mean (and latent sd)."""
        scenario, model = self._models()
        return model.predict(scenario.to_unit(np.atleast_2d(np.asarray(X, dtype=float))), return_std=return_std)

    def predict_simulation(self, X: np.ndarray, return_std: bool = True) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """The simulation level alone at ``X (n x dim)`` (scenario units)."""
        scenario, model = self._models()
        return model.predict_low(scenario.to_unit(np.atleast_2d(np.asarray(X, dtype=float))), return_std=return_std)

    def fall_probability(self, X: np.ndarray) -> np.ndarray:
        """Modelled probability of a fall on hardware at ``X (n x dim)`` (scenario units): ``(n,)``."""
        scenario, _ = self._models()
        U = scenario.to_unit(np.atleast_2d(np.asarray(X, dtype=float)))
        return np.zeros(U.shape[0]) if self.fall_model is None else self.fall_model.fall_probability(U)

    def to_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """:meth:`to_dict` plus the models' parameters (key ``"models"``) and their npz arrays."""
        _, objective = self._models()
        obj_params, obj_arrays = objective.to_state()
        models: dict[str, Any] = {"objective": obj_params, "fall": None}
        arrays = {f"objective.{k}": np.asarray(v) for k, v in obj_arrays.items()}
        if self.fall_model is not None:
            models["fall"], fall_arrays = self.fall_model.to_state()
            arrays.update({f"fall.{k}": np.asarray(v) for k, v in fall_arrays.items()})
        return {**self.to_dict(), "models": models}, arrays

    @classmethod
    def from_state(cls, params: dict[str, Any], arrays: dict[str, np.ndarray], scenario: Scenario) -> PriorFit:
        """The fit of :meth:`to_state`, models rebuilt without refitting.

        Raises:
            ModelError: the models are missing, or were fitted for other parameters than ``scenario``'s.
        """
        fit = cls.from_dict({k: v for k, v in params.items() if k != "models"})
        models = params.get("models")
        if not models:
            raise ModelError(f"the stored prior of {scenario.name!r} has no models; refit it (gapgauge prior)")
        if fit.parameter_names != scenario.parameter_names:
            raise ModelError(f"the stored prior of {scenario.name!r} was fitted for other parameters; refit it "
                             "(gapgauge prior)")
        fit.scenario = scenario
        fit.objective_model = MultiFidelityGP.from_state(models["objective"], _prefixed(arrays, "objective."))
        if models.get("fall") is not None:
            fit.fall_model = FallModel.from_state(models["fall"], _prefixed(arrays, "fall."))
        return fit


def _prefixed(arrays: dict[str, np.ndarray], prefix: str) -> dict[str, np.ndarray]:
    return {k[len(prefix):]: v for k, v in arrays.items() if k.startswith(prefix)}


# ---- leave-one-out ---------------------------------------------------------------------------


def hardware_only_gp(dim: int, seed: int) -> ExactGP:
    """The comparison GP on hardware trials alone: Matern 5/2 ARD on standardised outputs with a
    constant mean ~ N(0, 1) and weak log-normal hyperpriors (signal sd median 1, length-scales median
    ``default_length_scale(dim)``, noise sd median 0.3), as plain Bayesian optimisation would use."""
    ell = default_length_scale(dim)
    hyperprior = np.array([[0.0, 2.0], *[[np.log(ell), 1.0]] * dim, [2.0 * np.log(0.3), 3.0]])
    return ExactGP(Matern52(1.0, np.full(dim, ell)), 0.09, normalize_y=True, hyperprior=hyperprior,
                   basis_prior=(np.zeros(1), np.eye(1)), random_state=seed)


def _score(y: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> dict[str, float]:
    sd = np.maximum(sd, 1e-12)
    log_density = -0.5 * LOG2PI - np.log(sd) - 0.5 * ((y - mean) / sd) ** 2
    return {"rmse": float(np.sqrt(np.mean((y - mean) ** 2))), "log_predictive_density": float(np.mean(log_density))}


def leave_one_out(
    model: MultiFidelityGP, X: np.ndarray, y: np.ndarray, seed: int
) -> dict[str, dict[str, float | None]]:
    """Leave-one-out over hardware trials ``X (k x dim)`` (unit cube), ``y (k,)`` objective units.

    Each model predicts the left-out trial's observation (latent variance plus its noise); the
    multi-fidelity and hardware-only models are refitted, hyperparameters included, without it.
    """
    empty = {"rmse": None, "log_predictive_density": None}
    k = y.size
    if k == 0:
        return {"multi_fidelity": dict(empty), "hardware_only": dict(empty), "simulation_only": dict(empty)}
    keep = [np.arange(k) != i for i in range(k)]
    mf = np.array([model.copy_with_high(X[m], y[m], optimize=True).predict(X[i: i + 1], True, observation=True)
                   for i, m in enumerate(keep)])[:, :, 0]
    sim_mean, sim_sd = model.predict_low(X, return_std=True, observation=True)
    out = {"multi_fidelity": _score(y, mf[:, 0], mf[:, 1]), "simulation_only": _score(y, sim_mean, sim_sd)}
    if k >= 2:
        hw = [hardware_only_gp(X.shape[1], seed).fit(X[m], y[m], basis=np.ones((k - 1, 1))).predict(
            X[i: i + 1], return_std=True, basis=np.ones((1, 1)), observation=True) for i, m in enumerate(keep)]
        hw_arr = np.array(hw)[:, :, 0]
        out["hardware_only"] = _score(y, hw_arr[:, 0], hw_arr[:, 1])
    else:
        out["hardware_only"] = dict(empty)
    return out


# ---- the fit ---------------------------------------------------------------------------------


def fit_prior(
    scenario: Scenario,
    data: PriorData,
    *,
    seed: int = 0,
    max_inducing: int = DEFAULT_MAX_INDUCING,
    simulation_level: PriorFit | None = None,
    progress: Progress | None = None,
) -> PriorFit:
    """Fit the multi-fidelity prior and the fall model of ``scenario`` to ``data``.

    Args:
        scenario: the scenario (parameter names, for the result).
        data: the arrays (:func:`prior_data` builds them from a sweep and trials).
        seed: seeds the subsample, the inducing points and the optimiser restarts.
        max_inducing: inducing points of a sparse simulation level (used above
            ``multifidelity.SPARSE_THRESHOLD`` = 500 points).
        simulation_level: a previous fit (with its models): when its ``simulation_key`` equals this
            data's, its simulation levels (and its seed) are kept and only the hardware levels refitted.
        progress: called as ``progress(stage, step, 3)`` after each of the three steps.

    Raises:
        ModelError: ``seed`` or ``max_inducing`` out of range.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ModelError(f"seed must be a non-negative integer, got {seed!r}")
    if max_inducing < 1:
        raise ModelError(f"max_inducing must be at least 1, got {max_inducing}")
    started = time.perf_counter()
    tick = or_silent(progress)
    notes = list(data.notes)
    key = data.simulation_key(max_inducing)
    reuse = (simulation_level is not None and simulation_level.simulation_key == key
             and simulation_level.objective_model is not None
             and (simulation_level.fall_model is not None) == bool(data.margin_sim.size))
    if reuse:
        seed = simulation_level.seed
        objective = simulation_level.objective_model.copy_with_high(data.X_hw, data.y_hw, optimize=True)
        notes.append(f"simulation level reused from the previous fit (same sweep rows, seed {seed}); "
                     "hardware level refitted")
    else:
        # separate streams, so that a refit of the hardware level alone reproduces a full fit
        objective_seed, fall_seed = np.random.SeedSequence(int(seed)).spawn(2)
        objective = MultiFidelityGP(max_inducing=max_inducing, random_state=np.random.default_rng(objective_seed))
        objective.fit(data.X_sim, data.y_sim, data.X_hw, data.y_hw)
    tick(f"{STAGE}: objective model ({data.y_sim.size} simulated rollouts, {data.y_hw.size} hardware trials)", 1, 3)
    fall = None
    if data.margin_sim.size:
        if reuse:
            fall = simulation_level.fall_model.copy_with_high(data.X_hw_margin, data.margin_hw)
        else:
            fall = FallModel(max_inducing=max_inducing, random_state=np.random.default_rng(fall_seed)).fit(
                data.X_sim_margin, data.margin_sim, data.X_hw_margin, data.margin_hw, fell_low=data.fell_sim_margin)
    else:
        notes.append(f"no {MARGIN} in the sweep: proposals carry no fall risk")
    tick(f"{STAGE}: fall model ({data.margin_sim.size} simulated margins, {data.margin_hw.size} hardware)", 2, 3)
    loo = leave_one_out(objective, data.X_hw, data.y_hw, int(seed))
    tick(f"{STAGE}: leave-one-out over {data.y_hw.size} hardware trials", 3, 3)
    if data.y_hw.size == 0:
        notes.append("no hardware trials yet: the prior is the simulation level plus the discrepancy prior")
    return PriorFit(
        scenario_name=scenario.name, scenario_hash=scenario.content_hash,
        parameter_names=list(scenario.parameter_names),
        rho=objective.rho_, rho_interval=tuple(float(v) for v in objective.rho_interval_),
        discrepancy_scale=objective.discrepancy_scale_, offset=objective.offset_,
        hardware_noise_sd=objective.hardware_noise_sd_, loo=loo,
        n_sim=int(data.y_sim.size), n_sim_fall_model=int(data.margin_sim.size), n_hardware=int(data.y_hw.size),
        n_hardware_fall_model=int(data.margin_hw.size), n_diverged=int(data.n_diverged),
        simulation_level=type(objective.low_).__name__, simulation_key=key, hardware_key=data.hardware_key(),
        seed=int(seed), max_inducing=int(max_inducing), simulation_reused=bool(reuse),
        fit_seconds=time.perf_counter() - started, notes=notes,
        scenario=scenario, objective_model=objective, fall_model=fall,
    )

