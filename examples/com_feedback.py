"""A controller of our own, written as a gapgauge callable: centre-of-mass feedback over ankle and hip.

The scenario ``com_feedback.toml`` beside this file names it (``module = "com_feedback.py:controller"``)
and gapgauge calls it 500 times a second over the whole batch of rollouts::

    ctrl = controller(t, observation, params)

with ``observation (n x 4)`` = ``com_x, com_vx, heel_x, toe_x`` (m, m/s: the whole-body centre of mass,
its velocity and the two support edges) and ``params (n x 7)`` in the order of the scenario's
``[controller].parameters``. It returns the position-servo targets of ankle, knee and hip, rad,
``(n x 3)``; the servos' stiffness and damping are the scenario's ``stiffness`` / ``damping`` parameters,
set in the model, so MuJoCo closes the inner loop between calls.

The law, two balance strategies of the textbook kind (ankle strategy and hip strategy; a controller
of our own design, not a published one):

- the centre-of-mass error is its distance ahead of the support's midpoint, less a target:
  ``e = com_x - (heel_x + toe_x) / 2 - com_target``;
- ankle strategy: lean the ankle target back against the error and the velocity,
  ``ankle = ankle_setpoint - com_gain * e - com_velocity_gain * com_vx``
  (a positive ankle angle moves the shank's top forward, DEVELOPERS.md sign convention);
- hip strategy: bend at the hip in proportion to the extrapolated centre of mass's error
  ``e + com_vx / omega0``, ``omega0 = sqrt(g / l)`` (Hof, Gazendam and Sinke 2005),
  ``hip = hip_setpoint + hip_gain * (e + com_vx / omega0)``;
- the knee holds its set-point.

The function is pure (no state between calls) and vectorised: one numpy expression per column, so
a call on a batch of 128 rollouts costs a few microseconds beside MuJoCo's stepping.
"""

from __future__ import annotations

import numpy as np

GRAVITY = 9.81  # m/s^2, as in models/planar_body.xml
LEG_LENGTH = 0.66  # m: pendulum length for omega0, the standing centre-of-mass height of the planar body
OMEGA0 = float(np.sqrt(GRAVITY / LEG_LENGTH))  # 1/s


def controller(t: float, observation: np.ndarray, params: np.ndarray) -> np.ndarray:
    """Servo targets ``(n x 3)`` rad (ankle, knee, hip) from ``observation (n x 4)`` (com_x m, com_vx m/s,
    heel_x m, toe_x m) and ``params (n x 7)`` (ankle, knee and hip set-points rad, com_target m,
    com_gain rad/m, com_velocity_gain rad s/m, hip_gain rad/m); ``t`` (s) is not used."""
    com_x, com_vx, heel_x, toe_x = observation.T
    ankle_setpoint, knee_setpoint, hip_setpoint, com_target, com_gain, com_velocity_gain, hip_gain = params.T
    error = com_x - 0.5 * (heel_x + toe_x) - com_target
    ankle = ankle_setpoint - com_gain * error - com_velocity_gain * com_vx
    hip = hip_setpoint + hip_gain * (error + com_vx / OMEGA0)
    return np.column_stack([ankle, knee_setpoint, hip])
