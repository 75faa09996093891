"""The trial budget: how many hardware trials to book, with the simulation prior and without it.

The budget is a Monte Carlo over plausible hardware response surfaces (DESIGN.md section 5, "Budget"),
each tuned by the proposal policy of :mod:`gapgauge.compare.propose`:

1. Candidates: ``n_candidates`` scrambled Sobol points (scipy.stats.qmc) inside the scenario's SAFE
   bounds, in the unit cube of the full bounds; seeded from ``seed``.
2. Surfaces: joint draws of the hardware objective and the margin of stability on the candidates from
   the fitted posterior (the multi-fidelity prior of :mod:`gapgauge.compare.prior` and the fall model).
   Each draw is exact for the candidate set: the posterior covariance on all candidates, the models'
   own ``predict(X, return_cov=True)`` (Kennedy and O'Hagan 2000: the hardware-level GP's, whose prior
   covariance is ``rho0^2 C_low + k_delta`` with the simulation level's posterior ``C_low``, including
   the basis coefficients' uncertainty, Rasmussen and Williams 2006 eq. 2.42), is factorised by
   Cholesky with the least jitter that works (:func:`gapgauge.compare.linalg.cholesky_jittered`); the
   marginal sds are set to the models' own ``predict`` sds. The covariance of the draws is then scaled
   by the factor the hardware trials give, the cross-validation variance estimate of Bachoc (2013)
   (each trial predicted by the model without it), shrunk towards 1 by one pseudo-trial
   (:func:`~.belief.loo_variance_scale`): on the stand-in robots the simulation-led posterior is
   several times too wide where tuning goes, and surfaces drawn from it unscaled reach levels no robot
   reaches. The objective and the margin are separate GPs with independent posteriors, so a draw is a
   pair of independent draws.
3. Tuning: on every draw, the policy of ``gapgauge propose``, expected improvement times the
   probability of not falling (Jones, Schonlau and Welch 1998; Gardner et al. 2014), with the fall-risk
   limit and the plug-in incumbent (lowest posterior mean at the trials so far), proposes one trial at
   a time for up to ``max_trials``. Two simplifications, both for speed: the maximisation is discrete,
   over the same candidates (``propose`` polishes a Sobol candidate with L-BFGS-B); and after each trial
   the model is conditioned on it with its hyperparameters fixed (exact Gaussian conditioning on the
   candidate set, R&W eq. 2.19, by a growing Cholesky factor), not refitted. A trial's outcome is the
   draw observed with the hardware noise: it falls with the fall model's chance at the draw's margin
   (its probit link, :class:`gapgauge.compare.fall.FallModel`; without one, when the margin is below
   0), and then only its margin is observed (a fallen trial's objective is not a measurement, as in
   ``fit_prior``). When no candidate meets the fall-risk limit (``propose`` would stop and say so),
   the simulated user lifts the limit for that trial (EI x P(no fall) unconstrained, as with a higher
   ``max_fall_risk``); such trials are counted in ``infeasible_steps`` and reported in the notes.
4. Target (:mod:`.target`): a trial that does not fall, meets the scenario's ``[success]`` rule and
   scores the objective at or below a level. The level is given (``target_value``), or given as a
   distance above the best the posterior expects for this robot (``target_within``; the lowest
   posterior mean within the fall-risk limit), or, by default, chosen: the most ambitious level that
   ``reach_share`` (90%) of the simulated runs with the prior reach within ``max_trials``, never above
   the level at which the sweep shows the success rule to hold. The older per-draw target,
   ``median - fraction (median - best)`` over the candidates on which the draw stands, stays available
   (``target_fraction``). The policy never looks at the target: reached at the first trial that stands
   with the draw's (latent) objective at or below it.
5. Cold start: the same policy on the same draws with a hardware-only model instead of the prior,
   :func:`gapgauge.compare.prior.hardware_only_gp` (Matern 5/2 ARD, constant mean ~ N(0, 1), weak
   priors) for the objective and the same form for the margin (fall risk: the Gaussian tail below
   Hof's 0, no link, since the link is fitted to simulated falls), fitted (maximum a posteriori) on the
   trials already in the store when there are at least 3, else at its hyperpriors' medians. With
   fewer than 2 trials it borrows only the overall level and spread of the prior's predictions to set
   its output scale (a plain tuner would guess one), never their shape.

Both arms count trials from now on: the trials already in the store are known to both. The figures:
the probability of having reached the target by trial ``n`` (the curve), and the budget at level
``q``, the least ``n`` with that probability at least ``q`` (None, printed ">T", when the target is
reached in fewer than a fraction ``q`` of the draws within ``max_trials``, and then the arm says what
would give a number), and the expected falls before the target is reached. Whether the figures hold
is measured, not assumed: ``benchmarks/budget_coverage.py`` compares P50 and P80 with real tuning runs
(``propose`` and refits) on stand-in robots, shipped and drawn at random.

The package, along its seams:

- :mod:`.belief`: Gaussian beliefs on the candidate set, built from the fitted models' own
  ``predict(..., return_cov=True)``; conditioning; the surface draws.
- :mod:`.policy`: the simulated tuning runs (:func:`run_policy`).
- :mod:`.target`: what "reached" means, chosen or given, in words.
- :mod:`.figures`: reach curves, the budgets of one arm, what would give a number.
- :mod:`.plan`: the two arms, :func:`plan_from_prior` (the pure entry point: a fitted prior in, a
  :class:`BudgetPlan` out).
- :mod:`.result`: :class:`BudgetPlan` (stored as kind ``"budget"``).

The job that reads the prior from a store and saves the plan is :func:`gapgauge.app.budget.plan_budget`.
"""

from .belief import (
    COLD_CONSTANT_VARIANCE,
    COLD_NOISE_VARIANCE,
    Belief,
    Beliefs,
    Conditioner,
    beliefs_from_prior,
    condition,
    draw_surfaces,
    hardware_only_belief,
    loo_variance_scale,
    multifidelity_belief,
    scaled,
)
from .figures import arm_figures, budget_at, reach_curve
from .plan import (
    DEFAULT_CANDIDATES,
    DEFAULT_CONFIDENCE,
    DEFAULT_DRAWS,
    DEFAULT_MAX_TRIALS,
    DEFAULT_TARGET_FRACTION,
    METHOD,
    budget_from_beliefs,
    candidate_set,
    check_options,
    plan_from_prior,
)
from .policy import (
    DEFAULT_MAX_FALL_RISK,
    DRAW_CHUNK,
    POLICIES,
    PolicyRuns,
    fall_risk,
    falls_before,
    run_policy,
    trials_to_level,
)
from .result import ArmBudget, BudgetPlan, BudgetTarget, CurvePoint, book_text
from .target import DEFAULT_REACH_SHARE, auto_level, draw_targets, reference_best, standing, success_cap

__all__ = [
    "COLD_CONSTANT_VARIANCE",
    "COLD_NOISE_VARIANCE",
    "DEFAULT_CANDIDATES",
    "DEFAULT_CONFIDENCE",
    "DEFAULT_DRAWS",
    "DEFAULT_MAX_FALL_RISK",
    "DEFAULT_MAX_TRIALS",
    "DEFAULT_REACH_SHARE",
    "DEFAULT_TARGET_FRACTION",
    "DRAW_CHUNK",
    "METHOD",
    "POLICIES",
    "ArmBudget",
    "Belief",
    "Beliefs",
    "BudgetPlan",
    "BudgetTarget",
    "Conditioner",
    "CurvePoint",
    "PolicyRuns",
    "arm_figures",
    "auto_level",
    "beliefs_from_prior",
    "book_text",
    "budget_at",
    "budget_from_beliefs",
    "candidate_set",
    "check_options",
    "condition",
    "draw_surfaces",
    "draw_targets",
    "fall_risk",
    "falls_before",
    "hardware_only_belief",
    "loo_variance_scale",
    "multifidelity_belief",
    "plan_from_prior",
    "reach_curve",
    "reference_best",
    "run_policy",
    "scaled",
    "standing",
    "success_cap",
    "trials_to_level",
]
