"""Expected improvement and its optimiser (Jones, Schonlau and Welch 1998; Gardner et al. 2014)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import quad
from scipy.stats import norm

from gapgauge.compare.acquisition import expected_improvement, maximise_acquisition
from gapgauge.errors import ModelError


@pytest.mark.parametrize(
    ("mean", "sd", "best"),
    [(0.0, 1.0, 0.0), (1.0, 0.5, 0.2), (-2.0, 0.3, 0.5), (0.3, 2.0, 0.1), (5.0, 0.5, 0.0), (30.0, 1.0, 0.0)],
)
def test_expected_improvement_equals_direct_integration(mean: float, sd: float, best: float) -> None:
    # EI = E[max(f* - F, 0)], F ~ N(mean, sd^2): integrate (f* - f) phi over f < f* with scipy's quad
    reference, _ = quad(lambda f: (best - f) * norm.pdf(f, mean, sd), -np.inf, best, epsabs=0, epsrel=1e-12,
                        limit=500)
    value = expected_improvement(np.array([mean]), np.array([sd]), best)[0]
    assert value == pytest.approx(reference, rel=1e-9)  # also in the far tail (down to 1e-199)


def test_expected_improvement_without_uncertainty_is_the_plain_improvement() -> None:
    # Jones et al. (1998): with sigma = 0 the expected improvement is max(f* - mu, 0)
    values = expected_improvement(np.array([1.0, 3.0]), np.zeros(2), 2.0)
    np.testing.assert_allclose(values, [1.0, 0.0])


def branin(X: np.ndarray) -> np.ndarray:
    x1, x2 = X[:, 0], X[:, 1]
    b, c, t = 5.1 / (4 * np.pi**2), 5 / np.pi, 1 / (8 * np.pi)
    return (x2 - b * x1**2 + c * x1 - 6) ** 2 + 10 * (1 - t) * np.cos(x1) + 10


HARTMANN_A = np.array([[10, 3, 17, 3.5, 1.7, 8], [0.05, 10, 17, 0.1, 8, 14], [3, 3.5, 1.7, 10, 17, 8],
                       [17, 8, 0.05, 10, 0.1, 14]])
HARTMANN_P = 1e-4 * np.array([[1312, 1696, 5569, 124, 8283, 5886], [2329, 4135, 8307, 3736, 1004, 9991],
                              [2348, 1451, 3522, 2883, 3047, 6650], [4047, 8828, 8732, 5743, 1091, 381]])
HARTMANN_ALPHA = np.array([1.0, 1.2, 3.0, 3.2])


def hartmann6(X: np.ndarray) -> np.ndarray:
    inner = np.sum(HARTMANN_A[None] * (X[:, None, :] - HARTMANN_P[None]) ** 2, axis=2)
    return -np.sum(HARTMANN_ALPHA * np.exp(-inner), axis=1)


def _known(f):
    # the known function as the mean with no uncertainty: EI = f* - f, so the optimiser minimises f
    return lambda X: (f(X), np.zeros(X.shape[0]))


def test_acquisition_optimiser_reaches_the_branin_minimum() -> None:
    result = maximise_acquisition(_known(branin), np.array([[-5.0, 10.0], [0.0, 15.0]]), best=1e3, seed=0)
    # Dixon and Szego (1978), REFERENCES.md: global minimum 0.397887; tolerance 1e-5
    assert result.mean == pytest.approx(0.397887, abs=1e-5)
    minimisers = np.array([[-np.pi, 12.275], [np.pi, 2.275], [9.42478, 2.475]])
    assert np.min(np.linalg.norm(minimisers - result.x, axis=1)) < 1e-2


def test_acquisition_optimiser_reaches_the_hartmann6_minimum() -> None:
    result = maximise_acquisition(_known(hartmann6), np.array([[0.0, 1.0]] * 6), best=1e3, seed=0)
    # Dixon and Szego (1978), REFERENCES.md: global minimum -3.32237; tolerance 1e-4
    assert result.mean == pytest.approx(-3.32237, abs=1e-4)
    minimiser = np.array([0.20169, 0.150011, 0.476874, 0.275332, 0.311652, 0.6573])
    assert np.max(np.abs(result.x - minimiser)) < 1e-2


def test_no_feasible_candidate_is_a_model_error_that_says_what_to_do() -> None:
    with pytest.raises(ModelError, match="raise max_fall_risk"):
        maximise_acquisition(_known(branin), np.array([[-5.0, 10.0], [0.0, 15.0]]), best=None,
                             fall_probability=lambda X: np.full(X.shape[0], 0.5), max_fall_risk=0.05)


@settings(max_examples=30, deadline=None)
@given(
    dim=st.integers(1, 4),
    seed=st.integers(0, 2**31 - 1),
    limit=st.floats(0.01, 0.5),
    data=st.data(),
)
def test_proposals_stay_inside_the_bounds_and_under_the_fall_risk_limit(dim: int, seed: int, limit: float,
                                                                       data: st.DataObject) -> None:
    # a synthetic fall model P(fall) = Phi((a . x + b) / s) and a synthetic objective over arrays
    rng = np.random.default_rng(seed)
    low = rng.uniform(-1.0, 0.5, dim)
    bounds = np.column_stack([low, low + rng.uniform(0.05, 1.0, dim)])
    slope, offset = rng.normal(0.0, 3.0, dim), data.draw(st.floats(-3.0, 3.0))
    centre = rng.uniform(bounds[:, 0], bounds[:, 1])

    def predict(X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return np.sum((X - centre) ** 2, axis=1), 0.1 + 0.5 * np.abs(np.sin(3 * X[:, 0]))

    def fall(X: np.ndarray) -> np.ndarray:
        return norm.cdf(X @ slope + offset)

    try:
        result = maximise_acquisition(predict, bounds, best=data.draw(st.one_of(st.none(), st.floats(-1, 2))),
                                      fall_probability=fall, max_fall_risk=limit, seed=rng,
                                      n_candidates=64, n_starts=2, max_iter=30)
    except ModelError:
        # allowed only when (nearly) nothing is feasible: 64 Sobol points miss a feasible share of
        # 15% of the box with probability 0.85^64 ~ 3e-5
        share = np.mean(fall(rng.uniform(bounds[:, 0], bounds[:, 1], (20000, dim))) <= limit)
        assert share < 0.15
        return
    assert np.all(result.x >= bounds[:, 0]) and np.all(result.x <= bounds[:, 1])
    assert fall(result.x[None])[0] <= limit
    assert result.fall_risk <= limit
