"""The fall model: the probability of a fall at any parameter set.

``FallModel`` is the multi-fidelity machinery of :mod:`gapgauge.compare.multifidelity` (Kennedy and
O'Hagan 2000, fitted recursively as in Le Gratiet and Garnier 2014) applied to the margin of
stability (Hof, Gazendam and Sinke 2005: distance from the extrapolated centre of mass to the edge
of the base of support; negative when the body cannot stop without stepping). The simulation level
takes every non-diverged rollout, fallen or not (the margin is measured for all of them); the
hardware level takes the trials' margins.

    P(fall | x) = P(margin(x) < threshold) = Phi((threshold - mu(x)) / sd(x))

under the Gaussian predictive of a new trial's margin (latent variance plus the hardware noise, so
trial-to-trial scatter counts). The surface is the same as the other models': ``fit``, ``predict``,
``log_marginal_likelihood``, plus :meth:`fall_probability`.

The threshold. The margin is the minimum over the trial, and a body can dip below 0 and still recover
with its ankles and hips (14% of the standing rollouts of a 2,000-rollout push_recovery sweep did), so
``margin < 0`` over-counts falls. When the simulated outcomes are given, the threshold is the margin
that best separates the simulated falls from the stands, by Youden's J statistic (Youden 1950,
Cancer 3:32-35: the cut maximising sensitivity + specificity - 1); otherwise it is Hof's 0.

The floor. Margins below ``threshold - spread`` are raised to it before fitting (winsorised), ``spread``
being the sd of the margins of the rollouts that stood. A fallen body's margin measures how far it
fell (about -1 m on push_recovery, against a few cm for bodies that stood), not how near the
controller came to recovering; left as it is, the two clusters make the GP read everything as noise
(fitted noise sd 0.25 m instead of 0.03 m) and the fall probability near 0.5 everywhere. The floor
keeps the side of the threshold, which is all the fall probability uses.
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
        if fell_low is None:
            self.threshold_ = 0.0
            fell = margin_low < 0
        else:
            fell = np.asarray(fell_low, dtype=bool)
            self.threshold_ = youden_threshold(margin_low, fell)
        stood = margin_low[~fell]
        spread = float(np.std(stood)) if stood.size > 1 else float(np.std(margin_low))
        self.floor_ = self.threshold_ - (spread if spread > 0 else 1.0)
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
        """``P(margin < threshold)`` of a new hardware trial at ``X (n x dim)`` (unit cube): ``(n,)``."""
        mean, sd = self.model_.predict(X, return_std=True, observation=True)
        return ndtr((self.threshold_ - mean) / np.maximum(sd, 1e-12))

    def to_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        params, arrays = self.model_.to_state()
        return {**params, "floor": self.floor_, "threshold": self.threshold_}, arrays

    @classmethod
    def from_state(cls, params: dict[str, Any], arrays: dict[str, np.ndarray]) -> FallModel:
        out = cls()
        out.model_ = MultiFidelityGP.from_state(params, arrays)
        out.floor_ = float(params["floor"])
        out.threshold_ = float(params.get("threshold", 0.0))
        return out


def youden_threshold(margin: np.ndarray, fell: np.ndarray) -> float:
    """The margin cut that best separates falls from stands (Youden 1950).

    Args:
        margin: margins of stability, ``(n,)`` m.
        fell: ``(n,)`` bool, the outcome of each.

    Returns the midpoint between neighbouring sorted margins at which ``margin < cut`` maximises
    sensitivity + specificity - 1; 0 (Hof's definition) when only one outcome occurs.
    """
    margin = np.asarray(margin, dtype=float)
    fell = np.asarray(fell, dtype=bool)
    ok = np.isfinite(margin)
    margin, fell = margin[ok], fell[ok]
    n_fell, n_stood = int(fell.sum()), int((~fell).sum())
    if n_fell == 0 or n_stood == 0:
        return 0.0
    order = np.argsort(margin, kind="stable")
    m, f = margin[order], fell[order]
    # cut between position i and i+1: everything up to i is called a fall
    sensitivity = np.cumsum(f)[:-1] / n_fell
    specificity = 1.0 - np.cumsum(~f)[:-1] / n_stood
    distinct = m[1:] > m[:-1]
    if not distinct.any():
        return 0.0
    j = np.where(distinct, sensitivity + specificity - 1.0, -np.inf)
    i = int(np.argmax(j))
    return float(0.5 * (m[i] + m[i + 1]))
