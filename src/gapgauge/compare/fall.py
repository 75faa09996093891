"""The fall model: the probability of a fall at any parameter set.

``FallModel`` is the multi-fidelity machinery of :mod:`gapgauge.compare.multifidelity` (Kennedy and
O'Hagan 2000, fitted recursively as in Le Gratiet and Garnier 2014) applied to the margin of
stability (Hof, Gazendam and Sinke 2005: distance from the extrapolated centre of mass to the edge
of the base of support; negative when the body cannot stop without stepping). The simulation level
takes every non-diverged rollout, fallen or not (the margin is measured for all of them); the
hardware level takes the trials' margins.

    P(fall | x) = E[Phi(a + b (threshold - f(x)))] = Phi((a + b (threshold - mu(x))) / sqrt(1 + b^2 sd(x)^2))

with ``f(x) ~ N(mu, sd^2)`` the latent hardware margin and ``Phi(a + b (threshold - f))`` a probit link
from the latent margin to the chance of a fall, fitted to the simulated outcomes (see
:meth:`FallModel._calibrate`): the link carries the trial-to-trial scatter that physics brings, the
predictive sd carries what the model does not know. The surface is the same as the other models':
``fit`` returns self, ``predict(X, return_std=False, return_cov=False)`` (the margin), ``sample_y``,
``log_marginal_likelihood``, ``to_state`` / ``from_state``, plus :meth:`FallModel.predict_proba`
(scikit-learn's classifier verb: columns stand, fall) and :meth:`FallModel.fall_probability` (its fall
column).

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
from scipy.optimize import minimize
from scipy.special import log_ndtr, ndtr

from .multifidelity import DISCREPANCY_SD_PRIOR, MultiFidelityGP

# predict_proba's columns, in scikit-learn's order of classes_: stood (False), fell (True)
CLASSES = np.array([False, True])


class FallModel:
    """Probability of a fall from the modelled margin of stability (m).

    Parameters are passed to :class:`MultiFidelityGP` (priors, inducing points, seed).

    Fitted attributes: ``model_`` (the multi-fidelity GP of the winsorised margin, m), ``threshold_``
    (m), ``floor_`` (m), ``calibration_`` (``(a, b)`` of the probit link), ``classes_`` (stood, fell).
    """

    def __init__(
        self, *, rho_sd: float = 0.2, offset_sd: float = 0.03, discrepancy_sd: float = 0.02, **mf_options: Any
    ):
        # Priors of the hardware level, in metres of margin: a priori the robot's margin differs from
        # the simulation's by a scale rho ~ N(1, rho_sd^2), an offset of about offset_sd (also the sd
        # of a linear trend across the safe box) and a smooth discrepancy of about discrepancy_sd.
        # Set on the scale of the foot (18 cm heel to toe), not of the fall/stand gap (about 1 m),
        # which would otherwise dominate the standardised units and leave no parameter set below a
        # 5% fall risk before the first trial.
        self.rho_sd = rho_sd
        self.offset_sd = offset_sd
        self.discrepancy_sd = discrepancy_sd
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
        target = np.maximum(margin_low, self.floor_)
        scale = float(np.std(target)) or 1.0  # MultiFidelityGP works in simulation-sd units
        options = {
            "rho_prior": (1.0, self.rho_sd),
            "offset_prior_sd": self.offset_sd / scale,
            "trend_prior_sd": self.offset_sd / scale,
            "discrepancy_sd_prior": (self.discrepancy_sd / scale, DISCREPANCY_SD_PRIOR[1]),
            **self.mf_options,
        }
        self.model_ = MultiFidelityGP(**options).fit(
            X_low, target, X_high,
            np.maximum(np.asarray(margin_high, dtype=float), self.floor_))
        self.calibration_ = self._calibrate(X_low, fell)
        self.classes_ = CLASSES
        return self

    def copy_with_high(self, X_high: np.ndarray, margin_high: np.ndarray, optimize: bool = True) -> FallModel:
        """A new fall model sharing this one's simulation level, threshold, floor and link (all fitted
        on the simulations only), with the hardware level refitted to ``X_high (k x dim)`` (unit cube),
        ``margin_high (k,)`` m."""
        other = FallModel(rho_sd=self.rho_sd, offset_sd=self.offset_sd, discrepancy_sd=self.discrepancy_sd,
                          **self.mf_options)
        other.threshold_, other.floor_, other.calibration_ = self.threshold_, self.floor_, self.calibration_
        other.classes_ = CLASSES
        floored = np.maximum(np.asarray(margin_high, dtype=float), self.floor_)
        other.model_ = self.model_.copy_with_high(X_high, floored, optimize=optimize)
        return other

    def _calibrate(self, X_low: np.ndarray, fell: np.ndarray, max_points: int = 20000) -> tuple[float, float]:
        """Probit link ``P(fall | latent margin f) = Phi(a + b (threshold - f))`` fitted to simulated outcomes.

        A GP regression has one noise level for the whole space, fitted where outcomes are mixed, so
        its raw tail probability over-states the risk where every simulated body stood (0 falls in 64
        draws where the raw model said 6%, on push_recovery). Instead the outcome is linked to the
        latent mean margin by a probit curve whose two coefficients are fitted by maximum likelihood to
        the simulated falls (Platt 1999 with a probit link); the latent uncertainty is then integrated
        out in :meth:`fall_probability`. ``b`` is bounded (1 mm of margin at most per unit of the
        probit) so that perfectly separated simulations give a sharp but finite link. An evenly spaced
        subset of at most ``max_points`` rollouts keeps it cheap; no random choice is involved.
        """
        fell = np.asarray(fell, dtype=bool)
        if fell.all() or not fell.any():
            return 0.0, 1.0 / max(self.threshold_ - self.floor_, 1e-3)
        idx = np.unique(np.linspace(0, len(fell) - 1, min(len(fell), max_points)).astype(int))
        gap = self.threshold_ - self.model_.predict_low(X_low[idx])
        y = fell[idx]

        def negative_log_likelihood(ab: np.ndarray) -> float:
            s = ab[0] + ab[1] * gap
            return -float(np.sum(np.where(y, log_ndtr(s), log_ndtr(-s))))

        # b > 0 keeps the order: a lower predicted margin never means a lower risk
        fit = minimize(negative_log_likelihood, np.array([0.0, 10.0]), method="L-BFGS-B",
                       bounds=[(-20.0, 20.0), (1e-3, 1e3)])
        return float(fit.x[0]), float(fit.x[1])

    def predict(
        self, X: np.ndarray, return_std: bool = False, return_cov: bool = False, *, observation: bool = False
    ) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Latent (winsorised) margin of stability on hardware at ``X (n x dim)`` (unit cube): mean
        ``(n,)`` m, with ``return_std`` its sd ``(n,)`` m, with ``return_cov`` its covariance ``(n x n)`` m^2
        (:meth:`MultiFidelityGP.predict`)."""
        return self.model_.predict(X, return_std, return_cov, observation=observation)

    def sample_y(
        self, X: np.ndarray, n_samples: int = 1, random_state: int | np.random.Generator | None = None
    ) -> np.ndarray:
        """``(n x n_samples)`` joint draws of the latent hardware margin at ``X (n x dim)``, m."""
        return self.model_.sample_y(X, n_samples, random_state)

    def log_marginal_likelihood(
        self, theta: np.ndarray | None = None, eval_gradient: bool = False
    ) -> float | tuple[float, np.ndarray]:
        """The margin model's hardware-level log marginal likelihood
        (:meth:`MultiFidelityGP.log_marginal_likelihood`)."""
        return self.model_.log_marginal_likelihood(theta, eval_gradient)

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """``(n x 2)`` probabilities of a new hardware trial at ``X (n x dim)`` (unit cube): columns
        ``classes_`` = (stood, fell), as scikit-learn's classifiers order them."""
        fall = self.fall_probability(X)
        return np.column_stack([1.0 - fall, fall])

    def fall_probability(self, X: np.ndarray) -> np.ndarray:
        """``P(fall)`` of a new hardware trial at ``X (n x dim)`` (unit cube): ``(n,)``, the fall column of
        :meth:`predict_proba`."""
        # E_f[Phi(a + b (threshold - f))] for f ~ N(mean, sd^2) = Phi((a + b (threshold - mean)) / sqrt(1 + b^2 sd^2))
        # (the probit-Gaussian integral; Rasmussen and Williams 2006, eq. 3.80)
        mean, sd = self.model_.predict(X, return_std=True)
        a, b = self.calibration_
        return ndtr((a + b * (self.threshold_ - mean)) / np.sqrt(1.0 + (b * sd) ** 2))

    def to_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """JSON-able parameters and arrays that restore every later call (no pickle)."""
        params, arrays = self.model_.to_state()
        return {**params, "floor": self.floor_, "threshold": self.threshold_,
                "calibration": list(self.calibration_),
                "fall_priors": {"rho_sd": self.rho_sd, "offset_sd": self.offset_sd,
                                "discrepancy_sd": self.discrepancy_sd}}, arrays

    @classmethod
    def from_state(cls, params: dict[str, Any], arrays: dict[str, np.ndarray]) -> FallModel:
        """The model of :meth:`to_state`."""
        out = cls(**params.get("fall_priors", {}))
        out.model_ = MultiFidelityGP.from_state(params, arrays)
        out.mf_options = {"max_inducing": out.model_.max_inducing, "n_restarts": out.model_.n_restarts}
        out.floor_ = float(params["floor"])
        out.threshold_ = float(params.get("threshold", 0.0))
        a, b = params.get("calibration", (0.0, 1.0))
        out.calibration_ = (float(a), float(b))
        out.classes_ = CLASSES
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
