"""The built-in controller written as a gapgauge callable: a template to start your own from.

It does what gapgauge's built-in controller does (``gapgauge.sim.controls``): it holds the standing
set-points of ankle, knee and hip and adds the reaction's offsets for ``reaction_duration`` seconds,
``reaction_delay`` seconds after the push. The servos' stiffness and damping stay the scenario's
``stiffness`` / ``damping`` parameters, set in the MuJoCo model, so MuJoCo's position actuators close
the inner loop exactly as they do for the built-in controller; at a control rate equal to the physics
rate the trajectories are the built-in's (tests/test_controller.py; what differs is stated there and in
the README: the solver's warm start).

``servo_reaction.toml`` beside this file names it; it hands over, in this order,
``ankle_setpoint, knee_setpoint, hip_setpoint, reaction_delay, reaction_ankle, reaction_hip,
reaction_duration`` (rad, s) and reads no observation. The two constants are those of
``scenarios/push_recovery.toml``: change them with the scenario.
"""

from __future__ import annotations

import numpy as np

ONSET = 0.8  # s: [task].onset of scenarios/push_recovery.toml
HALF_STEP = 0.001  # s: half its [task].timestep; the built-in controller's slack at a window's edges


def controller(t: float, observation: np.ndarray, params: np.ndarray) -> np.ndarray:
    """Servo targets ``(n x 3)`` rad (ankle, knee, hip) at time ``t`` s from ``params (n x 7)``;
    ``observation (n x 0)`` is not used."""
    ankle, knee, hip, delay, reaction_ankle, reaction_hip, duration = params.T
    start = ONSET + delay
    stop = start + duration
    reacting = (t >= start - HALF_STEP) & (t < stop - HALF_STEP)
    return np.column_stack([ankle + reacting * reaction_ankle, knee, hip + reacting * reaction_hip])
