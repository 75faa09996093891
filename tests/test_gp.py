"""The exact GP against scikit-learn's GaussianProcessRegressor (REFERENCES.md: a fixed-kernel
sklearn GPR is the reference for any exact-GP code of ours, predictions equal to about 1e-8)."""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from scipy.optimize import approx_fprime
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

from gapgauge.compare.gp import ExactGP
from gapgauge.compare.kernels import Matern52, WithFixedCovariance

LENGTH_SCALES = [0.3, 0.7, 1.5]
VARIANCE = 1.7
NOISE = 0.05


def _data(n: int = 40, seed: int = 1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.uniform(size=(n, 3))
    y = np.sin(6 * X[:, 0]) + X[:, 1] ** 2 + 0.1 * rng.normal(size=n)
    return X, y, rng.uniform(size=(15, 3))


def _sklearn(X: np.ndarray, y: np.ndarray, normalize_y: bool) -> GaussianProcessRegressor:
    kernel = ConstantKernel(VARIANCE) * Matern(length_scale=LENGTH_SCALES, nu=2.5) + WhiteKernel(NOISE)
    return GaussianProcessRegressor(kernel, optimizer=None, alpha=0.0, normalize_y=normalize_y).fit(X, y)


@pytest.mark.parametrize("normalize_y", [False, True])
def test_exact_gp_predictions_equal_sklearn_gpr(normalize_y: bool) -> None:
    X, y, X_test = _data()
    reference = _sklearn(X, y, normalize_y)
    ours = ExactGP(Matern52(VARIANCE, LENGTH_SCALES), NOISE, optimize=False, normalize_y=normalize_y).fit(X, y)
    mean_ref, sd_ref = reference.predict(X_test, return_std=True)
    # sklearn's sd includes the WhiteKernel noise: compare with our sd of an observation
    mean, sd = ours.predict(X_test, return_std=True, observation=True)
    np.testing.assert_allclose(mean, mean_ref, rtol=0, atol=1e-8)  # source: sklearn GPR, REFERENCES.md
    np.testing.assert_allclose(sd, sd_ref, rtol=0, atol=1e-8)  # source: sklearn GPR, REFERENCES.md


def test_exact_gp_log_marginal_likelihood_and_gradient_equal_sklearn_gpr() -> None:
    X, y, _ = _data()
    reference = _sklearn(X, y, normalize_y=False)
    ours = ExactGP(Matern52(VARIANCE, LENGTH_SCALES), NOISE, optimize=False).fit(X, y)
    # same theta order: [log constant, log length-scales..., log noise]
    theta = reference.kernel_.theta + np.array([0.2, -0.1, 0.3, 0.05, -0.4])
    lml_ref, grad_ref = reference.log_marginal_likelihood(theta, eval_gradient=True)
    lml, grad = ours.log_marginal_likelihood(theta, eval_gradient=True)
    assert lml == pytest.approx(lml_ref, abs=1e-8)  # source: sklearn GPR log_marginal_likelihood
    np.testing.assert_allclose(grad, grad_ref, rtol=1e-8, atol=1e-8)  # source: sklearn GPR gradient


def test_exact_gp_gradient_matches_finite_differences_with_basis_and_hyperprior() -> None:
    X, y, _ = _data(25)
    hyperprior = np.array([[0.0, 1.0], [0.0, 1.0], [0.5, 2.0], [np.nan, np.inf], [-3.0, 1.5]])
    gp = ExactGP(Matern52(VARIANCE, LENGTH_SCALES), NOISE, optimize=False, hyperprior=hyperprior,
                 basis_prior=(np.array([1.0, 0.0]), np.diag([0.25, 1.0])))
    gp.fit(X, y, basis=np.column_stack([X[:, 2], np.ones(len(y))]))
    theta = gp.theta + 0.1
    _, grad = gp.log_posterior(theta, eval_gradient=True)
    numeric = approx_fprime(theta, gp.log_posterior, 1e-6)  # central reference: scipy finite differences
    np.testing.assert_allclose(grad, numeric, rtol=1e-4, atol=1e-4)


def test_basis_with_a_tight_prior_equals_a_known_mean_function() -> None:
    # R&W section 2.7: a basis whose coefficient prior has (almost) no variance is a fixed mean
    # function h(x)^T b0; the GP of y - h(x)^T b0 plus h(x*)^T b0 must agree (sklearn as reference)
    X, y, X_test = _data()
    h, h_test = np.sin(3 * X[:, :1]), np.sin(3 * X_test[:, :1])
    ours = ExactGP(Matern52(VARIANCE, LENGTH_SCALES), NOISE, optimize=False,
                   basis_prior=(np.array([2.0]), np.array([[1e-14]]))).fit(X, y, basis=h)
    reference = _sklearn(X, y - 2.0 * h[:, 0], normalize_y=False)
    np.testing.assert_allclose(ours.predict(X_test, basis=h_test),
                               reference.predict(X_test) + 2.0 * h_test[:, 0], atol=1e-6)


def test_fitted_hyperparameters_reach_at_least_sklearns_optimum() -> None:
    # sklearn's own L-BFGS-B maximum of the same likelihood is the reference; ours must be as high.
    # Every input matters here, so no length-scale runs off to sklearn's 1e5 bound (ours stop at 100)
    X, _, _ = _data(60, seed=3)
    y = np.sin(6 * X[:, 0]) + X[:, 1] ** 2 + 0.5 * np.cos(3 * X[:, 2]) + 0.1 * np.random.default_rng(4).normal(size=60)
    kernel = ConstantKernel(1.0) * Matern(length_scale=[1.0] * 3, nu=2.5) + WhiteKernel(0.1)
    reference = GaussianProcessRegressor(kernel, alpha=0.0, n_restarts_optimizer=2, random_state=0).fit(X, y)
    ours = ExactGP(n_restarts=2, random_state=0).fit(X, y)
    assert ours.log_marginal_likelihood() >= reference.log_marginal_likelihood_value_ - 1e-3


def test_exact_gp_posterior_covariance_equals_sklearn_gpr() -> None:
    # sklearn's predict(return_cov=True) with the noise as alpha (latent covariance), normalised targets
    X, y, X_test = _data()
    reference = GaussianProcessRegressor(ConstantKernel(VARIANCE) * Matern(length_scale=LENGTH_SCALES, nu=2.5),
                                         optimizer=None, alpha=NOISE, normalize_y=True).fit(X, y)
    gp = ExactGP(Matern52(VARIANCE, LENGTH_SCALES), NOISE, normalize_y=True, optimize=False).fit(X, y)
    mean_ref, cov_ref = reference.predict(X_test, return_cov=True)
    mean, cov = gp.predict(X_test, return_cov=True)
    np.testing.assert_allclose(mean, mean_ref, atol=1e-8)  # source: sklearn GPR, REFERENCES.md
    np.testing.assert_allclose(cov, cov_ref, atol=1e-8)  # source: sklearn GPR, REFERENCES.md
    np.testing.assert_allclose(gp.posterior_covariance(X_test[:5], X_test[5:]), cov_ref[:5, 5:], atol=1e-8)


def test_sample_y_draws_have_the_mean_and_covariance_of_predict() -> None:
    # law of large numbers: 40,000 joint draws; the sample mean is within 5 standard errors of
    # predict's mean and the sample covariance within 5 standard errors of predict(return_cov=True)'s
    X, y, X_test = _data()
    gp = ExactGP(Matern52(VARIANCE, LENGTH_SCALES), NOISE, normalize_y=True, optimize=False).fit(X, y)
    points = X_test[:4]
    mean, cov = gp.predict(points, return_cov=True)
    n = 40_000
    draws = gp.sample_y(points, n_samples=n, random_state=0)
    assert draws.shape == (4, n)
    sd = np.sqrt(np.diag(cov))
    assert np.all(np.abs(draws.mean(axis=1) - mean) < 5 * sd / np.sqrt(n))
    # sd of a Gaussian sample covariance entry: sqrt((cov_ij^2 + cov_ii cov_jj) / n), the Wishart variance
    se = np.sqrt((cov**2 + np.outer(np.diag(cov), np.diag(cov))) / n)
    assert np.all(np.abs(np.cov(draws) - cov) < 5 * se)
    np.testing.assert_array_equal(gp.sample_y(points, 3, random_state=7), gp.sample_y(points, 3, random_state=7))


def test_stored_state_restores_predictions_and_the_penalised_likelihood() -> None:
    # through JSON text and an npz file, as the store keeps them (no pickle): the same numbers, bit for bit
    X, y, X_test = _data(25)
    hyperprior = np.array([[0.0, 1.0], [0.0, 1.0], [0.5, 2.0], [0.0, 1.0], [-3.0, 1.5]])
    gp = ExactGP(hyperprior=hyperprior, normalize_y=True, basis_prior=(np.zeros(2), np.eye(2)), n_restarts=0)
    basis = np.column_stack([X[:, 2], np.ones(len(y))])
    gp.fit(X, y, basis=basis)
    rebuilt = ExactGP.from_state(*_through_json_and_npz(*gp.to_state()))
    basis_test = np.column_stack([X_test[:, 2], np.ones(len(X_test))])
    for a, b in zip(rebuilt.predict(X_test, return_cov=True, basis=basis_test),
                    gp.predict(X_test, return_cov=True, basis=basis_test), strict=True):
        np.testing.assert_array_equal(a, b)
    assert rebuilt.log_marginal_likelihood() == gp.log_marginal_likelihood()
    theta = gp.theta + 0.1
    assert rebuilt.log_posterior(theta) == gp.log_posterior(theta)


def _through_json_and_npz(params: dict, arrays: dict) -> tuple[dict, dict]:
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    buffer.seek(0)
    with np.load(buffer, allow_pickle=False) as npz:
        return json.loads(json.dumps(params)), dict(npz)


def test_a_fixed_covariance_term_leaves_the_likelihood_gradient_exact() -> None:
    # the fixed term has no hyperparameters: the analytic gradient (R&W eq. 5.9) still matches scipy's
    # finite differences, and the term shows in the prior variance
    X, y, X_test = _data()
    anchor = X[:6]

    def fixed(A: np.ndarray, B: np.ndarray | None) -> np.ndarray:
        B = A if B is None else B
        return Matern52(0.5, 0.4)(A, anchor) @ Matern52(0.5, 0.4)(anchor, B)

    def fixed_diag(A: np.ndarray) -> np.ndarray:
        return np.einsum("ij,ij->i", Matern52(0.5, 0.4)(A, anchor), Matern52(0.5, 0.4)(A, anchor))

    kernel = WithFixedCovariance(Matern52(VARIANCE, LENGTH_SCALES), fixed, fixed_diag, 2.0)
    gp = ExactGP(kernel, NOISE, optimize=False).fit(X, y)
    theta = gp.theta + np.array([0.1, -0.2, 0.1, 0.3, 0.2])
    _, grad = gp.log_marginal_likelihood(theta, eval_gradient=True)
    numeric = approx_fprime(theta, gp.log_marginal_likelihood, 1e-6)
    np.testing.assert_allclose(grad, numeric, rtol=1e-4, atol=1e-4)
    np.testing.assert_allclose(np.diag(kernel(X_test)), kernel.diag(X_test), rtol=1e-12)
    assert np.all(kernel.diag(X_test) > VARIANCE)
