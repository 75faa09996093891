"""fit_prior(): from the store's sweep and hardware trials to the fitted, stored prior.

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

Inputs are scaled to the unit cube of the scenario's full bounds (``scenario.to_unit``). The fitted
models are stored with ``store.save_model("prior", ...)`` as JSON parameters plus npz arrays
(inducing inputs, weight vectors, Cholesky factors, hyperparameters): enough to predict without
refitting (:func:`load_prior`).
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import GapgaugeError, ModelError
from ..scenario import Scenario
from ..store.codec import jsonable
from .fall import FallModel
from .gp import ExactGP
from .kernels import Matern52, default_length_scale
from .multifidelity import MultiFidelityGP

MODEL_KIND = "prior"
MARGIN = "margin_of_stability"
LOG2PI = np.log(2.0 * np.pi)


@dataclass
class PriorFit:
    """The fitted multi-fidelity prior of one scenario, its fall model and its diagnostics.

    Attributes:
        scenario: the scenario (parameter names, bounds, unit-cube scaling).
        objective_model: the multi-fidelity GP of the objective (unit-cube inputs).
        fall_model: the fall model, or None when no margin of stability was available.
        rho: posterior mean of rho (hardware = rho * simulation + discrepancy).
        rho_interval: its 95% interval (Gaussian posterior given the discrepancy hyperparameters).
        discrepancy_scale: sd of the discrepancy GP, objective units.
        loo: leave-one-out over hardware trials: ``{"multi_fidelity" | "hardware_only" |
            "simulation_only": {"rmse", "log_predictive_density"}}`` (values None when too few trials).
        fit_seconds: wall time of the fit, s.
        n_sim, n_sim_fall_model, n_hardware, n_hardware_fall_model, n_diverged: points used.
        seed: the seed of the fit.
        notes: what was left out and why.
    """

    scenario: Scenario
    objective_model: MultiFidelityGP
    fall_model: FallModel | None
    rho: float
    rho_interval: tuple[float, float]
    discrepancy_scale: float
    loo: dict[str, dict[str, float | None]]
    fit_seconds: float
    n_sim: int
    n_sim_fall_model: int
    n_hardware: int
    n_hardware_fall_model: int
    n_diverged: int
    seed: int
    notes: list[str] = field(default_factory=list)
    model_id: int | None = None

    def predict(self, X: np.ndarray, return_std: bool = True) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Hardware objective at parameters ``X (n x dim)`` in scenario units: mean (and latent sd)."""
        U = self.scenario.to_unit(np.atleast_2d(np.asarray(X, dtype=float)))
        return self.objective_model.predict(U, return_std=return_std)

    def predict_simulation(self, X: np.ndarray, return_std: bool = True) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """The simulation level alone at ``X (n x dim)`` (scenario units)."""
        return self.objective_model.predict_low(self.scenario.to_unit(X), return_std=return_std)

    def fall_probability(self, X: np.ndarray) -> np.ndarray:
        """Modelled probability of a fall on hardware at ``X (n x dim)`` (scenario units): ``(n,)``."""
        U = self.scenario.to_unit(np.atleast_2d(np.asarray(X, dtype=float)))
        if self.fall_model is None:
            return np.zeros(U.shape[0])
        return self.fall_model.fall_probability(U)

    def summary(self) -> dict[str, Any]:
        """Every number as JSON-ready values."""
        return {
            "scenario": self.scenario.name,
            "rho": self.rho,
            "rho_interval": list(self.rho_interval),
            "discrepancy_scale": self.discrepancy_scale,
            "offset": self.objective_model.offset_,
            "hardware_noise_sd": self.objective_model.hardware_noise_sd_,
            "fit_seconds": self.fit_seconds,
            "loo": self.loo,
            "n_sim": self.n_sim,
            "n_sim_fall_model": self.n_sim_fall_model,
            "n_hardware": self.n_hardware,
            "n_hardware_fall_model": self.n_hardware_fall_model,
            "n_diverged": self.n_diverged,
            "simulation_level": type(self.objective_model.low_).__name__,
            "seed": self.seed,
            "notes": list(self.notes),
            "model_id": self.model_id,
        }

    def write_json(self, path: str | Path) -> None:
        """Write :meth:`summary` as JSON to ``path``."""
        write_json(path, self.summary())


def write_json(path: str | Path, data: dict[str, Any]) -> None:
    """Write ``data`` as indented JSON; an unwritable path is a user error."""
    try:
        Path(path).write_text(json.dumps(jsonable(data), indent=2) + "\n", encoding="utf-8")
    except OSError as exc:
        raise GapgaugeError(f"{path}: cannot write the JSON ({exc.strerror}); pick another path") from None


# ---- data from the store ---------------------------------------------------------------------


@dataclass
class _Data:
    X_sim: np.ndarray
    y_sim: np.ndarray
    X_sim_margin: np.ndarray
    margin_sim: np.ndarray
    fell_sim_margin: np.ndarray
    X_hw: np.ndarray
    y_hw: np.ndarray
    X_hw_margin: np.ndarray
    margin_hw: np.ndarray
    n_diverged: int
    notes: list[str]


def _open_store(store: Any) -> Any:
    if isinstance(store, (str, Path)):
        from ..store import Store

        return Store(store, create=False)
    return store


def _read(scenario: Scenario, store: Any) -> _Data:
    no_sweep = hasattr(store, "runs") and not store.runs(scenario.content_hash, kind="sweep")
    batch = None if no_sweep else store.rollouts(scenario.content_hash, kinds=("sweep",))
    if batch is None or len(batch) == 0:
        raise ModelError(
            f"the store has no sweep for scenario {scenario.name!r}; run `gapgauge sweep {scenario.path}` "
            "with the same --store first"
        )
    notes: list[str] = []
    status = np.asarray(batch.status)
    diverged = status == "diverged"
    n_diverged = int(diverged.sum())
    if n_diverged:
        notes.append(f"{n_diverged} diverged rollout(s) left out (no measurement)")
    objective = np.asarray(batch.objective, dtype=float)
    ok = (status == "ok") & np.isfinite(objective)
    n_fell = int((status == "fell").sum())
    if n_fell:
        notes.append(f"{n_fell} fallen rollout(s) left out of the objective model (kept in the fall model)")
    if not ok.any():
        raise ModelError(
            f"the sweep of {scenario.name!r} has no rollout that stood; widen the bounds or run a larger "
            "sweep (gapgauge sweep)"
        )
    margin = np.asarray(batch.features.get(MARGIN, np.full(len(batch), np.nan)), dtype=float)
    has_margin = ~diverged & np.isfinite(margin)
    params = np.asarray(batch.params, dtype=float)

    trials = list(store.trials(scenario.content_hash))
    X_hw, y_hw, X_hm, m_hw = [], [], [], []
    n_fell_hw = 0
    for trial in trials:
        x = scenario.params_from_mapping(trial.params, source=f"trial {trial.source_path}")
        fell = trial.outcome == "fell" or bool(trial.features.get("fell", 0.0) or 0.0)
        value = trial.objective
        if fell:
            n_fell_hw += 1
        elif value is not None and np.isfinite(value):
            X_hw.append(x)
            y_hw.append(float(value))
        margin_value = trial.features.get(MARGIN)
        if margin_value is not None and np.isfinite(margin_value):
            X_hm.append(x)
            m_hw.append(float(margin_value))
    if n_fell_hw:
        notes.append(f"{n_fell_hw} hardware trial(s) that fell left out of the objective model")
    dim = scenario.dim
    return _Data(
        X_sim=scenario.to_unit(params[ok]),
        y_sim=objective[ok],
        X_sim_margin=scenario.to_unit(params[has_margin]),
        margin_sim=margin[has_margin],
        fell_sim_margin=(status == "fell")[has_margin],
        X_hw=scenario.to_unit(np.array(X_hw).reshape(-1, dim)),
        y_hw=np.array(y_hw),
        X_hw_margin=scenario.to_unit(np.array(X_hm).reshape(-1, dim)),
        margin_hw=np.array(m_hw),
        n_diverged=n_diverged,
        notes=notes,
    )


# ---- leave-one-out ---------------------------------------------------------------------------


def hardware_only_gp(dim: int, seed: int) -> ExactGP:
    """The comparison GP on hardware trials alone: Matern 5/2 ARD on standardised outputs with a
    constant mean ~ N(0, 1) and weak log-normal hyperpriors (signal sd median 1, length-scales median
    ``default_length_scale(dim)``, noise sd median 0.3), as plain Bayesian optimisation would use."""
    ell = default_length_scale(dim)
    hyperprior = np.array([[0.0, 2.0], *[[np.log(ell), 1.0]] * dim, [2.0 * np.log(0.3), 3.0]])
    return ExactGP(
        Matern52(1.0, np.full(dim, ell)),
        0.09,
        normalize_y=True,
        hyperprior=hyperprior,
        basis_prior=(np.zeros(1), np.eye(1)),
        random_state=seed,
    )


def _score(y: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> dict[str, float]:
    sd = np.maximum(sd, 1e-12)
    log_density = -0.5 * LOG2PI - np.log(sd) - 0.5 * ((y - mean) / sd) ** 2
    return {
        "rmse": float(np.sqrt(np.mean((y - mean) ** 2))),
        "log_predictive_density": float(np.mean(log_density)),
    }


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
    mf = np.array(
        [
            model.copy_with_high(X[m], y[m], optimize=True).predict(X[i : i + 1], True, observation=True)
            for i, m in enumerate(keep)
        ]
    )[:, :, 0]
    sim_mean, sim_sd = model.predict_low(X, return_std=True, observation=True)
    out = {"multi_fidelity": _score(y, mf[:, 0], mf[:, 1]), "simulation_only": _score(y, sim_mean, sim_sd)}
    if k >= 2:
        dim = X.shape[1]
        hw = []
        for i, m in enumerate(keep):
            gp = hardware_only_gp(dim, seed).fit(X[m], y[m], basis=np.ones((k - 1, 1)))
            hw.append(gp.predict(X[i : i + 1], return_std=True, basis=np.ones((1, 1)), observation=True))
        hw_arr = np.array(hw)[:, :, 0]
        out["hardware_only"] = _score(y, hw_arr[:, 0], hw_arr[:, 1])
    else:
        out["hardware_only"] = dict(empty)
    return out


# ---- fit, store, load ------------------------------------------------------------------------


def fit_prior(
    scenario: Scenario,
    store: Any,
    *,
    seed: int = 0,
    max_inducing: int = 300,
    progress: bool = True,
) -> PriorFit:
    """Fit the multi-fidelity prior and the fall model of ``scenario`` from ``store``; store them.

    Args:
        scenario: the loaded scenario.
        store: a ``gapgauge.store.Store`` or the path of its file.
        seed: seeds the subsample, the inducing points and the optimiser restarts; stored.
        max_inducing: inducing points of the simulation level (sparse GP above 2,000 rollouts).
        progress: print one line per step on stderr.

    Raises:
        ModelError: no sweep for the scenario yet, or no rollout that stood.
    """
    started = time.perf_counter()
    say = _progress(progress)
    store = _open_store(store)
    data = _read(scenario, store)
    rng = np.random.default_rng(seed)
    say(f"objective prior: {data.y_sim.size} simulated rollouts, {data.y_hw.size} hardware trials")
    objective = MultiFidelityGP(max_inducing=max_inducing, random_state=rng).fit(
        data.X_sim, data.y_sim, data.X_hw, data.y_hw
    )
    fall = None
    if data.margin_sim.size:
        say(f"fall model: {data.margin_sim.size} simulated margins, {data.margin_hw.size} hardware margins")
        fall = FallModel(max_inducing=max_inducing, random_state=rng).fit(
            data.X_sim_margin, data.margin_sim, data.X_hw_margin, data.margin_hw, fell_low=data.fell_sim_margin
        )
    else:
        data.notes.append(f"no {MARGIN} in the store: proposals carry no fall risk")
    say("leave-one-out over hardware trials")
    loo = leave_one_out(objective, data.X_hw, data.y_hw, seed)
    if data.y_hw.size == 0:
        data.notes.append("no hardware trials yet: the prior is the simulation level plus the discrepancy prior")
    fit = PriorFit(
        scenario=scenario,
        objective_model=objective,
        fall_model=fall,
        rho=objective.rho_,
        rho_interval=tuple(float(v) for v in objective.rho_interval()),
        discrepancy_scale=objective.discrepancy_scale_,
        loo=loo,
        fit_seconds=0.0,
        n_sim=int(data.y_sim.size),
        n_sim_fall_model=int(data.margin_sim.size),
        n_hardware=int(data.y_hw.size),
        n_hardware_fall_model=int(data.margin_hw.size),
        n_diverged=data.n_diverged,
        seed=int(seed),
        notes=data.notes,
    )
    fit.fit_seconds = time.perf_counter() - started
    params, arrays = _to_state(fit)
    fit.model_id = store.save_model(MODEL_KIND, scenario.content_hash, params, arrays)
    say(f"stored as model {fit.model_id} ({fit.fit_seconds:.1f} s)")
    return fit


def _to_state(fit: PriorFit) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    summary = fit.summary()
    summary.pop("model_id")
    obj_params, obj_arrays = fit.objective_model.to_state()
    params: dict[str, Any] = {
        "summary": summary,
        "parameter_names": fit.scenario.parameter_names,
        "objective": obj_params,
        "fall": None,
    }
    arrays = {f"objective.{k}": np.asarray(v) for k, v in obj_arrays.items()}
    if fit.fall_model is not None:
        fall_params, fall_arrays = fit.fall_model.to_state()
        params["fall"] = fall_params
        arrays.update({f"fall.{k}": np.asarray(v) for k, v in fall_arrays.items()})
    return jsonable(params), arrays


def load_prior(scenario: Scenario, store: Any) -> PriorFit:
    """The last prior stored for ``scenario``, rebuilt from its JSON and npz without refitting.

    Raises:
        ModelError: none stored yet (run ``gapgauge prior``), or stored for other parameters.
    """
    store = _open_store(store)
    loaded = store.load_model(MODEL_KIND, scenario.content_hash)
    if loaded is None:
        raise ModelError(
            f"no fitted prior for scenario {scenario.name!r} in the store; run `gapgauge prior {scenario.path}` first"
        )
    params, arrays = loaded
    arrays = arrays or {}
    if params.get("parameter_names") != scenario.parameter_names:
        raise ModelError(
            f"the stored prior of {scenario.name!r} was fitted for other parameters; "
            f"refit it with `gapgauge prior {scenario.path}`"
        )
    objective = MultiFidelityGP.from_state(
        params["objective"], {k[10:]: v for k, v in arrays.items() if k.startswith("objective.")}
    )
    fall = None
    if params.get("fall") is not None:
        fall = FallModel.from_state(params["fall"], {k[5:]: v for k, v in arrays.items() if k.startswith("fall.")})
    s = params["summary"]
    return PriorFit(
        scenario=scenario,
        objective_model=objective,
        fall_model=fall,
        rho=float(s["rho"]),
        rho_interval=tuple(s["rho_interval"]),
        discrepancy_scale=float(s["discrepancy_scale"]),
        loo=s["loo"],
        fit_seconds=float(s["fit_seconds"]),
        n_sim=int(s["n_sim"]),
        n_sim_fall_model=int(s["n_sim_fall_model"]),
        n_hardware=int(s["n_hardware"]),
        n_hardware_fall_model=int(s["n_hardware_fall_model"]),
        n_diverged=int(s["n_diverged"]),
        seed=int(s["seed"]),
        notes=list(s["notes"]),
    )


def _progress(enabled: bool):
    if not enabled:
        return lambda text: None
    from rich.console import Console

    console = Console(stderr=True, highlight=False)
    return lambda text: console.print(f"[dim]prior:[/] {text}")
