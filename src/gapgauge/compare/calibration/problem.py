"""The residual problem of a calibration: standardised residuals of the hardware features against the
simulator at a physics setting, the discrepancy criteria built on them, the simulated spreads
that standardise them, and the per-feature shift at one physics setting.

A physics setting is a point ``u`` of the unit cube of the search box (``k`` calibrated quantities);
:class:`ResidualProblem` turns many such points into one simulator call (every setting at every
trial) and keeps count of the evaluations and rollouts used.
"""

from __future__ import annotations

import contextlib
import math
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence

import numpy as np

from ...errors import ModelError, ScenarioError
from ...records import RolloutBatch
from ...scenario import Scenario
from ..shift import shift_from_arrays
from .result import ShiftAtPhysics

#: ``simulator(params (m x dim), physics (m x K)) -> RolloutBatch`` with the features measured.
Simulator = Callable[[np.ndarray, np.ndarray], RolloutBatch]

DISCREPANCIES = ("standardised", "multiresponse")
#: a simulated value that is missing (diverged rollout, undefined feature) where hardware has one
#: counts as this many simulated spreads away: far, but finite, so the optimiser can still rank it.
MISSING_RESIDUAL = 10.0
#: a feature whose simulated spread is below this fraction of its typical size carries no information
#: about the physics (it does not move with it) and is left out of the discrepancy.
MIN_RELATIVE_SPREAD = 1e-9


class ResidualProblem:
    """Evaluates the standardised residuals of many physics settings in one simulator call each.

    Args:
        scenario: the base scenario (its ``[physics]`` nominal values fill the quantities not calibrated).
        params: policy parameters of the trials, ``(n x dim)``, scenario units.
        hardware: hardware features, ``(n x f)`` in SI, NaN where a trial lacks one.
        features: the ``f`` feature names.
        simulator: see :data:`Simulator`.
        columns: ``(k,)`` indices of the calibrated quantities among the scenario's physics.
        low, high: ``(k,)`` search box, in the quantities' units.
        scales: ``(f,)`` simulated spread ``s_j`` of each feature (ones until measured).
        mode: the discrepancy, one of :data:`DISCREPANCIES`.
        floor: least error level (in simulated spreads).
        on_call: called after every simulator call (progress).
    """

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
        *,
        scales: np.ndarray | None = None,
        mode: str = "standardised",
        floor: float = 0.1,
        on_call: Callable[[], None] | None = None,
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
        self.scales = np.ones(len(features)) if scales is None else np.asarray(scales, dtype=float)
        self.mode = mode
        self.floor = floor
        self.on_call = on_call or (lambda: None)
        self.evaluations = 0
        self.rollouts = 0
        self.visited: list[np.ndarray] = []  # unit-cube points evaluated, (s x k) each
        self.visited_criterion: list[np.ndarray] = []  # their criterion, (s,) each

    def keep_features(self, keep: np.ndarray, scales: np.ndarray, *, mode: str, floor: float) -> ResidualProblem:
        """The problem restricted to features ``keep`` (indices), standardised by ``scales`` ``(len(keep),)``;
        the rollouts counted so far carry over."""
        out = ResidualProblem(
            self.scenario, self.params, self.hardware[:, keep], tuple(self.features[j] for j in keep),
            self.simulator, self.columns, self.low, self.high, scales=scales, mode=mode, floor=floor,
            on_call=self.on_call,
        )
        out.rollouts = self.rollouts
        return out

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

    def to_unit(self, values: np.ndarray) -> np.ndarray:
        """Calibrated quantities ``(k,)`` in their units -> the unit cube, clipped to it."""
        return np.clip((np.asarray(values, dtype=float) - self.low) / (self.high - self.low), 0.0, 1.0)

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
        self.on_call()
        return values.reshape(s, self.n, len(self.features))

    def residuals(self, simulated: np.ndarray) -> np.ndarray:
        """Standardised residuals of the observed values, ``(s x m)``; missing simulations penalised."""
        r = (self.hardware[None] - simulated) / self.scales
        r = np.where(np.isfinite(r), r, MISSING_RESIDUAL)
        return r[:, self.observed]

    def residuals_at(self, u: np.ndarray) -> np.ndarray:
        """Residuals ``(s x m)`` at unit-cube points ``(s x k)``, from one simulator call."""
        u = np.atleast_2d(u)
        self.evaluations += u.shape[0]
        r = self.residuals(self.simulate(self.to_physics(u)))
        self.record(u, r)
        return r

    def record(self, u: np.ndarray, r: np.ndarray) -> None:
        """Remember points ``(s x k)`` and their residuals ``(s x m)`` for the likelihood-ratio widening."""
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


def simulated_spreads(simulated: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each feature's simulated spread ``s_j`` and whether it informs the fit.

    Args:
        simulated: features ``(draws x n x f)`` under randomised physics draws, each draw at every trial.

    Returns:
        ``scales (f,)``: the standard deviation across draws at each trial's parameters, pooled over
        trials (root of the mean variance); ``informative (f,)`` bool: the spread is positive and not
        negligible against the feature's typical size (:data:`MIN_RELATIVE_SPREAD`).
    """
    with np.errstate(invalid="ignore"), quiet_nan_warnings():
        scales = np.sqrt(np.nanmean(np.nanvar(simulated, axis=0), axis=0))
        size = np.nanmean(np.abs(simulated), axis=(0, 1))
    informative = np.isfinite(scales) & (scales > MIN_RELATIVE_SPREAD * np.nan_to_num(size, nan=0.0))
    return scales, informative & (scales > 0)


@contextlib.contextmanager
def quiet_nan_warnings() -> Iterator[None]:
    """Silences numpy's "mean of empty slice" for features a trial lacks (NaN is the answer there)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        yield


def feature_table(
    trials_features: np.ndarray | Mapping[str, np.ndarray], feature_names: Sequence[str] | None, n: int
) -> tuple[np.ndarray, list[str]]:
    """The hardware features as a table ``(n x f)`` and its column names, from an array or a mapping."""
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


def matched_features(
    scenario: Scenario, table: np.ndarray, names: list[str]
) -> tuple[np.ndarray, list[str], dict[str, str]]:
    """The scenario's features the trials have: the hardware table ``(n x f)`` of them, their names, and
    feature name -> why it is left out (``fell`` is binary and always left out).

    Raises:
        ModelError: no feature of the scenario has a value in any trial.
    """
    excluded: dict[str, str] = {}
    chosen: list[str] = []
    for fname in scenario.features.names:
        if fname == "fell":
            continue
        if fname not in names:
            excluded[fname] = "not recorded in the trials"
        elif not np.isfinite(table[:, names.index(fname)]).any():
            excluded[fname] = "no trial has a value"
        else:
            chosen.append(fname)
    if not chosen:
        raise ModelError(
            "no hardware feature to match: the trials have none of "
            f"{', '.join(scenario.features.names[1:])}; ingest trials with their features first"
        )
    return np.column_stack([table[:, names.index(f)] for f in chosen]), chosen, excluded


def search_box(
    scenario: Scenario,
    names: tuple[str, ...],
    search_bounds: Mapping[str, tuple[float, float]] | None,
    widen: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Columns ``(k,)`` of the quantities ``names`` among the scenario's physics and their search box
    ``low, high (k,)``: each ``[physics]`` range widened by ``widen`` times its width on both sides (never
    below half its low end), or ``search_bounds[name]`` where given.

    Raises:
        ScenarioError: no name, a name twice, an unknown name, a bound for a quantity not calibrated,
            or an empty or negative search range.
    """
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
                f"search_bounds has {name!r}, which is not calibrated; calibrate it or drop the bound"
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
                "(widen a zero-width [physics] range with search_bounds)"
            )
        low[c], high[c] = lo, hi
    return columns, low, high


def shift_at_physics(
    problem: ResidualProblem, residuals: np.ndarray, physics: np.ndarray, simulated: np.ndarray, seed: int,
) -> ShiftAtPhysics:
    """Standardised bias and rms per feature from the residuals ``(m,)`` at ``physics``, and the shift
    verdicts (:func:`gapgauge.compare.shift.shift_from_arrays`) on the matched simulations
    ``simulated (K x n x f)``, row 0 at ``physics`` and the others randomised around it."""
    full = np.full(problem.observed.shape, np.nan)
    full[problem.observed] = residuals
    with quiet_nan_warnings():
        bias = np.nanmean(full, axis=0)
        rms = np.sqrt(np.nanmean(full**2, axis=0))
    report = shift_from_arrays(
        problem.hardware, np.transpose(simulated, (1, 0, 2)), list(problem.features), problem.scenario.shift, seed,
    )
    return ShiftAtPhysics(
        physics={r.name: float(v) for r, v in zip(problem.scenario.physics, physics, strict=True)},
        features=problem.features,
        bias=bias,
        rms=rms,
        verdicts=tuple(report.feature(f).verdict for f in problem.features),
        reasons=tuple(report.feature(f).reason for f in problem.features),
        total=float(np.mean(residuals**2)),
        verdict_source="gapgauge.compare.shift.shift_from_arrays",
    )
