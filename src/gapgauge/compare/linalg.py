"""The one jitter policy and the one posterior covariance of the package's Gaussian processes.

Every Cholesky factor of a covariance in :mod:`gapgauge.compare` goes through
:func:`cholesky_jittered`: the plain factor first; if floating point makes it fail (near-duplicate
inputs with tiny noise, candidates closer than a length-scale), the least relative jitter of
:data:`JITTER_STEPS` that works (relative to the mean absolute diagonal), which changes predictions and
draws negligibly. With ``eigen_fallback`` a covariance that is still not positive definite gets a
(non-triangular) square root of its nearest positive semi-definite matrix, for drawing samples only.

:func:`posterior_covariance` is the Gaussian conditional covariance of Rasmussen and Williams (2006)
eq. 2.24 in the form of their Algorithm 2.1 line 5: ``K(X, Z) - V_X^T V_Z`` with ``V = L \\ K(train, .)``;
every model's ``predict(X, return_cov=True)`` is built on it (the sparse GP adds its inducing
correction on top, see :class:`~gapgauge.compare.sparse.SparseGP`).
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import cholesky, solve_triangular

from ..errors import ModelError

# the triangle every factor is kept in (scikit-learn's GPR keeps it in a named constant too)
CHOLESKY_LOWER = True
# relative jitter tried in turn: 0 first, so a well-conditioned covariance is factorised exactly
JITTER_STEPS = (0.0, 1e-10, 1e-8, 1e-6, 1e-4)
# BLAS threads while fitting: the products here are small and many, and on shared cores OpenBLAS's
# spinning threads made one n = 2000 sparse-bound evaluation 1.5 s instead of 0.04 s (measured on
# the 2-core development machine under load); one thread is never much slower for these sizes
FIT_BLAS_THREADS = 1


def cholesky_jittered(K: np.ndarray, *, eigen_fallback: bool = False) -> np.ndarray:
    """A square root ``L (n x n)`` of the symmetric ``K (n x n)`` with ``L L^T = K + jitter I``.

    Lower-triangular Cholesky with the least jitter of :data:`JITTER_STEPS` (times the mean absolute
    diagonal of ``K``) that works. With ``eigen_fallback``, when none works, ``Q sqrt(max(w, 0))`` from
    the symmetric eigen-decomposition ``K = Q diag(w) Q^T`` (not triangular: only for drawing samples).

    Raises:
        ModelError: ``K`` is not positive definite even with the largest jitter (and no fallback).
    """
    K = np.asarray(K, dtype=float)
    n = K.shape[0]
    if n == 0:
        return np.zeros((0, 0))
    scale = float(np.mean(np.abs(np.diag(K)))) or 1.0
    for jitter in JITTER_STEPS:
        try:
            return cholesky(K + (jitter * scale) * np.eye(n) if jitter else K, lower=CHOLESKY_LOWER,
                            check_finite=False)
        except np.linalg.LinAlgError:
            continue
    if not eigen_fallback:
        raise ModelError(
            "a GP covariance is not positive definite even with jitter; remove duplicate parameter sets, "
            "allow more noise or refit the prior"
        )
    # the eigenvalues clipped to 0 give a square root of the nearest positive semi-definite matrix
    w, Q = np.linalg.eigh(0.5 * (K + K.T))
    return Q * np.sqrt(np.maximum(w, 0.0))


def solve_lower(L: np.ndarray, B: np.ndarray) -> np.ndarray:
    """``L^-1 B`` for a lower-triangular ``L (n x n)`` and ``B (n,)`` or ``(n x m)``."""
    return solve_triangular(L, B, lower=CHOLESKY_LOWER, check_finite=False)


def posterior_covariance(
    prior_cov: np.ndarray, L: np.ndarray, cross_x: np.ndarray, cross_z: np.ndarray | None = None
) -> np.ndarray:
    """Gaussian conditional covariance ``prior_cov - V_X^T V_Z``, ``V = L^-1 cross`` (R&W 2006 eq. 2.24).

    Args:
        prior_cov: ``(s x t)`` prior covariance between the query sets X and Z.
        L: ``(n x n)`` lower Cholesky factor of the training covariance (noise included); ``(0 x 0)``
            when there are no training points (the prior is returned).
        cross_x: ``(n x s)`` prior covariance between the training points and X.
        cross_z: ``(n x t)`` the same for Z (None: Z = X).

    Returns ``(s x t)``, in the units of ``prior_cov``.
    """
    if L.size == 0:
        return np.array(prior_cov, dtype=float, copy=True)
    VX = solve_lower(L, cross_x)
    VZ = VX if cross_z is None else solve_lower(L, cross_z)
    return prior_cov - VX.T @ VZ


__all__ = [
    "CHOLESKY_LOWER",
    "FIT_BLAS_THREADS",
    "JITTER_STEPS",
    "cholesky_jittered",
    "posterior_covariance",
    "solve_lower",
]
