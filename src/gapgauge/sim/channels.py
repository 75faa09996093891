"""Trajectory channels (SI) from MuJoCo's sensor data, for any body the scenario's channel map describes.

``mujoco.rollout`` records ``sensordata`` ``(nbatch x nstep x nsensordata)``; each channel is read from the
addresses of :class:`gapgauge.scenario.sensors.SensorPlan`:

- ``<joint>_angle``, ``_rate``, ``_torque``: the joint's ``jointpos`` / ``jointvel`` and its actuator's force;
- ``<group>_force``: the sum of the group's touch sensors (vertical when the feet are level on the
  support); ``<group>_x`` (``_y``): the force-weighted position of its points, their plain mean while the
  group carries no load (one point: its position);
- ``cop_x`` (``cop_y``): the force-weighted position of every group, NaN while the feet are unloaded
  (:func:`gapgauge.features.cop_from_contacts`);
- ``com_x com_y com_z``: the subtree centre of mass (``com_z`` above the support surface), ``com_v*`` its velocity;
- ``trunk_pitch``: on a planar chain the sum of its hinge angles (exact); on a 3-D body
  ``atan2(R[0, 2], R[2, 2])`` of the trunk's orientation ``R`` (the inclination of its long axis, the body's
  own z, in the sagittal x-z plane, positive forward);
- ``body_contact``: the sum of the fall-contact touch sensors (zero without any);
- ``platform_x``: the platform slide.
"""

from __future__ import annotations

from collections.abc import Collection

import numpy as np

from ..features import cop_from_contacts
from .model import ModelLayout


def extract(sd: np.ndarray, layout: ModelLayout, names: Collection[str] | None = None, with_cop: bool = False,
            copy: bool = True) -> dict[str, np.ndarray]:
    """Trajectory channels, each ``(nbatch x nstep)``, from ``sd (nbatch x nstep x nsensordata)``.

    Args:
        sd: sensor data of the scenario's compiled model (:func:`gapgauge.sim.model.base_model`).
        layout: :func:`gapgauge.sim.model.model_layout` of the scenario.
        names: the channels wanted (all when None); ``cop_x`` / ``cop_y`` come with ``with_cop`` or when named.
        copy: without it, channels read straight from one sensor are strided views into ``sd``, valid only
            while ``sd`` is (the low-pass reads each once, into its own padded copy).
    """
    plan = layout.plan
    lateral = layout.lateral
    out: dict[str, np.ndarray] = {}

    def want(name: str) -> bool:
        return names is None or name in names

    def col(adr: int, view: bool = False) -> np.ndarray:
        values = sd[:, :, adr]
        return values if view or not copy else values.copy()

    for j, joint in enumerate(layout.joint_names):
        for suffix, adrs in (("angle", plan.joint_pos), ("rate", plan.joint_vel), ("torque", plan.joint_torque)):
            if want(f"{joint}_{suffix}"):
                out[f"{joint}_{suffix}"] = col(adrs[j])
    groups = layout.contact_groups
    cop_wanted = {axis: with_cop or (names is not None and f"cop_{axis}" in names) for axis in "xy"}
    forces: list[np.ndarray] = []
    positions: dict[str, list[np.ndarray]] = {"x": [], "y": []}
    for g, points in zip(groups, plan.contacts, strict=True):
        axes = ("x", "y") if lateral else ("x",)
        need_force = want(f"{g}_force") or any(cop_wanted[a] for a in axes)
        need = {a: want(f"{g}_{a}") or cop_wanted[a] for a in axes}
        if not (need_force or any(need.values())):
            continue
        touch = [col(t, view=True) for t, _ in points]
        force = touch[0].copy() if len(touch) == 1 else np.sum(touch, axis=0)
        for k, axis in enumerate(axes):
            if not need[axis]:
                continue
            coords = [col(p + k, view=True) for _, p in points]
            if len(coords) == 1:
                where = coords[0].copy() if copy or cop_wanted[axis] else coords[0]
            else:
                where = _weighted(touch, coords, force)
            positions[axis].append(where)
            if want(f"{g}_{axis}"):
                out[f"{g}_{axis}"] = where
        forces.append(force)
        if want(f"{g}_force"):
            out[f"{g}_force"] = force
    for axis in ("x", "y") if lateral else ("x",):
        if cop_wanted[axis] and forces:
            out[f"cop_{axis}"] = cop_from_contacts(forces, positions[axis])
    body = {"com_x": (plan.com_pos, 0), "com_y": (plan.com_pos, 1), "com_vx": (plan.com_vel, 0),
            "com_vy": (plan.com_vel, 1), "com_vz": (plan.com_vel, 2)}
    for name, (adr, k) in body.items():
        if want(name) and (lateral or not name.endswith("y")):
            out[name] = col(adr + k)
    if want("com_z"):
        out["com_z"] = sd[:, :, plan.com_pos + 2] - plan.support_z
    if want("trunk_pitch"):
        out["trunk_pitch"] = _pitch(sd, plan)
    if want("body_contact"):
        touch = plan.fall_touch
        if touch:
            total = sd[:, :, touch[0]] + sd[:, :, touch[1]] if len(touch) > 1 else sd[:, :, touch[0]].copy()
            for adr in touch[2:]:
                total = total + sd[:, :, adr]
            out["body_contact"] = total
        else:
            out["body_contact"] = np.zeros(sd.shape[:2])
    if want("platform_x") and plan.platform_pos >= 0:
        out["platform_x"] = col(plan.platform_pos)
    return out


def _weighted(force: list[np.ndarray], coords: list[np.ndarray], total: np.ndarray) -> np.ndarray:
    """Force-weighted mean of the points' coordinate; their plain mean where the group carries no load."""
    moment = force[0] * coords[0]
    for f, c in zip(force[1:], coords[1:], strict=True):
        moment = moment + f * c
    mean = np.mean(coords, axis=0)
    loaded = total > 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(loaded, moment / np.where(loaded, total, 1.0), mean)


def _pitch(sd: np.ndarray, plan) -> np.ndarray:
    if plan.trunk_quat < 0:
        chain = plan.pitch_chain
        pitch = None
        for adr, sign in chain:
            term = sd[:, :, adr] if sign > 0 else -sd[:, :, adr]
            pitch = term if pitch is None else pitch + term
        if pitch is None:
            pitch = np.zeros(sd.shape[:2])
        elif len(chain) == 1:
            pitch = pitch.copy()
        return pitch + plan.pitch_offset if plan.pitch_offset else pitch
    q = plan.trunk_quat
    w, x, y, z = (sd[:, :, q + k] for k in range(4))
    return np.arctan2(2.0 * (x * z + w * y), 1.0 - 2.0 * (x * x + y * y))
