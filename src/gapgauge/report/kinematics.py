"""Stick-figure poses of the scenario's own model, for the report's filmstrip: the compiled MuJoCo model
(:func:`gapgauge.scenario.compile_model`), its joints set from the joint-angle channels, placed by
``mj_kinematics`` and drawn in the sagittal (x-z) plane. Nothing is hand-coded: segment lengths, joint
positions and shapes are the model's, so a lab's own MJCF is drawn as it is.

Joint-angle channels are mapped onto model joints by name: ``<name>_angle`` sets the model joint the
scenario's ``[model.channels]`` map gives for ``name`` (``left_hip = "left_hip_pitch"``), or the joint
called ``name`` when no map is given; a joint no channel names (the root's slides and pitch or free joint,
the platform) stays at the model's reference pose ``qpos0``, so the figure shows the posture the logged
joint angles give with the feet where the model puts them.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import mujoco
import numpy as np

ANGLE_SUFFIX = "_angle"
# the model's type arrays hold plain integers: compare with the enums' values
_LINE_GEOMS = (int(mujoco.mjtGeom.mjGEOM_CAPSULE), int(mujoco.mjtGeom.mjGEOM_CYLINDER))
_ROUND_GEOMS = (int(mujoco.mjtGeom.mjGEOM_SPHERE), int(mujoco.mjtGeom.mjGEOM_ELLIPSOID))
_BOX = int(mujoco.mjtGeom.mjGEOM_BOX)
_HINGE_OR_SLIDE = (int(mujoco.mjtJoint.mjJNT_HINGE), int(mujoco.mjtJoint.mjJNT_SLIDE))


@dataclass
class Pose:
    """One posture in the sagittal plane, in m: ``x`` forward, ``z`` up.

    Attributes:
        bones: ``(b x 2 x 2)`` lines from each body's origin to its children's (parent, child).
        limbs: ``(c x 2 x 2)`` capsule and cylinder geoms as their axes' end points, with ``limb_widths (c,)`` m.
        balls: ``(s x 3)`` spheres and ellipsoids as ``(x, z, radius)``.
        boxes: box geoms as ``(4 x 2)`` outlines (their x-z faces).
        joints: ``(j x 2)`` the anchors of the mapped joints.
        com: ``(2,)`` the centre of mass of the body the mapped joints belong to.
        mark: ``(2,)`` the centre of mass of the body asked for (where a push acts), or None.
    """

    bones: np.ndarray
    limbs: np.ndarray
    limb_widths: np.ndarray
    balls: np.ndarray
    boxes: list[np.ndarray] = field(default_factory=list)
    joints: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    com: np.ndarray = field(default_factory=lambda: np.zeros(2))
    mark: np.ndarray | None = None

    def extent(self) -> tuple[float, float, float, float]:
        """``(x_min, x_max, z_min, z_max)`` of the bones, limbs and balls (boxes can be a whole floor)."""
        points = [self.bones.reshape(-1, 2), self.limbs.reshape(-1, 2), self.joints]
        if len(self.balls):
            r = self.balls[:, 2:3]
            points += [self.balls[:, :2] - r, self.balls[:, :2] + r]
        xz = np.vstack([p for p in points if len(p)]) if any(len(p) for p in points) else np.zeros((1, 2))
        return float(xz[:, 0].min()), float(xz[:, 0].max()), float(xz[:, 1].min()), float(xz[:, 1].max())


def joint_map(model: mujoco.MjModel, channels: Mapping[str, object],
              joints: Mapping[str, str] | None = None) -> dict[str, int]:
    """Channel name -> qpos address, for every ``<name>_angle`` channel naming a hinge or slide joint.

    ``joints``: trade name -> model joint name (the scenario's map); a name it lacks is the model's own.
    """
    out = {}
    joints = joints or {}
    for name in channels:
        if not name.endswith(ANGLE_SUFFIX):
            continue
        stem = name[: -len(ANGLE_SUFFIX)]
        joint = mujoco.mj_name2id(model, mujoco.mjtObj.mjOBJ_JOINT, joints.get(stem, stem))
        if joint >= 0 and int(model.jnt_type[joint]) in _HINGE_OR_SLIDE:
            out[name] = int(model.jnt_qposadr[joint])
    return out


def _sagittal(points: np.ndarray) -> np.ndarray:
    return np.asarray(points)[..., [0, 2]]


def _moving_root(model: mujoco.MjModel, addresses: list[int]) -> int:
    """The top-level body (child of the world) holding the first mapped joint, or body 1."""
    for j in range(model.njnt):
        if int(model.jnt_qposadr[j]) in addresses:
            return int(model.body_rootid[model.jnt_bodyid[j]])
    return 1 if model.nbody > 1 else 0


def poses(model: mujoco.MjModel, angles: Mapping[str, np.ndarray], mark_body: str | None = None,
          joints: Mapping[str, str] | None = None) -> list[Pose]:
    """Poses at ``n`` instants from joint-angle channels.

    Args:
        model: the compiled model (left unchanged: a fresh ``MjData`` is used).
        angles: channel name (``<joint>_angle``) -> ``(n,)`` angles, rad (m for a slide joint); channels
            that name no joint of the model are ignored, NaN samples leave the joint at ``qpos0``.
        mark_body: a body whose centre of mass each pose records (``Pose.mark``), e.g. the pushed one.
        joints: trade name -> model joint name (:func:`joint_map`).

    Returns:
        ``n`` :class:`Pose` objects.
    """
    data = mujoco.MjData(model)
    mapping = joint_map(model, angles, joints)
    values = {name: np.atleast_1d(np.asarray(angles[name], float)) for name in mapping}
    n = max((len(v) for v in values.values()), default=1)
    root = _moving_root(model, list(mapping.values()))
    drawn = list(range(1, model.nbody))
    marked = -1 if mark_body is None else mujoco.mj_name2id(model, mujoco.mjtObj.mjOBJ_BODY, mark_body)
    out = []
    for i in range(n):
        data.qpos[:] = model.qpos0
        for name, address in mapping.items():
            value = values[name][min(i, len(values[name]) - 1)]
            if np.isfinite(value):
                data.qpos[address] = value
        mujoco.mj_kinematics(model, data)
        mujoco.mj_comPos(model, data)
        pose = _pose(model, data, drawn, mapping, root)
        pose.mark = _sagittal(data.xipos[marked]).copy() if marked >= 0 else None
        out.append(pose)
    return out


def _pose(model: mujoco.MjModel, data: mujoco.MjData, bodies: list[int], mapping: dict[str, int],
          root: int) -> Pose:
    bones = [(data.xpos[model.body_parentid[b]], data.xpos[b]) for b in bodies if model.body_parentid[b] != 0]
    limbs, widths, balls, boxes = [], [], [], []
    for g in range(model.ngeom):
        if model.geom_bodyid[g] == 0:  # the world's own geoms: the floor
            continue
        kind, size = int(model.geom_type[g]), model.geom_size[g]
        centre, axes = data.geom_xpos[g], data.geom_xmat[g].reshape(3, 3)
        if kind in _LINE_GEOMS:
            half = axes[:, 2] * size[1]
            limbs.append((centre - half, centre + half))
            widths.append(2 * size[0])
        elif kind in _ROUND_GEOMS:
            balls.append((centre[0], centre[2], size[0]))
        elif kind == _BOX:
            corners = [centre + axes[:, 0] * sx * size[0] + axes[:, 2] * sz * size[2]
                       for sx, sz in ((-1, -1), (1, -1), (1, 1), (-1, 1))]
            boxes.append(_sagittal(np.array(corners)))
    anchors = [data.xanchor[j] for j in range(model.njnt) if int(model.jnt_qposadr[j]) in mapping.values()]
    return Pose(
        bones=_sagittal(np.array(bones)).reshape(-1, 2, 2) if bones else np.zeros((0, 2, 2)),
        limbs=_sagittal(np.array(limbs)).reshape(-1, 2, 2) if limbs else np.zeros((0, 2, 2)),
        limb_widths=np.array(widths, float),
        balls=np.array(balls, float).reshape(-1, 3),
        boxes=boxes,
        joints=_sagittal(np.array(anchors)).reshape(-1, 2) if anchors else np.zeros((0, 2)),
        com=_sagittal(data.subtree_com[root]).copy(),
    )
