"""The sparse GP (Titsias 2009): with the inducing inputs at the data it is the exact GP."""

from __future__ import annotations

import numpy as np
from scipy.optimize import approx_fprime
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

from gapgauge.compare.kernels import Matern52
from gapgauge.compare.sparse import SparseGP, kmeans_plusplus
from test_gp import _through_json_and_npz

LENGTH_SCALES = [0.3, 0.7, 1.5]


def _data(n: int = 60) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(1)
    X = rng.uniform(size=(n, 3))
    return X, np.sin(6 * X[:, 0]) + X[:, 1] ** 2 + 0.1 * rng.normal(size=n), rng.uniform(size=(20, 3))


def test_sparse_gp_with_inducing_points_at_the_data_equals_the_exact_gp() -> None:
    # Titsias (2009): with Z = X, Q = K and the bound's trace term vanishes, so the variational
    # posterior is the exact posterior; reference: sklearn's exact GPR with the same fixed kernel
    X, y, X_test = _data()
    kernel = ConstantKernel(1.3) * Matern(length_scale=LENGTH_SCALES, nu=2.5) + WhiteKernel(0.05)
    exact = GaussianProcessRegressor(kernel, optimizer=None, alpha=0.0).fit(X, y)
    sparse = SparseGP(Matern52(1.3, LENGTH_SCALES), 0.05, inducing=X, optimize=False, normalize_y=False,
                      jitter=1e-12).fit(X, y)
    mean_ref, sd_ref = exact.predict(X_test, return_std=True)
    mean, sd = sparse.predict(X_test, return_std=True, observation=True)
    # tolerance: the 1e-12 relative jitter on K_uu, amplified by its condition number
    np.testing.assert_allclose(mean, mean_ref, atol=1e-6)
    np.testing.assert_allclose(sd, sd_ref, atol=1e-6)
    # and the bound equals the exact log marginal likelihood
    assert abs(sparse.bound_ - exact.log_marginal_likelihood_value_) < 1e-5


def test_sparse_bound_gradient_matches_finite_differences() -> None:
    X, y, _ = _data()
    sparse = SparseGP(Matern52(1.3, LENGTH_SCALES), 0.05, inducing=X[:15], optimize=False,
                      normalize_y=False).fit(X, y)
    theta = sparse.theta + np.array([0.1, -0.2, 0.1, 0.3, 0.2])
    _, grad = sparse.log_marginal_likelihood(theta, eval_gradient=True)
    numeric = approx_fprime(theta, sparse.log_marginal_likelihood, 1e-6)  # reference: scipy differences
    np.testing.assert_allclose(grad, numeric, rtol=1e-4, atol=1e-4)


def test_sparse_bound_is_below_the_exact_log_marginal_likelihood() -> None:
    # Titsias (2009): F is a lower bound of log p(y) for any inducing inputs
    X, y, _ = _data()
    kernel = ConstantKernel(1.3) * Matern(length_scale=LENGTH_SCALES, nu=2.5) + WhiteKernel(0.05)
    exact = GaussianProcessRegressor(kernel, optimizer=None, alpha=0.0).fit(X, y)
    sparse = SparseGP(Matern52(1.3, LENGTH_SCALES), 0.05, inducing=X[:10], optimize=False,
                      normalize_y=False).fit(X, y)
    assert sparse.bound_ < exact.log_marginal_likelihood_value_


def test_sparse_gp_learns_a_smooth_function_from_many_noisy_points() -> None:
    # many noisy points of a known function: held-out error well below the noise sd (0.3)
    rng = np.random.default_rng(0)
    X = rng.uniform(size=(6000, 4))

    def f(X: np.ndarray) -> np.ndarray:
        return np.sin(3 * X[:, 0]) + 4 * (X[:, 1] - 0.5) ** 2 + 0.3 * X[:, 2]

    sparse = SparseGP(n_inducing=100, n_subsample=1000, n_inducing_subsample=60, random_state=0)
    sparse.fit(X, f(X) + 0.3 * rng.normal(size=X.shape[0]))
    X_test = rng.uniform(size=(500, 4))
    rmse = np.sqrt(np.mean((sparse.predict(X_test) - f(X_test)) ** 2))
    assert rmse < 0.1
    assert 0.25 < np.sqrt(sparse.noise_) * sparse.y_std_ < 0.35  # the generating noise sd is 0.3


def test_kmeans_plusplus_is_reproducible_and_picks_distinct_rows() -> None:
    X = np.random.default_rng(2).uniform(size=(500, 3))
    a = kmeans_plusplus(X, 40, np.random.default_rng(7))
    b = kmeans_plusplus(X, 40, np.random.default_rng(7))
    np.testing.assert_array_equal(a, b)
    assert len(set(a.tolist())) == 40


def test_sparse_posterior_covariance_with_inducing_points_at_the_data_equals_the_exact_one() -> None:
    # Titsias (2009): with Z = X, K - Q + K_xu Sigma K_ux is the exact posterior covariance
    # K_** - K_*X (K_XX + s^2 I)^-1 K_X*; reference: sklearn's exact GPR, predict(return_cov=True), with the
    # noise as alpha so that its covariance is of the latent function. A cross block (two different sets)
    # checks the off-diagonal form, the diagonal block checks it against predict's variance.
    X, y, X_test = _data()
    exact = GaussianProcessRegressor(ConstantKernel(1.3) * Matern(length_scale=LENGTH_SCALES, nu=2.5),
                                     optimizer=None, alpha=0.05).fit(X, y)
    sparse = SparseGP(Matern52(1.3, LENGTH_SCALES), 0.05, inducing=X, optimize=False, normalize_y=False,
                      jitter=1e-12).fit(X, y)
    mean_ref, reference = exact.predict(X_test, return_cov=True)
    # tolerance: the 1e-12 relative jitter on K_uu, amplified by its condition number (as above)
    np.testing.assert_allclose(sparse.posterior_covariance(X_test[:8], X_test[8:]), reference[:8, 8:], atol=1e-6)
    mean, own = sparse.predict(X_test, return_cov=True)
    np.testing.assert_allclose(mean, mean_ref, atol=1e-6)
    np.testing.assert_allclose(own, reference, atol=1e-6)
    np.testing.assert_allclose(np.sqrt(np.diag(own)), sparse.predict(X_test, return_std=True)[1], rtol=1e-9)


def test_a_reloaded_sparse_gp_keeps_its_predictions_and_its_bound() -> None:
    # the stored state holds the hyperparameter subsample, so the bound (Titsias 2009, on that subsample)
    # can be evaluated after a reload; through JSON text and npz as the store keeps it: the same numbers
    X, y, X_test = _data(300)
    sparse = SparseGP(n_inducing=20, n_subsample=120, n_inducing_subsample=30, max_iter=30, random_state=0)
    sparse.fit(X, y)
    rebuilt = SparseGP.from_state(*_through_json_and_npz(*sparse.to_state()))
    for a, b in zip(rebuilt.predict(X_test, return_cov=True), sparse.predict(X_test, return_cov=True), strict=True):
        np.testing.assert_array_equal(a, b)
    assert rebuilt.log_marginal_likelihood() == sparse.log_marginal_likelihood()
    theta = sparse.theta + 0.2
    value, grad = rebuilt.log_marginal_likelihood(theta, eval_gradient=True)
    expected_value, expected_grad = sparse.log_marginal_likelihood(theta, eval_gradient=True)
    assert value == expected_value
    np.testing.assert_array_equal(grad, expected_grad)


def test_sparse_sample_y_draws_have_the_mean_and_covariance_of_predict() -> None:
    # law of large numbers: 40,000 joint draws, within 5 standard errors (the Wishart variance for the covariance)
    X, y, X_test = _data()
    sparse = SparseGP(Matern52(1.3, LENGTH_SCALES), 0.05, inducing=X[:15], optimize=False).fit(X, y)
    mean, cov = sparse.predict(X_test[:3], return_cov=True)
    n = 40_000
    draws = sparse.sample_y(X_test[:3], n_samples=n, random_state=1)
    assert np.all(np.abs(draws.mean(axis=1) - mean) < 5 * np.sqrt(np.diag(cov) / n))
    se = np.sqrt((cov**2 + np.outer(np.diag(cov), np.diag(cov))) / n)
    assert np.all(np.abs(np.cov(draws) - cov) < 5 * se)
