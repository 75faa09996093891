"""Expected improvement weighted by the probability of not falling, and its optimiser.

- Expected improvement for minimisation (Jones, Schonlau and Welch 1998, eq. 15):
  ``EI = (f* - mu) Phi(z) + sigma phi(z)``, ``z = (f* - mu) / sigma``; computed in log space
  (the tail uses the scaled complementary error function) so that tiny values still rank.
- Constrained expected improvement (Gardner et al. 2014): ``EI(x) * P(constraint holds at x)``;
  here the constraint is "no fall", ``1 - P(fall | x)``.
- The feasibility limit ``P(fall) <= max_fall_risk`` is a hard limit: candidates over it are never
  returned.

:func:`maximise_acquisition` works on any model given as callables over arrays, so it can be
checked on known functions (Branin, Hartmann-6) as well as used on the fitted prior: a seeded
scrambled Sobol candidate set (scipy.stats.qmc) inside the bounds, then L-BFGS-B from the best
feasible candidates, with a forward-difference gradient computed in one batched model call.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize
from scipy.special import erfcx, ndtr
from scipy.stats import qmc
from threadpoolctl import threadpool_limits

from ..errors import ModelError
from .linalg import FIT_BLAS_THREADS

LOG_PHI_CONST = -0.5 * np.log(2.0 * np.pi)
# a point over the fall-risk limit scores this much lower per unit of excess risk: far below any
# log-acquisition value, so the local search is pushed back inside without a hard edge
INFEASIBLE_PENALTY = 1e6
# the lowest log-acquisition kept: below it everything is "no improvement" (avoids -inf in L-BFGS-B)
LOG_FLOOR = -1e4

Predict = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]
FallProbability = Callable[[np.ndarray], np.ndarray]


def expected_improvement(mean: np.ndarray, sd: np.ndarray, best: float) -> np.ndarray:
    """Expected improvement below ``best`` (Jones, Schonlau and Welch 1998) of ``N(mean, sd^2)``.

    ``mean``, ``sd`` ``(n,)`` in objective units; where ``sd`` is 0 it is ``max(best - mean, 0)``.
    """
    return np.exp(log_expected_improvement(mean, sd, best))


def log_expected_improvement(mean: np.ndarray, sd: np.ndarray, best: float) -> np.ndarray:
    """``log EI`` computed stably: ``log sd + log h(z)``, ``h(z) = z Phi(z) + phi(z)``.

    For ``z < -1`` uses ``h(z) = phi(z) (1 + z Phi(z) / phi(z))`` with the Mills ratio
    ``Phi(z) / phi(z) = sqrt(pi / 2) erfcx(-z / sqrt 2)``, which does not underflow.
    """
    mean = np.asarray(mean, dtype=float)
    sd = np.asarray(sd, dtype=float)
    gap = best - mean
    positive = sd > 0
    safe_sd = np.where(positive, sd, 1.0)
    z = gap / safe_sd
    with np.errstate(divide="ignore", invalid="ignore"):
        direct = np.log(np.maximum(z * ndtr(z) + np.exp(LOG_PHI_CONST - 0.5 * z**2), 1e-300))
        mills = np.sqrt(np.pi / 2.0) * erfcx(-z / np.sqrt(2.0))
        tail = LOG_PHI_CONST - 0.5 * z**2 + np.log1p(np.maximum(z * mills, -1.0 + 1e-300))
        log_h = np.where(z < -1.0, tail, direct)
        noiseless = np.log(np.maximum(gap, 0.0))
    return np.where(positive, np.log(safe_sd) + log_h, noiseless)


@dataclass
class AcquisitionResult:
    """The maximiser of the acquisition and what the model says there.

    ``x`` is ``(dim,)`` in the coordinates of the bounds; ``mean`` and ``sd`` in objective units.
    """

    x: np.ndarray
    log_acquisition: float
    expected_improvement: float
    fall_risk: float
    mean: float
    sd: float
    n_candidates: int
    n_feasible: int
    incumbent: float


def maximise_acquisition(
    predict: Predict,
    bounds: np.ndarray,
    best: float | None,
    *,
    fall_probability: FallProbability | None = None,
    max_fall_risk: float = 1.0,
    seed: int | np.random.Generator = 0,
    n_candidates: int = 1024,
    n_starts: int = 8,
    max_iter: int = 100,
) -> AcquisitionResult:
    """Maximise ``EI(x) * (1 - P(fall | x))`` inside ``bounds`` subject to ``P(fall | x) <= max_fall_risk``.

    Args:
        predict: ``X (n x dim) -> (mean (n,), sd (n,))``, objective units (latent sd).
        bounds: ``(dim x 2)`` box searched (for the prior: the safe bounds in the unit cube).
        best: the incumbent ``f*`` (objective units); None: the lowest feasible predicted mean on
            the candidate set (used before any hardware trial).
        fall_probability: ``X (n x dim) -> (n,)``; None means no fall model (risk 0).
        max_fall_risk: the highest fall probability allowed for a returned point.
        seed: seed or Generator of the Sobol scrambling.
        n_candidates: Sobol points (rounded up to a power of two).
        n_starts: local searches started from the best feasible candidates.

    Raises:
        ModelError: no candidate satisfies the fall-risk limit.
    """
    # many small model calls: one BLAS thread (see gapgauge.compare.linalg.FIT_BLAS_THREADS)
    with threadpool_limits(limits=FIT_BLAS_THREADS, user_api="blas"):
        return _maximise(predict, bounds, best, fall_probability, max_fall_risk, seed, n_candidates,
                         n_starts, max_iter)


def _maximise(
    predict: Predict,
    bounds: np.ndarray,
    best: float | None,
    fall_probability: FallProbability | None,
    max_fall_risk: float,
    seed: int | np.random.Generator,
    n_candidates: int,
    n_starts: int,
    max_iter: int,
) -> AcquisitionResult:
    bounds = np.asarray(bounds, dtype=float)
    dim = bounds.shape[0]
    low, high = bounds[:, 0], bounds[:, 1]
    width = high - low
    rng = np.random.default_rng(seed)
    sobol = qmc.Sobol(dim, scramble=True, seed=rng)
    U = sobol.random_base2(int(np.ceil(np.log2(max(n_candidates, 2)))))
    candidates = low + U * width

    def risk(X: np.ndarray) -> np.ndarray:
        return np.zeros(X.shape[0]) if fall_probability is None else np.asarray(fall_probability(X), float)

    mean, sd = predict(candidates)
    p_fall = risk(candidates)
    feasible = p_fall <= max_fall_risk
    if not feasible.any():
        raise ModelError(
            f"no parameter set inside the safe bounds has a modelled fall probability at most "
            f"{max_fall_risk:g} (lowest found {p_fall.min():.3g}); raise max_fall_risk or add "
            "simulations (gapgauge sweep) or hardware trials where the model is unsure"
        )
    incumbent = float(np.min(mean[feasible])) if best is None else float(best)

    def score(X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        m, s = predict(X)
        p = risk(X)
        log_ei = np.maximum(log_expected_improvement(m, s, incumbent), LOG_FLOOR)
        value = log_ei + _log_probability(1.0 - p) - INFEASIBLE_PENALTY * np.maximum(p - max_fall_risk, 0.0)
        return value, log_ei, p, m, s

    values = score(candidates)[0]
    values[~feasible] = -np.inf
    order = np.argsort(-values)[: min(n_starts, int(feasible.sum()))]
    step = 1e-7 * width

    def objective(x: np.ndarray) -> tuple[float, np.ndarray]:
        # one batched call: the point and its forward-difference neighbours (stepping inwards at
        # the upper bound so the neighbours stay inside the box)
        direction = np.where(x + step <= high, 1.0, -1.0)
        X = np.vstack([x, x + np.diag(direction * step)])
        v = score(X)[0]
        grad = (v[1:] - v[0]) / (direction * step)
        return -float(v[0]), -grad

    results = []
    for index in order:
        start = candidates[index]
        res = minimize(
            objective, start, jac=True, method="L-BFGS-B", bounds=bounds, options={"maxiter": max_iter}
        )
        x = np.clip(res.x, low, high)
        results.append(x if risk(x[None])[0] <= max_fall_risk else start)
    X = np.vstack(results)
    value, log_ei, p, m, s = score(X)
    value[p > max_fall_risk] = -np.inf
    i = int(np.argmax(value))
    return AcquisitionResult(
        x=X[i],
        log_acquisition=float(value[i]),
        expected_improvement=float(np.exp(log_ei[i])),
        fall_risk=float(p[i]),
        mean=float(m[i]),
        sd=float(s[i]),
        n_candidates=int(candidates.shape[0]),
        n_feasible=int(feasible.sum()),
        incumbent=incumbent,
    )


def _log_probability(q: np.ndarray) -> np.ndarray:
    """``log q`` for a probability ``q`` in [0, 1], floored so a certain fall is very bad, not -inf."""
    # exp(LOG_FLOOR / 10) underflows to 0, so floor the logarithm rather than the probability
    with np.errstate(divide="ignore"):
        return np.maximum(np.log(np.clip(q, 0.0, 1.0)), LOG_FLOOR / 10)


def log_constrained_improvement(
    mean: np.ndarray, sd: np.ndarray, best: float | np.ndarray, fall_risk: np.ndarray
) -> np.ndarray:
    """``log(EI(x) (1 - P(fall | x)))`` (Gardner et al. 2014) on given predictions: the score that
    :func:`maximise_acquisition` maximises, before its penalty for points over the fall-risk limit.

    ``mean``, ``sd`` (latent) in objective units and ``fall_risk`` probabilities, broadcastable to one
    shape (e.g. ``(draws x n)``); ``best`` the incumbent, a scalar or broadcastable (e.g. ``(draws x 1)``).
    Used by :mod:`gapgauge.compare.budget` to run the same policy over a fixed candidate set.
    """
    log_ei = np.maximum(log_expected_improvement(mean, sd, best), LOG_FLOOR)
    return log_ei + _log_probability(1.0 - np.asarray(fall_risk, dtype=float))


__all__ = [
    "AcquisitionResult",
    "expected_improvement",
    "log_constrained_improvement",
    "log_expected_improvement",
    "maximise_acquisition",
]
