"""calibrate(): fit the simulator's physical parameters to the hardware trials; say how well each is pinned.

The view is the Bayesian calibration of Kennedy and O'Hagan (2001), J. R. Statist. Soc. B 63(3):425-464:
hardware feature ``j`` of trial ``i`` is the simulator at the trial's policy parameters ``x_i`` and the
unknown true physics ``theta``, plus Gaussian error,

    y_ij = eta_j(x_i, theta) + e_ij,    e_ij ~ N(0, (tau * s_j)^2),

where ``s_j`` is the feature's simulated spread under the scenario's physics randomisation (the unit in
which "a big shift" is measured everywhere in gapgauge) and ``tau`` the error level in those units.
Kennedy and O'Hagan's model discrepancy ``delta(x)`` is not fitted as a separate GP: with 3 to 5 trials
it cannot be told apart from the error, so it is absorbed into ``e`` (its size then shows in ``tau``).
With a flat prior on ``theta`` over the search box, the posterior mode minimises the *standardised
discrepancy*

    D(theta) = mean over trials i and features j of ((y_ij - eta_j(x_i, theta)) / s_j)^2,

and the approximate posterior around the mode is the Laplace approximation with the Gauss-Newton
Hessian of nonlinear least squares (Bates and Watts 1988, Nonlinear Regression Analysis, ch. 2):

    cov(theta) = (J^T J / tau^2 + 12 I)^-1     (in the unit cube of the search box),
    tau^2 = max(RSS / (m - k), noise_floor^2),

with ``J`` the ``(m x k)`` Jacobian of the standardised residuals at the mode (central finite
differences), ``m`` the number of matched hardware values and ``k`` the number of physical parameters.
The ``12 I`` is the uniform prior on the unit interval replaced by a Gaussian of the same variance
(1/12), so a direction the features do not see keeps the prior's width instead of an infinite one.
A parameter is *identifiable* from the trials at hand when its 95% interval (mode +- 1.96 sd, clipped
to the search box) covers less than ``identifiable_fraction`` (default half) of the search range.

Optimiser: scipy.optimize.differential_evolution (Storn and Price 1997, J. Global Optimization
11:341-359) with a fixed seed and a small population, every generation evaluated in ONE simulator call
(``vectorized=True``) so the simulator's threads see the whole population; then a polish by
scipy.optimize.least_squares (trust-region reflective, Branch, Coleman and Li 1999) whose finite-difference
Jacobian is again one simulator call. The simulator is the cost: the defaults use about 1,000 to 1,300
rollouts for 5 physical parameters and 5 trials.

``compare/`` runs no physics itself: the caller passes ``simulator(params (n x dim), physics (n x K))
-> RolloutBatch`` (see :func:`gapgauge.workflow.calibrate_from_store` for the default wiring).
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import optimize

from ..errors import ModelError, ScenarioError
from ..records import RolloutBatch
from ..scenario import Scenario

Simulator = Callable[[np.ndarray, np.ndarray], RolloutBatch]

#: standard normal quantile for a two-sided 95% interval
Z95 = 1.959963984540054
#: a simulated value that is missing (diverged rollout, undefined feature) where hardware has one
#: counts as this many simulated spreads away: far, but finite, so the optimiser can still rank it.
MISSING_RESIDUAL = 10.0
#: finite-difference step of the Laplace Jacobian, as a fraction of the search range. Large on
#: purpose: contact makes features kinked at small scales, and a wide step averages that out.
JACOBIAN_STEP = 0.05
#: finite-difference step of the polish's Jacobian (fraction of the search range).
POLISH_STEP = 0.02
#: a feature whose simulated spread is below this fraction of its typical size carries no information
#: about the physics (it does not move with it) and is left out of the discrepancy.
MIN_RELATIVE_SPREAD = 1e-9
#: posterior correlation beyond which two parameters are called confounded.
CONFOUNDED_CORRELATION = 0.9
#: chi-square quantile with one degree of freedom at 0.95 (scipy.stats.chi2.ppf(0.95, 1)): Wilks's
#: likelihood-ratio bound for the settings that fit as well as the best (Bates and Watts 1988, ch. 6).
CHI2_95_1DOF = 3.841458820694124

DISCREPANCIES = ("standardised", "multiresponse")
OPTIMISERS = ("differential_evolution",)


@dataclass(frozen=True)
class PhysicalEstimate:
    """The calibrated value of one physical parameter.

    Attributes:
        name: physics quantity (scenario ``[physics]`` name).
        unit: its unit.
        estimate: posterior mode (minimiser of the discrepancy), in ``unit``.
        interval: approximate 95% posterior interval ``(low, high)``, clipped to the search range.
        sd: approximate posterior standard deviation, in ``unit`` (Laplace, before clipping).
        search_range: ``(low, high)`` searched (the scenario's range, widened; see :func:`calibrate`).
        base_range: ``(low, high)`` of the scenario's randomisation.
        base_nominal: the scenario's nominal value.
        identifiable: whether the trials at hand pin it down (interval narrower than the threshold).
        reason: the plain-words reason for ``identifiable``.
        sensitivity: root-mean-square change of the matched standardised features when the parameter
            moves across its whole search range (linearised at the estimate), in simulated spreads.
        at_edge: the estimate sits at the edge of the search range (the robot may lie beyond it).
    """

    name: str
    unit: str
    estimate: float
    interval: tuple[float, float]
    sd: float
    search_range: tuple[float, float]
    base_range: tuple[float, float]
    base_nominal: float
    identifiable: bool
    reason: str
    sensitivity: float
    at_edge: bool

    def to_json(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "unit": self.unit,
            "estimate": self.estimate,
            "interval": list(self.interval),
            "sd": self.sd,
            "identifiable": self.identifiable,
            "reason": self.reason,
            "sensitivity": self.sensitivity,
            "at_edge": self.at_edge,
            "search_range": list(self.search_range),
            "base_range": list(self.base_range),
            "base_nominal": self.base_nominal,
        }


@dataclass(frozen=True)
class FeatureShift:
    """How far the hardware trials sit from simulation at one physics setting.

    Residuals are standardised, ``(hardware - simulated) / s_j`` with ``s_j`` the feature's simulated
    spread under the scenario's randomisation (the same scale as the discrepancy).

    Attributes:
        physics: the physics simulated, name -> value (every scenario quantity).
        features: matched feature names, ``(f,)``.
        bias: mean standardised residual over the trials, ``(f,)`` (in simulated spreads).
        rms: root-mean-square standardised residual over the trials, ``(f,)``.
        verdicts: per feature, SHIFT's verdict (``carries_over``, ``offset_order_kept``,
            ``does_not_carry_over``, ``undecided``) on matched simulations at ``physics`` plus
            randomised draws around it, ``(f,)``.
        reasons: SHIFT's plain-words reason for each verdict, ``(f,)``.
        total: the discrepancy D: mean squared standardised residual over trials and features.
        verdict_source: what gave the verdicts.
    """

    physics: dict[str, float]
    features: tuple[str, ...]
    bias: np.ndarray
    rms: np.ndarray
    verdicts: tuple[str, ...]
    reasons: tuple[str, ...]
    total: float
    verdict_source: str = ""

    @property
    def carried_over(self) -> list[str]:
        return [n for n, v in zip(self.features, self.verdicts, strict=True) if v == "carries_over"]

    def to_json(self) -> dict[str, Any]:
        return {
            "physics": dict(self.physics),
            "features": {
                name: {"bias": _finite(b), "rms": _finite(r), "verdict": v, "reason": why}
                for name, b, r, v, why in zip(
                    self.features, self.bias, self.rms, self.verdicts, self.reasons, strict=True
                )
            },
            "total": self.total,
            "carries_over": self.carried_over,
            "verdict_source": self.verdict_source,
        }


@dataclass
class CalibrationResult:
    """What :func:`calibrate` found. Plain data; ``to_json()`` gives every number.

    Attributes:
        scenario_name, scenario_path, scenario_hash: the base scenario calibrated.
        n_trials: number of hardware trials used.
        parameters: one :class:`PhysicalEstimate` per calibrated quantity, in the order asked for.
        features: matched feature names, ``(f,)``.
        feature_scales: simulated spread ``s_j`` of each matched feature, ``(f,)``, in the feature's unit.
        excluded_features: feature name -> why it was not matched.
        shift_before: :class:`FeatureShift` at the scenario's nominal physics.
        shift_after: :class:`FeatureShift` at the calibrated physics.
        noise_scale: ``tau_j``, each feature's error level in simulated spreads used for the intervals,
            ``(f,)`` (all equal for the ``standardised`` discrepancy).
        correlation: approximate posterior correlation of the parameters, ``(k x k)``.
        discrepancy, optimiser: the method names.
        seed: the seed every random choice came from.
        evaluations: discrepancy evaluations (one physics setting at every trial each).
        rollouts: simulator rollouts used in total.
        overlay_path: where the overlay was written (set by the caller that writes it), or None.
    """

    scenario_name: str
    scenario_path: Path
    scenario_hash: str
    n_trials: int
    parameters: list[PhysicalEstimate]
    features: tuple[str, ...]
    feature_scales: np.ndarray
    excluded_features: dict[str, str]
    shift_before: FeatureShift
    shift_after: FeatureShift
    noise_scale: np.ndarray
    correlation: np.ndarray
    discrepancy: str
    optimiser: str
    seed: int
    evaluations: int
    rollouts: int
    overlay_path: Path | None = None
    settings: dict[str, Any] = field(default_factory=dict)

    @property
    def identifiable(self) -> list[str]:
        return [p.name for p in self.parameters if p.identifiable]

    def estimate(self, name: str) -> PhysicalEstimate:
        for p in self.parameters:
            if p.name == name:
                return p
        raise KeyError(name)

    def default_overlay_path(self) -> Path:
        """``<base stem>.calibrated.toml`` beside the base scenario."""
        return self.scenario_path.with_name(f"{self.scenario_path.stem}.calibrated.toml")

    def overlay_text(self, overlay_path: str | Path | None = None) -> str:
        """The calibrated scenario overlay (TOML) for writing at ``overlay_path``.

        It ``extends`` the base scenario (path relative to the overlay's folder) and overrides
        ``[physics.NAME]`` of each identifiable parameter: ``nominal`` = the estimate, ``low``/``high``
        = its 95% interval (within the search range), so a randomised sweep of the overlay draws from
        what the trials allow and a ``--nominal`` sweep runs at the estimate. Parameters the trials do
        not pin down keep the base scenario's range and nominal (named in a comment): moving a value the
        data do not support would only look like knowledge.
        """
        target = Path(overlay_path) if overlay_path is not None else self.default_overlay_path()
        rel = os.path.relpath(self.scenario_path.resolve(), target.resolve().parent).replace(os.sep, "/")
        lines = [
            f"# Calibrated physics for scenario {self.scenario_name!r} ({self.scenario_hash}),",
            f"# from {self.n_trials} hardware trial(s) by `gapgauge calibrate` (seed {self.seed}).",
            f"# Discrepancy: {self.discrepancy}; optimiser: {self.optimiser};",
            f"# {self.evaluations} evaluations, {self.rollouts} rollouts.",
            "# Method: Kennedy and O'Hagan (2001) calibration view; ranges are approximate 95% intervals.",
        ]
        kept = [p for p in self.parameters if not p.identifiable]
        for p in kept:
            lines.append(f"# {p.name}: not identifiable from these trials, kept from the base ({p.reason}).")
        lines += ["", f"extends = {_toml_string(rel)}"]
        for p in self.parameters:
            if not p.identifiable:
                continue
            nominal = float(f"{p.estimate:.6g}")
            low = min(float(f"{p.interval[0]:.6g}"), nominal)
            high = max(float(f"{p.interval[1]:.6g}"), nominal)
            lines += [
                "",
                f"[physics.{p.name}]",
                f"# was nominal {_toml_float(p.base_nominal)}, range [{_toml_float(p.base_range[0])}, "
                f"{_toml_float(p.base_range[1])}] {p.unit}",
                f"low = {_toml_float(low)}",
                f"high = {_toml_float(high)}",
                f"nominal = {_toml_float(nominal)}",
            ]
        return "\n".join(lines) + "\n"

    @property
    def overlay(self) -> str:
        """The overlay text for its default place (or for ``overlay_path`` once written)."""
        return self.overlay_text(self.overlay_path)

    def to_json(self) -> dict[str, Any]:
        names = [p.name for p in self.parameters]
        return {
            "scenario": {
                "name": self.scenario_name, "path": str(self.scenario_path), "hash": self.scenario_hash,
            },
            "n_trials": self.n_trials,
            "parameters": [p.to_json() for p in self.parameters],
            "identifiable": self.identifiable,
            "features": list(self.features),
            "feature_scales": dict(zip(self.features, map(float, self.feature_scales), strict=True)),
            "excluded_features": dict(self.excluded_features),
            "shift_before": self.shift_before.to_json(),
            "shift_after": self.shift_after.to_json(),
            "noise_scale": dict(zip(self.features, map(float, self.noise_scale), strict=True)),
            "correlation": {"names": names, "matrix": np.asarray(self.correlation).tolist()},
            "discrepancy": self.discrepancy,
            "optimiser": self.optimiser,
            "overlay": self.overlay,
            "overlay_path": None if self.overlay_path is None else str(self.overlay_path),
            "seed": self.seed,
            "evaluations": self.evaluations,
            "rollouts": self.rollouts,
            "settings": dict(self.settings),
        }


# ---- the discrepancy over a batch of physics settings ------------------------------------------


class _Problem:
    """Evaluates the standardised residuals of many physics settings in one simulator call each."""

    def __init__(
        self,
        scenario: Scenario,
        params: np.ndarray,
        hardware: np.ndarray,
        features: tuple[str, ...],
        simulator: Simulator,
        columns: np.ndarray,
        low: np.ndarray,
        high: np.ndarray,
    ):
        self.scenario = scenario
        self.params = params  # (n x dim)
        self.hardware = hardware  # (n x f)
        self.features = features
        self.simulator = simulator
        self.columns = columns  # (k,) physics columns calibrated
        self.low, self.high = low, high  # (k,) search box
        self.nominal = np.array([r.nominal for r in scenario.physics], dtype=float)
        self.observed = np.isfinite(hardware)  # (n x f)
        self.feature_of = np.nonzero(self.observed)[1]  # (m,) feature of each observed value (row-major)
        self.counts = np.bincount(self.feature_of, minlength=len(features))  # (f,) values per feature
        self.scales = np.ones(len(features))
        self.mode = "standardised"
        self.floor = 0.1
        self.evaluations = 0
        self.rollouts = 0
        self.tick: Callable[[], None] = lambda: None
        self.visited: list[np.ndarray] = []  # unit-cube points evaluated, (s x k) each
        self.visited_criterion: list[np.ndarray] = []  # their criterion, (s,) each

    @property
    def n(self) -> int:
        return self.params.shape[0]

    @property
    def m(self) -> int:
        return int(self.feature_of.size)

    @property
    def k(self) -> int:
        return int(self.columns.size)

    def to_physics(self, u: np.ndarray) -> np.ndarray:
        """Unit-cube points ``(s x k)`` -> full physics rows ``(s x K)`` (others at nominal)."""
        u = np.atleast_2d(u)
        out = np.tile(self.nominal, (u.shape[0], 1))
        out[:, self.columns] = self.low + np.clip(u, 0.0, 1.0) * (self.high - self.low)
        return out

    def simulate(self, physics: np.ndarray) -> np.ndarray:
        """Simulated features ``(s x n x f)`` for physics rows ``(s x K)``, each at every trial."""
        s = physics.shape[0]
        params = np.tile(self.params, (s, 1))
        phys = np.repeat(physics, self.n, axis=0)
        batch = self.simulator(params, phys)
        missing = [f for f in self.features if f not in batch.features]
        if missing:
            raise ModelError(
                f"simulator returned no feature(s) {', '.join(missing)}; compute them in the simulator"
            )
        if len(batch) != s * self.n:
            raise ModelError(
                f"simulator returned {len(batch)} rollouts for {s * self.n} asked; fix the simulator"
            )
        self.rollouts += s * self.n
        values = np.column_stack([np.asarray(batch.features[f], dtype=float) for f in self.features])
        bad = np.asarray(batch.status) == "diverged"
        values[bad] = np.nan
        self.tick()
        return values.reshape(s, self.n, len(self.features))

    def residuals(self, simulated: np.ndarray) -> np.ndarray:
        """Standardised residuals of the observed values, ``(s x m)``; missing simulations penalised."""
        r = (self.hardware[None] - simulated) / self.scales
        r = np.where(np.isfinite(r), r, MISSING_RESIDUAL)
        return r[:, self.observed]

    def residuals_at(self, u: np.ndarray) -> np.ndarray:
        u = np.atleast_2d(u)
        self.evaluations += u.shape[0]
        r = self.residuals(self.simulate(self.to_physics(u)))
        self.record(u, r)
        return r

    def record(self, u: np.ndarray, r: np.ndarray) -> None:
        self.visited.append(np.clip(np.atleast_2d(u), 0.0, 1.0))
        self.visited_criterion.append(self.criterion(r))

    def log_likelihood_drop(self, criterion: np.ndarray, tau: np.ndarray) -> np.ndarray:
        """Drop of the log likelihood from the best visited point, ``(s,)``, for criteria ``(s,)``.

        ``standardised``: ``m (D - D_min) / (2 tau^2)`` with the fitted common error level; ``multiresponse``:
        ``m (C - C_min)``, the criterion being the profiled negative log likelihood over ``m``.
        """
        best = min(float(np.min(c)) for c in self.visited_criterion)
        if self.mode == "standardised":
            return self.m * (criterion - best) / (2.0 * float(tau[0]) ** 2)
        return self.m * (criterion - best)

    def feature_rss(self, r: np.ndarray) -> np.ndarray:
        """Residual sum of squares per feature, ``(s x f)``, from residuals ``(s x m)``."""
        onehot = np.zeros((self.m, len(self.features)))
        onehot[np.arange(self.m), self.feature_of] = 1.0
        return np.atleast_2d(r) ** 2 @ onehot

    def criterion(self, r: np.ndarray) -> np.ndarray:
        """The minimised criterion per setting, ``(s,)``, from residuals ``(s x m)``.

        ``standardised``: ``D``, the mean squared standardised residual (one error level for all).
        ``multiresponse``: ``(1/m) sum_j (n_j / 2) log(RSS_j / n_j + floor^2)``, the negative log
        likelihood with each feature's error variance profiled out (Box and Draper 1965, diagonal case).
        """
        r = np.atleast_2d(r)
        if self.mode == "standardised":
            return np.mean(r**2, axis=1)
        rss = self.feature_rss(r)
        return np.sum(0.5 * self.counts * np.log(rss / self.counts + self.floor**2), axis=1) / self.m

    def error_scales(self, r: np.ndarray) -> np.ndarray:
        """Error level ``tau_j`` of each feature, ``(f,)`` in simulated spreads, from the residuals
        ``(m,)`` at the mode; variances carry the ``m / (m - k)`` degrees-of-freedom correction and are
        floored at ``floor^2``."""
        correction = self.m / max(self.m - self.k, 1)
        if self.mode == "standardised":
            tau2 = np.full(len(self.features), np.sum(r**2) / max(self.m - self.k, 1))
        else:
            tau2 = correction * self.feature_rss(r)[0] / self.counts
        return np.sqrt(np.maximum(tau2, self.floor**2))

    def objective(self, u_columns: np.ndarray) -> np.ndarray:
        """The criterion for unit-cube points given as columns ``(k x s)`` (scipy's vectorised layout)."""
        return self.criterion(self.residuals_at(np.asarray(u_columns).T))


# ---- the public function -------------------------------------------------------------------------


def calibrate(
    scenario: Scenario,
    trials_params: np.ndarray,
    trials_features: np.ndarray | Mapping[str, np.ndarray],
    feature_names: Sequence[str] | None,
    simulator: Simulator,
    *,
    physics_names: Sequence[str] | None = None,
    discrepancy: str = "multiresponse",
    optimiser: str = "differential_evolution",
    search_bounds: Mapping[str, tuple[float, float]] | None = None,
    widen: float = 0.5,
    spread_draws: int = 8,
    popsize: int = 3,
    generations: int = 10,
    polish: bool = True,
    polish_evaluations: int = 8,
    noise_floor: float = 0.1,
    identifiable_fraction: float = 0.5,
    seed: int = 0,
    progress: bool = True,
) -> CalibrationResult:
    """Fit the simulator's physical parameters so matched simulations reproduce the hardware trials.

    Method (see the module docstring): Kennedy and O'Hagan (2001) calibration with Gaussian feature
    error; the discrepancy minimised by scipy's differential evolution (Storn and Price 1997) and
    polished by trust-region least squares (Branch, Coleman and Li 1999); intervals from the Laplace
    approximation with the Gauss-Newton Hessian (Bates and Watts 1988).

    The standardised residual of trial ``i`` and feature ``j`` is ``(hw_ij - sim_ij) / s_j`` where
    ``s_j`` is the feature's simulated spread: the standard deviation across ``spread_draws``
    randomised physics draws (uniform over every ``[physics]`` range of the scenario) at each trial's
    parameters, pooled over trials. A feature with no spread does not move with the physics, so it
    cannot inform the fit and is left out (it is named in ``excluded_features``); so are ``fell``
    (binary) and features the hardware did not record. Physical quantities not calibrated stay at the
    scenario's nominal.

    Discrepancies: ``"standardised"`` minimises ``D``, the mean over trials and features of the squared
    standardised residual (one error level ``tau`` shared by every feature). ``"multiresponse"``
    gives every feature its own error level, profiled out (Box and Draper 1965, Biometrika 52:355-365,
    with a diagonal error covariance): a feature the simulator cannot reproduce at any physics (a
    sensor artefact, a processing difference) then weighs less instead of dragging the physics away.

    Search range: the robot may lie outside the randomisation range (that is often why one
    calibrates), so each range is widened by ``widen`` times its width on both sides, never below
    half its low end (a positive quantity stays positive); ``search_bounds`` overrides it per name.

    Args:
        scenario: the base scenario (parameters, physics ranges and nominal, feature names).
        trials_params: policy parameters of the hardware trials, ``(n x dim)``, scenario units.
        trials_features: hardware features ``(n x f)`` in SI (columns named by ``feature_names``;
            NaN where a trial lacks one), or a mapping feature name -> ``(n,)``.
        feature_names: names of the columns of ``trials_features`` (None for a mapping).
        simulator: ``simulator(params (m x dim), physics (m x K)) -> RolloutBatch`` with the
            features; ``K`` = every scenario physics quantity, in ``[physics]`` order.
        physics_names: quantities to calibrate (default ``scenario.calibration_physics``).
        discrepancy: ``"standardised"`` or ``"multiresponse"``.
        optimiser: ``"differential_evolution"`` (with the least-squares polish when ``polish``).
        search_bounds: name -> ``(low, high)`` in the quantity's unit, overriding the widened range.
        widen: fraction of each range's width added on both sides to make the search range.
        spread_draws: randomised draws per trial for the scales ``s_j`` (and for the shift verdicts).
        popsize: differential-evolution population per parameter (population = popsize * k, at least 5).
        generations: differential-evolution generations after the initial one.
        polish: run the least-squares polish from the best member.
        polish_evaluations: at most this many residual evaluations in the polish (plus one
            Jacobian, k settings, per iteration).
        noise_floor: least error level ``tau`` (in simulated spreads), so a near-exact fit does not
            claim infinite precision.
        identifiable_fraction: identifiable when the 95% interval covers less than this fraction of
            the search range.
        seed: seed of every random choice (spread draws, the optimiser's population); stored.
        progress: show a progress bar on stderr.

    Returns:
        :class:`CalibrationResult`.

    Raises:
        ScenarioError: an unknown or uncalibratable physics name, a bad search bound.
        ModelError: too few usable trials or features, a simulator that does not deliver.
    """
    if discrepancy not in DISCREPANCIES:
        raise ModelError(f"discrepancy {discrepancy!r} is not known; use one of {', '.join(DISCREPANCIES)}")
    if optimiser not in OPTIMISERS:
        raise ModelError(f"optimiser {optimiser!r} is not known; use one of {', '.join(OPTIMISERS)}")
    if isinstance(seed, bool) or int(seed) != seed or seed < 0:
        raise ModelError(f"seed must be a non-negative integer, got {seed!r}")
    if spread_draws < 2:
        raise ModelError(f"spread_draws must be at least 2 to measure a spread, got {spread_draws}")
    seed = int(seed)

    params = np.atleast_2d(np.asarray(trials_params, dtype=float))
    n = params.shape[0]
    if params.shape != (n, scenario.dim) or n == 0:
        raise ModelError(f"trials_params must be (n x {scenario.dim}) with n >= 1, got {params.shape}")
    if not np.all(np.isfinite(params)):
        raise ModelError("trials_params holds NaN or infinite values; give every trial its parameters")
    hardware_all, names_all = _feature_table(trials_features, feature_names, n)

    names = tuple(physics_names) if physics_names is not None else scenario.calibration_physics
    columns, low, high = _search_box(scenario, names, search_bounds, widen)
    k = len(names)

    excluded: dict[str, str] = {}
    chosen: list[str] = []
    for fname in scenario.features.names:
        if fname == "fell":
            continue
        if fname not in names_all:
            excluded[fname] = "not recorded in the trials"
        elif not np.isfinite(hardware_all[:, names_all.index(fname)]).any():
            excluded[fname] = "no trial has a value"
        else:
            chosen.append(fname)
    if not chosen:
        raise ModelError(
            "no hardware feature to match: the trials have none of "
            f"{', '.join(scenario.features.names[1:])}; ingest trials with their features first"
        )
    hardware = np.column_stack([hardware_all[:, names_all.index(f)] for f in chosen])
    first = _Problem(scenario, params, hardware, tuple(chosen), simulator, columns, low, high)
    rng = np.random.default_rng(seed)
    total_calls = 1 + (generations + 1) + (2 * polish_evaluations if polish else 0) + 2
    with _progress_bar(progress, total_calls) as tick:
        first.tick = tick

        # Scales s_j and the "before" simulations share one call: randomised draws, then the nominal.
        phys_low = np.array([r.low for r in scenario.physics])
        phys_high = np.array([r.high for r in scenario.physics])
        draws = rng.uniform(phys_low, phys_high, size=(spread_draws, len(scenario.physics)))
        sim = first.simulate(np.vstack([draws, first.nominal[None]]))
        spread_sim, nominal_sim = sim[:-1], sim[-1]
        with np.errstate(invalid="ignore"), _quiet_nan_warnings():
            scales = np.sqrt(np.nanmean(np.nanvar(spread_sim, axis=0), axis=0))
            size = np.nanmean(np.abs(spread_sim), axis=(0, 1))
        informative = np.isfinite(scales) & (scales > MIN_RELATIVE_SPREAD * np.nan_to_num(size, nan=0.0))
        informative &= scales > 0
        for j in np.flatnonzero(~informative):
            excluded[chosen[j]] = "does not change with the physics in simulation (no spread)"
        if not informative.any():
            raise ModelError(
                "no matched feature changes with the physics in simulation; calibration has nothing to fit"
            )
        keep = np.flatnonzero(informative)
        problem = _Problem(scenario, params, hardware[:, keep], tuple(chosen[j] for j in keep),
                           simulator, columns, low, high)
        problem.tick, problem.scales = tick, scales[keep]
        problem.mode, problem.floor = discrepancy, noise_floor
        problem.rollouts = first.rollouts
        before_sims = np.concatenate([nominal_sim[None], spread_sim], axis=0)[:, :, keep]  # (K x n x f)

        # The global search: differential evolution, one simulator call per generation.
        u_nominal = np.clip((problem.nominal[columns] - low) / (high - low), 0.0, 1.0)
        de = optimize.differential_evolution(
            problem.objective,
            bounds=[(0.0, 1.0)] * k,
            popsize=popsize,
            maxiter=generations,
            init="latinhypercube",
            x0=u_nominal,
            seed=np.random.default_rng([seed, 2]),
            polish=False,
            vectorized=True,
            updating="deferred",
            tol=0.0,
        )
        u_best, c_best = np.asarray(de.x, dtype=float), float(de.fun)
        if polish:
            u_best, c_best = _polish(problem, u_best, c_best, polish_evaluations)

        # Laplace approximation at the mode: central differences, one simulator call.
        jac, r_best, sim_best = _jacobian(problem, u_best)

        # The "after" simulations: the calibrated physics, then draws from the overlay's ranges.
        tau = problem.error_scales(r_best)  # (f,)
        weighted = jac / tau[problem.feature_of][:, None]
        cov = np.linalg.inv(weighted.T @ weighted + 12.0 * np.eye(k))
        sd_u = np.sqrt(np.diag(cov))
        lo_u = np.maximum(u_best - Z95 * sd_u, 0.0)
        hi_u = np.minimum(u_best + Z95 * sd_u, 1.0)
        # Widen by every visited setting the likelihood-ratio test cannot reject (a rugged
        # discrepancy, e.g. from trials that fell, has far-apart settings that fit about as well,
        # which a local curvature cannot see).
        visited = np.vstack(problem.visited)
        drop = problem.log_likelihood_drop(np.concatenate(problem.visited_criterion), tau)
        plausible = visited[drop <= 0.5 * CHI2_95_1DOF]
        laplace_width = hi_u - lo_u
        lo_u = np.minimum(lo_u, plausible.min(axis=0))
        hi_u = np.maximum(hi_u, plausible.max(axis=0))
        widened = (hi_u - lo_u) > laplace_width + 1e-12
        identified = (hi_u - lo_u) < identifiable_fraction
        best_physics = problem.to_physics(u_best)[0]
        after_low, after_high = phys_low.copy(), phys_high.copy()
        after_low[columns] = np.where(identified, low + lo_u * (high - low), after_low[columns])
        after_high[columns] = np.where(identified, low + hi_u * (high - low), after_high[columns])
        after_draws = np.random.default_rng([seed, 3]).uniform(
            after_low, after_high, size=(spread_draws, len(scenario.physics))
        )
        after_sims = problem.simulate(after_draws)  # (draws x n x f)
        problem.evaluations += spread_draws

    corr = cov / np.outer(sd_u, sd_u)
    sensitivity = np.sqrt(np.sum(jac**2, axis=0) / problem.m)
    signal = np.sqrt(np.sum(weighted**2, axis=0) / problem.m)
    estimates = []
    for c, name in enumerate(names):
        rng_ = scenario.physics_range(name)
        span = high[c] - low[c]
        fraction = float(hi_u[c] - lo_u[c])
        at_edge = bool(u_best[c] < 0.01 or u_best[c] > 0.99)
        interval = (float(low[c] + lo_u[c] * span), float(low[c] + hi_u[c] * span))
        reason = _reason(c, names, bool(identified[c]), fraction, sensitivity, signal, tau, corr,
                         identifiable_fraction, bool(widened[c]), f"{interval[0]:.3g} to {interval[1]:.3g}")
        if at_edge and signal[c] >= 1.0:
            reason += "; the estimate sits at the edge of the search range, the robot may lie beyond it"
        estimates.append(PhysicalEstimate(
            name=name,
            unit=rng_.unit,
            estimate=float(low[c] + u_best[c] * span),
            interval=interval,
            sd=float(sd_u[c] * span),
            search_range=(float(low[c]), float(high[c])),
            base_range=(rng_.low, rng_.high),
            base_nominal=rng_.nominal,
            identifiable=bool(identified[c]),
            reason=reason,
            sensitivity=float(sensitivity[c]),
            at_edge=at_edge,
        ))

    after_all = np.concatenate([sim_best[None], after_sims], axis=0)  # (K x n x f)
    verdict_seed = int(np.random.default_rng([seed, 4]).integers(2**31))
    shift_before = _shift(scenario, problem, problem.residuals(nominal_sim[None, :, keep])[0],
                          problem.nominal, before_sims, verdict_seed)
    shift_after = _shift(scenario, problem, r_best, best_physics, after_all, verdict_seed)
    return CalibrationResult(
        scenario_name=scenario.name,
        scenario_path=Path(scenario.path),
        scenario_hash=scenario.content_hash,
        n_trials=n,
        parameters=estimates,
        features=problem.features,
        feature_scales=problem.scales.copy(),
        excluded_features=excluded,
        shift_before=shift_before,
        shift_after=shift_after,
        noise_scale=tau,
        correlation=corr,
        discrepancy=discrepancy,
        optimiser=optimiser + (" + least_squares polish" if polish else ""),
        seed=seed,
        evaluations=problem.evaluations + spread_draws + 1,
        rollouts=problem.rollouts,
        settings={
            "widen": widen, "spread_draws": spread_draws, "popsize": popsize, "generations": generations,
            "polish": polish, "polish_evaluations": polish_evaluations, "noise_floor": noise_floor,
            "identifiable_fraction": identifiable_fraction, "jacobian_step": JACOBIAN_STEP,
            "criterion_at_estimate": float(problem.criterion(r_best)[0]),
            "discrepancy_at_estimate": float(np.mean(r_best**2)),
            "verdict_seed": verdict_seed,
        },
    )


# ---- helpers -------------------------------------------------------------------------------------


def _feature_table(
    trials_features: np.ndarray | Mapping[str, np.ndarray], feature_names: Sequence[str] | None, n: int
) -> tuple[np.ndarray, list[str]]:
    if isinstance(trials_features, Mapping):
        names = list(trials_features)
        table = np.column_stack([np.asarray(trials_features[f], dtype=float).reshape(-1) for f in names]) \
            if names else np.empty((n, 0))
    else:
        if feature_names is None:
            raise ModelError("trials_features is an array: give feature_names, one per column")
        names = list(feature_names)
        table = np.asarray(trials_features, dtype=float)
        if table.ndim == 1 and len(names) == 1:
            table = table[:, None]
    if table.shape != (n, len(names)):
        raise ModelError(
            f"trials_features must be (n x f) = ({n} x {len(names)}) to match trials_params and "
            f"feature_names, got {table.shape}"
        )
    return table, names


def _search_box(
    scenario: Scenario,
    names: tuple[str, ...],
    search_bounds: Mapping[str, tuple[float, float]] | None,
    widen: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    known = [r.name for r in scenario.physics]
    if not names:
        raise ScenarioError(
            f"{scenario.path}: no physical parameter to calibrate; name some of: {', '.join(known)}"
        )
    if len(set(names)) != len(names):
        raise ScenarioError(f"physics to calibrate names one twice ({', '.join(names)}); name each once")
    for name in names:
        if name not in known:
            raise ScenarioError(
                f"{scenario.path}: physics {name!r} to calibrate is not one of the scenario's physics quantities; "
                f"use names from: {', '.join(known)}"
            )
    for name in search_bounds or {}:
        if name not in names:
            raise ScenarioError(
                f"search bound for {name!r}, which is not calibrated; calibrate it or drop the bound"
            )
    columns = np.array([known.index(n) for n in names])
    low, high = np.empty(len(names)), np.empty(len(names))
    for c, name in enumerate(names):
        r = scenario.physics_range(name)
        if search_bounds and name in search_bounds:
            lo, hi = (float(v) for v in search_bounds[name])
        else:
            width = r.high - r.low
            lo = max(r.low - widen * width, r.low / 2 if r.low > 0 else 0.0)
            hi = r.high + widen * width
        if not (math.isfinite(lo) and math.isfinite(hi) and 0.0 <= lo < hi):
            raise ScenarioError(
                f"{scenario.path}: search range of {name!r} is [{lo}, {hi}]; it needs 0 <= low < high "
                "(widen a zero-width [physics] range with search bounds)"
            )
        low[c], high[c] = lo, hi
    return columns, low, high


class _progress_bar:
    """A rich progress bar over simulator calls, or nothing."""

    def __init__(self, show: bool, total: int):
        self.show, self.total = show, total
        self._progress = None

    def __enter__(self) -> Callable[[], None]:
        if not self.show:
            return lambda: None
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

        self._progress = Progress(
            TextColumn("calibrating"), BarColumn(), MofNCompleteColumn(), TextColumn("simulator calls"),
            TimeElapsedColumn(), console=Console(stderr=True), transient=True,
        )
        self._progress.start()
        task = self._progress.add_task("calibrate", total=self.total)
        return lambda: self._progress.advance(task)

    def __exit__(self, *exc: object) -> None:
        if self._progress is not None:
            self._progress.stop()


class _quiet_nan_warnings:
    """Silences numpy's "mean of empty slice" for features a trial lacks (NaN is the answer there)."""

    def __enter__(self) -> None:
        import warnings

        self._catch = warnings.catch_warnings()
        self._catch.__enter__()
        warnings.simplefilter("ignore", RuntimeWarning)

    def __exit__(self, *exc: object) -> None:
        self._catch.__exit__(*exc)


def _polish(problem: _Problem, u0: np.ndarray, c0: float, max_evaluations: int) -> tuple[np.ndarray, float]:
    """Trust-region reflective least squares from ``u0`` (scipy.optimize.least_squares, Branch, Coleman
    and Li 1999) on the residuals weighted by the error levels at ``u0`` (for ``multiresponse`` that
    is one step of iteratively reweighted least squares); kept only if the criterion improved."""
    k = u0.size
    cache: dict[bytes, np.ndarray] = {}
    r0 = problem.residuals_at(u0)[0]
    weight = 1.0 / problem.error_scales(r0)[problem.feature_of]  # (m,)
    cache[np.asarray(u0, dtype=float).tobytes()] = r0

    def raw(u: np.ndarray) -> np.ndarray:
        key = np.asarray(u, dtype=float).tobytes()
        if key not in cache:
            cache[key] = problem.residuals_at(u)[0]
        return cache[key]

    def fun(u: np.ndarray) -> np.ndarray:
        return raw(u) * weight

    def jac(u: np.ndarray) -> np.ndarray:
        # Forward differences, stepping inwards at the upper bound; the k settings in one call.
        step = np.where(u + POLISH_STEP <= 1.0, POLISH_STEP, -POLISH_STEP)
        points = np.tile(u, (k, 1)) + np.diag(step)
        r = problem.residuals_at(points) * weight
        return ((r - fun(u)[None]) / step[:, None]).T

    try:
        res = optimize.least_squares(
            fun, u0, jac=jac, bounds=(np.zeros(k), np.ones(k)), method="trf", max_nfev=max_evaluations,
        )
    except (ValueError, np.linalg.LinAlgError):  # pragma: no cover - a degenerate Jacobian
        return u0, c0
    u = np.clip(np.asarray(res.x, dtype=float), 0.0, 1.0)
    c = float(problem.criterion(raw(u))[0])
    return (u, c) if c < c0 else (u0, c0)


def _jacobian(problem: _Problem, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Central-difference Jacobian ``(m x k)`` of the standardised residuals at ``u`` (one-sided at a
    bound, step :data:`JACOBIAN_STEP`), the residuals ``(m,)`` at ``u`` and the simulated features
    ``(n x f)`` there, from one simulator call."""
    k = u.size
    plus = np.minimum(u + JACOBIAN_STEP, 1.0)
    minus = np.maximum(u - JACOBIAN_STEP, 0.0)
    points = np.vstack([u[None], np.tile(u, (k, 1)), np.tile(u, (k, 1))])
    points[1 + np.arange(k), np.arange(k)] = plus
    points[1 + k + np.arange(k), np.arange(k)] = minus
    problem.evaluations += points.shape[0]
    simulated = problem.simulate(problem.to_physics(points))
    r = problem.residuals(simulated)
    problem.record(points, r)
    jac = (r[1:1 + k] - r[1 + k:]).T / (plus - minus)[None]
    return jac, r[0], simulated[0]


def _reason(
    c: int, names: Sequence[str], ok: bool, fraction: float, sensitivity: np.ndarray, signal: np.ndarray,
    tau: np.ndarray, corr: np.ndarray, threshold: float, widened: bool, range_text: str,
) -> str:
    pct = f"{100 * fraction:.0f}%"
    if ok:
        return f"the 95% interval spans {pct} of the search range"
    if widened and signal[c] >= 1.0:
        return (
            f"settings far apart fit about as well (not rejected by the likelihood-ratio test at 95%): "
            f"from {range_text}, {pct} of the search range"
        )
    if signal[c] < 1.0:
        return (
            f"the matched features barely change with it: {sensitivity[c]:.2g} simulated spreads across "
            f"its search range, against errors of about {float(np.median(tau)):.2g}; interval spans {pct} "
            "of the range"
        )
    others = [(abs(corr[c, o]), o) for o in range(len(names)) if o != c]
    if others:
        value, o = max(others)
        if value >= CONFOUNDED_CORRELATION:
            return (
                f"confounded with {names[o]} (posterior correlation {corr[c, o]:+.2f}): these trials move "
                f"the features alike for both; interval spans {pct} of the range"
            )
    return f"the 95% interval spans {pct} of the search range (from {100 * threshold:.0f}% on, not pinned)"


def _shift(
    scenario: Scenario, problem: _Problem, residuals: np.ndarray, physics: np.ndarray, simulated: np.ndarray,
    seed: int,
) -> FeatureShift:
    """Standardised bias and rms per feature from the residuals ``(m,)`` at ``physics``, and SHIFT's
    verdicts (:func:`gapgauge.compare.shift.shift_from_arrays`) on the matched simulations
    ``simulated (K x n x f)``, row 0 at ``physics`` and the others randomised around it."""
    full = np.full(problem.observed.shape, np.nan)
    full[problem.observed] = residuals
    with _quiet_nan_warnings():
        bias = np.nanmean(full, axis=0)
        rms = np.sqrt(np.nanmean(full**2, axis=0))
    try:
        from .shift import shift_from_arrays

        report = shift_from_arrays(
            problem.hardware, np.transpose(simulated, (1, 0, 2)), list(problem.features), scenario.shift,
            seed,
        )
        verdicts = tuple(report.feature(f).verdict for f in problem.features)
        reasons = tuple(report.feature(f).reason for f in problem.features)
        source = "gapgauge.compare.shift.shift_from_arrays"
    except ImportError:  # pragma: no cover - SHIFT's module is part of the package
        limit = scenario.shift.residual_limit
        verdicts = tuple("carries_over" if r <= limit else "does_not_carry_over" for r in rms)
        reasons = tuple(f"rms standardised residual {r:.2g} against the limit {limit:g}" for r in rms)
        source = "rms standardised residual against [shift] residual_limit"
    return FeatureShift(
        physics={r.name: float(v) for r, v in zip(scenario.physics, physics, strict=True)},
        features=problem.features,
        bias=bias,
        rms=rms,
        verdicts=verdicts,
        reasons=reasons,
        total=float(np.mean(residuals**2)),
        verdict_source=source,
    )


def _finite(x: float) -> float | None:
    """JSON has no NaN: a missing figure is null."""
    return float(x) if math.isfinite(x) else None


def _toml_float(x: float) -> str:
    text = f"{float(x):.6g}"
    return text if any(ch in text for ch in ".en") else text + ".0"


def _toml_string(text: str) -> str:
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'
