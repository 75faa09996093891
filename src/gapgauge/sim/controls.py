"""Open-loop inputs for ``mujoco.rollout``: servo set-points, the timed reaction, push or platform motion.

The built-in controller is a set of position servos, one per actuated joint of the scenario's
``[model.channels]`` map, holding a standing posture, plus a corrective reaction: a timed step of the
set-points (DEVELOPERS.md, "Policy parameters"). Each parameter is tied to its joints by name; a joint
with no set-point parameter holds its reference angle (``qpos0``). Both are open loop, so a whole
rollout's inputs are one array, built here, vectorised over the batch.

Each control vector follows ``CONTROL_SPEC = mjSTATE_CTRL | mjSTATE_XFRC_APPLIED``: first ``ctrl``
(``nu``: the servo set-points in rad, the platform drive target in m, 0 for other actuators), then ``xfrc_applied``
(``nbody x 6``: force N then torque N m, world frame, applied at the body's centre of mass). MuJoCo
lays out a state vector's components in the order of their ``mjtState`` bits (``mj_getState``), so
the offsets come from ``mj_stateSize`` of the components before each one.

Row ``k`` of a rollout's controls acts during the step from ``t_k = k dt`` to ``t_k + dt``: a push from
``onset`` for ``duration`` covers the steps with ``onset <= t_k < onset + duration``, so its impulse is
``force * duration`` to within one step.
"""

from __future__ import annotations

import mujoco
import numpy as np

from ..scenario import Scenario
from .model import _load, joint_columns, lowest_point, physics_column

CONTROL_SPEC: int = int(mujoco.mjtState.mjSTATE_CTRL | mujoco.mjtState.mjSTATE_XFRC_APPLIED)
STATE_SPEC: int = int(mujoco.mjtState.mjSTATE_FULLPHYSICS)


def control_size(model: mujoco.MjModel) -> int:
    """Length of one control vector under :data:`CONTROL_SPEC`."""
    return int(mujoco.mj_stateSize(model, CONTROL_SPEC))


def _offset(model: mujoco.MjModel, spec: int, component: mujoco.mjtState) -> int:
    """Start of ``component`` inside a vector of ``spec``: the size of the components before it."""
    before = spec & (int(component) - 1)
    return int(mujoco.mj_stateSize(model, before))


def minimum_jerk(t: np.ndarray, onset: float, duration: float) -> np.ndarray:
    """Minimum-jerk profile from 0 to 1, ``(nstep,)`` dimensionless, for times ``t (nstep,)`` s.

    ``s = clip((t - onset) / duration, 0, 1)``, ``x = 10 s^3 - 15 s^4 + 6 s^5``
    (Flash and Hogan 1985, J. Neurosci. 5(7):1688-1703): zero velocity and acceleration at both ends.
    """
    s = np.clip((np.asarray(t, dtype=float) - onset) / duration, 0.0, 1.0)
    return s**3 * (10.0 - 15.0 * s + 6.0 * s**2)


def setpoints(scenario: Scenario, params: np.ndarray) -> np.ndarray:
    """Standing set-points of the actuated joints, ``(n x njoint)`` rad, map order (the joint's reference
    angle where no parameter sets one)."""
    params = np.atleast_2d(np.asarray(params, dtype=float))
    out = np.tile(_load(scenario)[1].joint_qpos0, (params.shape[0], 1))
    for j, c in joint_columns(scenario, "setpoint").items():
        out[:, j] = params[:, c]
    return out


def _role_column(scenario: Scenario, params: np.ndarray, role: str) -> np.ndarray:
    for c, p in enumerate(scenario.parameters):
        if p.role == role:
            return params[:, c]
    return np.zeros(params.shape[0])


def build_controls(
    scenario: Scenario,
    params: np.ndarray,
    physics: np.ndarray,
    *,
    out: np.ndarray | None = None,
) -> np.ndarray:
    """Open-loop controls of a batch of rollouts.

    Args:
        scenario: the task (kind, onset, duration, magnitude, body), time step and horizon.
        params: policy parameters, ``(n x dim)``, scenario units.
        physics: physics draw, ``(n x k)``; ``disturbance_scale`` scales the push force or platform travel.
        out: optional float64 array of at least ``(n x nstep x ncontrol)`` to fill (reused between
            sub-batches to save allocation); its first ``n`` rows are returned.

    Returns:
        ``(n x nstep x ncontrol)`` float64, ``ncontrol = nu + 6 nbody`` (see :data:`CONTROL_SPEC`):
        servo set-points (rad), platform target (m), applied body wrenches (N, N m).
    """
    base, lay = _load(scenario)
    params = np.atleast_2d(np.asarray(params, dtype=float))
    physics = np.atleast_2d(np.asarray(physics, dtype=float))
    n = params.shape[0]
    task = scenario.task
    nstep = task.nstep
    ncontrol = control_size(base)
    if out is None:
        out = np.empty((n, nstep, ncontrol))
    else:
        out = out[:n]
        if out.shape != (n, nstep, ncontrol):
            raise ValueError(f"out must hold ({n} x {nstep} x {ncontrol}), got {out.shape}")
    out.fill(0.0)
    t = np.arange(nstep) * task.timestep
    scale = physics[:, physics_column(scenario, "disturbance_scale")]

    # Set-points, with the reaction's offsets added over [onset + delay, onset + delay + duration).
    start = task.onset + _role_column(scenario, params, "reaction_delay")
    stop = start + _role_column(scenario, params, "reaction_duration")
    # Half a step of slack so a window edge that falls on a sample instant is not lost to rounding.
    eps = 0.5 * task.timestep
    window = (t[None, :] >= start[:, None] - eps) & (t[None, :] < stop[:, None] - eps)
    offsets = np.zeros((n, len(lay.servo_ids)))
    for j, c in joint_columns(scenario, "reaction_offset").items():
        offsets[:, j] = params[:, c]
    stand = setpoints(scenario, params)
    ctrl0 = _offset(base, CONTROL_SPEC, mujoco.mjtState.mjSTATE_CTRL)
    for j, a in enumerate(lay.servo_ids):
        column = out[:, :, ctrl0 + int(a)]
        column[:] = stand[:, j, None]
        if np.any(offsets[:, j]):
            column += window * offsets[:, j, None]

    if task.kind == "platform":
        travel = task.magnitude * scale
        profile = minimum_jerk(t, task.onset, task.duration)
        out[:, :, ctrl0 + lay.platform_drive_id] = travel[:, None] * profile[None, :]
    else:
        body = mujoco.mj_name2id(base, mujoco.mjtObj.mjOBJ_BODY, task.body)
        if body < 0:
            raise ValueError(f"scenario {scenario.name!r}: task.body {task.body!r} is not a model body")
        x0 = _offset(base, CONTROL_SPEC, mujoco.mjtState.mjSTATE_XFRC_APPLIED)
        push = (t >= task.onset - eps) & (t < task.onset + task.duration - eps)
        for axis, component in enumerate(task.direction):
            if component != 0.0:  # (an exact 1.0 along x leaves the force as the magnitude itself)
                force = task.magnitude * scale if component == 1.0 else task.magnitude * component * scale
                out[:, push, x0 + 6 * body + axis] = force[:, None]
    return out


def initial_state(scenario: Scenario, params: np.ndarray) -> np.ndarray:
    """Initial full-physics states, ``(n x nstate)`` (``mjSTATE_FULLPHYSICS``).

    Joints at their standing set-points, every velocity zero, the platform at rest at 0, each servo's
    lag state (activation) at its set-point so no servo starts with a step; a floating body turned so the
    first contact point's segment (a foot) has its reference orientation, then lifted or lowered so its
    lowest colliding point just touches the support surface (the bundled planar body: the foot flat, heel
    and toe spheres on the platform top).
    """
    base, lay = _load(scenario)
    stand = setpoints(scenario, params)
    n = stand.shape[0]
    data = mujoco.MjData(base)
    one = np.empty(mujoco.mj_stateSize(base, STATE_SPEC))
    q0 = _offset(base, STATE_SPEC, mujoco.mjtState.mjSTATE_QPOS)
    a0 = _offset(base, STATE_SPEC, mujoco.mjtState.mjSTATE_ACT)
    out = np.empty((n, one.size))
    for i in range(n):
        data.qpos[:] = base.qpos0
        data.qpos[lay.joint_qpos] = stand[i]
        if lay.free_qpos >= 0:
            _level(base, data, lay)
        elif lay.level_qpos >= 0:  # a planar body on a pitch hinge: turn it back by the feet's pitch
            mujoco.mj_kinematics(base, data)
            data.qpos[lay.level_qpos] -= lay.level_sign * _pitch_change(data, lay)
        if lay.height_qpos >= 0:
            mujoco.mj_kinematics(base, data)
            data.qpos[lay.height_qpos] += lay.support_z - lowest_point(base, data, lay.body_geoms)
        mujoco.mj_getState(base, data, one, STATE_SPEC)
        out[i] = one
    out[:, q0 + lay.joint_qpos] = stand
    driven = lay.servo_act >= 0
    out[:, a0 + lay.servo_act[driven]] = stand[:, driven]
    return out


def _pitch_change(data: mujoco.MjData, lay) -> float:
    """Pitch (about world y) of the foot now, relative to its reference orientation, rad."""
    rot = data.xmat[lay.foot_body].reshape(3, 3) @ lay.foot_xmat0.T
    return float(np.arctan2(rot[0, 2], rot[2, 2]))


def _level(model: mujoco.MjModel, data: mujoco.MjData, lay) -> None:
    """Turn the free-floating body (``data.qpos``, in place) so the foot has its reference orientation."""
    mujoco.mj_kinematics(model, data)
    turn = lay.foot_xmat0 @ data.xmat[lay.foot_body].reshape(3, 3).T  # world rotation taking the foot back
    q_turn = np.empty(4)
    mujoco.mju_mat2Quat(q_turn, turn.reshape(-1))
    quat = data.qpos[lay.free_qpos + 3:lay.free_qpos + 7].copy()
    out = np.empty(4)
    mujoco.mju_mulQuat(out, q_turn, quat)
    data.qpos[lay.free_qpos + 3:lay.free_qpos + 7] = out


def state_offsets(model: mujoco.MjModel) -> dict[str, int]:
    """Start of time, qpos, qvel and act inside a ``mjSTATE_FULLPHYSICS`` state vector."""
    return {
        "time": _offset(model, STATE_SPEC, mujoco.mjtState.mjSTATE_TIME),
        "qpos": _offset(model, STATE_SPEC, mujoco.mjtState.mjSTATE_QPOS),
        "qvel": _offset(model, STATE_SPEC, mujoco.mjtState.mjSTATE_QVEL),
        "act": _offset(model, STATE_SPEC, mujoco.mjtState.mjSTATE_ACT),
    }
