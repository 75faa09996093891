"""The validated pieces of a scenario: one frozen dataclass per table, and the names they may use.

:func:`gapgauge.scenario.load_scenario` builds them; everything downstream reads them. Units are those
of the scenario file unless a field says SI.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

FEATURE_NAMES: tuple[str, ...] = (
    "fell",
    "recovery_time",
    "peak_com_excursion",
    "cop_path_length",
    "cop_mean_velocity",
    "cop_range",
    "sway_area",
    "margin_of_stability",
    "peak_joint_torque",
    "positive_work",
)
#: features a 3-D model adds to the default list: the medio-lateral and 2-D forms of the sway measures
#: (Prieto et al. 1996) and of the centre-of-mass excursion and sway area; name -> the lateral channel it needs
LATERAL_FEATURE_NAMES: dict[str, str] = {
    "cop_path_length_ml": "cop_y",
    "cop_path_length_2d": "cop_y",
    "cop_mean_velocity_ml": "cop_y",
    "cop_mean_velocity_2d": "cop_y",
    "cop_range_ml": "cop_y",
    "peak_com_excursion_ml": "com_y",
    "sway_area_2d": "com_y",
}
#: further features a scenario may name (not in any default list); name -> lateral channel needed, or ""
EXTRA_FEATURE_NAMES: dict[str, str] = {
    "cop_rms_distance": "",
    "cop_rms_distance_ml": "cop_y",
    "cop_rms_distance_2d": "cop_y",
    "cop_mean_distance_2d": "cop_y",
    "cop_sway_area": "cop_y",
}
#: every feature a scenario may name
ALL_FEATURE_NAMES: tuple[str, ...] = (*FEATURE_NAMES, *LATERAL_FEATURE_NAMES, *EXTRA_FEATURE_NAMES)
#: roles of the built-in controller that act on named joints
JOINT_ROLES = ("stiffness", "damping", "setpoint", "reaction_offset")
#: ``controller``: a parameter only handed to a controller of one's own (``[controller] kind = "callable"``)
PARAMETER_ROLES = (
    "stiffness", "damping", "setpoint", "reaction_delay", "reaction_offset", "reaction_duration", "controller",
)
PHYSICS_NAMES = (
    "trunk_mass_scale",
    "friction",
    "joint_damping",
    "servo_strength",
    "servo_lag",
    "disturbance_scale",
)
TASK_KINDS = ("push", "platform")


@dataclass(frozen=True)
class Parameter:
    """One policy parameter: its bounds for simulation and narrower safe bounds for hardware."""

    name: str
    unit: str
    low: float
    high: float
    safe_low: float
    safe_high: float
    log: bool
    role: str
    joint: str | None  # the first (often only) joint of ``joints``; None for roles without a joint
    nominal: float
    joints: tuple[str, ...] = ()  # joints (trade names of [model.channels].joints) the parameter acts on

    def __post_init__(self) -> None:
        if not self.joints and self.joint is not None:
            object.__setattr__(self, "joints", (self.joint,))

    def as_dict(self) -> dict[str, Any]:
        out = dict(self.__dict__)
        out["joints"] = list(self.joints)
        return out


@dataclass(frozen=True)
class PhysicsRange:
    """One randomised physical quantity: the range drawn from and its nominal value."""

    name: str
    unit: str
    low: float
    high: float
    nominal: float


@dataclass(frozen=True)
class Task:
    """What disturbs the body and when.

    kind: ``push`` (horizontal force on ``body``, N, for ``duration`` s, along ``direction``, a unit
    vector in the world frame, +x by default) or ``platform`` (support surface translates by ``magnitude``
    m over ``duration`` s, smooth minimum-jerk profile).
    """

    kind: str
    onset: float
    duration: float
    magnitude: float
    body: str
    horizon: float
    timestep: float
    direction: tuple[float, float, float] = (1.0, 0.0, 0.0)

    @property
    def nstep(self) -> int:
        return int(round(self.horizon / self.timestep))


@dataclass(frozen=True)
class FeatureSettings:
    """The [features] table, plus what the features read of the body (from the [model.channels] map):
    the actuated joints' trade names (torque and work sum over them), the contact groups (the centre of
    pressure is their force-weighted position), the groups at the rear and front edges of the base of
    support (margin of stability) and whether the model is 3-D (medio-lateral channels)."""

    names: tuple[str, ...]
    fall_com_height: float  # m: the centre of mass below this height means a fall
    fall_trunk_pitch: float  # rad: |trunk pitch| beyond this means a fall
    recovery_speed: float  # m/s: recovered once |COM velocity| stays below this
    leg_length: float  # m: pendulum length for omega0 = sqrt(g / l) in the margin of stability
    joints: tuple[str, ...] = ("ankle", "knee", "hip")
    contacts: tuple[str, ...] = ("heel", "toe")
    rear: str = "heel"
    front: str = "toe"
    lateral: bool = False


@dataclass(frozen=True)
class Objective:
    """Lower is better: sum of weight * feature."""

    weights: dict[str, float]
    fall_value: float  # objective recorded for a fallen rollout (kept out of the GP; see compare/)

    def evaluate(self, features: dict[str, np.ndarray]) -> np.ndarray:
        total = None
        for name, weight in self.weights.items():
            term = weight * np.asarray(features[name], dtype=float)
            total = term if total is None else total + term
        fell = np.asarray(features["fell"], dtype=bool)
        return np.where(fell, self.fall_value, total)


@dataclass(frozen=True)
class ColumnMap:
    channel: str
    column: str
    unit: str


@dataclass(frozen=True)
class BagChannel:
    channel: str
    topic: str
    field: str
    unit: str
    stamp: str = "header"  # "header": the message's header.stamp (a zero stamp too) when it has one; "record"


@dataclass(frozen=True)
class Hardware:
    time_column: str
    time_unit: str
    columns: tuple[ColumnMap, ...]
    sample_rate_hz: float  # expected logging rate
    min_rate_hz: float  # slower than this is refused (too slow for the features)
    max_gap_s: float
    lowpass_hz: float | None
    max_file_mb: float
    bag: tuple[BagChannel, ...]
    plausible: dict[str, tuple[float, float]]  # channel -> (low, high) in SI
    onset_tolerance_s: float = 0.01  # an onset placed less precisely than this is not placed (s)


@dataclass(frozen=True)
class ShiftSettings:
    level: float  # significance level of the tests
    residual_limit: float  # |standardised residual| below this counts as consistent
    offset_limit: float  # |bias| / simulated sd below this counts as no offset
    rank_threshold: float  # Kendall tau at least this counts as order kept
    bootstrap: int
    permutations: int


@dataclass(frozen=True)
class JointMap:
    """One actuated joint: ``name`` is the trade name used in channel names (``<name>_angle``...) and in
    parameters (``joint = name``); ``joint`` and ``actuator`` are the model's own names."""

    name: str
    joint: str
    actuator: str


@dataclass(frozen=True)
class ContactGroup:
    """Points under the feet read as one: channels ``<name>_force`` (sum of their vertical forces) and
    ``<name>_x`` (``_y`` on a 3-D model), their force-weighted position. Each point is a model site, geom or
    touch sensor."""

    name: str
    points: tuple[str, ...]


@dataclass(frozen=True)
class BodyMap:
    """The ``[model.channels]`` map from the trade's channel names to the model's own names.

    Attributes:
        joints: the actuated joints, in order (the built-in controller's servos).
        contacts: the contact groups under the feet (centre of pressure and vertical force).
        rear, front: contact groups whose ``_x`` are the rear and front edges of the base of support.
        com_body: the body whose subtree centre of mass is the whole-body centre of mass.
        trunk: the body whose pitch is ``trunk_pitch``.
        support: the geom whose top is the support surface (``com_z`` is measured from it).
        fall_contacts: sites, touch sensors or bodies whose contact with anything counts as a fall.
        platform: the body of a translating support platform ("" for none).
        lateral: True for a 3-D model (medio-lateral channels), False for a planar one; None: from the model.
    """

    joints: tuple[JointMap, ...]
    contacts: tuple[ContactGroup, ...]
    rear: str
    front: str
    com_body: str
    trunk: str
    support: str
    fall_contacts: tuple[str, ...]
    platform: str
    lateral: bool | None

    @property
    def joint_names(self) -> tuple[str, ...]:
        return tuple(j.name for j in self.joints)

    def canonical(self) -> dict[str, Any]:
        """JSON-ready form (part of the simulation hash)."""
        return {
            "joints": [[j.name, j.joint, j.actuator] for j in self.joints],
            "contacts": [[c.name, list(c.points)] for c in self.contacts],
            "rear": self.rear, "front": self.front, "com_body": self.com_body, "trunk": self.trunk,
            "support": self.support, "fall_contacts": list(self.fall_contacts), "platform": self.platform,
            "lateral": self.lateral,
        }


#: the channel map of the bundled planar body (models/planar_body.xml), used when a scenario names its
#: model as a plain path (``model = "..."``) without a ``[model.channels]`` table
PLANAR_BODY = BodyMap(
    joints=(JointMap("ankle", "ankle", "ankle_servo"), JointMap("knee", "knee", "knee_servo"),
            JointMap("hip", "hip", "hip_servo")),
    contacts=(ContactGroup("heel", ("heel_site",)), ContactGroup("toe", ("toe_site",))),
    rear="heel", front="toe", com_body="foot", trunk="trunk", support="platform_top",
    fall_contacts=("thigh_touch", "trunk_touch"), platform="platform", lateral=False,
)
