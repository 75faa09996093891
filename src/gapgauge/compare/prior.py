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
draw from separate seed streams), in a fraction of the time. :func:`refit_hardware` does the same from
the trials alone, for a caller that knows the sweep is unchanged without reading it
(:attr:`PriorFit.sweep_state`, set by :mod:`gapgauge.app.prior` from the store's run counts): a new
trial then costs the hardware levels (a few trials) and never a read or a hash of 10^5-10^6 rollouts.
The simulation levels' cost does not grow with the trials, nor the hardware levels' with the sweep.

Data (``PriorData``, ``HardwareData``, ``prior_data``, ``hardware_data``) live in
:mod:`gapgauge.compare.prior_data` and are re-exported here.

This module is pure: the store is read and written by :mod:`gapgauge.app.prior`. A :class:`PriorFit`
is a :class:`~gapgauge.results.Result` whose models travel as unstored fields; :meth:`PriorFit.to_state`
/ :meth:`PriorFit.from_state` add the models' JSON parameters and npz arrays (no pickle).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from ..errors import ModelError
from ..progress import Progress, or_silent
from ..results import Result
from ..scenario import Scenario
from .fall import FallModel
from .gp import ExactGP
from .kernels import Matern52, default_length_scale
from .multifidelity import POSTERIOR_ROWS, MultiFidelityGP
from .prior_data import MARGIN, HardwareData, PriorData, hardware_data, prior_data

MODEL_KIND = "prior"
LOG2PI = np.log(2.0 * np.pi)
STAGE = "prior"
DEFAULT_MAX_INDUCING = 300
# A sparse level's capacity must grow with its data for the approximation to stay good (Burt, Rasmussen and
# van der Wilk 2019, ICML, "Rates of convergence for sparse variational GP regression"). Measured on the
# push_recovery objective (benchmarks/prior_scale.py, mean held-out RMSE of 3 fit seeds): 300 inducing
# points 0.736 at 10^5 rollouts but 0.749 at 2 x 10^5; 600 give 0.729 at 2 x 10^5 and 0.730 at 10^6
# (replicated rows), for about 30% more fit time; a propose after a new trial then takes 1.0 s at 10^6.
LARGE_SWEEP = 100_000
LARGE_SWEEP_INDUCING = 600
UNSTORED = {"stored": False}
NO_MARGIN_NOTE = f"no {MARGIN} in the sweep: proposals carry no fall risk"

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
        simulation_notes: the part of ``notes`` about the sweep (kept when only the hardware is refitted).
        sweep_state: the caller's cheap key of the sweep the simulation levels were fitted on (the store's
            runs and row counts, see :func:`gapgauge.app.prior.sweep_state`); "" when unknown.
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
    simulation_notes: list[str] = field(default_factory=list)
    sweep_state: str = ""
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
    max_inducing: int | None = None,
    simulation_level: PriorFit | None = None,
    sweep_state: str = "",
    progress: Progress | None = None,
) -> PriorFit:
    """Fit the multi-fidelity prior and the fall model of ``scenario`` to ``data``.

    Args:
        scenario: the scenario (parameter names, for the result).
        data: the arrays (:func:`prior_data` builds them from a sweep and trials).
        seed: seeds the subsample, the inducing points and the optimiser restarts.
        max_inducing: inducing points of a sparse simulation level (None: :func:`inducing_for` the sweep; used above
            ``multifidelity.SPARSE_THRESHOLD`` = 500 points).
        simulation_level: a previous fit (with its models): when its ``simulation_key`` equals this
            data's, its simulation levels (and its seed) are kept and only the hardware levels refitted.
        sweep_state: the caller's key of the sweep ``data`` was read from, stored with the result.
        progress: called as ``progress(stage, step, 3)`` after each of the three steps.

    Raises:
        ModelError: ``seed`` or ``max_inducing`` out of range.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ModelError(f"seed must be a non-negative integer, got {seed!r}")
    if max_inducing is None:
        max_inducing = inducing_for(max(data.y_sim.size, data.margin_sim.size))
    if max_inducing < 1:
        raise ModelError(f"max_inducing must be at least 1, got {max_inducing}")
    started = time.perf_counter()
    key = data.simulation_key(max_inducing)
    if (simulation_level is not None and simulation_level.simulation_key == key
            and simulation_level.objective_model is not None
            and (simulation_level.fall_model is not None) == bool(data.margin_sim.size)):
        notes = list(data.notes) + ([] if data.margin_sim.size else [NO_MARGIN_NOTE])
        return refit_hardware(scenario, simulation_level, data.hardware(), sweep_state=sweep_state,
                              simulation_notes=notes, progress=progress, started=started)
    tick = or_silent(progress)
    # separate streams, so that a refit of the hardware level alone reproduces a full fit
    objective_seed, fall_seed = np.random.SeedSequence(int(seed)).spawn(2)
    objective = MultiFidelityGP(max_inducing=max_inducing, random_state=np.random.default_rng(objective_seed))
    objective.fit(data.X_sim, data.y_sim, data.X_hw, data.y_hw)
    tick(f"{STAGE}: objective model ({data.y_sim.size} simulated rollouts, {data.y_hw.size} hardware trials)", 1, 3)
    fall = None
    simulation_notes = list(data.notes)
    if data.margin_sim.size:
        fall = FallModel(max_inducing=max_inducing, random_state=np.random.default_rng(fall_seed)).fit(
            data.X_sim_margin, data.margin_sim, data.X_hw_margin, data.margin_hw, fell_low=data.fell_sim_margin)
    else:
        simulation_notes.append(NO_MARGIN_NOTE)
    largest = max(data.y_sim.size, data.margin_sim.size)
    if largest > POSTERIOR_ROWS:
        simulation_notes.append(f"the simulation levels' posteriors use a seeded random {POSTERIOR_ROWS:,} of up to "
                                f"{largest:,} rollouts (more do not change their held-out error)")
    tick(f"{STAGE}: fall model ({data.margin_sim.size} simulated margins, {data.margin_hw.size} hardware)", 2, 3)
    simulation = {
        "n_sim": int(data.y_sim.size), "n_sim_fall_model": int(data.margin_sim.size),
        "n_diverged": int(data.n_diverged), "simulation_level": type(objective.low_).__name__,
        "simulation_key": key, "seed": int(seed), "max_inducing": int(max_inducing),
        "simulation_notes": simulation_notes, "sweep_state": sweep_state,
    }
    return _result(scenario, objective, fall, data.hardware(), simulation, False, tick, started)


def refit_hardware(
    scenario: Scenario,
    previous: PriorFit,
    hardware: HardwareData,
    *,
    sweep_state: str = "",
    simulation_notes: list[str] | None = None,
    progress: Progress | None = None,
    started: float | None = None,
) -> PriorFit:
    """The prior of ``previous`` (with its models) with its simulation levels kept and its hardware levels
    refitted to ``hardware`` (:func:`hardware_data`): the fit a full :func:`fit_prior` with ``previous.seed``
    gives on the same sweep, without the sweep's rows.

    Args:
        scenario: the scenario (parameter names, for the result).
        previous: a fit on the sweep as it stands (the caller knows it is unchanged).
        hardware: the trials' arrays.
        sweep_state: stored with the result; "" keeps ``previous.sweep_state``.
        simulation_notes: the sweep's notes when the caller has the data; None keeps ``previous``'s.
        progress: called as ``progress(stage, step, 3)`` after each of the three steps.
        started: ``time.perf_counter()`` at the caller's start, for ``fit_seconds``.

    Raises:
        ModelError: ``previous`` was read without its models.
    """
    started = time.perf_counter() if started is None else started
    _, model = previous._models()
    tick = or_silent(progress)
    objective = model.copy_with_high(hardware.X_hw, hardware.y_hw, optimize=True)
    tick(f"{STAGE}: objective model (simulation level reused, {hardware.y_hw.size} hardware trials)", 1, 3)
    fall = None
    if previous.fall_model is not None:
        fall = previous.fall_model.copy_with_high(hardware.X_hw_margin, hardware.margin_hw)
    tick(f"{STAGE}: fall model (simulation level reused, {hardware.margin_hw.size} hardware)", 2, 3)
    simulation = {name: getattr(previous, name) for name in (
        "n_sim", "n_sim_fall_model", "n_diverged", "simulation_level", "simulation_key", "seed", "max_inducing",
        "simulation_notes", "sweep_state")}
    simulation["simulation_notes"] = list(previous.simulation_notes if simulation_notes is None else simulation_notes)
    if sweep_state:
        simulation["sweep_state"] = sweep_state
    return _result(scenario, objective, fall, hardware, simulation, True, tick, started)


def _result(
    scenario: Scenario, objective: MultiFidelityGP, fall: FallModel | None, hardware: HardwareData,
    simulation: dict[str, Any], reused: bool, tick: Progress, started: float,
) -> PriorFit:
    """The leave-one-out step and the :class:`PriorFit` of fitted models; ``simulation`` holds the fields
    that describe the simulation levels."""
    seed = simulation["seed"]
    loo = leave_one_out(objective, hardware.X_hw, hardware.y_hw, int(seed))
    tick(f"{STAGE}: leave-one-out over {hardware.y_hw.size} hardware trials", 3, 3)
    notes = [*simulation["simulation_notes"], *hardware.notes]
    if reused:
        notes.append(f"simulation level reused from the previous fit (same sweep rows, seed {seed}); "
                     "hardware level refitted")
    if hardware.y_hw.size == 0:
        notes.append("no hardware trials yet: the prior is the simulation level plus the discrepancy prior")
    return PriorFit(
        scenario_name=scenario.name, scenario_hash=scenario.content_hash,
        parameter_names=list(scenario.parameter_names),
        rho=objective.rho_, rho_interval=tuple(float(v) for v in objective.rho_interval_),
        discrepancy_scale=objective.discrepancy_scale_, offset=objective.offset_,
        hardware_noise_sd=objective.hardware_noise_sd_, loo=loo,
        n_hardware=int(hardware.y_hw.size), n_hardware_fall_model=int(hardware.margin_hw.size),
        hardware_key=hardware.hardware_key(), simulation_reused=reused,
        fit_seconds=time.perf_counter() - started, notes=notes,
        scenario=scenario, objective_model=objective, fall_model=fall, **simulation,
    )


def inducing_for(n_rollouts: int) -> int:
    """The default number of inducing points for a sweep of ``n_rollouts`` simulated rollouts (those of the
    fall model, the larger set): :data:`DEFAULT_MAX_INDUCING` up to :data:`LARGE_SWEEP`, then
    :data:`LARGE_SWEEP_INDUCING`."""
    return DEFAULT_MAX_INDUCING if n_rollouts <= LARGE_SWEEP else LARGE_SWEEP_INDUCING


__all__ = ["DEFAULT_MAX_INDUCING", "HardwareData", "PriorData", "PriorFit", "fit_prior", "hardware_data",
           "hardware_only_gp", "inducing_for", "leave_one_out", "prior_data", "refit_hardware"]
