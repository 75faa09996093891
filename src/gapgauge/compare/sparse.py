"""Sparse GP regression for the simulation level: the variational bound of Titsias (2009).

``SparseGP`` follows Titsias, "Variational learning of inducing variables in sparse Gaussian
processes" (AISTATS 2009): with ``m`` inducing inputs ``Z`` and ``Q = K_fu K_uu^-1 K_uf``, the
collapsed evidence lower bound is

    F = log N(y | 0, Q + noise I) - tr(K_ff - Q) / (2 noise)

and the optimal variational distribution of the inducing values gives the predictive mean and
variance (the same formulas as the "SGPR" of common GP libraries):

    A = L_uu^-1 K_uf / sigma,  B = I + A A^T,  c = L_B^-1 A y / sigma
    mean(x) = k_u(x)^T L_uu^-T L_B^-T c
    var(x)  = k(x, x) - |L_uu^-1 k_u(x)|^2 + |L_B^-1 L_uu^-1 k_u(x)|^2

Everything touching all ``n`` points is ``O(n m^2)`` and done in chunks, so 10^5 rollouts with a few
hundred inducing points fit in seconds. What it adds beyond the paper's algorithm, for scale:

- inducing inputs chosen by k-means++ seeding (Arthur and Vassilvitskii 2007) rather than optimised
  (:mod:`gapgauge.compare.inducing`);
- hyperparameters by maximising the bound (with its analytic gradient, derived below) on a random
  subsample of ``n_subsample`` points with ``m`` inducing points chosen from it, then the final
  posterior on all points with inducing points re-chosen in the length-scale-scaled space.

Gradient of the bound. With ``v = (Q + noise I)^-1 y``, ``P = K_uu^-1 K_uf`` and
``W = v v^T + A^T B^-1 A / noise``: ``dF/dK_uf = P W``, ``dF/dK_uu = -P W P^T / 2``,
``dF/dK_ff,ii = -1 / (2 noise)`` and ``dF/dnoise = (v^T v - tr (Q + noise I)^-1) / 2
+ tr(K_ff - Q) / (2 noise^2)``; all are formed in ``O(n m^2)`` without an ``n x n`` matrix.

Surface as in :mod:`gapgauge.compare.gp` (``log_marginal_likelihood`` is the bound on the hyperparameter
subsample, stored by ``to_state`` so that it can be evaluated after a reload). The inducing covariance
carries a fixed relative regularisation ``INDUCING_JITTER`` (part of the model: the bound and its gradient
include it); every Cholesky factor goes through :func:`gapgauge.compare.linalg.cholesky_jittered`.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.linalg import cho_solve, solve_triangular
from scipy.optimize import minimize
from threadpoolctl import threadpool_limits

from ..errors import ModelError
from .gp import LOG2PI, ExactGP, draw_gaussian, log_normal_prior
from .inducing import choose_inducing, kmeans_plusplus
from .kernels import Matern52, default_length_scale
from .linalg import CHOLESKY_LOWER, FIT_BLAS_THREADS, cholesky_jittered, solve_lower

# the inducing covariance is ill-conditioned when two inducing inputs are close relative to the
# length-scales; this relative jitter keeps its Cholesky factor finite (a common choice, 1e-6)
INDUCING_JITTER = 1e-6
CHUNK = 8192
# a prediction at up to this many points keeps k_u(X) and M k_u(X) for the next call with the same X: the
# multi-fidelity hardware level asks the simulation level about the same candidates three times per step
MEMO_ROWS = 4096
MEMO_ENTRIES = 4


class SparseGP:
    """Variational sparse GP regression (Titsias 2009) with a Matern 5/2 ARD kernel.

    Parameters:
        kernel: initial kernel (None: variance 1, length-scales ``default_length_scale(dim)``).
        noise: initial noise variance (standardised output units squared).
        n_inducing: number of inducing inputs ``m`` (at most the number of points).
        n_subsample: points used to fit the hyperparameters (all when fewer).
        n_posterior: points the posterior is computed on, a seeded random subsample when more (None: all).
        n_inducing_subsample: inducing inputs used while fitting the hyperparameters (may exceed
            ``n_inducing``; equal to ``n_subsample``, the bound is the exact marginal likelihood of
            the subsample).
        inducing: fixed inducing inputs ``(m x dim)`` to use instead of k-means++ (e.g. the data).
        normalize_y: standardise the targets before fitting.
        optimize: fit the hyperparameters by maximising the bound.
        hyperprior: optional ``(dim + 2) x 2`` normal priors on ``theta`` (see ``ExactGP``).
        max_iter: L-BFGS-B iterations per start.
        n_restarts: extra optimiser starts (seeded), the best bound wins.
        jitter: relative jitter on the inducing covariance (see ``INDUCING_JITTER``).
        random_state: seed or Generator for the subsample and the k-means++ seeding.

    Fitted attributes: ``kernel_``, ``noise_``, ``y_mean_``, ``y_std_``; ``inducing_ (m x dim)``,
    ``L_uu_``, ``L_B_ (m x m)`` and ``alpha_ (m,)`` of the posterior; ``X_subsample_``,
    ``y_subsample_`` (standardised) and ``inducing_subsample_``, the data the hyperparameters were
    fitted on; ``n_train_`` and ``bound_`` (the bound on the posterior's points at those hyperparameters).
    """

    def __init__(
        self,
        kernel: Matern52 | None = None,
        noise: float = 0.1,
        *,
        n_inducing: int = 300,
        n_subsample: int = 2000,
        n_posterior: int | None = None,
        n_inducing_subsample: int = 150,
        inducing: np.ndarray | None = None,
        normalize_y: bool = True,
        optimize: bool = True,
        hyperprior: np.ndarray | None = None,
        max_iter: int = 150,
        n_restarts: int = 1,
        jitter: float = INDUCING_JITTER,
        random_state: int | np.random.Generator | None = 0,
    ):
        self.kernel = kernel
        self.noise = noise
        self.n_inducing = n_inducing
        self.n_subsample = n_subsample
        self.n_posterior = n_posterior
        self.n_inducing_subsample = n_inducing_subsample
        self.inducing = inducing
        self.normalize_y = normalize_y
        self.optimize = optimize
        self.hyperprior = hyperprior
        self.max_iter = max_iter
        self.n_restarts = n_restarts
        self.jitter = jitter
        self.random_state = random_state

    @property
    def theta(self) -> np.ndarray:
        """``[log variance, log length_scale..., log noise]``."""
        return np.concatenate([self.kernel_.theta, [np.log(self.noise_)]])

    # ---- the bound ------------------------------------------------------------------------
    @staticmethod
    def _bound(
        theta: np.ndarray,
        X: np.ndarray,
        y: np.ndarray,
        Z: np.ndarray,
        kernel: Matern52,
        eval_gradient: bool,
        jitter: float = INDUCING_JITTER,
    ) -> tuple[float, np.ndarray]:
        kern = kernel.clone_with_theta(theta[:-1])
        noise = float(np.exp(theta[-1]))
        sigma = np.sqrt(noise)
        n, m = X.shape[0], Z.shape[0]
        Kuu = kern(Z)
        jitter = jitter * kern.variance
        try:
            Luu = cholesky_jittered(Kuu + jitter * np.eye(m))
            Kuf = kern(Z, X)
            A = solve_lower(Luu, Kuf) / sigma
            AAT = A @ A.T
            LB = cholesky_jittered(np.eye(m) + AAT)
        except ModelError:  # not positive definite at this theta: the optimiser backs off
            return -np.inf, np.zeros_like(theta)
        Ay = A @ y
        c = solve_triangular(LB, Ay, lower=True, check_finite=False) / sigma
        trace_K = n * kern.variance
        trace_Q = noise * np.trace(AAT)
        value = (
            -0.5 * n * LOG2PI
            - np.log(np.diag(LB)).sum()
            - 0.5 * n * np.log(noise)
            - 0.5 * (y @ y) / noise
            + 0.5 * (c @ c)
            - 0.5 * (trace_K - trace_Q) / noise
        )
        if not eval_gradient:
            return float(value), np.zeros_like(theta)
        Binv_Ay = cho_solve((LB, True), Ay, check_finite=False)
        v = (y - A.T @ Binv_Ay) / noise  # (Q + noise I)^-1 y by Woodbury
        Pv = solve_triangular(Luu, A @ v, lower=True, trans="T", check_finite=False) * sigma
        Binv_AAT = cho_solve((LB, True), AAT, check_finite=False)  # B^-1 A A^T
        # P W = (P v) v^T + Luu^-T (A A^T) B^-1 A / sigma
        M1 = solve_triangular(Luu, Binv_AAT.T, lower=True, trans="T", check_finite=False)
        dF_dKuf = np.outer(Pv, v) + (M1 @ A) / sigma
        # P W P^T = (P v)(P v)^T + Luu^-T (A A^T) B^-1 (A A^T) Luu^-1
        inner = solve_triangular(Luu, AAT @ Binv_AAT, lower=True, trans="T", check_finite=False)
        inner = solve_triangular(Luu, inner.T, lower=True, trans="T", check_finite=False)
        dF_dKuu = -0.5 * (np.outer(Pv, Pv) + inner)
        grad = np.empty_like(theta)
        grad[:-1] = kern.gradient_contract(Z, X, dF_dKuf) + kern.gradient_contract(Z, None, dF_dKuu)
        # tr K_ff and the jitter on K_uu scale with the variance too
        grad[0] += -0.5 * trace_K / noise + jitter * np.trace(dF_dKuu)
        trace_Sigma_inv = (n - np.trace(Binv_AAT)) / noise
        dF_dnoise = 0.5 * (v @ v - trace_Sigma_inv) + 0.5 * (trace_K - trace_Q) / noise**2
        grad[-1] = noise * dF_dnoise
        return float(value), grad

    def log_marginal_likelihood(
        self, theta: np.ndarray | None = None, eval_gradient: bool = False
    ) -> float | tuple[float, np.ndarray]:
        """Titsias's collapsed bound on the log marginal likelihood of the training targets.

        Evaluated on the hyperparameter subsample with its inducing inputs (the data the
        optimiser saw); ``theta`` as in :attr:`theta`.
        """
        theta = self.theta if theta is None else np.asarray(theta, dtype=float)
        value, grad = self._bound(
            theta, self.X_subsample_, self.y_subsample_, self.inducing_subsample_, self.kernel_, eval_gradient,
            self.jitter,
        )
        return (value, grad) if eval_gradient else value

    # ---- fit ------------------------------------------------------------------------------
    def fit(self, X: np.ndarray, y: np.ndarray) -> SparseGP:
        """Fit to ``X (n x dim)`` in the unit cube and targets ``y (n,)``."""
        with threadpool_limits(limits=FIT_BLAS_THREADS, user_api="blas"):
            return self._fit(X, y)

    def _fit(self, X: np.ndarray, y: np.ndarray) -> SparseGP:
        X = np.atleast_2d(np.asarray(X, dtype=float))
        y = np.asarray(y, dtype=float).ravel()
        n, dim = X.shape
        if n != y.size:
            raise ValueError(f"X has {n} rows but y has {y.size}")
        if n == 0:
            raise ModelError("the sparse GP needs at least one point")
        rng = np.random.default_rng(self.random_state)
        if self.normalize_y:
            self.y_mean_ = float(y.mean())
            sd = float(y.std())
            self.y_std_ = sd if sd > 0 else 1.0
        else:
            self.y_mean_, self.y_std_ = 0.0, 1.0
        ys = (y - self.y_mean_) / self.y_std_
        self.kernel_ = (
            Matern52(1.0, np.full(dim, default_length_scale(dim)))
            if self.kernel is None
            else Matern52(self.kernel.variance, np.broadcast_to(self.kernel.length_scale, (dim,)))
        )
        self.noise_ = float(self.noise)
        m = min(self.n_inducing, n)

        sub = rng.choice(n, size=self.n_subsample, replace=False) if n > self.n_subsample else np.arange(n)
        self.X_subsample_, self.y_subsample_ = X[sub], ys[sub]
        if self.inducing is not None:
            self.inducing_subsample_ = np.asarray(self.inducing, dtype=float)
        else:
            self.inducing_subsample_ = self.X_subsample_[
                kmeans_plusplus(self.X_subsample_, min(self.n_inducing_subsample, sub.size), rng)
            ]
        if self.optimize:
            self._optimise(rng)

        if self.inducing is not None:
            Z = np.asarray(self.inducing, dtype=float)
        else:
            Z = choose_inducing(X, m, self.kernel_.length_scale, rng)
        if self.n_posterior is not None and n > self.n_posterior:
            rows = np.sort(rng.choice(n, size=self.n_posterior, replace=False))
            X, ys = X[rows], ys[rows]
        self._posterior(X, ys, Z)
        self.n_train_ = n
        return self

    def _optimise(self, rng: np.random.Generator) -> None:
        dim = self.X_subsample_.shape[1]
        bounds = ExactGP().bounds(dim)
        # the bound per point keeps the gradient O(1), so L-BFGS-B's first steps stay inside the
        # box instead of jumping to its corners (seen: length-scales at 0.01 and 100, all noise)
        scale = 1.0 / self.X_subsample_.shape[0]

        def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
            value, grad = self._bound(
                theta, self.X_subsample_, self.y_subsample_, self.inducing_subsample_, self.kernel_, True,
                self.jitter,
            )
            lp, lp_grad = log_normal_prior(theta, self.hyperprior)
            if not np.isfinite(value):
                return 1e25, np.zeros_like(theta)
            return -(value + lp) * scale, -(grad + lp_grad) * scale

        starts = [np.clip(self.theta, bounds[:, 0], bounds[:, 1])]
        for _ in range(self.n_restarts):
            # restarts spread the length-scales by a factor e either way around the first start
            draw = starts[0] + np.concatenate([[0.0], rng.normal(0.0, 1.0, dim), [rng.normal(0.0, 1.0)]])
            starts.append(np.clip(draw, bounds[:, 0], bounds[:, 1]))
        best = None
        for start in starts:
            res = minimize(
                objective,
                start,
                jac=True,
                method="L-BFGS-B",
                bounds=bounds,
                options={"maxiter": self.max_iter},
            )
            if best is None or res.fun < best.fun:
                best = res
        self.kernel_.theta = best.x[:-1]
        self.noise_ = float(np.exp(best.x[-1]))

    def _posterior(self, X: np.ndarray, ys: np.ndarray, Z: np.ndarray) -> None:
        kern, noise = self.kernel_, self.noise_
        sigma = np.sqrt(noise)
        m = Z.shape[0]
        Kuu = kern(Z) + self.jitter * kern.variance * np.eye(m)
        Luu = cholesky_jittered(Kuu)
        AAT = np.zeros((m, m))
        Ay = np.zeros(m)
        for start in range(0, X.shape[0], CHUNK):
            Xc = X[start : start + CHUNK]
            A = solve_lower(Luu, kern(Z, Xc)) / sigma
            AAT += A @ A.T
            Ay += A @ ys[start : start + CHUNK]
        LB = cholesky_jittered(np.eye(m) + AAT)
        c = solve_lower(LB, Ay) / sigma
        self.inducing_ = Z
        self.L_uu_ = Luu
        self.L_B_ = LB
        # mean(x) = k_u(x)^T alpha_, alpha_ = L_uu^-T L_B^-T c
        self.alpha_ = solve_triangular(
            Luu, solve_triangular(LB, c, lower=CHOLESKY_LOWER, trans="T"), lower=CHOLESKY_LOWER, trans="T"
        )
        n = X.shape[0]
        self.bound_ = float(
            -0.5 * n * LOG2PI
            - np.log(np.diag(LB)).sum()
            - 0.5 * n * np.log(noise)
            - 0.5 * (ys @ ys) / noise
            + 0.5 * (c @ c)
            - 0.5 * (n * kern.variance - noise * np.trace(AAT)) / noise
        )
        self._prepare_prediction()

    # ---- prediction -----------------------------------------------------------------------
    def _prepare_prediction(self) -> None:
        """``M = K_uu^-1 - Sigma`` from the factors (:meth:`posterior_covariance`), so that ``var(x) = k(x, x) -
        k_u(x)^T M k_u(x)``: one product instead of two triangular solves per call."""
        m = self.L_uu_.shape[0]
        P1 = solve_lower(self.L_uu_, np.eye(m))
        P2 = solve_lower(self.L_B_, P1)
        self._M = P1.T @ P1 - P2.T @ P2
        self._memo: dict[tuple, tuple[np.ndarray, np.ndarray]] = {}

    def _inducing_cross(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``k_u(X)`` and ``M k_u(X)``, both ``(m x n)``; kept for the next call with the same ``X`` (by value)."""
        key = (X.shape, X.tobytes()) if X.shape[0] <= MEMO_ROWS else None
        hit = self._memo.get(key) if key is not None else None
        if hit is not None:
            return hit
        K = self.kernel_(self.inducing_, X)
        value = (K, self._M @ K)
        if key is not None:
            if len(self._memo) >= MEMO_ENTRIES:
                self._memo.pop(next(iter(self._memo)))
            self._memo[key] = value
        return value

    def predict(
        self, X: np.ndarray, return_std: bool = False, return_cov: bool = False, *, observation: bool = False
    ) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Predictive mean ``(n,)`` at ``X (n x dim)`` in the units of the fitted ``y``; with
        ``return_std`` its sd ``(n,)``, with ``return_cov`` its covariance ``(n x n)`` (units squared).

        The sd and covariance are of the latent function; with ``observation`` the noise variance is
        added on the diagonal.
        """
        if return_std and return_cov:
            raise ValueError("give return_std or return_cov, not both")
        X = np.atleast_2d(np.asarray(X, dtype=float))
        K, MK = self._inducing_cross(X)
        mean = K.T @ self.alpha_ * self.y_std_ + self.y_mean_
        if return_cov:
            cov = self.posterior_covariance(X)
            if observation:
                cov[np.diag_indices_from(cov)] += self.noise_ * self.y_std_**2
            return mean, cov
        if not return_std:
            return mean
        var = self.kernel_.diag(X) - np.einsum("ij,ij->j", K, MK)
        var = np.maximum(var, 0.0) + (self.noise_ if observation else 0.0)
        return mean, np.sqrt(var) * self.y_std_

    def posterior_covariance(self, X: np.ndarray, Z: np.ndarray | None = None) -> np.ndarray:
        """Posterior covariance ``(n x m)`` of the latent function between ``X (n x dim)`` and
        ``Z (m x dim)`` (``Z = X`` if None), in the units of the fitted ``y`` squared.

        Titsias (2009): ``k(x, z) - Q(x, z) + k_u(x)^T Sigma k_u(z)`` with ``Q(x, z) = k_u(x)^T K_uu^-1
        k_u(z)`` and ``Sigma = (K_uu + K_uf K_fu / noise)^-1 = L_uu^-T L_B^-T L_B^-1 L_uu^-1`` (from the
        stored factors, since ``K_uu + K_uf K_fu / noise = L_uu (I + A A^T) L_uu^T``), i.e. ``k(x, z) -
        k_u(x)^T M k_u(z)`` with ``M = K_uu^-1 - Sigma``; its diagonal is :meth:`predict`'s variance.
        """
        X = np.atleast_2d(np.asarray(X, dtype=float))
        Z = None if Z is None else np.atleast_2d(np.asarray(Z, dtype=float))
        cov = self.kernel_(X, Z) - self._inducing_cross(X)[1].T @ self._inducing_cross(X if Z is None else Z)[0]
        return cov * self.y_std_**2

    def sample_y(
        self, X: np.ndarray, n_samples: int = 1, random_state: int | np.random.Generator | None = None
    ) -> np.ndarray:
        """``(n x n_samples)`` joint draws of the latent function at ``X (n x dim)`` from
        ``N(mean, cov)`` of :meth:`predict` (``return_cov=True``)."""
        mean, cov = self.predict(X, return_cov=True)
        return draw_gaussian(mean, cov, n_samples, random_state)

    # ---- storage --------------------------------------------------------------------------
    def to_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """JSON-able parameters and arrays that restore predictions, draws and the bound
        (:meth:`log_marginal_likelihood`, on the stored hyperparameter subsample) without refitting."""
        params = {
            "model": "SparseGP",
            "kernel": self.kernel_.get_params(),
            "noise": self.noise_,
            "y_mean": self.y_mean_,
            "y_std": self.y_std_,
            "n_train": self.n_train_,
            "bound": self.bound_,
            "jitter": self.jitter,
            "normalize_y": self.normalize_y,
            "n_inducing": self.n_inducing,
            "n_subsample": self.n_subsample,
            "n_posterior": self.n_posterior,
            "n_inducing_subsample": self.n_inducing_subsample,
            "has_hyperprior": self.hyperprior is not None,
        }
        arrays = {
            "inducing": self.inducing_,
            "alpha_vector": self.alpha_,
            "L_uu": self.L_uu_,
            "L_B": self.L_B_,
            "X_subsample": self.X_subsample_,
            "y_subsample": self.y_subsample_,
            "inducing_subsample": self.inducing_subsample_,
        }
        if self.hyperprior is not None:
            arrays["hyperprior"] = np.asarray(self.hyperprior, dtype=float)
        return params, arrays

    @classmethod
    def from_state(cls, params: dict[str, Any], arrays: dict[str, np.ndarray]) -> SparseGP:
        """The model of :meth:`to_state`, fitted state included (``optimize`` off)."""
        kernel = Matern52(params["kernel"]["variance"], np.asarray(params["kernel"]["length_scale"]))
        if "X_subsample" not in arrays:
            raise ModelError("the stored sparse GP was saved by an older gapgauge (no subsample); refit the prior")
        gp = cls(
            kernel,
            params["noise"],
            n_inducing=int(params["n_inducing"]),
            n_subsample=int(params["n_subsample"]),
            n_posterior=params.get("n_posterior"),
            n_inducing_subsample=int(params["n_inducing_subsample"]),
            normalize_y=bool(params["normalize_y"]),
            optimize=False,
            hyperprior=np.asarray(arrays["hyperprior"]) if params.get("has_hyperprior") else None,
            jitter=float(params["jitter"]),
        )
        gp.kernel_ = kernel
        gp.noise_ = float(params["noise"])
        gp.y_mean_, gp.y_std_ = float(params["y_mean"]), float(params["y_std"])
        gp.n_train_ = int(params["n_train"])
        gp.bound_ = float(params["bound"])
        gp.inducing_ = np.asarray(arrays["inducing"], dtype=float)
        gp.alpha_ = np.asarray(arrays["alpha_vector"], dtype=float)
        gp.L_uu_ = np.asarray(arrays["L_uu"], dtype=float)
        gp.L_B_ = np.asarray(arrays["L_B"], dtype=float)
        gp.X_subsample_ = np.asarray(arrays["X_subsample"], dtype=float)
        gp.y_subsample_ = np.asarray(arrays["y_subsample"], dtype=float)
        gp.inducing_subsample_ = np.asarray(arrays["inducing_subsample"], dtype=float)
        gp._prepare_prediction()
        return gp
