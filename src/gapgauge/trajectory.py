"""The one record type for simulated and hardware time series.

A :class:`Trajectory` holds a batch of trials on one time base: ``t`` is ``(nstep,)`` seconds and
each channel is an array ``(nbatch x nstep)`` in SI units. A hardware log is a batch of one. Channels
a source does not have are simply absent; a feature that needs a missing channel raises
:class:`MissingChannelError` (it never guesses).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

#: channel name -> (dimension, meaning) of the bundled planar body (the default channel map). All values in
#: SI: rad, rad/s, N m, N, m, m/s. A scenario's own channels follow its ``[model.channels]`` map
#: (``Scenario.channels``): per-joint ``<joint>_angle/_rate/_torque``, per-contact-group
#: ``<group>_force/_x/_y``, and :data:`BODY_CHANNELS`; :func:`channel_dimension` tells any of them.
CHANNELS: dict[str, tuple[str, str]] = {
    "ankle_angle": ("angle", "ankle joint angle"),
    "knee_angle": ("angle", "knee joint angle"),
    "hip_angle": ("angle", "hip joint angle"),
    "ankle_rate": ("angular_rate", "ankle joint rate"),
    "knee_rate": ("angular_rate", "knee joint rate"),
    "hip_rate": ("angular_rate", "hip joint rate"),
    "ankle_torque": ("torque", "ankle joint torque"),
    "knee_torque": ("torque", "knee joint torque"),
    "hip_torque": ("torque", "hip joint torque"),
    "heel_force": ("force", "vertical ground reaction force under the heel"),
    "toe_force": ("force", "vertical ground reaction force under the toe"),
    "heel_x": ("length", "horizontal position of the heel contact (rear edge of support)"),
    "toe_x": ("length", "horizontal position of the toe contact (front edge of support)"),
    "cop_x": ("length", "centre of pressure, horizontal"),
    "com_x": ("length", "whole-body centre of mass, horizontal"),
    "com_z": ("length", "whole-body centre of mass, height above the support surface"),
    "com_vx": ("speed", "whole-body centre-of-mass velocity, horizontal"),
    "com_vz": ("speed", "whole-body centre-of-mass velocity, vertical"),
    "trunk_pitch": ("angle", "trunk pitch from vertical, positive forward"),
    "body_contact": ("force", "contact force on any segment other than the foot (simulation only)"),
    "platform_x": ("length", "support platform position"),
}

#: actuated joints of the bundled planar body (and of a scenario without a ``[model.channels]`` map)
JOINTS: tuple[str, ...] = ("ankle", "knee", "hip")

#: channels of the body as a whole (not tied to a joint or a contact group), 3-D ones included:
#: name -> (dimension, meaning). A scenario's own set is ``Scenario.channels``.
BODY_CHANNELS: dict[str, tuple[str, str]] = {
    "cop_x": ("length", "centre of pressure, horizontal (anterior-posterior)"),
    "cop_y": ("length", "centre of pressure, medio-lateral (3-D models)"),
    "com_x": ("length", "whole-body centre of mass, horizontal (anterior-posterior)"),
    "com_y": ("length", "whole-body centre of mass, medio-lateral (3-D models)"),
    "com_z": ("length", "whole-body centre of mass, height above the support surface"),
    "com_vx": ("speed", "whole-body centre-of-mass velocity, horizontal (anterior-posterior)"),
    "com_vy": ("speed", "whole-body centre-of-mass velocity, medio-lateral (3-D models)"),
    "com_vz": ("speed", "whole-body centre-of-mass velocity, vertical"),
    "trunk_pitch": ("angle", "trunk pitch from vertical, positive forward"),
    "body_contact": ("force", "contact force on any segment other than the feet (simulation only)"),
    "platform_x": ("length", "support platform position"),
}
#: suffix of a per-joint channel -> (dimension, what it measures)
JOINT_SUFFIXES: dict[str, tuple[str, str]] = {
    "angle": ("angle", "joint angle"),
    "rate": ("angular_rate", "joint rate"),
    "torque": ("torque", "joint torque"),
}
#: suffix of a per-contact-group channel -> (dimension, what it measures)
CONTACT_SUFFIXES: dict[str, tuple[str, str]] = {
    "force": ("force", "vertical ground reaction force under"),
    "x": ("length", "horizontal (anterior-posterior) position of the contact"),
    "y": ("length", "medio-lateral position of the contact"),
}


def joint_channels(joint: str) -> dict[str, tuple[str, str]]:
    """The channels of one actuated joint: ``<joint>_angle`` (rad), ``_rate`` (rad/s), ``_torque`` (N m)."""
    return {f"{joint}_{suffix}": (dim, f"{joint} {what}") for suffix, (dim, what) in JOINT_SUFFIXES.items()}


def contact_channels(group: str, lateral: bool) -> dict[str, tuple[str, str]]:
    """The channels of one contact group (points under the feet): ``<group>_force`` (N, vertical),
    ``<group>_x`` (m, force-weighted position) and on a 3-D model ``<group>_y``."""
    out = {}
    for suffix, (dim, what) in CONTACT_SUFFIXES.items():
        if suffix != "y" or lateral:
            out[f"{group}_{suffix}"] = (dim, f"{what} {group}" if suffix == "force" else f"{group}: {what}")
    return out


def channel_dimension(name: str) -> str:
    """Dimension (``angle``, ``angular_rate``, ``torque``, ``force``, ``length``, ``speed``) of a channel
    name: a body channel, or a per-joint / per-contact-group channel told by its suffix.

    Raises:
        KeyError: the name has no known suffix.
    """
    if name in BODY_CHANNELS:
        return BODY_CHANNELS[name][0]
    if name in CHANNELS:
        return CHANNELS[name][0]
    stem, _, suffix = name.rpartition("_")
    if stem and suffix in JOINT_SUFFIXES:
        return JOINT_SUFFIXES[suffix][0]
    if stem and suffix in CONTACT_SUFFIXES:
        return CONTACT_SUFFIXES[suffix][0]
    raise KeyError(name)


class MissingChannelError(KeyError):
    """A feature needs a channel that this trajectory does not carry."""

    def __init__(self, channel: str, feature: str = ""):
        self.channel = channel
        self.feature = feature
        who = f"feature {feature!r} needs" if feature else "needs"
        super().__init__(f"{who} channel {channel!r}, which this trajectory does not have")

    def __str__(self) -> str:  # KeyError quotes its message; we want it plain
        return self.args[0]


@dataclass
class Trajectory:
    """A batch of time series on one time base.

    Attributes:
        t: time, ``(nstep,)`` s, strictly increasing.
        channels: channel name -> ``(nbatch x nstep)`` array in SI units.
        onset: time of the disturbance onset, s (features are measured from here).
        meta: free-form provenance (source, robot id, synthetic flag, ...).
    """

    t: np.ndarray
    channels: dict[str, np.ndarray]
    onset: float = 0.0
    meta: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.t = np.asarray(self.t, dtype=float)
        for name, values in list(self.channels.items()):
            arr = np.asarray(values, dtype=float)
            if arr.ndim == 1:
                arr = arr[None, :]
            if arr.shape[-1] != self.t.shape[0]:
                raise ValueError(f"channel {name!r} has {arr.shape[-1]} samples, time has {self.t.shape[0]}")
            self.channels[name] = arr

    @property
    def nbatch(self) -> int:
        return next(iter(self.channels.values())).shape[0] if self.channels else 0

    @property
    def dt(self) -> float:
        """Mean sample interval, s."""
        return float((self.t[-1] - self.t[0]) / max(len(self.t) - 1, 1))

    def has(self, name: str) -> bool:
        return name in self.channels

    def get(self, name: str, feature: str = "") -> np.ndarray:
        """Channel ``(nbatch x nstep)``; raises :class:`MissingChannelError` if absent."""
        try:
            return self.channels[name]
        except KeyError:
            raise MissingChannelError(name, feature) from None

    def select(self, index) -> Trajectory:
        """A sub-batch (index, slice or boolean mask over the batch)."""
        sel = [index] if isinstance(index, (int, np.integer)) else index
        return Trajectory(self.t, {k: v[sel] for k, v in self.channels.items()}, self.onset, dict(self.meta))
