"""Where each trajectory channel's raw values come from in ``sensordata``, adding the sensors a model lacks.

A channel is read from MuJoCo sensors (``mujoco.rollout`` records ``sensordata`` at every step):
``jointpos`` / ``jointvel`` of each actuated joint and ``actuatorfrc`` of its actuator; a ``touch`` and a
``framepos`` sensor on every contact point's site (a geom named as a point gets a site just around it);
``subtreecom`` / ``subtreelinvel`` of the whole-body root; the trunk pitch from the hinge angles along a
planar chain (exact: they add up) or, on a 3-D model, from the trunk's ``framequat``; ``touch`` sensors
over the fall-contact segments; ``jointpos`` of the platform slide.

The model's own sensors are used where they fit (same kind, same object, no cutoff or delay); missing ones
are added with ``mujoco.MjSpec``, named ``gapgauge/...``. Sensors and sites do not change the dynamics.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import mujoco
import numpy as np

from ..errors import ScenarioError
from .types import BodyMap

OBJ = mujoco.mjtObj
SENS = mujoco.mjtSensor
#: m added around a geom named as a contact point, so the contact point (on its surface) lies inside the site
POINT_MARGIN = 0.005
#: m added around a segment named as a fall contact
SEGMENT_MARGIN = 0.02
GEOM = mujoco.mjtGeom
_SITE_TYPES = tuple(int(t) for t in (GEOM.mjGEOM_SPHERE, GEOM.mjGEOM_CAPSULE, GEOM.mjGEOM_ELLIPSOID,
                                     GEOM.mjGEOM_CYLINDER, GEOM.mjGEOM_BOX))
#: m added to each size component of a site around a geom, per geom type (others: all three)
_GROW = {int(GEOM.mjGEOM_SPHERE): (1.0, 0.0, 0.0), int(GEOM.mjGEOM_CAPSULE): (1.0, 0.0, 0.0),
         int(GEOM.mjGEOM_CYLINDER): (1.0, 1.0, 0.0)}


@dataclass(frozen=True)
class SensorPlan:
    """Addresses into ``sensordata`` (each a sensor's first component).

    Attributes:
        joint_pos, joint_vel, joint_torque: per actuated joint, in map order.
        contacts: per contact group, per point: ``(touch address, framepos address)``.
        com_pos, com_vel: ``subtreecom`` and ``subtreelinvel`` of ``com_body`` (3 components each).
        pitch_chain: ``(jointpos address, sign)`` of each hinge from the world to the trunk, root first
            (planar models); empty when ``trunk_quat`` is used.
        pitch_offset: rad added to the chain sum (the trunk's pitch at zero hinge angles).
        trunk_quat: ``framequat`` address of the trunk body (4 components), -1 with a chain.
        fall_touch: touch sensors whose sum is ``body_contact``.
        platform_pos: ``jointpos`` of the platform slide, -1 without a platform.
        support_z: height of the support surface's top, m, at the model's reference pose.
    """

    joint_pos: tuple[int, ...]
    joint_vel: tuple[int, ...]
    joint_torque: tuple[int, ...]
    contacts: tuple[tuple[tuple[int, int], ...], ...]
    com_pos: int
    com_vel: int
    pitch_chain: tuple[tuple[int, float], ...]
    pitch_offset: float
    trunk_quat: int
    fall_touch: tuple[int, ...]
    platform_pos: int
    support_z: float


@dataclass
class _Plan:
    """Sensors wanted: ``(type, objtype, object name)`` -> a base-model sensor id, or a new name."""

    base: mujoco.MjModel
    sites: list[tuple[str, str, int, float]] = field(default_factory=list)  # (name, body, geom id, margin)
    added: list[tuple[str, int, int, str]] = field(default_factory=list)  # (name, type, objtype, objname)
    slots: dict[tuple[int, int, str], str | int] = field(default_factory=dict)

    def sensor(self, stype: SENS, objtype: OBJ, name: str) -> tuple[int, int, str]:
        key = (int(stype), int(objtype), name)
        if key in self.slots:
            return key
        m = self.base
        oid = mujoco.mj_name2id(m, objtype, name) if name else -1
        for s in range(m.nsensor):
            if (m.sensor_type[s] == stype and m.sensor_objtype[s] == objtype and m.sensor_objid[s] == oid and oid >= 0
                    and m.sensor_reftype[s] == 0 and m.sensor_cutoff[s] == 0 and m.sensor_delay[s] == 0):
                self.slots[key] = s
                return key
        new = f"gapgauge/{stype.name[7:].lower()}/{name}"
        self.added.append((new, int(stype), int(objtype), name))
        self.slots[key] = new
        return key

    def site_for_geom(self, geom: int, margin: float, scenario_path: Path, key: str) -> str:
        m = self.base
        body = mujoco.mj_id2name(m, OBJ.mjOBJ_BODY, int(m.geom_bodyid[geom]))
        gname = mujoco.mj_id2name(m, OBJ.mjOBJ_GEOM, geom) or f"geom{geom}"
        if not body:
            raise ScenarioError(f"{scenario_path}: key '{key}': geom {gname!r} is on an unnamed body; "
                                "name the body in the MJCF, or name a site instead")
        name = f"gapgauge/site/{gname}"
        if all(s[0] != name for s in self.sites):
            self.sites.append((name, body, geom, margin))
        return name


def _site_of(m: mujoco.MjModel, plan: _Plan, name: str, margin: float, path: Path, key: str) -> tuple[str, str]:
    """``(site name, touch sensor slot name)`` for a point named as a site, a touch sensor or a geom."""
    if mujoco.mj_name2id(m, OBJ.mjOBJ_SITE, name) >= 0:
        return name, name
    sid = mujoco.mj_name2id(m, OBJ.mjOBJ_SENSOR, name)
    if sid >= 0:
        site = mujoco.mj_id2name(m, OBJ.mjOBJ_SITE, int(m.sensor_objid[sid]))
        if not site:
            raise ScenarioError(f"{path}: key '{key}': touch sensor {name!r} is on an unnamed site; name the site")
        return site, site
    geom = mujoco.mj_name2id(m, OBJ.mjOBJ_GEOM, name)
    site = plan.site_for_geom(geom, margin, path, key)
    return site, site


def _chain(m: mujoco.MjModel, trunk: int) -> tuple[list[tuple[str, float]], float] | None:
    """Hinges from the world to ``trunk`` with the sign of their world y axis, and the pitch at zero hinge
    angles; None when the path holds a joint that is neither a y hinge nor a slide (then: framequat)."""
    data = mujoco.MjData(m)
    data.qpos[:] = m.qpos0
    mujoco.mj_kinematics(m, data)
    path = []
    b = trunk
    while b > 0:
        path.append(b)
        b = int(m.body_parentid[b])
    hinges: list[tuple[str, float]] = []
    zero = 0.0
    for body in reversed(path):
        for j in range(int(m.body_jntadr[body]), int(m.body_jntadr[body]) + int(m.body_jntnum[body])):
            kind, axis = m.jnt_type[j], data.xaxis[j]
            if kind == mujoco.mjtJoint.mjJNT_SLIDE:
                continue
            if kind != mujoco.mjtJoint.mjJNT_HINGE or abs(abs(axis[1]) - 1.0) > 1e-9:
                return None
            name = mujoco.mj_id2name(m, OBJ.mjOBJ_JOINT, j)
            if not name:
                return None
            sign = 1.0 if axis[1] > 0 else -1.0
            hinges.append((name, sign))
            zero += sign * float(m.qpos0[m.jnt_qposadr[j]])
    rot = data.xmat[trunk].reshape(3, 3)
    return hinges, float(np.arctan2(rot[0, 2], rot[2, 2])) - zero


def _support_z(m: mujoco.MjModel, geom: int) -> float:
    data = mujoco.MjData(m)
    mujoco.mj_kinematics(m, data)
    top = float(data.geom_xpos[geom, 2])
    return top + float(m.geom_size[geom, 2]) if int(m.geom_type[geom]) == int(GEOM.mjGEOM_BOX) else top


def plan_sensors(base: mujoco.MjModel, model_path: Path, body: BodyMap, lateral: bool,
                 scenario_path: Path) -> tuple[SensorPlan, mujoco.MjModel, tuple[str, ...]]:
    """The sensor plan of ``body`` on ``base``, and the model to simulate (``base`` itself when it already
    has every sensor needed, else recompiled from ``model_path`` with the missing ones)."""
    plan = _Plan(base)
    joints = [(plan.sensor(SENS.mjSENS_JOINTPOS, OBJ.mjOBJ_JOINT, j.joint),
               plan.sensor(SENS.mjSENS_JOINTVEL, OBJ.mjOBJ_JOINT, j.joint),
               plan.sensor(SENS.mjSENS_ACTUATORFRC, OBJ.mjOBJ_ACTUATOR, j.actuator)) for j in body.joints]
    contacts = []
    for c in body.contacts:
        points = []
        for p in c.points:
            site, _ = _site_of(base, plan, p, POINT_MARGIN, scenario_path, f"model.channels.contacts.{c.name}")
            points.append((plan.sensor(SENS.mjSENS_TOUCH, OBJ.mjOBJ_SITE, site),
                           plan.sensor(SENS.mjSENS_FRAMEPOS, OBJ.mjOBJ_SITE, site)))
        contacts.append(points)
    com = (plan.sensor(SENS.mjSENS_SUBTREECOM, OBJ.mjOBJ_BODY, body.com_body),
           plan.sensor(SENS.mjSENS_SUBTREELINVEL, OBJ.mjOBJ_BODY, body.com_body))
    trunk = mujoco.mj_name2id(base, OBJ.mjOBJ_BODY, body.trunk)
    chain = None if lateral else _chain(base, trunk)
    pitch = [] if chain is None else [(plan.sensor(SENS.mjSENS_JOINTPOS, OBJ.mjOBJ_JOINT, n), s) for n, s in chain[0]]
    quat = plan.sensor(SENS.mjSENS_FRAMEQUAT, OBJ.mjOBJ_XBODY, body.trunk) if chain is None else None
    fall = []
    for name in body.fall_contacts:
        bid = mujoco.mj_name2id(base, OBJ.mjOBJ_BODY, name)
        if (mujoco.mj_name2id(base, OBJ.mjOBJ_SITE, name) < 0 and mujoco.mj_name2id(base, OBJ.mjOBJ_SENSOR, name) < 0
                and mujoco.mj_name2id(base, OBJ.mjOBJ_GEOM, name) < 0 and bid >= 0):
            geoms = [g for g in range(base.ngeom) if base.geom_bodyid[g] == bid
                     and (base.geom_contype[g] or base.geom_conaffinity[g])]
            key = "model.channels.fall_contacts"
            sites = [plan.site_for_geom(g, SEGMENT_MARGIN, scenario_path, key) for g in geoms]
        else:
            sites = [_site_of(base, plan, name, SEGMENT_MARGIN, scenario_path, "model.channels.fall_contacts")[0]]
        fall += [plan.sensor(SENS.mjSENS_TOUCH, OBJ.mjOBJ_SITE, s) for s in sites]
    platform = None
    if body.platform:
        bid = mujoco.mj_name2id(base, OBJ.mjOBJ_BODY, body.platform)
        slide = next(j for j in range(base.njnt) if base.jnt_bodyid[j] == bid
                     and base.jnt_type[j] == mujoco.mjtJoint.mjJNT_SLIDE)
        platform = plan.sensor(SENS.mjSENS_JOINTPOS, OBJ.mjOBJ_JOINT, mujoco.mj_id2name(base, OBJ.mjOBJ_JOINT, slide))

    model = base if not (plan.added or plan.sites) else _augment(base, model_path, plan, scenario_path)

    def adr(slot: tuple[int, int, str]) -> int:
        found = plan.slots[slot]
        sid = found if isinstance(found, int) else mujoco.mj_name2id(model, OBJ.mjOBJ_SENSOR, found)
        return int(model.sensor_adr[sid])

    support = mujoco.mj_name2id(model, OBJ.mjOBJ_GEOM, body.support)
    out = SensorPlan(
        joint_pos=tuple(adr(j[0]) for j in joints), joint_vel=tuple(adr(j[1]) for j in joints),
        joint_torque=tuple(adr(j[2]) for j in joints),
        contacts=tuple(tuple((adr(t), adr(p)) for t, p in points) for points in contacts),
        com_pos=adr(com[0]), com_vel=adr(com[1]),
        pitch_chain=tuple((adr(slot), sign) for slot, sign in pitch),
        pitch_offset=0.0 if chain is None else chain[1], trunk_quat=-1 if quat is None else adr(quat),
        fall_touch=tuple(adr(s) for s in fall), platform_pos=-1 if platform is None else adr(platform),
        support_z=_support_z(model, support),
    )
    return out, model, tuple(s[0] for s in plan.sites) + tuple(a[0] for a in plan.added)


def _augment(base: mujoco.MjModel, model_path: Path, plan: _Plan, scenario_path: Path) -> mujoco.MjModel:
    """Recompile ``model_path`` with the sites and sensors of ``plan`` added; check nothing else moved."""
    spec = mujoco.MjSpec.from_file(str(model_path))
    for name, body, geom, margin in plan.sites:
        site = spec.body(body).add_site()
        site.name = name
        gtype = int(base.geom_type[geom])
        size = base.geom_size[geom].copy()
        if gtype in _SITE_TYPES:
            site.type = mujoco.mjtGeom(gtype)
            site.size = size + margin * np.array(_GROW.get(gtype, (1.0, 1.0, 1.0)))
        else:  # planes, meshes, height fields: a sphere over the geom's bounding radius
            site.type = mujoco.mjtGeom.mjGEOM_SPHERE
            site.size = [float(base.geom_rbound[geom]) + margin, 0.0, 0.0]
        site.pos = base.geom_pos[geom].copy()
        site.quat = base.geom_quat[geom].copy()
    for name, stype, objtype, objname in plan.added:
        sensor = spec.add_sensor()
        sensor.name = name
        sensor.type = mujoco.mjtSensor(stype)
        sensor.objtype = mujoco.mjtObj(objtype)
        sensor.objname = objname
    try:
        model = spec.compile()
    except ValueError as exc:
        text = " ".join(str(exc).split())
        raise ScenarioError(f"{scenario_path}: key 'model': MuJoCo cannot add the sensors gapgauge reads to "
                            f"{model_path} ({text}); name sites or sensors of the model in [model.channels]") from None
    same = (model.nq, model.nv, model.nu, model.nbody, model.ngeom) == (base.nq, base.nv, base.nu, base.nbody,
                                                                       base.ngeom)
    if not same or not np.array_equal(model.body_mass, base.body_mass):
        raise ScenarioError(f"{scenario_path}: key 'model': recompiling {model_path} with sensors changed the "
                            "model itself; name sites or sensors of the model in [model.channels]")
    return model
