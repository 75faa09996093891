"""The search of a calibration and its entry point: differential evolution over the search box, a
least-squares polish, and approximate posterior intervals from the Laplace approximation widened by
the likelihood-ratio test (see the package docstring for the method and its sources)."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import optimize

from ...errors import ModelError
from ...progress import Progress, or_silent
from ...scenario import Scenario
from .problem import (
    DISCREPANCIES,
    ResidualProblem,
    Simulator,
    feature_table,
    matched_features,
    search_box,
    shift_at_physics,
    simulated_spreads,
)
from .result import CalibrationResult, PhysicalEstimate

OPTIMISERS = ("differential_evolution",)
STAGE = "calibrate: simulator calls"
#: standard normal quantile for a two-sided 95% interval
Z95 = 1.959963984540054
#: finite-difference step of the Laplace Jacobian, as a fraction of the search range. Large on
#: purpose: contact makes features kinked at small scales, and a wide step averages that out.
JACOBIAN_STEP = 0.05
#: finite-difference step of the polish's Jacobian (fraction of the search range).
POLISH_STEP = 0.02
#: posterior correlation beyond which two parameters are called confounded.
CONFOUNDED_CORRELATION = 0.9
#: chi-square quantile with one degree of freedom at 0.95 (scipy.stats.chi2.ppf(0.95, 1)): Wilks's
#: likelihood-ratio bound for the settings that fit as well as the best (Bates and Watts 1988, ch. 6).
CHI2_95_1DOF = 3.841458820694124


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
    trial_ids: Sequence[int] | None = None,
    progress: Progress | None = None,
) -> CalibrationResult:
    """Fit the simulator's physical parameters so matched simulations reproduce the hardware trials.

    Method (see the package docstring): Kennedy and O'Hagan (2001) calibration with Gaussian feature
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
        trial_ids: the trials' store ids, ``(n,)``, kept in the result.
        progress: ``progress(stage, done, total)`` after every simulator call, or None.

    Returns:
        :class:`~gapgauge.compare.calibration.result.CalibrationResult` (``overlay_path`` None: writing
        the overlay is the caller's).

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
    ids = [int(i) for i in trial_ids] if trial_ids is not None else []
    if trial_ids is not None and len(ids) != n:
        raise ModelError(f"trial_ids has {len(ids)} ids for {n} trials in trials_params; give one per trial")
    hardware_all, names_all = feature_table(trials_features, feature_names, n)

    names = tuple(physics_names) if physics_names is not None else scenario.calibration_physics
    columns, low, high = search_box(scenario, names, search_bounds, widen)

    hardware, chosen, excluded = matched_features(scenario, hardware_all, names_all)

    report = or_silent(progress)
    total_calls = 1 + (generations + 1) + (1 + 2 * polish_evaluations if polish else 0) + 2
    calls = 0

    def on_call() -> None:
        nonlocal calls
        calls += 1
        report(STAGE, min(calls, total_calls), total_calls)

    first = ResidualProblem(scenario, params, hardware, tuple(chosen), simulator, columns, low, high,
                            on_call=on_call)
    rng = np.random.default_rng(seed)

    # Scales s_j and the "before" simulations share one call: randomised draws, then the nominal.
    phys_low = np.array([r.low for r in scenario.physics])
    phys_high = np.array([r.high for r in scenario.physics])
    draws = rng.uniform(phys_low, phys_high, size=(spread_draws, len(scenario.physics)))
    sim = first.simulate(np.vstack([draws, first.nominal[None]]))
    spread_sim, nominal_sim = sim[:-1], sim[-1]
    scales, informative = simulated_spreads(spread_sim)
    for j in np.flatnonzero(~informative):
        excluded[chosen[j]] = "does not change with the physics in simulation (no spread)"
    if not informative.any():
        raise ModelError("no matched feature changes with the physics in simulation; calibration has nothing to fit")
    keep = np.flatnonzero(informative)
    problem = first.keep_features(keep, scales[keep], mode=discrepancy, floor=noise_floor)
    before_sims = np.concatenate([nominal_sim[None], spread_sim], axis=0)[:, :, keep]  # (K x n x f)

    u_best = _search(problem, popsize, generations, seed, polish, polish_evaluations)

    # Laplace approximation at the mode: central differences, one simulator call.
    jac, r_best, sim_best = _jacobian(problem, u_best)
    laplace = _intervals(problem, u_best, jac, r_best, identifiable_fraction)

    # The "after" simulations: the calibrated physics, then draws from the overlay's ranges.
    best_physics = problem.to_physics(u_best)[0]
    after_low, after_high = phys_low.copy(), phys_high.copy()
    chosen_low = low + laplace.lo_u * (high - low)
    chosen_high = low + laplace.hi_u * (high - low)
    after_low[columns] = np.where(laplace.identified, chosen_low, after_low[columns])
    after_high[columns] = np.where(laplace.identified, chosen_high, after_high[columns])
    after_draws = np.random.default_rng([seed, 3]).uniform(
        after_low, after_high, size=(spread_draws, len(scenario.physics))
    )
    after_sims = problem.simulate(after_draws)  # (draws x n x f)
    problem.evaluations += spread_draws
    report(STAGE, total_calls, total_calls)

    estimates = _estimates(scenario, names, low, high, u_best, laplace, identifiable_fraction, problem.m)
    after_all = np.concatenate([sim_best[None], after_sims], axis=0)  # (K x n x f)
    verdict_seed = int(np.random.default_rng([seed, 4]).integers(2**31))
    r_nominal = problem.residuals(nominal_sim[None, :, keep])[0]
    shift_before = shift_at_physics(problem, r_nominal, problem.nominal, before_sims, verdict_seed)
    shift_after = shift_at_physics(problem, r_best, best_physics, after_all, verdict_seed)
    return CalibrationResult(
        scenario_name=scenario.name,
        scenario_path=Path(scenario.path),
        scenario_hash=scenario.content_hash,
        n_trials=n,
        trial_ids=ids,
        parameters=estimates,
        features=problem.features,
        feature_scales=problem.scales.copy(),
        excluded_features=excluded,
        shift_before=shift_before,
        shift_after=shift_after,
        noise_scale=laplace.tau,
        correlation=laplace.cov / np.outer(laplace.sd_u, laplace.sd_u),
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


# ---- the search ----------------------------------------------------------------------------------


def _search(
    problem: ResidualProblem, popsize: int, generations: int, seed: int, polish: bool, polish_evaluations: int,
) -> np.ndarray:
    """The posterior mode in the unit cube, ``(k,)``: differential evolution from a Latin hypercube
    that includes the nominal physics, one simulator call per generation; then the polish."""
    de = optimize.differential_evolution(
        problem.objective,
        bounds=[(0.0, 1.0)] * problem.k,
        popsize=popsize,
        maxiter=generations,
        init="latinhypercube",
        x0=problem.to_unit(problem.nominal[problem.columns]),
        seed=np.random.default_rng([seed, 2]),
        polish=False,
        vectorized=True,
        updating="deferred",
        tol=0.0,
    )
    u_best, c_best = np.asarray(de.x, dtype=float), float(de.fun)
    if polish:
        u_best, c_best = _polish(problem, u_best, c_best, polish_evaluations)
    return u_best


def _polish(
    problem: ResidualProblem, u0: np.ndarray, c0: float, max_evaluations: int
) -> tuple[np.ndarray, float]:
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


# ---- the intervals -------------------------------------------------------------------------------


def _jacobian(problem: ResidualProblem, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
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


@dataclass(frozen=True)
class _Laplace:
    """The approximate posterior at the mode, in the unit cube of the search box."""

    jac: np.ndarray  # (m x k) Jacobian of the standardised residuals
    weighted: np.ndarray  # (m x k) the same divided by each value's error level
    tau: np.ndarray  # (f,) error levels, simulated spreads
    cov: np.ndarray  # (k x k) posterior covariance
    sd_u: np.ndarray  # (k,) posterior sd
    lo_u: np.ndarray  # (k,) 95% interval, Laplace widened by the likelihood-ratio test
    hi_u: np.ndarray
    widened: np.ndarray  # (k,) bool: the likelihood-ratio test widened the Laplace interval
    identified: np.ndarray  # (k,) bool: the interval is narrower than the threshold


def _intervals(
    problem: ResidualProblem, u_best: np.ndarray, jac: np.ndarray, r_best: np.ndarray, identifiable_fraction: float,
) -> _Laplace:
    """``cov = (J^T J / tau^2 + 12 I)^-1`` (Gauss-Newton Laplace approximation, Bates and Watts 1988;
    ``12 I`` is the uniform prior's variance 1/12 as a Gaussian), mode +- 1.96 sd clipped to the cube."""
    tau = problem.error_scales(r_best)  # (f,)
    weighted = jac / tau[problem.feature_of][:, None]
    cov = np.linalg.inv(weighted.T @ weighted + 12.0 * np.eye(problem.k))
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
    return _Laplace(
        jac=jac, weighted=weighted, tau=tau, cov=cov, sd_u=sd_u, lo_u=lo_u, hi_u=hi_u,
        widened=(hi_u - lo_u) > laplace_width + 1e-12,
        identified=(hi_u - lo_u) < identifiable_fraction,
    )


def _estimates(
    scenario: Scenario, names: Sequence[str], low: np.ndarray, high: np.ndarray, u_best: np.ndarray,
    laplace: _Laplace, identifiable_fraction: float, m: int,
) -> list[PhysicalEstimate]:
    """One :class:`PhysicalEstimate` per calibrated quantity, back in its unit, with its reason."""
    corr = laplace.cov / np.outer(laplace.sd_u, laplace.sd_u)
    sensitivity = np.sqrt(np.sum(laplace.jac**2, axis=0) / m)
    signal = np.sqrt(np.sum(laplace.weighted**2, axis=0) / m)
    estimates = []
    for c, name in enumerate(names):
        rng_ = scenario.physics_range(name)
        span = high[c] - low[c]
        fraction = float(laplace.hi_u[c] - laplace.lo_u[c])
        at_edge = bool(u_best[c] < 0.01 or u_best[c] > 0.99)
        interval = (float(low[c] + laplace.lo_u[c] * span), float(low[c] + laplace.hi_u[c] * span))
        reason = _reason(c, names, bool(laplace.identified[c]), fraction, sensitivity, signal, laplace.tau, corr,
                         identifiable_fraction, bool(laplace.widened[c]), f"{interval[0]:.3g} to {interval[1]:.3g}")
        if at_edge and signal[c] >= 1.0:
            reason += "; the estimate sits at the edge of the search range, the robot may lie beyond it"
        estimates.append(PhysicalEstimate(
            name=name,
            unit=rng_.unit,
            estimate=float(low[c] + u_best[c] * span),
            interval=interval,
            sd=float(laplace.sd_u[c] * span),
            search_range=(float(low[c]), float(high[c])),
            base_range=(rng_.low, rng_.high),
            base_nominal=rng_.nominal,
            identifiable=bool(laplace.identified[c]),
            reason=reason,
            sensitivity=float(sensitivity[c]),
            at_edge=at_edge,
        ))
    return estimates


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
