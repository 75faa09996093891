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
PARAMETER_ROLES = ("stiffness", "damping", "setpoint", "reaction_delay", "reaction_offset", "reaction_duration")
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
    joint: str | None
    nominal: float

    def as_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


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

    kind: ``push`` (horizontal force on ``body``, N, for ``duration`` s) or ``platform`` (support
    surface translates by ``magnitude`` m over ``duration`` s, smooth minimum-jerk profile).
    """

    kind: str
    onset: float
    duration: float
    magnitude: float
    body: str
    horizon: float
    timestep: float

    @property
    def nstep(self) -> int:
        return int(round(self.horizon / self.timestep))


@dataclass(frozen=True)
class FeatureSettings:
    names: tuple[str, ...]
    fall_com_height: float  # m: the centre of mass below this height means a fall
    fall_trunk_pitch: float  # rad: |trunk pitch| beyond this means a fall
    recovery_speed: float  # m/s: recovered once |COM velocity| stays below this
    leg_length: float  # m: pendulum length for omega0 = sqrt(g / l) in the margin of stability


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


@dataclass(frozen=True)
class ShiftSettings:
    level: float  # significance level of the tests
    residual_limit: float  # |standardised residual| below this counts as consistent
    offset_limit: float  # |bias| / simulated sd below this counts as no offset
    rank_threshold: float  # Kendall tau at least this counts as order kept
    bootstrap: int
    permutations: int
