"""Facts about a scenario's model as MuJoCo compiles it (not as its XML reads), and the check that every
name of the ``[model.channels]`` map exists there.

The MJCF text is not the model: ``<compiler angle="degree">`` (MuJoCo's default for MJCF) turns a
hinge's ``range`` from degrees into radians, ``limited`` / ``autolimits`` decide whether a range
applies at all, and ``<default>`` classes and includes supply attributes the joint element never
names. Reading the compiled model gets all of these right.

:func:`compile_body` compiles the model once per (files, map), checks it (every named joint, actuator,
body, site, geom and sensor exists and is of a usable kind; gravity points down; masses and joint ranges
are sane) and works out where each channel's raw values are in ``sensordata``. A sensor the channels
need that the model lacks (a joint's ``jointpos``, a contact point's ``touch``...) is added with
``mujoco.MjSpec``, which leaves the dynamics as they were; a model that has them all is used as MuJoCo
compiled it.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, replace
from pathlib import Path

import mujoco
import numpy as np

from ..errors import ScenarioError
from .model_files import files_stamp, model_files
from .sensors import SensorPlan, plan_sensors
from .types import BodyMap, JointMap

OBJ = mujoco.mjtObj
#: a hinge whose compiled range spans more than this (rad) was almost surely written in degrees under
#: ``<compiler angle="radian">``
MAX_HINGE_SPAN = 2 * np.pi + 1e-9


@dataclass(frozen=True)
class CompiledBody:
    """A scenario's compiled model with its channel map resolved.

    Attributes:
        model: the compiled model (with any sensors gapgauge added); shared, copy before changing it.
        body: the map with every default filled in (actuator of each joint, com_body, support).
        lateral: True for a 3-D model (medio-lateral channels).
        sensors: where each channel's raw values sit in ``sensordata``.
        added: names of the sites and sensors gapgauge added to the model.
    """

    model: mujoco.MjModel
    body: BodyMap
    lateral: bool
    sensors: SensorPlan
    added: tuple[str, ...]


_CACHE: dict[tuple, CompiledBody] = {}


def compile_model(model_path: Path, scenario_path: Path | None = None) -> mujoco.MjModel:
    """The MJCF at ``model_path`` as MuJoCo compiles it (no sensors added).

    Raises:
        ScenarioError: MuJoCo cannot compile the file (cut-off XML, a missing include, a bad attribute),
            naming the scenario's ``model`` key.
    """
    path = Path(model_path).resolve()
    try:
        return mujoco.MjModel.from_xml_path(str(path))
    except ValueError as exc:
        text = " ".join(str(exc).split())
        raise ScenarioError(
            f"{scenario_path or path}: key 'model': MuJoCo cannot compile {path} ({text}); fix the MJCF file"
        ) from None


def compile_body(model_path: Path, body: BodyMap, scenario_path: Path, *, task_kind: str = "push",
                 task_body: str = "", servos: bool = True, declared: bool = True) -> CompiledBody:
    """Compile and check the model for the channel map ``body`` (cached per files, map and task).

    Args:
        model_path: the MJCF file. body: the scenario's channel map. scenario_path: for messages.
        task_kind, task_body: a push acts on ``task_body`` (checked to exist); a platform task moves
            ``task_body``, which becomes the map's ``platform``.
        servos: the built-in controller drives the joints, so each actuator must be a position servo.
        declared: the scenario wrote the map out ([model.channels]); else it is the bundled planar body's
            default and a name it lacks is reported under the ``model`` key.

    Raises:
        ScenarioError: one line naming the key of the map (or ``model``), what the model lacks and the fix.
    """
    files = model_files(Path(model_path))
    key = (files_stamp(files), json.dumps(body.canonical()), task_kind, task_body, servos)
    hit = _CACHE.get(key)
    if hit is not None:
        return hit
    base = compile_model(model_path, scenario_path)
    check = _Checker(base, scenario_path, declared)
    if task_kind == "platform":
        if body.platform and body.platform != task_body:
            raise check.fail("task.body", f"names {task_body!r} but [model.channels] names platform "
                             f"{body.platform!r}", "name the same platform body in both")
        body = replace(body, platform=task_body)
    resolved = check.resolve(body, servos)
    if task_kind == "push":
        check.body(task_body, "task.body")
    lateral = check.lateral(resolved) if resolved.lateral is None else resolved.lateral
    check.sane(resolved)
    plan, model, added = plan_sensors(base, Path(model_path), resolved, lateral, scenario_path)
    out = CompiledBody(model, replace(resolved, lateral=lateral), lateral, plan, added)
    _CACHE[key] = out
    _CACHE[(key[0], json.dumps(out.body.canonical()), task_kind, task_body, servos)] = out
    return out


class _Checker:
    """Name lookups in the compiled model, each failure one ScenarioError line naming the map's key."""

    def __init__(self, model: mujoco.MjModel, scenario_path: Path, declared: bool = True):
        self.m = model
        self.path = scenario_path
        self.declared = declared

    def fail(self, key: str, problem: str, fix: str) -> ScenarioError:
        if not self.declared and key.startswith("model.channels"):
            key, problem = "model", f"{problem} (the default channel map, of models/planar_body.xml, needs it)"
            fix = f"{fix}; or map your model's own names in a [model.channels] table"
        return ScenarioError(f"{self.path}: key '{key}': {problem}; {fix}")

    def names(self, kind: OBJ, count: int) -> list[str]:
        return [n for n in (mujoco.mj_id2name(self.m, kind, i) for i in range(count)) if n]

    def find(self, kind: OBJ, name: str) -> int:
        return mujoco.mj_name2id(self.m, kind, name)

    def need(self, kind: OBJ, count: int, name: str, key: str) -> int:
        i = self.find(kind, name)
        if i < 0:
            what = kind.name[6:].lower()
            known = self.names(kind, count)
            listed = ", ".join(known[:12]) + (" ..." if len(known) > 12 else "")
            raise self.fail(key, f"the model has no {what} named {name!r}", f"use one of: {listed or '(none)'}")
        return i

    def body(self, name: str, key: str) -> int:
        return self.need(OBJ.mjOBJ_BODY, self.m.nbody, name, key)

    def resolve(self, body: BodyMap, servos: bool) -> BodyMap:
        m = self.m
        joints = []
        for j in body.joints:
            key = f"model.channels.joints.{j.name}"
            jid = self.need(OBJ.mjOBJ_JOINT, m.njnt, j.joint, key)
            if m.jnt_type[jid] != mujoco.mjtJoint.mjJNT_HINGE:
                raise self.fail(key, f"joint {j.joint!r} is not a hinge", "actuated joints are hinges (angles in rad)")
            drives = [a for a in range(m.nu) if m.actuator_trntype[a] == mujoco.mjtTrn.mjTRN_JOINT
                      and m.actuator_trnid[a, 0] == jid]
            if j.actuator:
                aid = self.need(OBJ.mjOBJ_ACTUATOR, m.nu, j.actuator, key)
                if aid not in drives:
                    raise self.fail(key, f"actuator {j.actuator!r} does not drive joint {j.joint!r}",
                                    "name the actuator whose joint= is that joint")
            elif len(drives) != 1:
                raise self.fail(key, f"joint {j.joint!r} is driven by {len(drives)} actuators",
                                'name one: {joint = "...", actuator = "..."}' if drives else
                                "add a <position> actuator for it to the model")
            else:
                aid = drives[0]
            if servos and not self._is_servo(aid):
                raise self.fail(key, f"actuator {mujoco.mj_id2name(m, OBJ.mjOBJ_ACTUATOR, aid)!r} is not a position "
                                "servo", "the built-in controller sets kp and kv of <position> actuators: use one")
            joints.append(JointMap(j.name, j.joint, mujoco.mj_id2name(m, OBJ.mjOBJ_ACTUATOR, aid)))
        for c in body.contacts:
            for p in c.points:
                self.point(p, f"model.channels.contacts.{c.name}")
        for name in body.fall_contacts:
            self.point(name, "model.channels.fall_contacts", bodies=True)
        self.body(body.trunk, "model.channels.trunk")
        com_body = body.com_body or self._root_of(joints[0].joint)
        self.body(com_body, "model.channels.com_body")
        support = body.support or self._default_support()
        gid = self.need(OBJ.mjOBJ_GEOM, m.ngeom, support, "model.channels.support")
        if int(m.geom_type[gid]) not in (int(mujoco.mjtGeom.mjGEOM_PLANE), int(mujoco.mjtGeom.mjGEOM_BOX)):
            raise self.fail("model.channels.support", f"geom {support!r} is neither a plane nor a box",
                            "name the floor plane or the platform box the feet stand on")
        if body.platform:
            self.platform(body.platform, "model.channels.platform")
        return replace(body, joints=tuple(joints), com_body=com_body, support=support)

    def _is_servo(self, aid: int) -> bool:
        m = self.m
        return (m.actuator_gaintype[aid] == mujoco.mjtGain.mjGAIN_FIXED
                and m.actuator_biastype[aid] == mujoco.mjtBias.mjBIAS_AFFINE
                and m.actuator_gainprm[aid, 0] > 0 and m.actuator_biasprm[aid, 1] == -m.actuator_gainprm[aid, 0])

    def point(self, name: str, key: str, bodies: bool = False) -> None:
        m = self.m
        if self.find(OBJ.mjOBJ_SITE, name) >= 0 or self.find(OBJ.mjOBJ_GEOM, name) >= 0:
            return
        sid = self.find(OBJ.mjOBJ_SENSOR, name)
        if sid >= 0:
            if m.sensor_type[sid] != mujoco.mjtSensor.mjSENS_TOUCH:
                raise self.fail(key, f"sensor {name!r} is not a touch sensor", "name a touch sensor, a site or a geom")
            return
        if bodies and self.find(OBJ.mjOBJ_BODY, name) >= 0:
            return
        what = "site, geom, touch sensor or body" if bodies else "site, geom or touch sensor"
        raise self.fail(key, f"the model has no {what} named {name!r}", "check the name against the MJCF")

    def platform(self, name: str, key: str) -> None:
        bid = self.body(name, key)
        m = self.m
        slides = [j for j in range(m.jnt_bodyid.size) if m.jnt_bodyid[j] == bid
                  and m.jnt_type[j] == mujoco.mjtJoint.mjJNT_SLIDE]
        if not slides or not any(m.actuator_trntype[a] == mujoco.mjtTrn.mjTRN_JOINT
                                 and m.actuator_trnid[a, 0] == slides[0] for a in range(m.nu)):
            raise self.fail(key, f"body {name!r} has no actuated slide joint", "a platform slides on a driven joint")

    def _root_of(self, joint: str) -> str:
        """The child of the world that carries ``joint``: the whole body (default ``com_body``)."""
        m = self.m
        b = int(m.jnt_bodyid[self.find(OBJ.mjOBJ_JOINT, joint)])
        return mujoco.mj_id2name(self.m, OBJ.mjOBJ_BODY, int(m.body_rootid[b])) or ""

    def _default_support(self) -> str:
        m = self.m
        planes = [g for g in range(m.ngeom) if m.geom_bodyid[g] == 0 and m.geom_type[g] == mujoco.mjtGeom.mjGEOM_PLANE]
        if len(planes) == 1 and mujoco.mj_id2name(m, OBJ.mjOBJ_GEOM, planes[0]):
            return mujoco.mj_id2name(m, OBJ.mjOBJ_GEOM, planes[0])
        raise self.fail("model.channels.support", "is missing and the model has no single named floor plane",
                        'name the geom the feet stand on, e.g. support = "floor"')

    def lateral(self, body: BodyMap) -> bool:
        """3-D when anything in the body can move sideways: a free or ball joint, a hinge not about y, a
        slide with a y component (axes in the world frame at the model's reference pose)."""
        m = self.m
        data = mujoco.MjData(m)
        mujoco.mj_kinematics(m, data)
        root = self.find(OBJ.mjOBJ_BODY, body.com_body)
        for j in range(m.njnt):
            b = int(m.jnt_bodyid[j])
            if m.body_rootid[b] != m.body_rootid[root]:
                continue
            kind, axis = m.jnt_type[j], data.xaxis[j]
            if int(kind) in (int(mujoco.mjtJoint.mjJNT_FREE), int(mujoco.mjtJoint.mjJNT_BALL)):
                return True
            if kind == mujoco.mjtJoint.mjJNT_HINGE and (abs(axis[0]) > 1e-9 or abs(axis[2]) > 1e-9):
                return True
            if kind == mujoco.mjtJoint.mjJNT_SLIDE and abs(axis[1]) > 1e-9:
                return True
        return False

    def sane(self, body: BodyMap) -> None:
        """Units and ranges: gravity down, body masses positive and finite, hinge ranges within a turn."""
        m = self.m
        if not m.opt.gravity[2] < 0 or abs(m.opt.gravity[0]) + abs(m.opt.gravity[1]) > 1e-9:
            raise self.fail("model", f"gravity is {m.opt.gravity.tolist()} m/s^2, not straight down",
                            'set <option gravity="0 0 -9.81"/> (z up)')
        root = self.find(OBJ.mjOBJ_BODY, body.com_body)
        mass = float(m.body_subtreemass[root])
        if not (np.isfinite(mass) and 0.01 < mass < 1e5):
            raise self.fail("model.channels.com_body", f"the body under {body.com_body!r} weighs {mass:.4g} kg",
                            "give the segments their masses in kg")
        for j in body.joints:
            jid = self.find(OBJ.mjOBJ_JOINT, j.joint)
            low, high = m.jnt_range[jid]
            if m.jnt_limited[jid] and not (low < high and high - low <= MAX_HINGE_SPAN):
                raise self.fail(f"model.channels.joints.{j.name}",
                                f"joint {j.joint!r} range [{low:.4g}, {high:.4g}] rad is reversed or more than a turn",
                                'write ranges in the unit of <compiler angle> (degrees by default, or angle="radian")')


def joint_ranges(scenario) -> dict[str, tuple[float, float]]:
    """Hinge joint name (the model's) -> ``(low, high)`` rad, for every limited hinge of the compiled model.

    Taken from ``model.jnt_range`` where ``model.jnt_limited`` is set, so ``<compiler angle="degree">``
    and ``limited="false"`` (or a range without ``autolimits``) are honoured. Unlimited hinges, slide
    joints (ranges in m), ball and free joints are left out.
    """
    model = compiled(scenario).model
    out: dict[str, tuple[float, float]] = {}
    for j in range(model.njnt):
        if model.jnt_type[j] != mujoco.mjtJoint.mjJNT_HINGE or not model.jnt_limited[j]:
            continue
        low, high = model.jnt_range[j]
        out[model.joint(j).name] = (float(low), float(high))
    return out


def joint_angle_ranges(scenario) -> dict[str, tuple[float, float]]:
    """Angle channel (``<joint>_angle``, trade names) -> ``(low, high)`` rad of each limited actuated joint."""
    ranges = joint_ranges(scenario)
    return {f"{j.name}_angle": ranges[j.joint] for j in scenario.body.joints if j.joint in ranges}


def compiled(scenario) -> CompiledBody:
    """The :class:`CompiledBody` of a loaded scenario (cached with the model files)."""
    task = scenario.task
    return compile_body(scenario.model_path, scenario.body, scenario.path, task_kind=task.kind, task_body=task.body,
                        servos=scenario.controller_kind == "builtin")
