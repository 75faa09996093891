"""Exact Gaussian-process regression (Rasmussen and Williams 2006, Algorithm 2.1).

``ExactGP`` follows Algorithm 2.1 of Rasmussen and Williams, *Gaussian Processes for Machine
Learning* (2006): Cholesky factor of ``K + noise I``, ``alpha = L^T \\ (L \\ y)``, predictive mean
``k*^T alpha`` and variance ``k** - |L \\ k*|^2``; the log marginal likelihood and its analytic gradient
``0.5 tr((alpha alpha^T - K^-1) dK/dtheta)`` (eq. 5.9). What it adds:

- optional explicit basis functions with a Gaussian prior on their coefficients (R&W section 2.7):
  ``y = H^T b + f(x) + noise``, ``b ~ N(b0, B)``, which is the same as a GP with mean ``H^T b0`` and
  covariance ``k + H^T B H``; the coefficients' posterior (R&W eq. 2.42) is kept in ``coef_`` and
  ``coef_cov_``. The multi-fidelity model uses this for rho (the simulation level as a basis function);
- optional log-normal priors on the hyperparameters, so a handful of points gives sane answers
  (the maximum a posteriori replaces the maximum of the marginal likelihood);
- hyperparameters by L-BFGS-B from the initial values plus a few seeded restarts.

The surface is scikit-learn's ``GaussianProcessRegressor``, shared by every model of
:mod:`gapgauge.compare`: ``fit(X, y)`` returns self, ``predict(X, return_std=False, return_cov=False)``,
``sample_y(X, n_samples=1, random_state=None)``, ``log_marginal_likelihood(theta=None,
eval_gradient=False)``, ``to_state()`` / ``from_state()``; hyperparameters are plain attributes and
fitted state ends in ``_`` (``y_mean_``, ``y_std_``, ``kernel_``, ``noise_``, ``L_``, ``alpha_``).
Factors go through the package's one jitter policy (:func:`gapgauge.compare.linalg.cholesky_jittered`).
Inputs are expected in the unit cube (the callers scale them with ``scenario.to_unit``); outputs are
standardised when ``normalize_y`` is true.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.linalg import cho_solve
from scipy.optimize import minimize
from threadpoolctl import threadpool_limits

from ..errors import ModelError
from .kernels import Matern52, WithFixedCovariance, default_length_scale
from .linalg import CHOLESKY_LOWER, FIT_BLAS_THREADS, cholesky_jittered, posterior_covariance, solve_lower

LOG2PI = np.log(2.0 * np.pi)
# bounds of the log hyperparameters searched by the optimiser: inputs are in the unit cube and
# outputs standardised, so length-scales far outside [0.01, 100] and variances outside
# [1e-4, 1e4] mean nothing for these data
LOG_VARIANCE_BOUNDS = (np.log(1e-4), np.log(1e4))
LOG_LENGTH_SCALE_BOUNDS = (np.log(1e-2), np.log(1e2))
LOG_NOISE_BOUNDS = (np.log(1e-8), np.log(10.0))


def log_normal_prior(theta: np.ndarray, prior: np.ndarray | None) -> tuple[float, np.ndarray]:
    """Sum of independent normal log densities on log hyperparameters and its gradient.

    ``prior`` is ``(p x 2)``: for each log hyperparameter the mean and sd of its normal prior
    (a log-normal prior on the hyperparameter itself); a row with sd = inf or NaN is flat.
    """
    grad = np.zeros_like(theta)
    if prior is None:
        return 0.0, grad
    mean, sd = prior[:, 0], prior[:, 1]
    used = np.isfinite(sd) & np.isfinite(mean)
    z = (theta[used] - mean[used]) / sd[used]
    value = float(np.sum(-0.5 * z**2 - np.log(sd[used]) - 0.5 * LOG2PI))
    grad[used] = -z / sd[used]
    return value, grad


class ExactGP:
    """Exact GP regression with a Matern 5/2 ARD kernel (Rasmussen and Williams, Algorithm 2.1).

    Parameters:
        kernel: the covariance (its hyperparameters are the initial values when optimising); a
            :class:`~gapgauge.compare.kernels.WithFixedCovariance` adds a fixed covariance term.
        noise: Gaussian noise variance (standardised output units squared).
        alpha: fixed extra variance on the diagonal, scalar or ``(n,)`` (as in scikit-learn).
        normalize_y: standardise the targets (mean 0, sd 1) before fitting.
        optimize: fit the hyperparameters by (penalised) marginal likelihood.
        n_restarts: extra optimiser starts drawn from the hyperprior (or the search box).
        hyperprior: ``(1 + dim + 1) x 2`` normal priors (mean, sd) on ``theta``, or None.
        basis_prior: ``(b0 (p,), B (p x p))`` prior of the basis coefficients, or None for no basis.
        random_state: seed or ``numpy.random.Generator`` for the restarts.

    Fitted attributes: ``kernel_``, ``noise_`` (the hyperparameters used), ``y_mean_``, ``y_std_``
    (the standardisation), ``X_train_ (n x dim)``, ``y_train_ (n,)`` standardised, ``basis_train_
    (n x p)`` or None, ``L_ (n x n)`` and ``alpha_ (n,)`` of Algorithm 2.1, ``coef_ (p,)`` and
    ``coef_cov_ (p x p)`` the basis coefficients' posterior (standardised units) or None.
    """

    def __init__(
        self,
        kernel: Matern52 | WithFixedCovariance | None = None,
        noise: float = 1e-2,
        *,
        alpha: float | np.ndarray = 0.0,
        normalize_y: bool = False,
        optimize: bool = True,
        n_restarts: int = 2,
        hyperprior: np.ndarray | None = None,
        basis_prior: tuple[np.ndarray, np.ndarray] | None = None,
        random_state: int | np.random.Generator | None = 0,
    ):
        self.kernel = kernel
        self.noise = noise
        self.alpha = alpha
        self.normalize_y = normalize_y
        self.optimize = optimize
        self.n_restarts = n_restarts
        self.hyperprior = hyperprior
        self.basis_prior = basis_prior
        self.random_state = random_state

    # ---- hyperparameters ------------------------------------------------------------------
    @property
    def theta(self) -> np.ndarray:
        """``[log variance, log length_scale..., log noise]``."""
        return np.concatenate([self.kernel_.theta, [np.log(self.noise_)]])

    def bounds(self, dim: int) -> np.ndarray:
        return np.array([LOG_VARIANCE_BOUNDS, *[LOG_LENGTH_SCALE_BOUNDS] * dim, LOG_NOISE_BOUNDS])

    # ---- fit ------------------------------------------------------------------------------
    def fit(self, X: np.ndarray, y: np.ndarray, basis: np.ndarray | None = None) -> ExactGP:
        """Fit to inputs ``X (n x dim)`` (unit cube) and targets ``y (n,)``.

        ``basis`` is ``(n x p)``, the basis functions' values at ``X`` (needs ``basis_prior``).
        """
        X = np.atleast_2d(np.asarray(X, dtype=float))
        y = np.asarray(y, dtype=float).ravel()
        if X.shape[0] != y.shape[0]:
            raise ValueError(f"X has {X.shape[0]} rows but y has {y.shape[0]}")
        if (basis is None) != (self.basis_prior is None):
            raise ValueError("give basis values exactly when basis_prior is set")
        dim = X.shape[1]
        if self.kernel is None:
            self.kernel_ = Matern52(1.0, np.full(dim, default_length_scale(dim)))
        else:
            # a copy (any kind of kernel), with the length-scales broadcast to the inputs' dimension
            length_scale = np.broadcast_to(self.kernel.length_scale, (dim,))
            self.kernel_ = self.kernel.clone_with_theta(np.concatenate([[np.log(self.kernel.variance)],
                                                                        np.log(length_scale)]))
        self.noise_ = float(self.noise)
        if self.normalize_y and y.size > 0:
            self.y_mean_ = float(np.mean(y))
            sd = float(np.std(y))
            self.y_std_ = sd if sd > 0 else 1.0
        else:
            self.y_mean_, self.y_std_ = 0.0, 1.0
        self.X_train_ = X
        # standardised targets (what the likelihood sees)
        self.y_train_ = (y - self.y_mean_) / self.y_std_
        self.basis_train_ = None if basis is None else np.atleast_2d(np.asarray(basis, dtype=float))
        with threadpool_limits(limits=FIT_BLAS_THREADS, user_api="blas"):
            if self.optimize and y.size > 0:
                self._optimise()
            self._factorise()
        return self

    def _optimise(self) -> None:
        dim = self.X_train_.shape[1]
        bounds = self.bounds(dim)

        def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
            value, grad = self.log_posterior(theta, eval_gradient=True)
            if not np.isfinite(value):
                return 1e25, np.zeros_like(theta)
            return -value, -grad

        rng = np.random.default_rng(self.random_state)
        starts = [np.clip(self.theta, bounds[:, 0], bounds[:, 1])]
        for _ in range(self.n_restarts):
            if self.hyperprior is not None and np.all(np.isfinite(self.hyperprior[:, 1])):
                draw = rng.normal(self.hyperprior[:, 0], self.hyperprior[:, 1])
            else:
                draw = rng.uniform(bounds[:, 0], bounds[:, 1])
            starts.append(np.clip(draw, bounds[:, 0], bounds[:, 1]))
        best = None
        for start in starts:
            res = minimize(objective, start, jac=True, method="L-BFGS-B", bounds=bounds)
            if best is None or res.fun < best.fun:
                best = res
        self.kernel_.theta = best.x[:-1]
        self.noise_ = float(np.exp(best.x[-1]))

    def _covariance(self, theta: np.ndarray) -> tuple[np.ndarray, Matern52, float]:
        kernel = self.kernel_.clone_with_theta(theta[:-1])
        noise = float(np.exp(theta[-1]))
        K = kernel(self.X_train_)
        K[np.diag_indices_from(K)] += noise + self.alpha
        return K, kernel, noise

    def _factorise(self) -> None:
        K, _, _ = self._covariance(self.theta)
        n = K.shape[0]
        if self.basis_train_ is not None and n == 0:
            self.coef_, self.coef_cov_ = (
                np.asarray(self.basis_prior[0], float),
                np.asarray(self.basis_prior[1], float),
            )
            residual = self.y_train_
        elif self.basis_train_ is not None:
            b0, B = self.basis_prior
            H = self.basis_train_
            # Alg 2.1 line 2 on K alone, for the coefficients' posterior (R&W eq. 2.42)
            L0 = cholesky_jittered(K)
            KiH = cho_solve((L0, CHOLESKY_LOWER), H, check_finite=False)
            Kiy = cho_solve((L0, CHOLESKY_LOWER), self.y_train_, check_finite=False)
            Binv = np.linalg.inv(B)
            precision = Binv + H.T @ KiH
            self.coef_cov_ = np.linalg.inv(precision)
            self.coef_ = self.coef_cov_ @ (Binv @ b0 + H.T @ Kiy)
            K = K + H @ B @ H.T
            residual = self.y_train_ - H @ b0
        else:
            self.coef_ = self.coef_cov_ = None
            residual = self.y_train_
        # Alg 2.1 line 2: L = cholesky(K + noise I)
        self.L_ = cholesky_jittered(K)
        # Alg 2.1 line 3: alpha = L^T \ (L \ y)
        self.alpha_ = cho_solve((self.L_, CHOLESKY_LOWER), residual, check_finite=False) if n else np.zeros(0)

    # ---- marginal likelihood --------------------------------------------------------------
    def log_marginal_likelihood(
        self, theta: np.ndarray | None = None, eval_gradient: bool = False
    ) -> float | tuple[float, np.ndarray]:
        """Log marginal likelihood of the (standardised) training targets (R&W Alg. 2.1, eq. 5.9).

        ``theta`` is ``[log variance, log length_scale..., log noise]`` (None: the fitted values).
        With ``eval_gradient`` also returns its gradient with respect to ``theta``.
        """
        theta = self.theta if theta is None else np.asarray(theta, dtype=float)
        if self.y_train_.size == 0:  # no data: the empty product of densities
            return (0.0, np.zeros_like(theta)) if eval_gradient else 0.0
        K, kernel, noise = self._covariance(theta)
        y = self.y_train_
        if self.basis_train_ is not None:
            b0, B = self.basis_prior
            K = K + self.basis_train_ @ B @ self.basis_train_.T
            y = y - self.basis_train_ @ b0
        try:
            L = cholesky_jittered(K)
        except ModelError:  # not positive definite at this theta: the optimiser backs off
            return (-np.inf, np.zeros_like(theta)) if eval_gradient else -np.inf
        alpha = cho_solve((L, CHOLESKY_LOWER), y, check_finite=False)
        value = -0.5 * y @ alpha - np.log(np.diag(L)).sum() - 0.5 * y.size * LOG2PI
        if not eval_gradient:
            return float(value)
        # eq. 5.9: 0.5 tr((alpha alpha^T - K^-1) dK/dtheta)
        inner = np.outer(alpha, alpha) - cho_solve((L, CHOLESKY_LOWER), np.eye(y.size), check_finite=False)
        grad = np.empty_like(theta)
        grad[:-1] = 0.5 * kernel.gradient_contract(self.X_train_, None, inner)
        grad[-1] = 0.5 * noise * np.trace(inner)
        return float(value), grad

    def log_posterior(
        self, theta: np.ndarray, eval_gradient: bool = False
    ) -> float | tuple[float, np.ndarray]:
        """Log marginal likelihood plus the log hyperprior (the objective of the optimiser)."""
        lp, lp_grad = log_normal_prior(np.asarray(theta, dtype=float), self.hyperprior)
        if not eval_gradient:
            return self.log_marginal_likelihood(theta) + lp
        value, grad = self.log_marginal_likelihood(theta, eval_gradient=True)
        return value + lp, grad + lp_grad

    # ---- prediction -----------------------------------------------------------------------
    def _prior_cross(self, X: np.ndarray, basis: np.ndarray | None) -> np.ndarray:
        """Prior covariance ``(n_train x n)`` between the training inputs and ``X``, basis term included."""
        cross = self.kernel_(self.X_train_, X)
        if self.basis_train_ is not None:
            cross = cross + self.basis_train_ @ self.basis_prior[1] @ self._check_basis(basis, X).T
        return cross

    def _check_basis(self, basis: np.ndarray | None, X: np.ndarray) -> np.ndarray:
        if basis is None:
            raise ValueError("this model has basis functions: give their values at X as basis (n x p)")
        basis = np.atleast_2d(np.asarray(basis, dtype=float))
        if basis.shape[0] != X.shape[0]:
            raise ValueError(f"basis has {basis.shape[0]} rows but X has {X.shape[0]}")
        return basis

    def predict(
        self,
        X: np.ndarray,
        return_std: bool = False,
        return_cov: bool = False,
        *,
        basis: np.ndarray | None = None,
        observation: bool = False,
    ) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Predictive mean ``(n,)`` at ``X (n x dim)``, in the units of ``y`` given to :meth:`fit`; with
        ``return_std`` also its sd ``(n,)``, with ``return_cov`` its covariance ``(n x n)`` (units squared).

        The sd and covariance are those of the latent function; with ``observation`` those of new
        observations (the noise variance added on the diagonal, as scikit-learn does with a
        ``WhiteKernel``). ``basis`` is ``(n x p)``, the basis functions at ``X`` when the model has a
        basis (R&W section 2.7: their prior ``H^T B H`` is part of every covariance).
        """
        if return_std and return_cov:
            raise ValueError("give return_std or return_cov, not both")
        X = np.atleast_2d(np.asarray(X, dtype=float))
        cross = self._prior_cross(X, basis)
        mean = np.zeros(X.shape[0])
        if self.basis_train_ is not None:
            mean += self._check_basis(basis, X) @ self.basis_prior[0]
        # Alg 2.1 line 4: mean = k*^T alpha
        mean = self.y_std_ * (mean + cross.T @ self.alpha_) + self.y_mean_
        if return_cov:
            prior = self.kernel_(X)
            if self.basis_train_ is not None:
                B = self._check_basis(basis, X)
                prior = prior + B @ self.basis_prior[1] @ B.T
            # R&W eq. 2.24 (what posterior_covariance does), reusing the cross-covariance computed above
            cov = posterior_covariance(prior, self.L_, cross) * self.y_std_**2
            if observation:
                cov[np.diag_indices_from(cov)] += self.noise_ * self.y_std_**2
            return mean, cov
        if not return_std:
            return mean
        prior_var = self.kernel_.diag(X).copy()
        if self.basis_train_ is not None:
            B = self._check_basis(basis, X)
            prior_var += np.einsum("ij,jk,ik->i", B, self.basis_prior[1], B)
        # Alg 2.1 lines 5-6: v = L \ k*, var = k** - v^T v (no data: the prior variance)
        V = solve_lower(self.L_, cross) if self.L_.size else np.zeros((0, X.shape[0]))
        var = prior_var - np.einsum("ij,ij->j", V, V)
        var = np.maximum(var, 0.0) + (self.noise_ if observation else 0.0)
        return mean, np.sqrt(var) * self.y_std_

    def posterior_covariance(
        self,
        X: np.ndarray,
        Z: np.ndarray | None = None,
        *,
        basis: np.ndarray | None = None,
        basis_z: np.ndarray | None = None,
    ) -> np.ndarray:
        """Posterior covariance ``(n x m)`` of the latent function between ``X (n x dim)`` and
        ``Z (m x dim)`` (``Z = X`` if None), in the units of ``y`` squared.

        ``k(X, Z) - V_X^T V_Z`` with ``V = L \\ k(X_train, .)`` (Rasmussen and Williams 2006, eq. 2.24;
        :func:`gapgauge.compare.linalg.posterior_covariance`), the basis prior ``H_X^T B H_Z`` added to
        every prior covariance when the model has basis functions (``basis (n x p)``, ``basis_z (m x p)``).
        """
        X = np.atleast_2d(np.asarray(X, dtype=float))
        Zq = X if Z is None else np.atleast_2d(np.asarray(Z, dtype=float))
        prior = self.kernel_(X, Z)
        cross_x = self._prior_cross(X, basis)
        cross_z = None if Z is None else self._prior_cross(Zq, basis_z)
        if self.basis_train_ is not None:
            bx = self._check_basis(basis, X)
            bz = bx if Z is None else self._check_basis(basis_z, Zq)
            prior = prior + bx @ self.basis_prior[1] @ bz.T
        return posterior_covariance(prior, self.L_, cross_x, cross_z) * self.y_std_**2

    def sample_y(
        self,
        X: np.ndarray,
        n_samples: int = 1,
        random_state: int | np.random.Generator | None = None,
        *,
        basis: np.ndarray | None = None,
    ) -> np.ndarray:
        """``(n x n_samples)`` joint draws of the latent function at ``X (n x dim)`` from the posterior
        ``N(mean, cov)`` of :meth:`predict` (``return_cov=True``), as scikit-learn's ``sample_y``."""
        mean, cov = self.predict(X, return_cov=True, basis=basis)
        return draw_gaussian(mean, cov, n_samples, random_state)

    # ---- storage --------------------------------------------------------------------------
    def to_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """JSON-able parameters and arrays that restore predictions, draws and the (penalised) log
        marginal likelihood without refitting (no pickle). A :class:`WithFixedCovariance` kernel
        stores its base kernel only; its owner rebuilds the fixed term."""
        params = {
            "model": "ExactGP",
            "kernel": self.kernel_.get_params(),
            "noise": self.noise_,
            "normalize_y": self.normalize_y,
            "n_restarts": self.n_restarts,
            "y_mean": self.y_mean_,
            "y_std": self.y_std_,
            "has_basis": self.basis_train_ is not None,
            "has_hyperprior": self.hyperprior is not None,
        }
        arrays = {
            "X_train": self.X_train_,
            "y_train": self.y_train_,
            "alpha_vector": self.alpha_,
            "L": self.L_,
            "extra_diagonal": np.broadcast_to(np.asarray(self.alpha, float), self.y_train_.shape).copy(),
        }
        if self.hyperprior is not None:
            arrays["hyperprior"] = np.asarray(self.hyperprior, dtype=float)
        if self.basis_train_ is not None:
            arrays.update(
                basis_train=self.basis_train_,
                basis_mean=self.basis_prior[0],
                basis_cov=self.basis_prior[1],
                coef=self.coef_,
                coef_cov=self.coef_cov_,
            )
        return params, arrays

    @classmethod
    def from_state(cls, params: dict[str, Any], arrays: dict[str, np.ndarray]) -> ExactGP:
        """The model of :meth:`to_state`, fitted state included (``optimize`` off)."""
        kernel = Matern52(params["kernel"]["variance"], np.asarray(params["kernel"]["length_scale"]))
        has_basis = bool(params["has_basis"])
        basis_prior = (np.asarray(arrays["basis_mean"]), np.asarray(arrays["basis_cov"])) if has_basis else None
        gp = cls(
            kernel,
            params["noise"],
            alpha=np.asarray(arrays["extra_diagonal"]),
            normalize_y=params["normalize_y"],
            optimize=False,
            n_restarts=int(params.get("n_restarts", 2)),
            hyperprior=np.asarray(arrays["hyperprior"]) if params.get("has_hyperprior") else None,
            basis_prior=basis_prior,
        )
        gp.kernel_ = kernel
        gp.noise_ = float(params["noise"])
        gp.y_mean_, gp.y_std_ = float(params["y_mean"]), float(params["y_std"])
        gp.X_train_ = np.asarray(arrays["X_train"], dtype=float).reshape(-1, kernel.length_scale.size)
        gp.y_train_ = np.asarray(arrays["y_train"], dtype=float)
        gp.alpha_ = np.asarray(arrays["alpha_vector"], dtype=float)
        gp.L_ = np.asarray(arrays["L"], dtype=float).reshape(gp.y_train_.size, gp.y_train_.size)
        gp.basis_train_ = np.asarray(arrays["basis_train"]) if has_basis else None
        gp.coef_ = np.asarray(arrays["coef"]) if has_basis else None
        gp.coef_cov_ = np.asarray(arrays["coef_cov"]) if has_basis else None
        return gp


def draw_gaussian(
    mean: np.ndarray, cov: np.ndarray, n_samples: int, random_state: int | np.random.Generator | None
) -> np.ndarray:
    """``(n x n_samples)`` draws of ``N(mean (n,), cov (n x n))``: ``mean + L z`` with ``L`` the jittered
    square root of :func:`~gapgauge.compare.linalg.cholesky_jittered` (eigen fallback on) and ``z``
    standard normal from ``numpy.random.default_rng(random_state)``."""
    if n_samples < 1:
        raise ValueError(f"n_samples must be at least 1, got {n_samples}")
    rng = np.random.default_rng(random_state)
    L = cholesky_jittered(0.5 * (cov + cov.T), eigen_fallback=True)
    return mean[:, None] + L @ rng.standard_normal((mean.size, int(n_samples)))
