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

Margins below ``floor_`` are raised to it before fitting (winsorised). A fallen body's margin measures
how far it fell (about -1 m on push_recovery, against a few cm for bodies that stood), not how near
the controller came to recovering; left as it is, the two clusters make the GP read everything as
noise (fitted noise sd 0.25 m instead of 0.03 m on a 2,000-rollout push_recovery sweep) and the fall
probability near 0.5 everywhere. The floor keeps the sign, which is all ``P(margin < 0)`` uses: it is
minus the sd of the margins of the simulated rollouts that stood.

Caveat: the margin is the minimum over the trial, so a body can dip below 0 and still recover
(14% of standing push_recovery rollouts did): ``P(margin < 0)`` errs on the side of a fall.
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
        self, X_low: np.ndarray, margin_low: np.ndarray, X_high: np.ndarray, margin_high: np.ndarray,
        fell_low: np.ndarray | None = None,
    ) -> FallModel:
        """Fit to simulated margins ``X_low (n x dim)`` (unit cube), ``margin_low (n,)`` m and the
        hardware trials' ``X_high (k x dim)``, ``margin_high (k,)`` m (``k`` may be 0).

        ``fell_low (n,)`` bool marks the simulated rollouts that fell (for the floor); None: those
        with a negative margin.
        """
        margin_low = np.asarray(margin_low, dtype=float)
        fell = margin_low < 0 if fell_low is None else np.asarray(fell_low, dtype=bool)
        stood = margin_low[~fell]
        spread = float(np.std(stood)) if stood.size > 1 else float(np.std(margin_low))
        self.floor_ = -spread if spread > 0 else -1.0
        self.model_ = MultiFidelityGP(**self.mf_options).fit(
            X_low, np.maximum(margin_low, self.floor_), X_high,
            np.maximum(np.asarray(margin_high, dtype=float), self.floor_))
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
        params, arrays = self.model_.to_state()
        return {**params, "floor": self.floor_}, arrays

    @classmethod
    def from_state(cls, params: dict[str, Any], arrays: dict[str, np.ndarray]) -> FallModel:
        out = cls()
        out.model_ = MultiFidelityGP.from_state(params, arrays)
        out.floor_ = float(params["floor"])
        return out
