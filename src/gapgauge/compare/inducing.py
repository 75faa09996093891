"""Choosing inducing inputs for the sparse simulation level: k-means++ seeding.

:class:`~gapgauge.compare.sparse.SparseGP` takes its ``m`` inducing inputs as k-means++ centres
(Arthur and Vassilvitskii 2007) of a random pool of ``20 m`` rollouts, in the space the kernel sees
(each input divided by its length-scale), so they spread along the short length-scales. The pool, not
the whole sweep, is seeded: k-means++ costs ``O(pool x m)``, and a pool of 6,000 points already covers a
13-dimensional unit cube at the resolution 300 inducing points can resolve; at 10^6 rollouts the choice
is then as cheap as at 10^5 (benchmarks/prior_scale.py measures the held-out accuracy it gives).
"""

from __future__ import annotations

import numpy as np

POOL_FACTOR = 20  # pool of rollouts k-means++ seeds from, per inducing input


def kmeans_plusplus(X: np.ndarray, m: int, rng: np.random.Generator) -> np.ndarray:
    """``m`` rows of ``X (n x dim)`` chosen by k-means++ seeding (Arthur and Vassilvitskii 2007).

    Each next centre is drawn with probability proportional to its squared distance to the
    nearest centre chosen so far; returns the chosen row indices ``(m,)``.
    """
    n = X.shape[0]
    if m >= n:
        return np.arange(n)
    chosen = np.empty(m, dtype=int)
    chosen[0] = rng.integers(n)
    d2 = ((X - X[chosen[0]]) ** 2).sum(1)
    for i in range(1, m):
        total = d2.sum()
        j = int(rng.choice(n, p=d2 / total)) if total > 0 else int(rng.integers(n))
        chosen[i] = j
        d2 = np.minimum(d2, ((X - X[j]) ** 2).sum(1))
    return chosen


def choose_inducing(X: np.ndarray, m: int, length_scale: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """``m`` inducing inputs ``(m x dim)`` for data ``X (n x dim)`` (unit cube) and a kernel with these
    ``length_scale (dim,)``: k-means++ centres of a random pool of ``20 m`` rows (all rows when fewer),
    seeded in the space the kernel sees, so that inducing inputs spread along the short length-scales."""
    n = X.shape[0]
    pool = rng.choice(n, size=min(n, POOL_FACTOR * m), replace=False) if n > POOL_FACTOR * m else np.arange(n)
    return X[pool][kmeans_plusplus(X[pool] / length_scale, m, rng)]


__all__ = ["POOL_FACTOR", "choose_inducing", "kmeans_plusplus"]
