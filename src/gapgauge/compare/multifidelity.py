"""The multi-fidelity prior: simulation (low fidelity) corrected by hardware (high fidelity).

``MultiFidelityGP`` is the autoregressive model of Kennedy and O'Hagan (2000),

    high(x) = rho * low(x) + delta(x),

fitted recursively as in Le Gratiet and Garnier (2014): first the simulation level ``low`` alone
(a :class:`~gapgauge.compare.sparse.SparseGP` above ``SPARSE_THRESHOLD`` = 500 points, an
:class:`~gapgauge.compare.gp.ExactGP` at or below it), then the hardware level given the simulation
level's posterior mean at the trial parameters. As in Le Gratiet and Garnier, rho, a constant
offset and a linear trend are regression coefficients of the discrepancy GP, with a Gaussian prior;
their posterior given the discrepancy's hyperparameters is Gaussian and exact (Rasmussen and
Williams 2006, section 2.7, eq. 2.42): the basis functions are ``[low mean(x), 1, x - 0.5]``.

What it adds, because hardware trials are few (2 to 10):

- weak priors: rho ~ N(1, 0.5^2) (simulation right up to a factor); offset ~ N(0, 1) and a linear
  trend in the parameters (Le Gratiet and Garnier's regression part of the discrepancy) with slopes
  ~ N(0, 2^2 / dim), both in simulation-sd units over the unit cube; log-normal priors on the
  discrepancy's scale (median 0.5 simulation sd), length-scales (median
  :func:`~gapgauge.compare.kernels.default_length_scale`) and the hardware noise (median sd
  ``HARDWARE_NOISE_FRACTION`` of the simulation's own noise sd, see there); the discrepancy's
  hyperparameters are the maximum a posteriori;
- the simulation level's own uncertainty is a GP, not noise (Kennedy and O'Hagan 2000; Le Gratiet and
  Garnier 2014 condition the high level on the low level's posterior): ``low = mu_low + e_low`` with
  ``e_low ~ GP(0, C_low)``, ``C_low`` the simulation level's POSTERIOR covariance (exact GP: R&W eq.
  2.24; sparse GP: Titsias 2009, see :meth:`SparseGP.posterior_covariance`). The hardware level's prior
  covariance is therefore ``rho0^2 C_low(x, x') + k_delta(x, x')`` (plus the basis coefficients' prior),
  with ``rho0^2`` a plug-in value of ``E[rho^2]`` that keeps rho a linear coefficient of the mean: the
  prior's ``E[rho^2]`` on a first pass, then (with hardware trials) the posterior ``E[rho^2]`` of that
  pass, with the discrepancy's hyperparameters refitted once. A hardware trial at ``x`` thus reduces
  the simulation level's part of the uncertainty at ``x`` too, as any GP observation does (R&W eq.
  2.26): trying a parameter set makes the model sure of it, and expected improvement moves on;
- with no hardware trials the model is the simulation level plus the discrepancy prior: rho at its
  prior mean, the discrepancy at its prior scale.

The predictive mean is ``E[rho] mu_low(x) + mu_delta(x)`` and the variance the hardware-level GP's
posterior variance, which holds ``rho0^2 C_low`` conditioned on the trials, the discrepancy and the
coefficients' uncertainty.
Outputs are standardised with the simulation level's mean and sd; inputs are in the unit cube.

The surface is that of every model here (:mod:`gapgauge.compare.gp`): ``fit`` returns self,
``predict(X, return_std=False, return_cov=False)``, ``sample_y``, ``log_marginal_likelihood``,
``to_state`` / ``from_state``; fitted state ends in ``_`` (``low_``, ``delta_``, ``y_mean_``, ``y_std_``,
``rho_``, ``rho_sd_``, ``rho_interval_``). :meth:`MultiFidelityGP.fit_high` and
:meth:`MultiFidelityGP.copy_with_high` refit the hardware level alone on a fitted simulation level.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.stats import norm

from ..errors import ModelError
from .gp import ExactGP, draw_gaussian
from .kernels import Matern52, WithFixedCovariance, default_length_scale
from .sparse import SparseGP

# above this many simulation points (rollouts that stood, for the objective; rollouts with a margin, for
# the fall model) the simulation level is the sparse GP: the exact GP's n^3 fit
# with 15 hyperparameters took over 100 s at n = 2000 on the 2-core machine, the sparse GP ~5 s
SPARSE_THRESHOLD = 500
# The simulation level's hyperparameters are those of the exact GP on a random subsample of this many
# rollouts (every subsample point an inducing input, so the Titsias bound is the exact marginal
# likelihood); the posterior then uses all rollouts with max_inducing inducing points. The variational
# bound with few inducing points prefers long length-scales and more noise (Bauer, van der Wilk and
# Rasmussen 2016, NeurIPS): with 150 of them on a 4,096-rollout push_recovery sweep, margin length-scales
# of 1.5-100 and a predicted margin of -0.09 +- 0.10 m at a corner of the safe box where 22 of 32
# simulations fell (winsorised mean about -0.7 m); the exact fit on 600 rollouts gives length-scales of
# 0.5-4 and -0.37 +- 0.23 m there (benchmarks/transfer.py found the corner: every stand-in fell on it).
HYPERPARAMETER_SUBSAMPLE = 600
# Past 10^5 rollouts more rows do not make the sparse level more accurate; its error is set by the
# hyperparameters (from 600 rollouts) and the inducing points (benchmarks/prior_scale.py, push_recovery
# objective: held-out RMSE 0.7407 from all of 10^6 replicated rollouts, 0.7408 from 200,000 of them), while
# the O(n m^2) pass over all of them was most of a 164 s fit. Above this many points the posterior uses a
# seeded random subsample of them; the fall model's threshold and link see every one.
POSTERIOR_ROWS = 200_000
RHO_PRIOR = (1.0, 0.5)  # mean, sd
OFFSET_PRIOR_SD = 1.0  # simulation-sd units
# simulation-sd units across the whole unit cube, shared among the dimensions: a weak prior that lets
# a smooth (linear) gap between simulation and hardware be a trend rather than a wiggly GP
TREND_PRIOR_SD = 2.0
DISCREPANCY_SD_PRIOR = (0.5, 1.0)  # median (simulation-sd units), sd of its log
LENGTH_SCALE_LOG_SD = 1.0
NOISE_LOG_SD = 1.5  # sd of the log of the hardware noise sd
# Median of the hardware noise sd as a fraction of the simulation level's noise sd. The simulation's noise is
# its physics randomisation (mass, friction, servo strength and lag, push size drawn per rollout): the spread
# over a population of robots and pushes. Trials on ONE robot repeat its physics; their scatter is the
# sensors' and the push's, much smaller (the stand-in robots of benchmarks/transfer_standin.py: objective
# noise sd about 0.03 against 0.42 for the simulation level of a 1,024-rollout push_recovery sweep). A third
# is a cautious median; the log-normal prior (NOISE_LOG_SD) still lets the data move it by a factor of e^1.5
# either way.
HARDWARE_NOISE_FRACTION = 1.0 / 3.0
NOISE_FLOOR = 1e-4  # standardised variance: the least noise median a noise-free simulation implies


class MultiFidelityGP:
    """Kennedy-O'Hagan autoregressive co-kriging, fitted recursively (Le Gratiet and Garnier 2014).

    Parameters:
        rho_prior: (mean, sd) of the normal prior of rho.
        offset_prior_sd: sd of the normal prior of the constant offset (simulation-sd units).
        discrepancy_sd_prior: (median, log-sd) of the log-normal prior of the discrepancy sd.
        max_inducing: inducing points of the sparse simulation level.
        max_posterior_rows: points the sparse simulation level's posterior uses at most (see ``POSTERIOR_ROWS``).
        sparse_threshold: use the sparse GP above this many simulation points.
        n_restarts: extra seeded optimiser starts for the discrepancy's hyperparameters.
        trend_prior_sd: sd of the discrepancy's linear trend across the unit cube (simulation-sd
            units, shared among the dimensions), or None for no trend.
        random_state: seed or Generator (sparse subsample, k-means++, restarts).

    Fitted attributes: ``low_`` (the simulation level, an ExactGP or SparseGP in objective units),
    ``delta_`` (the hardware-level ExactGP in simulation-sd units, basis ``[low mean, 1, x - 0.5]``),
    ``y_mean_``, ``y_std_`` (the simulation level's mean and sd), ``dim_``, ``rho0_sq_``,
    ``seed_high_`` (seed of the hardware level's restarts), ``X_high_ (k x dim)``, ``y_high_ (k,)``.
    """

    def __init__(
        self,
        *,
        rho_prior: tuple[float, float] = RHO_PRIOR,
        offset_prior_sd: float = OFFSET_PRIOR_SD,
        discrepancy_sd_prior: tuple[float, float] = DISCREPANCY_SD_PRIOR,
        max_inducing: int = 300,
        max_posterior_rows: int | None = POSTERIOR_ROWS,
        sparse_threshold: int = SPARSE_THRESHOLD,
        n_restarts: int = 2,
        trend_prior_sd: float | None = TREND_PRIOR_SD,
        random_state: int | np.random.Generator | None = 0,
    ):
        self.trend_prior_sd = trend_prior_sd
        self.rho_prior = rho_prior
        self.offset_prior_sd = offset_prior_sd
        self.discrepancy_sd_prior = discrepancy_sd_prior
        self.max_inducing = max_inducing
        self.max_posterior_rows = max_posterior_rows
        self.sparse_threshold = sparse_threshold
        self.n_restarts = n_restarts
        self.random_state = random_state

    # ---- fit ------------------------------------------------------------------------------
    def fit(
        self, X_low: np.ndarray, y_low: np.ndarray, X_high: np.ndarray, y_high: np.ndarray
    ) -> MultiFidelityGP:
        """Fit both levels: simulation ``X_low (n x dim), y_low (n,)``; hardware ``X_high (k x dim),
        y_high (k,)``. Inputs in the unit cube; targets in the same (objective) units at both levels.
        """
        X_low = np.atleast_2d(np.asarray(X_low, dtype=float))
        y_low = np.asarray(y_low, dtype=float).ravel()
        if y_low.size == 0:
            raise ModelError("the multi-fidelity prior needs simulated points at the low level")
        rng = np.random.default_rng(self.random_state)
        self.seed_high_ = int(rng.integers(2**31))
        if y_low.size > self.sparse_threshold:
            low: SparseGP | ExactGP = SparseGP(
                n_inducing=self.max_inducing,
                n_subsample=HYPERPARAMETER_SUBSAMPLE,
                n_inducing_subsample=HYPERPARAMETER_SUBSAMPLE,
                n_posterior=self.max_posterior_rows,
                normalize_y=True,
                random_state=rng,
            )
        else:
            low = ExactGP(noise=0.1, normalize_y=True, n_restarts=1, random_state=rng)
        self.low_ = low.fit(X_low, y_low)
        self.y_mean_ = float(y_low.mean())
        sd = float(y_low.std())
        self.y_std_ = sd if sd > 0 else 1.0
        self.dim_ = X_low.shape[1]
        return self.fit_high(X_high, y_high)

    def _low_standardised(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        mu, sd = self.low_.predict(X, return_std=True)
        return (mu - self.y_mean_) / self.y_std_, sd / self.y_std_

    def low_noise_variance(self) -> float:
        """The simulation level's noise variance in simulation-sd units squared."""
        return float(self.low_.noise_ * (self.low_.y_std_ / self.y_std_) ** 2)

    def _hyperprior(self) -> np.ndarray:
        dim = self.dim_
        median_sd, log_sd = self.discrepancy_sd_prior
        noise_median = max(HARDWARE_NOISE_FRACTION**2 * self.low_noise_variance(), NOISE_FLOOR)
        rows = [[2.0 * np.log(median_sd), 2.0 * log_sd]]
        rows += [[np.log(default_length_scale(dim)), LENGTH_SCALE_LOG_SD]] * dim
        rows += [[np.log(noise_median), 2.0 * NOISE_LOG_SD]]
        return np.array(rows)

    def _basis(self, X: np.ndarray, mu_low: np.ndarray) -> np.ndarray:
        columns = [mu_low, np.ones_like(mu_low)]
        if self.trend_prior_sd is not None:
            columns += list((X - 0.5).T)
        return np.column_stack(columns)

    def _basis_prior(self) -> tuple[np.ndarray, np.ndarray]:
        rho_mean, rho_sd = self.rho_prior
        mean = [rho_mean, 0.0]
        var = [rho_sd**2, self.offset_prior_sd**2]
        if self.trend_prior_sd is not None:
            mean += [0.0] * self.dim_
            # a slope of s per unit-cube side changes the output by s across it; shared so that
            # the whole trend's prior variance does not grow with the number of parameters
            var += [self.trend_prior_sd**2 / self.dim_] * self.dim_
        return np.array(mean), np.diag(var)

    def _low_covariance_kernel(self, base: Matern52, rho0_sq: float) -> WithFixedCovariance:
        """``base + rho0^2 C_low`` in standardised units: the hardware level's prior covariance."""
        scale = self.y_std_**2

        def fixed(X: np.ndarray, Z: np.ndarray | None) -> np.ndarray:
            return self.low_.posterior_covariance(X, Z) / scale

        def fixed_diag(X: np.ndarray) -> np.ndarray:
            return self._low_standardised(X)[1] ** 2

        return WithFixedCovariance(base, fixed, fixed_diag, rho0_sq)

    def fit_high(self, X_high: np.ndarray, y_high: np.ndarray, optimize: bool = True) -> MultiFidelityGP:
        """(Re)fit the hardware level only, keeping the simulation level.

        ``X_high (k x dim)`` unit cube, ``y_high (k,)`` objective units; ``k`` may be 0. With
        ``optimize`` false the discrepancy's hyperparameters and ``rho0`` stay as fitted before (kriging
        believer). With it, ``rho0^2`` is rho's prior second moment on a first pass and, given hardware
        trials, rho's posterior second moment from that pass on a second one (module docstring).
        """
        X_high = np.asarray(X_high, dtype=float).reshape(-1, self.dim_)
        y_high = np.asarray(y_high, dtype=float).ravel()
        mu, _ = self._low_standardised(X_high)
        basis = self._basis(X_high, mu)
        targets = (y_high - self.y_mean_) / self.y_std_
        hyperprior = self._hyperprior()
        if optimize or not hasattr(self, "delta_"):
            rho_mean, rho_sd = self.rho_prior
            rho0_sq = rho_mean**2 + rho_sd**2
            kernel = Matern52(np.exp(hyperprior[0, 0]), np.exp(hyperprior[1:-1, 0]))
            noise = float(np.exp(hyperprior[-1, 0]))
            passes = 2 if optimize and y_high.size > 0 else 1
        else:
            rho0_sq = self.rho0_sq_
            kernel, noise = self.delta_.kernel_.base, self.delta_.noise_
            passes = 1
        for step in range(passes):
            if step == 1:
                rho0_sq = float(self.delta_.coef_[0] ** 2 + self.delta_.coef_cov_[0, 0])
                kernel, noise = self.delta_.kernel_.base, self.delta_.noise_
            delta = ExactGP(
                self._low_covariance_kernel(kernel, rho0_sq),
                noise,
                normalize_y=False,
                optimize=optimize and y_high.size > 0,
                n_restarts=self.n_restarts,
                hyperprior=hyperprior,
                basis_prior=self._basis_prior(),
                random_state=self.seed_high_,
            )
            self.delta_ = delta.fit(X_high, targets, basis=basis)
        self.rho0_sq_ = rho0_sq
        self.X_high_, self.y_high_ = X_high, y_high
        return self

    # ---- fitted quantities ----------------------------------------------------------------
    @property
    def rho_(self) -> float:
        """Posterior mean of rho (given the discrepancy's hyperparameters)."""
        return float(self.delta_.coef_[0])

    @property
    def rho_sd_(self) -> float:
        return float(np.sqrt(self.delta_.coef_cov_[0, 0]))

    def rho_interval(self, level: float = 0.95) -> tuple[float, float]:
        """Central interval of rho's Gaussian posterior (R&W eq. 2.42, hyperparameters at the MAP)."""
        half = norm.ppf(0.5 + level / 2) * self.rho_sd_
        return self.rho_ - half, self.rho_ + half

    @property
    def rho_interval_(self) -> tuple[float, float]:
        """The 95% central interval of rho's posterior (:meth:`rho_interval`)."""
        return self.rho_interval(0.95)

    @property
    def discrepancy_scale_(self) -> float:
        """Prior sd of the discrepancy delta(x), in objective units (fitted, or the prior median)."""
        return float(np.sqrt(self.delta_.kernel_.variance) * self.y_std_)

    @property
    def offset_(self) -> float:
        """Posterior mean of the constant offset, objective units (relative to the simulation mean)."""
        return float(self.delta_.coef_[1] * self.y_std_)

    @property
    def hardware_noise_sd_(self) -> float:
        return float(np.sqrt(self.delta_.noise_) * self.y_std_)

    # ---- marginal likelihood and prediction ------------------------------------------------
    def log_marginal_likelihood(
        self, theta: np.ndarray | None = None, eval_gradient: bool = False
    ) -> float | tuple[float, np.ndarray]:
        """Log marginal likelihood of the hardware level (rho and the offset integrated out),
        in standardised units; ``theta`` as :attr:`ExactGP.theta` of the discrepancy."""
        return self.delta_.log_marginal_likelihood(theta, eval_gradient)

    def predict(
        self, X: np.ndarray, return_std: bool = False, return_cov: bool = False, *, observation: bool = False
    ) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Hardware-level mean ``(n,)`` at ``X (n x dim)`` (unit cube), objective units; with
        ``return_std`` its sd ``(n,)``, with ``return_cov`` its covariance ``(n x n)`` (units squared).

        The sd and covariance are of the latent hardware function: the hardware-level GP's posterior,
        its prior covariance holding ``rho0^2 C_low`` and the basis coefficients' prior, so the
        simulation level's own uncertainty is not added again; with ``observation`` the hardware
        noise is added on the diagonal.
        """
        X = np.atleast_2d(np.asarray(X, dtype=float))
        mu, _ = self._low_standardised(X)
        basis = self._basis(X, mu)
        out = self.delta_.predict(X, return_std, return_cov, basis=basis, observation=observation)
        if not (return_std or return_cov):
            return out * self.y_std_ + self.y_mean_
        mean, spread = out
        return mean * self.y_std_ + self.y_mean_, spread * (self.y_std_**2 if return_cov else self.y_std_)

    def sample_y(
        self, X: np.ndarray, n_samples: int = 1, random_state: int | np.random.Generator | None = None
    ) -> np.ndarray:
        """``(n x n_samples)`` joint draws of the latent hardware function at ``X (n x dim)`` from
        ``N(mean, cov)`` of :meth:`predict` (``return_cov=True``), objective units."""
        mean, cov = self.predict(X, return_cov=True)
        return draw_gaussian(mean, cov, n_samples, random_state)

    def predict_low(
        self, X: np.ndarray, return_std: bool = False, observation: bool = False
    ) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """The simulation level alone at ``X (n x dim)`` (unit cube), objective units."""
        return self.low_.predict(X, return_std=return_std, observation=observation)

    def copy_with_high(self, X_high: np.ndarray, y_high: np.ndarray, optimize: bool) -> MultiFidelityGP:
        """A new model sharing the (fitted) simulation level, with other hardware data."""
        other = MultiFidelityGP.__new__(MultiFidelityGP)
        other.__dict__.update(self.__dict__)
        return other.fit_high(X_high, y_high, optimize=optimize)

    # ---- storage --------------------------------------------------------------------------
    def to_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        low_params, low_arrays = self.low_.to_state()
        delta_params, delta_arrays = self.delta_.to_state()
        params = {
            "model": "MultiFidelityGP",
            "rho_prior": list(self.rho_prior),
            "offset_prior_sd": self.offset_prior_sd,
            "discrepancy_sd_prior": list(self.discrepancy_sd_prior),
            "max_inducing": self.max_inducing,
            "max_posterior_rows": self.max_posterior_rows,
            "sparse_threshold": self.sparse_threshold,
            "n_restarts": self.n_restarts,
            "trend_prior_sd": self.trend_prior_sd,
            "seed_high": self.seed_high_,
            "rho0_sq": self.rho0_sq_,
            "y_mean": self.y_mean_,
            "y_std": self.y_std_,
            "dim": self.dim_,
            "low": low_params,
            "delta": delta_params,
        }
        arrays = {f"low.{k}": v for k, v in low_arrays.items()}
        arrays.update({f"delta.{k}": v for k, v in delta_arrays.items()})
        arrays.update(X_high=self.X_high_, y_high=self.y_high_)
        return params, arrays

    @classmethod
    def from_state(cls, params: dict[str, Any], arrays: dict[str, np.ndarray]) -> MultiFidelityGP:
        model = cls(
            rho_prior=tuple(params["rho_prior"]),
            offset_prior_sd=params["offset_prior_sd"],
            discrepancy_sd_prior=tuple(params["discrepancy_sd_prior"]),
            max_inducing=params["max_inducing"],
            max_posterior_rows=params.get("max_posterior_rows"),
            sparse_threshold=params["sparse_threshold"],
            n_restarts=params["n_restarts"],
            trend_prior_sd=params["trend_prior_sd"],
        )
        low_arrays = {k[4:]: v for k, v in arrays.items() if k.startswith("low.")}
        delta_arrays = {k[6:]: v for k, v in arrays.items() if k.startswith("delta.")}
        low_cls = SparseGP if params["low"]["model"] == "SparseGP" else ExactGP
        model.low_ = low_cls.from_state(params["low"], low_arrays)
        model.seed_high_ = int(params["seed_high"])
        model.y_mean_, model.y_std_ = float(params["y_mean"]), float(params["y_std"])
        model.dim_ = int(params["dim"])
        if "rho0_sq" not in params:
            raise ModelError("the stored prior was fitted by an older gapgauge (no rho0); refit it with gapgauge prior")
        model.rho0_sq_ = float(params["rho0_sq"])
        model.delta_ = ExactGP.from_state(params["delta"], delta_arrays)
        # the stored factor L is of the full covariance; C_low is rebuilt from the stored simulation level
        model.delta_.kernel_ = model._low_covariance_kernel(model.delta_.kernel_, model.rho0_sq_)
        model.delta_.kernel = model.delta_.kernel_
        model.X_high_ = np.asarray(arrays["X_high"]).reshape(-1, model.dim_)
        model.y_high_ = np.asarray(arrays["y_high"])
        return model
