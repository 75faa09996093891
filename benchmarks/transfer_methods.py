"""The four tuning methods of benchmarks/transfer.py, each run against one stand-in robot.

- ``gapgauge``: the sweep prior (:func:`gapgauge.compare.prior.fit_prior`, no hardware trials) and the
  real :func:`gapgauge.compare.propose.propose` policy (EI x P(no fall) in the safe bounds, fall-risk
  limit 0.05). After every trial the hardware level of the objective model and of the fall model is
  refitted (hyperparameters by maximum a posteriori) on all trials so far, the simulation level kept
  fixed (``MultiFidelityGP.copy_with_high``). Trials that fell enter the fall model only, as in
  ``fit_prior``.
- ``cold_start``: the same GP and acquisition (:func:`maximise_acquisition`, 1,024 Sobol candidates and
  6 local searches, as ``propose``) on the stand-in alone: the objective is
  :func:`gapgauge.compare.prior.hardware_only_gp`; the fall model is the same GP on the hardware
  margins of stability, with the threshold and floor of :class:`gapgauge.compare.fall.FallModel`
  computed from the hardware outcomes (Youden's J; Hof's 0 while only one outcome has been seen) and
  ``P(fall) = Phi((threshold - mu) / sd)``. First trial: a uniform random point of the safe box.
- ``zero_shot``: first trial at the simulation's optimum (the lowest simulation-level mean of the sweep
  prior inside the safe box, among points whose prior fall risk is at most the limit), then the
  cold-start BO seeded with that trial.
- ``random``: uniform random points of the safe box (unit cube of the full bounds, log axes in log).

When no candidate meets the fall-risk limit (``propose`` would stop and say so), the simulated engineer
lifts the limit for that one trial; such trials are counted (``limit_lifted``).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field, replace

import numpy as np
from scipy.optimize import minimize
from scipy.special import ndtr
from transfer_standin import StandinTruth, safe_sobol

from gapgauge.compare.acquisition import maximise_acquisition
from gapgauge.compare.fall import youden_threshold
from gapgauge.compare.prior import PriorFit, hardware_only_gp
from gapgauge.compare.propose import propose, safe_unit_bounds
from gapgauge.errors import ModelError

METHODS = ("gapgauge", "cold_start", "zero_shot", "random")
MAX_FALL_RISK = 0.05  # gapgauge propose's default
DEFAULT_SPREAD = 0.05  # m: margin spread assumed before two standing hardware trials (about a third of the foot)


@dataclass
class TuningRun:
    """One tuning run: per trial ``t`` (in order), the unit-cube parameters and the clean outcome."""

    method: str
    profile: str
    seed: int
    U: np.ndarray
    objective: np.ndarray
    fell: np.ndarray
    success: np.ndarray
    scored: np.ndarray
    limit_lifted: np.ndarray
    seconds: float
    notes: list[str] = field(default_factory=list)


class Observer:
    """Runs trials on the stand-in and says what its logs would report (module docstring of
    ``transfer_standin``). Trial ``t``'s sensor noise is drawn from ``default_rng([seed, profile, t])``,
    so every method sees the same noise sequence on a given seed and profile."""

    def __init__(self, truth: StandinTruth, noise: dict[str, float], seed: int, profile_index: int):
        self.truth, self.noise, self.seed, self.profile_index = truth, noise, seed, profile_index
        self.U, self.outcomes, self.y, self.margin = [], [], [], []

    def run(self, U: np.ndarray) -> None:
        U = np.atleast_2d(U)
        out = self.truth.evaluate(U)
        for i in range(U.shape[0]):
            t = len(self.y)
            e = np.random.default_rng([self.seed, self.profile_index, t]).standard_normal(2)
            self.U.append(U[i])
            self.outcomes.append({k: getattr(out, k)[i] for k in ("objective", "fell", "success", "scored")})
            self.y.append(out.objective[i] + self.noise["objective_offset"] + self.noise["objective_sd"] * e[0])
            self.margin.append(out.margin[i] + self.noise["margin_offset"] + self.noise["margin_sd"] * e[1])

    @property
    def X(self) -> np.ndarray:
        return np.array(self.U).reshape(len(self.U), -1)

    @property
    def fell(self) -> np.ndarray:
        return np.array([o["fell"] for o in self.outcomes], dtype=bool)

    def result(self, method: str, profile: str, lifted: list[bool], seconds: float) -> TuningRun:
        def col(key: str, dtype=float) -> np.ndarray:
            return np.array([o[key] for o in self.outcomes], dtype=dtype)

        return TuningRun(method, profile, self.seed, self.X, col("objective"), col("fell", bool),
                         col("success", bool), col("scored"), np.array(lifted, dtype=bool), seconds)


# ---- gapgauge ------------------------------------------------------------------------------------


def run_gapgauge(base: PriorFit, obs: Observer, max_trials: int, rng: np.random.Generator) -> list[bool]:
    scenario = base.scenario
    lifted = []
    prior = base
    for t in range(max_trials):
        if t:
            X, fell = obs.X, obs.fell
            y = np.array(obs.y)
            objective = base.objective_model.copy_with_high(X[~fell], y[~fell], optimize=True)
            fall = base.fall_model.copy_with_high(X, np.array(obs.margin), optimize=True)
            prior = replace(base, objective_model=objective, fall_model=fall, n_hardware=int((~fell).sum()),
                            n_hardware_fall_model=t, notes=[])
        seed = int(rng.integers(2**31))
        try:
            proposals = propose(scenario, prior, max_fall_risk=MAX_FALL_RISK, seed=seed)
            lifted.append(False)
        except ModelError:
            proposals = propose(scenario, prior, max_fall_risk=1.0, seed=seed)
            lifted.append(True)
        x = scenario.params_from_mapping(proposals.proposals[0].params)
        obs.run(scenario.to_unit(x[None]))
    return lifted


# ---- cold start (hardware only) ------------------------------------------------------------------


class HardwareOnlyFall:
    """P(fall) from a hardware-only GP of the margin of stability (see the module docstring)."""

    def __init__(self, dim: int, seed: int):
        self.dim, self.seed = dim, seed

    def fit(self, X: np.ndarray, margin: np.ndarray, fell: np.ndarray) -> HardwareOnlyFall:
        self.threshold_ = youden_threshold(margin, fell)
        stood = margin[~fell]
        spread = float(np.std(stood)) if stood.size >= 2 and np.std(stood) > 0 else DEFAULT_SPREAD
        self.floor_ = self.threshold_ - spread
        self.gp_ = hardware_only_gp(self.dim, self.seed).fit(
            X, np.maximum(margin, self.floor_), basis=np.ones((len(margin), 1)))
        return self

    def fall_probability(self, U: np.ndarray) -> np.ndarray:
        mean, sd = self.gp_.predict(U, return_std=True, basis=np.ones((U.shape[0], 1)))
        return ndtr((self.threshold_ - mean) / np.maximum(sd, 1e-12))


def run_cold_start(obs: Observer, first: np.ndarray, max_trials: int, rng: np.random.Generator) -> list[bool]:
    safe = obs.truth.safe
    dim = safe.shape[0]
    obs.run(first)
    lifted = [False]
    for _ in range(1, max_trials):
        X, fell = obs.X, obs.fell
        y = np.array(obs.y)
        seed = int(rng.integers(2**31))
        gp = hardware_only_gp(dim, seed).fit(X[~fell], y[~fell], basis=np.ones((int((~fell).sum()), 1)))
        fall = HardwareOnlyFall(dim, seed).fit(X, np.array(obs.margin), fell)

        def predict(U: np.ndarray, gp=gp) -> tuple[np.ndarray, np.ndarray]:
            return gp.predict(U, return_std=True, basis=np.ones((U.shape[0], 1)))

        # the plug-in incumbent of propose: the lowest posterior mean at the standing trials
        best = float(np.min(predict(X[~fell])[0])) if (~fell).any() else None
        try:
            result = maximise_acquisition(predict, safe, best, fall_probability=fall.fall_probability,
                                          max_fall_risk=MAX_FALL_RISK, seed=seed, n_candidates=1024, n_starts=6)
            lifted.append(False)
        except ModelError:
            result = maximise_acquisition(predict, safe, best, fall_probability=fall.fall_probability,
                                          max_fall_risk=1.0, seed=seed, n_candidates=1024, n_starts=6)
            lifted.append(True)
        obs.run(np.clip(result.x, safe[:, 0], safe[:, 1]))
    return lifted


def simulation_optimum(base: PriorFit, n_candidates: int = 8192) -> np.ndarray:
    """The lowest simulation-level mean of the prior inside the safe box, among points whose prior fall
    risk is at most the limit: Sobol candidates, then L-BFGS-B from the 4 best (kept only if feasible)."""
    scenario = base.scenario
    safe = safe_unit_bounds(scenario)
    model = base.objective_model
    U = safe_sobol(scenario, n_candidates, seed=5)
    mean = model.predict_low(U)
    risk = base.fall_model.fall_probability(U)
    mean = np.where(risk <= MAX_FALL_RISK, mean, np.inf)
    best_u, best_f = U[int(np.argmin(mean))], float(np.min(mean))
    for i in np.argsort(mean)[:4]:
        res = minimize(lambda u: float(model.predict_low(u[None])[0]), U[i], method="L-BFGS-B",
                       bounds=safe, options={"maxiter": 50})
        if res.fun < best_f and base.fall_model.fall_probability(res.x[None])[0] <= MAX_FALL_RISK:
            best_u, best_f = np.clip(res.x, safe[:, 0], safe[:, 1]), float(res.fun)
    return best_u


# ---- one run -----------------------------------------------------------------------------------


def tune(method: str, base: PriorFit, truth: StandinTruth, noise: dict[str, float], seed: int,
         profile_index: int, max_trials: int, sim_optimum: np.ndarray) -> TuningRun:
    """Run ``method`` for ``max_trials`` trials on ``truth``; the methods' own choices draw from
    ``default_rng([seed, profile_index, method index])``."""
    started = time.perf_counter()
    rng = np.random.default_rng([seed, profile_index, 1000 + METHODS.index(method)])
    obs = Observer(truth, noise, seed, profile_index)
    safe = truth.safe
    if method == "gapgauge":
        lifted = run_gapgauge(base, obs, max_trials, rng)
    elif method == "cold_start":
        first = safe[:, 0] + rng.random(safe.shape[0]) * (safe[:, 1] - safe[:, 0])
        lifted = run_cold_start(obs, first, max_trials, rng)
    elif method == "zero_shot":
        lifted = run_cold_start(obs, sim_optimum, max_trials, rng)
    elif method == "random":
        obs.run(safe[:, 0] + rng.random((max_trials, safe.shape[0])) * (safe[:, 1] - safe[:, 0]))
        lifted = [False] * max_trials
    else:
        raise ValueError(f"unknown method {method!r}")
    return obs.result(method, truth.name, lifted, time.perf_counter() - started)
