"""MjModel per rollout from the MJCF, the policy parameters and a physics draw.

Gains and physics live in the model, so one :class:`mujoco.MjModel` per rollout carries everything
that differs between rollouts except the open-loop inputs (see :mod:`gapgauge.sim.controls`).

The model is the scenario's compiled MJCF (:func:`gapgauge.scenario.model_info.compiled`: checked against
its ``[model.channels]`` map, with any sensor the channels need added). What a rollout's model gets
(DEVELOPERS.md, "Policy parameters" and "Physics draw"):

- servo ``kp`` / ``kv`` of each actuated joint from the ``stiffness`` / ``damping`` parameters tied to it
  by name (joints without one keep the MJCF's gains). MuJoCo's position actuator computes
  ``force = gainprm[0] * act + biasprm[1] * q + biasprm[2] * qdot``, so ``gainprm[0] = kp``,
  ``biasprm[1] = -kp``, ``biasprm[2] = -kv`` (MuJoCo XML reference, <position>);
- ``servo_strength`` scales kp, kv and the torque limits (``forcerange``) of those servos;
- ``servo_lag`` (s) is the servos' first-order time constant, ``actuator_dynprm[:, 0]``;
- ``trunk_mass_scale`` scales the trunk's mass and inertia;
- ``friction`` is the sliding coefficient of every geom that can touch another. MuJoCo combines two
  geoms' coefficients by their maximum, so setting only the feet would leave the floor's in charge;
- ``joint_damping`` (N m s/rad) is the passive damping of the actuated joints;
- the scenario's time step goes into ``opt.timestep``.

After a mass change the model's derived constants (``body_subtreemass``, which the subtree
centre-of-mass sensors divide by, and the inverse weights of the constraint solver) are recomputed with
``mj_setConst``.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass

import mujoco
import numpy as np

from ..scenario import Scenario
from ..scenario.model_info import compiled
from ..scenario.sensors import SensorPlan

OBJ = mujoco.mjtObj


@dataclass(frozen=True)
class ModelLayout:
    """Indices into the scenario's compiled model, looked up once by name.

    Attributes:
        joint_names: trade names of the actuated joints (channel names), ``(njoint,)``.
        contact_groups: names of the contact groups (channel names), map order.
        servo_ids: actuator id of each actuated joint's servo, ``(njoint,)``.
        platform_drive_id: actuator id of the platform drive (-1 without a platform).
        joint_qpos, joint_dof: qpos and dof address of each actuated joint, ``(njoint,)``.
        joint_qpos0: reference angle of each actuated joint (its set-point when no parameter sets one), rad.
        platform_qpos: qpos address of the platform slide (-1 without).
        trunk_id: body id of the trunk.
        contact_geoms: ids of every geom that can collide, ``(ngeom_contact,)``.
        body_geoms: colliding geoms of the body (``com_body``'s subtree): the lowest touches the support.
        height_qpos: qpos address of the body's vertical coordinate (a z slide, or a free joint's z); -1 fixed.
        free_qpos: qpos address of the body's free joint (-1 without): its orientation levels the feet.
        level_qpos, level_sign: qpos address and world-axis sign of the body's own pitch hinge (a planar
            body whose feet hang below a floating trunk; -1 without, or when the feet are the root).
        foot_body: body of the first contact point (levelled to its reference orientation).
        foot_xmat0: that body's orientation at the reference pose, ``(3 x 3)``.
        sensor: sensor name -> (address, dimension) in ``sensordata``.
        plan: where each channel's raw values are (:class:`~gapgauge.scenario.sensors.SensorPlan`).
        servo_act: activation index of each servo (``actuator_actadr``, -1 for none), ``(njoint,)``.
        base_forcerange: torque limits of the servos in the MJCF, ``(njoint x 2)`` N m.
        root_z0: height coordinate that puts the body's lowest colliding point on the support, reference pose.
        support_z: height of the support surface, m (the reference for ``com_z``).
        lateral: True for a 3-D model.
    """

    joint_names: tuple[str, ...]
    contact_groups: tuple[str, ...]
    servo_ids: np.ndarray
    platform_drive_id: int
    joint_qpos: np.ndarray
    joint_dof: np.ndarray
    joint_qpos0: np.ndarray
    platform_qpos: int
    trunk_id: int
    contact_geoms: np.ndarray
    body_geoms: np.ndarray
    height_qpos: int
    free_qpos: int
    level_qpos: int
    level_sign: float
    foot_body: int
    foot_xmat0: np.ndarray
    sensor: dict[str, tuple[int, int]]
    plan: SensorPlan
    servo_act: np.ndarray
    base_forcerange: np.ndarray
    root_z0: float
    support_z: float
    lateral: bool


# Layouts by compiled model: the compiled model is cached by scenario.model_info (per files and map), so a
# recompiled file gets a new model object and a fresh layout.
_LAYOUTS: dict[int, tuple[mujoco.MjModel, ModelLayout]] = {}


def _load(scenario: Scenario) -> tuple[mujoco.MjModel, ModelLayout]:
    body = compiled(scenario)
    model = body.model
    hit = _LAYOUTS.get(id(model))
    if hit is not None and hit[0] is model:
        return model, hit[1]
    layout = _layout(model, body)
    _LAYOUTS[id(model)] = (model, layout)
    return model, layout


def base_model(scenario: Scenario) -> mujoco.MjModel:
    """The compiled MJCF of ``scenario`` (with any sensors gapgauge added), shared: copy it
    (``copy.copy``) before changing any field."""
    return _load(scenario)[0]


def model_layout(scenario: Scenario) -> ModelLayout:
    """Name lookups of the scenario's model (see :class:`ModelLayout`), cached with the model."""
    return _load(scenario)[1]


def lowest_point(model: mujoco.MjModel, data: mujoco.MjData, geoms: np.ndarray) -> float:
    """Lowest height (m) of the geoms ``geoms`` at the pose in ``data`` (after ``mj_kinematics``): exact for
    spheres, capsules, cylinders, ellipsoids and boxes; the bounding sphere for other shapes."""
    g = mujoco.mjtGeom
    low = np.inf
    for i in geoms:
        z = float(data.geom_xpos[i, 2])
        rot = data.geom_xmat[i].reshape(3, 3)
        size = model.geom_size[i]
        kind = int(model.geom_type[i])
        if kind == int(g.mjGEOM_SPHERE):
            z -= size[0]
        elif kind == int(g.mjGEOM_CAPSULE):
            z -= abs(rot[2, 2]) * size[1] + size[0]
        elif kind == int(g.mjGEOM_CYLINDER):
            z -= abs(rot[2, 2]) * size[1] + size[0] * np.sqrt(max(0.0, 1.0 - rot[2, 2] ** 2))
        elif kind == int(g.mjGEOM_BOX):
            z -= float(np.abs(rot[2]) @ size)
        elif kind == int(g.mjGEOM_ELLIPSOID):
            z -= float(np.sqrt(np.sum((rot[2] * size) ** 2)))
        else:
            z -= float(model.geom_rbound[i])
        low = min(low, z)
    return low


def _layout(model: mujoco.MjModel, body) -> ModelLayout:
    bmap = body.body

    def ident(kind: OBJ, name: str) -> int:
        return mujoco.mj_name2id(model, kind, name)

    servo_ids = np.array([ident(OBJ.mjOBJ_ACTUATOR, j.actuator) for j in bmap.joints])
    joint_ids = np.array([ident(OBJ.mjOBJ_JOINT, j.joint) for j in bmap.joints])
    contact = np.flatnonzero((model.geom_contype != 0) | (model.geom_conaffinity != 0))
    root = ident(OBJ.mjOBJ_BODY, bmap.com_body)
    in_body = np.array([_descends(model, int(model.geom_bodyid[gid]), root) for gid in contact], dtype=bool)
    sensor = {model.sensor(i).name: (int(model.sensor_adr[i]), int(model.sensor_dim[i])) for i in range(model.nsensor)}

    height, free, level, sign = -1, -1, -1, 1.0
    data = mujoco.MjData(model)
    mujoco.mj_kinematics(model, data)
    for j in range(int(model.body_jntadr[root]), int(model.body_jntadr[root]) + int(model.body_jntnum[root])):
        kind = int(model.jnt_type[j])
        if kind == int(mujoco.mjtJoint.mjJNT_FREE):
            free = height = int(model.jnt_qposadr[j])
            height += 2
        elif kind == int(mujoco.mjtJoint.mjJNT_SLIDE) and abs(abs(data.xaxis[j, 2]) - 1.0) < 1e-9 and height < 0:
            height = int(model.jnt_qposadr[j])
        elif kind == int(mujoco.mjtJoint.mjJNT_HINGE) and abs(abs(data.xaxis[j, 1]) - 1.0) < 1e-9 and level < 0:
            level, sign = int(model.jnt_qposadr[j]), float(np.sign(data.xaxis[j, 1]))
    platform_drive, platform_qpos = -1, -1
    if bmap.platform:
        pid = ident(OBJ.mjOBJ_BODY, bmap.platform)
        slide = next(j for j in range(model.njnt) if model.jnt_bodyid[j] == pid
                     and int(model.jnt_type[j]) == int(mujoco.mjtJoint.mjJNT_SLIDE))
        platform_qpos = int(model.jnt_qposadr[slide])
        joint_trn = int(mujoco.mjtTrn.mjTRN_JOINT)
        platform_drive = next(a for a in range(model.nu) if int(model.actuator_trntype[a]) == joint_trn
                              and model.actuator_trnid[a, 0] == slide)
    point = bmap.contacts[0].points[0]
    foot = _point_body(model, point)
    if foot == root or free >= 0:
        level = -1  # the feet are the root (nothing to level), or the free joint levels them
    support_z = body.sensors.support_z
    root_z0 = 0.0
    if height >= 0:
        root_z0 = float(model.qpos0[height] + support_z - lowest_point(model, data, contact[in_body]))
    return ModelLayout(
        joint_names=bmap.joint_names,
        contact_groups=tuple(c.name for c in bmap.contacts),
        servo_ids=servo_ids,
        platform_drive_id=int(platform_drive),
        joint_qpos=model.jnt_qposadr[joint_ids].copy(),
        joint_dof=model.jnt_dofadr[joint_ids].copy(),
        joint_qpos0=model.qpos0[model.jnt_qposadr[joint_ids]].copy(),
        platform_qpos=platform_qpos,
        trunk_id=ident(OBJ.mjOBJ_BODY, bmap.trunk),
        contact_geoms=contact,
        body_geoms=contact[in_body],
        height_qpos=height,
        free_qpos=free,
        level_qpos=level,
        level_sign=sign,
        foot_body=foot,
        foot_xmat0=data.xmat[foot].reshape(3, 3).copy(),
        sensor=sensor,
        plan=body.sensors,
        servo_act=model.actuator_actadr[servo_ids].copy(),
        base_forcerange=model.actuator_forcerange[servo_ids].copy(),
        root_z0=root_z0,
        support_z=support_z,
        lateral=body.lateral,
    )


def _descends(model: mujoco.MjModel, body: int, root: int) -> bool:
    while body > 0:
        if body == root:
            return True
        body = int(model.body_parentid[body])
    return False


def _point_body(model: mujoco.MjModel, name: str) -> int:
    """Body carrying the contact point ``name`` (a site, geom or touch sensor)."""
    sid = mujoco.mj_name2id(model, OBJ.mjOBJ_SITE, name)
    if sid >= 0:
        return int(model.site_bodyid[sid])
    sensor = mujoco.mj_name2id(model, OBJ.mjOBJ_SENSOR, name)
    if sensor >= 0:
        return int(model.site_bodyid[model.sensor_objid[sensor]])
    return int(model.geom_bodyid[mujoco.mj_name2id(model, OBJ.mjOBJ_GEOM, name)])


def joint_columns(scenario: Scenario, role: str) -> dict[int, int]:
    """Parameter column of ``role`` for each actuated joint index (map order) that has one."""
    index = {name: i for i, name in enumerate(scenario.joint_names)}
    return {index[j]: c for c, p in enumerate(scenario.parameters) if p.role == role for j in p.joints}


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
        scenario: the scenario (model, parameter roles, physics names, time step).
        params: policy parameters, ``(n x dim)``, scenario units, scenario column order.
        physics: physics draw, ``(n x k)``, scenario ``[physics]`` order.
        out: models from an earlier call on the same scenario to overwrite instead of copying
            (every field set here is rewritten from the base model, so reuse gives the same models
            as fresh copies; a copy costs about 0.3 ms, a rewrite a few microseconds).

    Returns:
        ``n`` models (``out[:n]`` reused first, then new copies of the base model).
    """
    base, lay = _load(scenario)
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
