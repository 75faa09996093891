"""The multi-fidelity prior on the Forrester, Sobester and Keane (2007) pair (REFERENCES.md)."""

from __future__ import annotations

import numpy as np
import pytest

from gapgauge.compare.multifidelity import MultiFidelityGP
from test_gp import _through_json_and_npz


def forrester_high(x: np.ndarray) -> np.ndarray:
    return (6 * x - 2) ** 2 * np.sin(12 * x - 4)


def forrester_low(x: np.ndarray) -> np.ndarray:
    return 0.5 * forrester_high(x) + 10 * (x - 0.5) - 5


# the paper's worked design (REFERENCES.md): high at 0, 0.4, 0.6, 1; low at 11 evenly spaced points
X_LOW = np.linspace(0.0, 1.0, 11)[:, None]
X_HIGH = np.array([0.0, 0.4, 0.6, 1.0])[:, None]


@pytest.fixture(scope="module")
def forrester_model() -> MultiFidelityGP:
    return MultiFidelityGP(random_state=0).fit(X_LOW, forrester_low(X_LOW[:, 0]),
                                               X_HIGH, forrester_high(X_HIGH[:, 0]))


def test_forrester_rho_is_near_two(forrester_model: MultiFidelityGP) -> None:
    # exactly f_high = 2 f_low + 20 - 20 x (REFERENCES.md, Forrester et al. 2007): rho = 2.
    # Tolerance 0.1: four high-fidelity points and a prior rho ~ N(1, 0.5^2) pulling towards 1
    assert forrester_model.rho_ == pytest.approx(2.0, abs=0.1)
    low, high = forrester_model.rho_interval()
    assert low < 2.0 < high


def test_forrester_posterior_mean_minimum_is_near_the_true_minimiser(forrester_model: MultiFidelityGP) -> None:
    x = np.linspace(0.0, 1.0, 20001)[:, None]
    mean = forrester_model.predict(x)
    # REFERENCES.md: the minimum of f_high is at x = 0.757249 (f = -6.020740); tolerance 0.01 in x
    # and 0.5 in f, from four high-fidelity points
    assert x[np.argmin(mean), 0] == pytest.approx(0.757249, abs=0.01)
    assert mean.min() == pytest.approx(-6.020740, abs=0.5)


def test_forrester_prior_beats_the_simulation_alone_away_from_the_trials(forrester_model: MultiFidelityGP) -> None:
    x = np.linspace(0.0, 1.0, 201)[:, None]
    truth = forrester_high(x[:, 0])
    prior_error = np.sqrt(np.mean((forrester_model.predict(x) - truth) ** 2))
    sim_error = np.sqrt(np.mean((forrester_model.predict_low(x) - truth) ** 2))
    assert prior_error < 0.2 * sim_error


def test_without_hardware_trials_the_prior_is_the_simulation_level_with_wider_uncertainty() -> None:
    # Kennedy and O'Hagan (2000) with no high-fidelity data: the prior predictive, rho at its prior
    # mean 1 and the discrepancy at its zero prior mean, so the mean is the simulation level's
    model = MultiFidelityGP(random_state=0).fit(X_LOW, forrester_low(X_LOW[:, 0]), np.empty((0, 1)), [])
    x = np.linspace(0.0, 1.0, 51)[:, None]
    mean, sd = model.predict(x, return_std=True)
    low_mean, low_sd = model.predict_low(x, return_std=True)
    np.testing.assert_allclose(mean, low_mean, atol=1e-9)
    assert np.all(sd > low_sd)
    assert model.rho_ == 1.0


def test_stored_state_predicts_like_the_fitted_model(forrester_model: MultiFidelityGP) -> None:
    # through JSON text and an npz file, as the store keeps it (no pickle): the same numbers, and the same
    # hardware-level log marginal likelihood at and away from the fitted hyperparameters
    rebuilt = MultiFidelityGP.from_state(*_through_json_and_npz(*forrester_model.to_state()))
    x = np.linspace(0.0, 1.0, 31)[:, None]
    for a, b in zip(rebuilt.predict(x, return_cov=True), forrester_model.predict(x, return_cov=True), strict=True):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(rebuilt.predict(x, return_std=True)[1], forrester_model.predict(x, True)[1])
    assert rebuilt.log_marginal_likelihood() == forrester_model.log_marginal_likelihood()
    theta = forrester_model.delta_.theta + 0.1
    assert rebuilt.log_marginal_likelihood(theta) == forrester_model.log_marginal_likelihood(theta)
    assert rebuilt.rho_interval_ == forrester_model.rho_interval_


def test_sample_y_draws_have_the_mean_and_covariance_of_predict(forrester_model: MultiFidelityGP) -> None:
    # law of large numbers: 40,000 joint draws, within 5 standard errors (the Wishart variance for the covariance)
    x = np.array([[0.2], [0.5], [0.8]])
    mean, cov = forrester_model.predict(x, return_cov=True)
    n = 40_000
    draws = forrester_model.sample_y(x, n_samples=n, random_state=2)
    assert np.all(np.abs(draws.mean(axis=1) - mean) < 5 * np.sqrt(np.diag(cov) / n))
    se = np.sqrt((cov**2 + np.outer(np.diag(cov), np.diag(cov))) / n)
    assert np.all(np.abs(np.cov(draws) - cov) < 5 * se)
