"""calibrate(): fit the simulator's physical parameters to the hardware trials; say how well each is pinned.

The view is the Bayesian calibration of Kennedy and O'Hagan (2001), J. R. Statist. Soc. B 63(3):425-464:
hardware feature ``j`` of trial ``i`` is the simulator at the trial's policy parameters ``x_i`` and the
unknown true physics ``theta``, plus Gaussian error,

    y_ij = eta_j(x_i, theta) + e_ij,    e_ij ~ N(0, (tau * s_j)^2),

where ``s_j`` is the feature's simulated spread under the scenario's physics randomisation (the unit in
which "a big shift" is measured everywhere in gapgauge) and ``tau`` the error level in those units.
Kennedy and O'Hagan's model discrepancy ``delta(x)`` is not fitted as a separate GP: with 3 to 5 trials
it cannot be told apart from the error, so it is absorbed into ``e`` (its size then shows in ``tau``).
With a flat prior on ``theta`` over the search box, the posterior mode minimises the *standardised
discrepancy*

    D(theta) = mean over trials i and features j of ((y_ij - eta_j(x_i, theta)) / s_j)^2,

and the approximate posterior around the mode is the Laplace approximation with the Gauss-Newton
Hessian of nonlinear least squares (Bates and Watts 1988, Nonlinear Regression Analysis, ch. 2):

    cov(theta) = (J^T J / tau^2 + 12 I)^-1     (in the unit cube of the search box),
    tau^2 = max(RSS / (m - k), noise_floor^2),

with ``J`` the ``(m x k)`` Jacobian of the standardised residuals at the mode (central finite
differences), ``m`` the number of matched hardware values and ``k`` the number of physical parameters.
The ``12 I`` is the uniform prior on the unit interval replaced by a Gaussian of the same variance
(1/12), so a direction the features do not see keeps the prior's width instead of an infinite one.
A parameter is *identifiable* from the trials at hand when its 95% interval (mode +- 1.96 sd, clipped
to the search box) covers less than ``identifiable_fraction`` (default half) of the search range.

Optimiser: scipy.optimize.differential_evolution (Storn and Price 1997, J. Global Optimization
11:341-359) with a fixed seed and a small population, every generation evaluated in ONE simulator call
(``vectorized=True``) so the simulator's threads see the whole population; then a polish by
scipy.optimize.least_squares (trust-region reflective, Branch, Coleman and Li 1999) whose finite-difference
Jacobian is again one simulator call. The simulator is the cost: the defaults use about 1,000 to 1,300
rollouts for 5 physical parameters and 5 trials.

``compare/`` runs no physics itself: the caller passes ``simulator(params (n x dim), physics (n x K))
-> RolloutBatch`` (:func:`gapgauge.app.calibrate.calibrate` wires in the scenario's simulator).

Modules: :mod:`.result` (what was found, the overlay), :mod:`.problem` (residuals, discrepancies,
simulated spreads), :mod:`.fit` (the search, the intervals, :func:`calibrate`).
"""

from .fit import OPTIMISERS, calibrate
from .problem import DISCREPANCIES, Simulator
from .result import CalibrationResult, FeatureBeforeAfter, PhysicalEstimate, ShiftAtPhysics

__all__ = [
    "DISCREPANCIES",
    "OPTIMISERS",
    "CalibrationResult",
    "FeatureBeforeAfter",
    "PhysicalEstimate",
    "ShiftAtPhysics",
    "Simulator",
    "calibrate",
]
