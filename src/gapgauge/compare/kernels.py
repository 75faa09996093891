"""The Matern 5/2 covariance with one length-scale per input (ARD).

    k(x, z) = variance * (1 + sqrt(5) r + 5 r^2 / 3) exp(-sqrt(5) r),
    r^2 = sum_d (x_d - z_d)^2 / length_scale_d^2

(Rasmussen and Williams 2006, eq. 4.17, with automatic relevance determination, section 5.1).
Its hyperparameters are handled in log space, in the order ``[log variance, log length_scale_1,
..., log length_scale_dim]`` (the same order as scikit-learn's ``ConstantKernel * Matern``).

The gradients are given as contractions ``sum_ij G_ij dK_ij / dtheta`` rather than as an
``(n x m x p)`` tensor: every caller (the exact GP's marginal likelihood, the sparse GP's bound)
only needs those sums, and they cost ``O(n m dim)`` time and ``O(n m)`` memory.
"""

from __future__ import annotations

import numpy as np

SQRT5 = np.sqrt(5.0)


def default_length_scale(dim: int) -> float:
    """A starting length-scale for inputs in the unit cube of ``dim`` dimensions.

    Two uniform points differ by 1/6 per dimension in mean square, so their distance is about
    sqrt(dim / 6); starting there puts the correlations between the data neither all near 0 (where
    the optimiser can get stuck explaining everything as noise) nor all near 1.
    """
    return max(0.3, float(np.sqrt(dim / 6.0)))


class Matern52:
    """Matern 5/2 ARD kernel on inputs already scaled to the unit cube.

    Parameters:
        variance: signal variance (output units squared; outputs are standardised by the models).
        length_scale: ``(dim,)`` length-scales in unit-cube units.
    """

    def __init__(self, variance: float = 1.0, length_scale: np.ndarray | float = 1.0):
        self.variance = float(variance)
        self.length_scale = np.atleast_1d(np.asarray(length_scale, dtype=float)).copy()

    # ---- hyperparameters in log space -----------------------------------------------------
    @property
    def n_dims(self) -> int:
        return 1 + self.length_scale.size

    @property
    def theta(self) -> np.ndarray:
        """``[log variance, log length_scale...]``."""
        return np.concatenate([[np.log(self.variance)], np.log(self.length_scale)])

    @theta.setter
    def theta(self, theta: np.ndarray) -> None:
        theta = np.asarray(theta, dtype=float)
        self.variance = float(np.exp(theta[0]))
        self.length_scale = np.exp(theta[1:]).copy()

    def clone_with_theta(self, theta: np.ndarray) -> Matern52:
        out = Matern52(self.variance, self.length_scale)
        out.theta = theta
        return out

    # ---- values ---------------------------------------------------------------------------
    def _scaled_sq_dist(self, X: np.ndarray, Z: np.ndarray) -> np.ndarray:
        Xs = X / self.length_scale
        Zs = Z / self.length_scale
        # the expanded form is O(n m dim) in one matrix product; clip the rounding below zero. In place:
        # the sparse level's pass over 10^6 rollouts makes 10^8-element matrices of these, chunk by chunk
        d2 = Xs @ Zs.T
        d2 *= -2.0
        d2 += (Xs**2).sum(1)[:, None]
        d2 += (Zs**2).sum(1)[None, :]
        return np.maximum(d2, 0.0, out=d2)

    def __call__(self, X: np.ndarray, Z: np.ndarray | None = None) -> np.ndarray:
        """Covariance matrix ``(n x m)`` between ``X (n x dim)`` and ``Z (m x dim)`` (``Z = X`` if None)."""
        same = Z is None
        Z = X if Z is None else Z
        # variance (1 + s + s^2 / 3) exp(-s) with s = sqrt5 r, the usual form, evaluated in place
        s = np.sqrt(self._scaled_sq_dist(X, Z))
        s *= SQRT5
        K = np.exp(-s)
        poly = s * s
        poly *= 1.0 / 3.0
        poly += s
        poly += 1.0
        K *= poly
        K *= self.variance
        if same:
            np.fill_diagonal(K, self.variance)
        return K

    def diag(self, X: np.ndarray) -> np.ndarray:
        """``k(x, x)`` for each row of ``X (n x dim)``: the variance (the kernel is stationary)."""
        return np.full(X.shape[0], self.variance)

    # ---- gradients ------------------------------------------------------------------------
    def gradient_contract(self, X: np.ndarray, Z: np.ndarray | None, G: np.ndarray) -> np.ndarray:
        """``sum_ij G_ij dK(X, Z)_ij / dtheta_p`` for each log hyperparameter ``p``: ``(1 + dim,)``.

        ``G`` is ``(n x m)``. Uses dk/dlog(l_d) = variance (5/3) (1 + sqrt5 r) exp(-sqrt5 r)
        (x_d - z_d)^2 / l_d^2, which is finite at r = 0 (no division by r).
        """
        Z = X if Z is None else Z
        r = np.sqrt(self._scaled_sq_dist(X, Z))
        e = np.exp(-SQRT5 * r)
        K = self.variance * (1.0 + SQRT5 * r + (5.0 / 3.0) * r**2) * e
        M = G * (self.variance * (5.0 / 3.0) * (1.0 + SQRT5 * r) * e)
        out = np.empty(self.n_dims)
        out[0] = np.sum(G * K)
        for d in range(self.length_scale.size):
            xd = X[:, d] / self.length_scale[d]
            zd = Z[:, d] / self.length_scale[d]
            # sum_ij M_ij (x_i - z_j)^2 expanded, so no (n x m) temporary per dimension
            out[1 + d] = (M.sum(1) @ xd**2) + (M.sum(0) @ zd**2) - 2.0 * (xd @ M @ zd)
        return out

    def gradient(self, X: np.ndarray) -> np.ndarray:
        """Full gradient tensor ``(n x n x (1 + dim))`` of ``K(X, X)``; for tests and small n only."""
        r = np.sqrt(self._scaled_sq_dist(X, X))
        e = np.exp(-SQRT5 * r)
        K = self.variance * (1.0 + SQRT5 * r + (5.0 / 3.0) * r**2) * e
        np.fill_diagonal(K, self.variance)
        base = self.variance * (5.0 / 3.0) * (1.0 + SQRT5 * r) * e
        grads = [K]
        for d in range(self.length_scale.size):
            diff = (X[:, d][:, None] - X[:, d][None, :]) / self.length_scale[d]
            grads.append(base * diff**2)
        return np.stack(grads, axis=-1)

    def get_params(self) -> dict:
        return {"variance": self.variance, "length_scale": self.length_scale.tolist()}


class WithFixedCovariance:
    """A Matern 5/2 kernel plus a fixed, hyperparameter-free covariance: ``k(x, z) = base(x, z) +
    scale * fixed(x, z)``.

    The multi-fidelity prior's hardware level uses it for ``rho0^2 C_low(x, z)``, the simulation
    level's posterior covariance (Kennedy and O'Hagan 2000; Le Gratiet and Garnier 2014). The
    hyperparameters, their order and the gradients are the base kernel's: the fixed term does not depend
    on them (zero gradient), so :class:`~gapgauge.compare.gp.ExactGP` optimises its marginal likelihood
    unchanged.

    Parameters:
        base: the Matern 5/2 kernel whose hyperparameters are fitted.
        fixed: ``fixed(X (n x dim), Z (m x dim) or None) -> (n x m)``, a positive semi-definite
            covariance (``Z = X`` if None).
        fixed_diag: ``fixed_diag(X (n x dim)) -> (n,)``, its diagonal.
        scale: non-negative factor on the fixed term.
    """

    def __init__(self, base: Matern52, fixed, fixed_diag, scale: float = 1.0, _cache: dict | None = None):
        self.base = base
        self.fixed = fixed
        self.fixed_diag = fixed_diag
        self.scale = float(scale)
        # the training block is asked for at every optimiser step: keep the last one (by identity)
        self._cache = {} if _cache is None else _cache

    @property
    def variance(self) -> float:
        return self.base.variance

    @property
    def length_scale(self) -> np.ndarray:
        return self.base.length_scale

    @property
    def n_dims(self) -> int:
        return self.base.n_dims

    @property
    def theta(self) -> np.ndarray:
        return self.base.theta

    @theta.setter
    def theta(self, theta: np.ndarray) -> None:
        self.base.theta = theta

    def clone_with_theta(self, theta: np.ndarray) -> WithFixedCovariance:
        return WithFixedCovariance(self.base.clone_with_theta(theta), self.fixed, self.fixed_diag, self.scale,
                                   self._cache)

    def _fixed(self, X: np.ndarray, Z: np.ndarray | None) -> np.ndarray:
        hit = self._cache.get("key")
        if hit is not None and hit[0] is X and hit[1] is Z:
            return self._cache["value"]
        value = self.fixed(X, Z)
        self._cache.update(key=(X, Z), value=value)
        return value

    def __call__(self, X: np.ndarray, Z: np.ndarray | None = None) -> np.ndarray:
        """Covariance matrix ``(n x m)`` between ``X (n x dim)`` and ``Z (m x dim)`` (``Z = X`` if None)."""
        return self.base(X, Z) + self.scale * self._fixed(X, Z)

    def diag(self, X: np.ndarray) -> np.ndarray:
        """``k(x, x)`` for each row of ``X (n x dim)``."""
        return self.base.diag(X) + self.scale * self.fixed_diag(X)

    def gradient_contract(self, X: np.ndarray, Z: np.ndarray | None, G: np.ndarray) -> np.ndarray:
        """The base kernel's contraction: the fixed term has no hyperparameters."""
        return self.base.gradient_contract(X, Z, G)

    def gradient(self, X: np.ndarray) -> np.ndarray:
        return self.base.gradient(X)

    def get_params(self) -> dict:
        """The base kernel's parameters: the fixed term is rebuilt by its owner, not stored here."""
        return self.base.get_params()
