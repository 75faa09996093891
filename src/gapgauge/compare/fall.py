"""The fall model: the probability of a fall at any parameter set.

``FallModel`` is the multi-fidelity machinery of :mod:`gapgauge.compare.multifidelity` (Kennedy and
O'Hagan 2000, fitted recursively as in Le Gratiet and Garnier 2014) applied to the margin of
stability (Hof, Gazendam and Sinke 2005: distance from the extrapolated centre of mass to the edge
of the base of support; negative when the body cannot stop without stepping). The simulation level
takes every non-diverged rollout, fallen or not (the margin is measured for all of them); the
hardware level takes the trials' margins.

    P(fall | x) = P(margin(x) < 0) = Phi(-mu(x) / sd(x))

under the Gaussian predictive of a new trial's margin (latent variance plus the hardware noise, so
trial-to-trial scatter counts). The surface is the same as the other models': ``fit``, ``predict``,
``log_marginal_likelihood``, plus :meth:`fall_probability`.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.special import ndtr

from .multifidelity import MultiFidelityGP


class FallModel:
    """Probability of a fall from the modelled margin of stability (m).

    Parameters are passed to :class:`MultiFidelityGP` (priors, inducing points, seed).
    """

    def __init__(self, **mf_options: Any):
        self.mf_options = mf_options

    def fit(
        self, X_low: np.ndarray, margin_low: np.ndarray, X_high: np.ndarray, margin_high: np.ndarray
    ) -> FallModel:
        """Fit to simulated margins ``X_low (n x dim)`` (unit cube), ``margin_low (n,)`` m and the
        hardware trials' ``X_high (k x dim)``, ``margin_high (k,)`` m (``k`` may be 0)."""
        self.model_ = MultiFidelityGP(**self.mf_options).fit(X_low, margin_low, X_high, margin_high)
        return self

    def predict(
        self, X: np.ndarray, return_std: bool = False, observation: bool = False
    ) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Margin of stability on hardware at ``X (n x dim)`` (unit cube): mean (and sd), m."""
        return self.model_.predict(X, return_std=return_std, observation=observation)

    def log_marginal_likelihood(
        self, theta: np.ndarray | None = None, eval_gradient: bool = False
    ) -> float | tuple[float, np.ndarray]:
        return self.model_.log_marginal_likelihood(theta, eval_gradient)

    def fall_probability(self, X: np.ndarray) -> np.ndarray:
        """``P(margin < 0)`` of a new hardware trial at ``X (n x dim)`` (unit cube): ``(n,)``."""
        mean, sd = self.model_.predict(X, return_std=True, observation=True)
        return ndtr(-mean / np.maximum(sd, 1e-12))

    def to_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return self.model_.to_state()

    @classmethod
    def from_state(cls, params: dict[str, Any], arrays: dict[str, np.ndarray]) -> FallModel:
        out = cls()
        out.model_ = MultiFidelityGP.from_state(params, arrays)
        return out
