"""Beliefs on a fixed point set: what the budget's simulated tuner knows about one response.

A :class:`Belief` is a Gaussian over the latent response (the hardware objective, or the margin of
stability) at the trials already run followed by the candidate set. It is built from a fitted model's
own ``predict(X, return_std=True, return_cov=True)``: the multi-fidelity prior's hardware level
(:func:`multifidelity_belief`) or the hardware-only GP of a cold start (:func:`hardware_only_belief`).
:class:`Conditioner` then updates it under many streams of simulated observations at once, and
:func:`draw_surfaces` draws plausible hardware surfaces from it.

The surfaces are drawn from the prior's posterior with its covariance scaled by a factor checked on
the hardware trials themselves (:func:`loo_variance_scale`): the cross-validation estimate of a GP's
variance (Bachoc 2013), each trial predicted by the model refitted without it, shrunk towards 1. On
the stand-in robots the simulation-led posterior is several times too wide where tuning goes (its
mean is close, its sd is not); drawn from it unscaled, the surfaces reach levels no robot reaches. The
tuner of the simulated runs keeps the model as it is, as ``gapgauge propose`` does.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...errors import ModelError
from ..kernels import Matern52, default_length_scale
from ..linalg import cholesky_jittered, solve_lower
from ..multifidelity import MultiFidelityGP
from ..prior import PriorFit, hardware_only_gp

# the hardware-only GP's hyperprior medians (gapgauge.compare.prior.hardware_only_gp), standardised
# units: the cold start's belief before it has the 3 trials that its fit needs
COLD_NOISE_VARIANCE = 0.09
COLD_CONSTANT_VARIANCE = 1.0
# a cold start fits its GP (maximum a posteriori) from this many known trials on
COLD_FIT_MIN_TRIALS = 3
# the variance scale's prior weight, in trials: the model's own scale (1) counts as this many
# leave-one-out residuals (a scaled inverse chi-square prior with this many degrees of freedom)
SCALE_PRIOR_TRIALS = 1.0
# leave-one-out needs at least this many hardware trials
SCALE_MIN_TRIALS = 2


@dataclass
class Belief:
    """A Gaussian belief about one response (objective or margin) at a fixed set of points.

    Attributes:
        mean: ``(s,)`` posterior mean, response units.
        cov: ``(s x s)`` posterior covariance of the latent response, units squared.
        noise_var: variance of one hardware observation around the latent response, units squared.
        n_known: the first ``n_known`` points are trials already run (already conditioned on); the
            other ``s - n_known`` are the candidates, in order.
        floor: observed values are raised to this before conditioning (the fall model's winsorising,
            :class:`gapgauge.compare.fall.FallModel`), or None.
        link: for a margin belief, ``(a, b, threshold)`` of the fall model's probit link
            ``P(fall | f) = Phi(a + b (threshold - f))``; None: a fall is ``margin < 0`` and its
            probability the Gaussian tail of a new observation (Hof's threshold).
    """

    mean: np.ndarray
    cov: np.ndarray
    noise_var: float
    n_known: int = 0
    floor: float | None = None
    link: tuple[float, float, float] | None = None

    @property
    def n_candidates(self) -> int:
        return self.mean.size - self.n_known


@dataclass
class Beliefs:
    """The four beliefs of a budget on one candidate set, with the hardware's observation noise.

    Attributes:
        objective: the prior's belief about the hardware objective (the surfaces are drawn from it and
            the with-prior arm tunes with it).
        cold_objective: the cold start's belief about the objective.
        objective_noise_sd: sd of one hardware observation of the objective, objective units.
        margin, cold_margin: the same for the margin of stability (m); None without a fall model.
        margin_noise_sd: sd of one hardware observation of the margin, m.
        covariance_check: largest relative difference between a belief's covariance diagonal and its
            model's predictive sd before rescaling (0 up to rounding).
        objective_scale, margin_scale: the variance scales of the surfaces' draws
            (:func:`loo_variance_scale`; 1: unscaled); the beliefs themselves are not scaled.
        objective_residuals, margin_residuals: the standardised leave-one-out residuals they rest on.
    """

    objective: Belief
    cold_objective: Belief
    objective_noise_sd: float
    margin: Belief | None = None
    cold_margin: Belief | None = None
    margin_noise_sd: float = 0.0
    covariance_check: float = 0.0
    objective_scale: float = 1.0
    margin_scale: float = 1.0
    objective_residuals: np.ndarray | None = None
    margin_residuals: np.ndarray | None = None

    def surfaces(self, draws: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray | None]:
        """``(draws x m)`` plausible hardware objectives and margins (None without a fall model) at the
        candidates: :func:`draw_surfaces` of the prior's beliefs with their variance scales."""
        objective = draw_surfaces(scaled(self.objective, self.objective_scale), draws, rng)
        if self.margin is None:
            return objective, None
        return objective, draw_surfaces(scaled(self.margin, self.margin_scale), draws, rng)


def condition(belief: Belief, index: np.ndarray, y: np.ndarray) -> Belief:
    """``belief`` conditioned on noisy observations ``y (k,)`` at its points ``index (k,)``.

    Gaussian conditioning with the hyperparameters fixed (Rasmussen and Williams 2006, eq. 2.19 and
    2.24 with the prior replaced by ``belief``).
    """
    index = np.asarray(index, dtype=int)
    y = np.asarray(y, dtype=float)
    if index.size == 0:
        return belief
    C = belief.cov[:, index]
    K = C[index] + belief.noise_var * np.eye(index.size)
    L = cholesky_jittered(K)
    A = solve_lower(L, C.T)
    r = solve_lower(L, y - belief.mean[index])
    return Belief(belief.mean + A.T @ r, belief.cov - A.T @ A, belief.noise_var, belief.n_known, belief.floor,
                  belief.link)


class Conditioner:
    """Posterior means and variances of one belief under ``draws`` separate streams of observations.

    Each observation extends a Cholesky factor of the observed points' covariance by one row
    (R&W eq. 2.19 in updating form): with ``c = cov0[:, i] - V^T V[:, i]`` the covariance of every
    point with the new one given the earlier observations and ``d = c_i + noise``, the mean moves by
    ``c (y - mean_i) / d``, the variance drops by ``c^2 / d`` and ``c / sqrt(d)`` becomes a row of
    ``V``. ``O(points x observations)`` per observation and draw; no ``points x points`` update.

    Attributes:
        mean, var: ``(draws x s)`` posterior mean and latent variance in each stream.
        noise: observation noise variance; link: the belief's fall link.
    """

    def __init__(self, belief: Belief, draws: int, max_observations: int):
        self.cov0 = belief.cov
        self.noise = float(belief.noise_var)
        self.mean = np.tile(belief.mean, (draws, 1))
        self.var = np.tile(np.diag(belief.cov).copy(), (draws, 1))
        self.V = np.zeros((draws, max_observations, belief.mean.size))
        self.n = 0
        self.rows = np.arange(draws)
        self.link = belief.link

    def observe(self, index: np.ndarray, y: np.ndarray, mask: np.ndarray) -> None:
        """Observe ``y (draws,)`` at point ``index (draws,)`` in the draws where ``mask (draws,)``."""
        c = self.cov0[index]
        if self.n:
            past = self.V[self.rows[:, None], np.arange(self.n)[None, :], index[:, None]]
            c = c - np.einsum("dk,dks->ds", past, self.V[:, : self.n])
        d = np.maximum(c[self.rows, index] + self.noise, 1e-300)
        v = c / np.sqrt(d)[:, None]
        v[~mask] = 0.0
        residual = np.where(mask, y - self.mean[self.rows, index], 0.0)
        self.mean += v * (residual / np.sqrt(d))[:, None]
        self.var = np.maximum(self.var - v**2, 0.0)
        self.V[:, self.n] = v
        self.n += 1


def scaled(belief: Belief, factor: float) -> Belief:
    """``belief`` with its covariance multiplied by ``factor`` (the mean and everything else kept)."""
    if factor == 1.0:
        return belief
    return Belief(belief.mean, factor * belief.cov, belief.noise_var, belief.n_known, belief.floor, belief.link)


def loo_variance_scale(model: MultiFidelityGP, prior_trials: float = SCALE_PRIOR_TRIALS) -> tuple[float, np.ndarray]:
    """The factor by which the hardware trials say the model's predictive variance should be scaled,
    and the standardised leave-one-out residuals ``z (k,)`` it rests on.

    ``z_i = (y_i - mu_{-i}) / s_{-i}``: trial ``i`` predicted (latent variance plus the hardware noise)
    by the model with the same simulation level and hyperparameters, its hardware level conditioned on
    the other trials (``copy_with_high(..., optimize=False)``). Bachoc (2013), Computational Statistics
    and Data Analysis 66:55-69, shows the cross-validation estimate of the variance, ``mean(z^2)`` times
    the model's, to be the robust one when the covariance is misspecified. With ``k`` trials it is
    shrunk towards 1 by ``prior_trials`` pseudo-trials: ``(prior_trials + sum z^2) / (prior_trials + k)``
    (the posterior mean scale under a scaled inverse chi-square prior centred on 1). Fewer than 2
    trials: 1, and no residuals.
    """
    X, y = model.X_high_, model.y_high_
    k = y.size
    if k < SCALE_MIN_TRIALS:
        return 1.0, np.zeros(0)
    z = np.empty(k)
    for i in range(k):
        keep = np.arange(k) != i
        mu, sd = model.copy_with_high(X[keep], y[keep], optimize=False).predict(X[i: i + 1], return_std=True,
                                                                                observation=True)
        z[i] = (y[i] - mu[0]) / max(float(sd[0]), 1e-12)
    return float((prior_trials + np.sum(z**2)) / (prior_trials + k)), z


def draw_surfaces(belief: Belief, draws: int, rng: np.random.Generator) -> np.ndarray:
    """``(draws x m)`` joint draws of the latent response at the belief's ``m`` candidates (its known
    points left out) from ``N(mean, cov)``: Cholesky with the least jitter that works, else the root of
    the nearest positive semi-definite matrix."""
    k = belief.n_known
    mean, cov = belief.mean[k:], belief.cov[k:, k:]
    L = cholesky_jittered(cov, eigen_fallback=True)
    z = rng.standard_normal((draws, mean.size))
    return mean[None, :] + z @ L.T


# ---- beliefs from the fitted models ------------------------------------------------------------


def multifidelity_belief(model: MultiFidelityGP, X: np.ndarray, n_known: int = 0) -> tuple[Belief, float]:
    """The hardware-level belief of a fitted :class:`MultiFidelityGP` at ``X (s x dim)`` (unit cube).

    Covariance: the model's ``predict(X, return_cov=True)``, the hardware-level GP's posterior
    covariance whose prior covariance ``rho0^2 C_low + k_delta`` already holds the simulation level's
    posterior ``C_low`` (Kennedy and O'Hagan 2000; see :class:`MultiFidelityGP`); symmetrised, then
    rescaled so its diagonal is ``predict``'s variance exactly. Returns the belief (noise: the hardware
    noise) and the largest relative difference between the two sds before rescaling (a check; 0 up to
    rounding).
    """
    mean, sd = model.predict(X, return_std=True)
    _, cov = model.predict(X, return_cov=True)
    cov = 0.5 * (cov + cov.T)
    own = np.sqrt(np.maximum(np.diag(cov), 0.0))
    check = float(np.max(np.abs(own - sd) / np.maximum(sd, 1e-12))) if sd.size else 0.0
    scale = np.where(own > 0, sd / np.maximum(own, 1e-300), 0.0)
    cov = cov * np.outer(scale, scale)
    return Belief(mean, cov, model.hardware_noise_sd_**2, n_known), check


def hardware_only_belief(
    points: np.ndarray,
    n_known: int,
    y_known: np.ndarray,
    scale_hint: tuple[float, float],
    seed: int,
    floor: float | None = None,
) -> Belief:
    """The cold start's belief at ``points (s x dim)`` (unit cube), conditioned on the trials already
    run (the first ``n_known`` points, observed ``y_known (n_known,)``, response units).

    :func:`gapgauge.compare.prior.hardware_only_gp`: fitted by maximum a posteriori with 3 trials or
    more, the belief then being its own posterior ``predict(points, return_cov=True)``; else its
    hyperpriors' medians (signal sd 1, length-scale ``default_length_scale(dim)``, noise sd 0.3,
    constant mean ~ N(0, 1), standardised units), standardised by the trials (2) or by
    ``scale_hint = (level, spread)`` (fewer), and conditioned on the trials.
    """
    dim = points.shape[1]
    y_known = np.asarray(y_known, dtype=float)
    if n_known >= COLD_FIT_MIN_TRIALS:
        gp = hardware_only_gp(dim, seed).fit(points[:n_known], y_known, basis=np.ones((n_known, 1)))
        mean, cov = gp.predict(points, return_cov=True, basis=np.ones((points.shape[0], 1)))
        return Belief(mean, cov, gp.noise_ * gp.y_std_**2, n_known, floor)
    kernel = Matern52(1.0, np.full(dim, default_length_scale(dim)))
    if n_known == 2 and np.std(y_known) > 0:
        level, spread = float(np.mean(y_known)), float(np.std(y_known))
    else:
        level, spread = scale_hint
    cov = (kernel(points) + COLD_CONSTANT_VARIANCE) * spread**2
    belief = Belief(np.full(points.shape[0], float(level)), cov, COLD_NOISE_VARIANCE * spread**2, n_known, floor)
    return condition(belief, np.arange(n_known), y_known)


def _scale_hint(belief: Belief) -> tuple[float, float]:
    """``(level, spread)`` of a prior's belief: its mean over all points, and the spread of its
    candidates' means combined with its mean variance (the overall scale a plain tuner would guess;
    never the shape)."""
    spread = float(np.sqrt(np.var(belief.mean[belief.n_known:]) + np.mean(np.diag(belief.cov))))
    return float(np.mean(belief.mean)), spread


def beliefs_from_prior(prior: PriorFit, candidates: np.ndarray, seed: int = 0, calibrate: bool = True) -> Beliefs:
    """The beliefs of a fitted prior and of a cold start at ``candidates (m x dim)`` (unit cube).

    Each belief's points are the response's hardware trials (``X_high_``, known) followed by the
    candidates. The cold start sees the same trials; its scale hint is the prior's overall level and
    spread when it has too few trials to set its own. With ``calibrate``, the variance scales of the
    draws come from the trials (:func:`loo_variance_scale`, objective and margin alike); else 1.

    Raises:
        ModelError: the prior carries no fitted models.
    """
    if prior.objective_model is None:
        raise ModelError(
            "the prior has no fitted models (a prior read back from its JSON summary carries none); "
            "take it from gapgauge.app.prior.current_prior or gapgauge.compare.prior.fit_prior"
        )
    obj = prior.objective_model
    X_o = np.vstack([obj.X_high_, candidates])
    objective, check_o = multifidelity_belief(obj, X_o, n_known=obj.X_high_.shape[0])
    cold_objective = hardware_only_belief(X_o, obj.X_high_.shape[0], obj.y_high_, _scale_hint(objective), seed)
    beliefs = Beliefs(objective, cold_objective, float(obj.hardware_noise_sd_), covariance_check=check_o)
    if calibrate:
        beliefs.objective_scale, beliefs.objective_residuals = loo_variance_scale(obj)
    fall = prior.fall_model
    if fall is None:
        return beliefs
    fm = fall.model_
    X_m = np.vstack([fm.X_high_, candidates])
    margin, check_m = multifidelity_belief(fm, X_m, n_known=fm.X_high_.shape[0])
    margin.floor = float(fall.floor_)
    a, b = fall.calibration_
    margin.link = (float(a), float(b), float(fall.threshold_))
    beliefs.margin = margin
    beliefs.cold_margin = hardware_only_belief(
        X_m, fm.X_high_.shape[0], fm.y_high_, _scale_hint(margin), seed, margin.floor
    )
    beliefs.margin_noise_sd = float(fm.hardware_noise_sd_)
    beliefs.covariance_check = max(check_o, check_m)
    if calibrate:
        beliefs.margin_scale, beliefs.margin_residuals = loo_variance_scale(fm)
    return beliefs
