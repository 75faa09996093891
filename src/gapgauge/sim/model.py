"""MjModel per rollout from the MJCF, the policy parameters and a physics draw.

Gains and physics live in the model, so one :class:`mujoco.MjModel` per rollout carries everything
that differs between rollouts except the open-loop inputs (see :mod:`gapgauge.sim.controls`).

What a rollout's model gets (DEVELOPERS.md, "Policy parameters" and "Physics draw"):

- servo ``kp`` / ``kv`` per joint from the ``stiffness`` / ``damping`` parameters. MuJoCo's position
  actuator computes ``force = gainprm[0] * act + biasprm[1] * q + biasprm[2] * qdot``, so
  ``gainprm[0] = kp``, ``biasprm[1] = -kp``, ``biasprm[2] = -kv`` (MuJoCo XML reference, <position>);
- ``servo_strength`` scales kp, kv and the torque limits (``forcerange``);
- ``servo_lag`` (s) is the servo's first-order time constant, ``actuator_dynprm[:, 0]``;
- ``trunk_mass_scale`` scales the trunk's mass and inertia;
- ``friction`` is the sliding coefficient of every geom that can touch another. MuJoCo combines two
  geoms' coefficients by their maximum, so setting only the feet would leave the platform's 1.0 in charge;
- ``joint_damping`` (N m s/rad) is the passive damping of the ankle, knee and hip;
- the scenario's time step goes into ``opt.timestep``.

After a mass change the model's derived constants (``body_subtreemass``, which the subtree
centre-of-mass sensors divide by, and the inverse weights of the constraint solver) are recomputed with
``mj_setConst``.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass
from pathlib import Path

import mujoco
import numpy as np

from ..errors import ScenarioError
from ..scenario import Scenario, compile_model
from ..trajectory import JOINTS

#: servo actuator of each joint, in JOINTS order (names in models/planar_body.xml)
SERVOS: tuple[str, ...] = ("ankle_servo", "knee_servo", "hip_servo")
PLATFORM_DRIVE = "platform_drive"
TRUNK = "trunk"
ROOT_BODY = "foot"
ROOT_JOINTS: tuple[str, ...] = ("root_x", "root_z", "root_pitch")
PLATFORM_JOINT = "platform_x"
PLATFORM_GEOM = "platform_top"
FOOT_CONTACTS: tuple[str, ...] = ("heel", "toe")


@dataclass(frozen=True)
class ModelLayout:
    """Indices into a model built from the planar body MJCF, looked up once by name.

    Attributes:
        servo_ids: actuator id of the ankle, knee and hip servo, ``(3,)``.
        platform_drive_id: actuator id of the platform drive.
        joint_qpos: qpos address of ankle, knee and hip, ``(3,)``.
        joint_dof: dof address of ankle, knee and hip, ``(3,)``.
        root_qpos: qpos address of root_x, root_z, root_pitch, ``(3,)``.
        platform_qpos: qpos address of the platform slide.
        trunk_id: body id of the trunk.
        contact_geoms: ids of every geom that can collide, ``(ngeom_contact,)``.
        sensor: sensor name -> (address, dimension) in ``sensordata``.
        servo_act: activation index of each servo (``actuator_actadr``), ``(3,)``.
        base_forcerange: torque limits of the three servos in the MJCF, ``(3 x 2)`` N m.
        root_z0: root_z (m) that puts the heel and toe spheres exactly on the platform top.
        support_z: height of the platform top, m (the reference for ``com_z``).
    """

    servo_ids: np.ndarray
    platform_drive_id: int
    joint_qpos: np.ndarray
    joint_dof: np.ndarray
    root_qpos: np.ndarray
    platform_qpos: int
    trunk_id: int
    contact_geoms: np.ndarray
    sensor: dict[str, tuple[int, int]]
    servo_act: np.ndarray
    base_forcerange: np.ndarray
    root_z0: float
    support_z: float


# Layouts by compiled model: the compiled model itself is cached by scenario.compile_model (per path and
# modification time), so a recompiled file gets a new model object and a fresh layout.
_LAYOUTS: dict[int, tuple[mujoco.MjModel, ModelLayout]] = {}


def _load(path: Path, scenario_path: Path | None = None) -> tuple[mujoco.MjModel, ModelLayout]:
    model = compile_model(path, scenario_path)
    hit = _LAYOUTS.get(id(model))
    if hit is not None and hit[0] is model:
        return model, hit[1]
    try:
        layout = _layout(model)
    except ValueError as exc:  # the model compiles but lacks what the simulator drives (no ankle_servo...)
        raise ScenarioError(
            f"{scenario_path or path}: key 'model': MuJoCo cannot use {Path(path).resolve()} ({exc}); "
            "fix the MJCF file or name the bundled models/planar_body.xml"
        ) from None
    _LAYOUTS[id(model)] = (model, layout)
    return model, layout


def base_model(scenario: Scenario) -> mujoco.MjModel:
    """The compiled MJCF of ``scenario`` (cached per model path and modification time).

    The returned model is shared: copy it (``copy.copy``) before changing any field.
    """
    return _load(scenario.model_path, scenario.path)[0]


def model_layout(scenario: Scenario) -> ModelLayout:
    """Name lookups of the scenario's model (see :class:`ModelLayout`), cached with the model."""
    return _load(scenario.model_path, scenario.path)[1]


def _layout(model: mujoco.MjModel) -> ModelLayout:
    def ident(kind: mujoco.mjtObj, name: str) -> int:
        i = mujoco.mj_name2id(model, kind, name)
        if i < 0:
            raise ValueError(f"model has no {kind.name[5:].lower()} named {name!r}; gapgauge.sim needs it")
        return i

    act = mujoco.mjtObj.mjOBJ_ACTUATOR
    jnt = mujoco.mjtObj.mjOBJ_JOINT
    servo_ids = np.array([ident(act, n) for n in SERVOS])
    joint_ids = np.array([ident(jnt, n) for n in JOINTS])
    root_ids = np.array([ident(jnt, n) for n in ROOT_JOINTS])
    contact = np.flatnonzero((model.geom_contype != 0) | (model.geom_conaffinity != 0))
    sensor = {
        model.sensor(i).name: (int(model.sensor_adr[i]), int(model.sensor_dim[i]))
        for i in range(model.nsensor)
    }

    # Heel and toe are spheres under a flat foot: put their lowest points on the platform top.
    data = mujoco.MjData(model)
    mujoco.mj_kinematics(model, data)
    platform = ident(mujoco.mjtObj.mjOBJ_GEOM, PLATFORM_GEOM)
    support_z = float(data.geom_xpos[platform, 2] + model.geom_size[platform, 2])
    lowest = min(
        float(data.geom_xpos[g, 2] - model.geom_size[g, 0])
        for g in (ident(mujoco.mjtObj.mjOBJ_GEOM, n) for n in FOOT_CONTACTS)
    )
    root_z_qpos = int(model.jnt_qposadr[root_ids[1]])
    root_z0 = float(model.qpos0[root_z_qpos] + support_z - lowest)
    return ModelLayout(
        servo_ids=servo_ids,
        platform_drive_id=ident(act, PLATFORM_DRIVE),
        joint_qpos=model.jnt_qposadr[joint_ids].copy(),
        joint_dof=model.jnt_dofadr[joint_ids].copy(),
        root_qpos=model.jnt_qposadr[root_ids].copy(),
        platform_qpos=int(model.jnt_qposadr[ident(jnt, PLATFORM_JOINT)]),
        trunk_id=ident(mujoco.mjtObj.mjOBJ_BODY, TRUNK),
        contact_geoms=contact,
        sensor=sensor,
        servo_act=model.actuator_actadr[servo_ids].copy(),
        base_forcerange=model.actuator_forcerange[servo_ids].copy(),
        root_z0=root_z0,
        support_z=support_z,
    )


def joint_columns(scenario: Scenario, role: str) -> dict[int, int]:
    """Parameter column of ``role`` for each joint index (0 ankle, 1 knee, 2 hip) that has one."""
    return {JOINTS.index(p.joint): c for c, p in enumerate(scenario.parameters) if p.role == role}


def physics_column(scenario: Scenario, name: str) -> int:
    """Column of the physics quantity ``name`` in a physics draw ``(n x k)`` (scenario order)."""
    return [r.name for r in scenario.physics].index(name)


def build_models(
    scenario: Scenario,
    params: np.ndarray,
    physics: np.ndarray,
    *,
    out: list[mujoco.MjModel] | None = None,
) -> list[mujoco.MjModel]:
    """One MjModel per rollout, with its gains and physics set.

    Args:
        scenario: the scenario (model path, parameter roles, physics names, time step).
        params: policy parameters, ``(n x dim)``, scenario units, scenario column order.
        physics: physics draw, ``(n x k)``, scenario ``[physics]`` order.
        out: models from an earlier call on the same scenario to overwrite instead of copying
            (every field set here is rewritten from the base model, so reuse gives the same models
            as fresh copies; a copy costs about 0.3 ms, a rewrite a few microseconds).

    Returns:
        ``n`` models (``out[:n]`` reused first, then new copies of the base model).
    """
    base, lay = _load(scenario.model_path, scenario.path)
    params = np.atleast_2d(np.asarray(params, dtype=float))
    physics = np.atleast_2d(np.asarray(physics, dtype=float))
    n = params.shape[0]
    if params.shape != (n, scenario.dim):
        raise ValueError(f"params must be (n x {scenario.dim}), got {params.shape}")
    if physics.shape != (n, len(scenario.physics)):
        raise ValueError(f"physics must be (n x {len(scenario.physics)}), got {physics.shape}")

    servo = lay.servo_ids
    base_kp = base.actuator_gainprm[servo, 0]
    base_kv = -base.actuator_biasprm[servo, 2]
    kp = np.tile(base_kp, (n, 1))
    kv = np.tile(base_kv, (n, 1))
    for j, c in joint_columns(scenario, "stiffness").items():
        kp[:, j] = params[:, c]
    for j, c in joint_columns(scenario, "damping").items():
        kv[:, j] = params[:, c]
    strength = physics[:, physics_column(scenario, "servo_strength")]
    kp *= strength[:, None]
    kv *= strength[:, None]
    forcerange = lay.base_forcerange[None, :, :] * strength[:, None, None]
    lag = physics[:, physics_column(scenario, "servo_lag")]
    mass_scale = physics[:, physics_column(scenario, "trunk_mass_scale")]
    friction = physics[:, physics_column(scenario, "friction")]
    damping = physics[:, physics_column(scenario, "joint_damping")]
    trunk_mass = base.body_mass[lay.trunk_id]
    trunk_inertia = base.body_inertia[lay.trunk_id]

    models = list(out[:n]) if out is not None else []
    scratch = mujoco.MjData(base)
    for i in range(n):
        if i < len(models):
            m = models[i]
        else:
            m = copy.copy(base)
            models.append(m)
        m.opt.timestep = scenario.task.timestep
        m.actuator_gainprm[servo, 0] = kp[i]
        m.actuator_biasprm[servo, 1] = -kp[i]
        m.actuator_biasprm[servo, 2] = -kv[i]
        m.actuator_forcerange[servo] = forcerange[i]
        m.actuator_dynprm[servo, 0] = lag[i]
        m.body_mass[lay.trunk_id] = trunk_mass * mass_scale[i]
        m.body_inertia[lay.trunk_id] = trunk_inertia * mass_scale[i]
        m.geom_friction[lay.contact_geoms, 0] = friction[i]
        m.dof_damping[lay.joint_dof] = damping[i]
        mujoco.mj_setConst(m, scratch)
    return models
