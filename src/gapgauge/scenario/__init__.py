"""Load and validate a scenario file; the parameter space; facts about the compiled model.

A scenario (TOML) names the model file, the task (what disturbs the body and when), the horizon and
time step, the policy parameters, the physics randomisation ranges, the features and the objective,
the success rule, how hardware log columns map onto trajectory channels, and the thresholds of the
shift verdicts. See ``scenarios/push_recovery.toml`` for a commented example.

Modules, bottom up: :mod:`.types` (one frozen dataclass per table), :mod:`.space` (the
:class:`Scenario` and its parameter space), :mod:`.reader` and :mod:`.tables` (each table read and
validated with its key path), :mod:`.loading` (TOML, ``extends`` overlays, the model file checks,
:func:`load_scenario`), :mod:`.model_info` (joint ranges of the compiled MuJoCo model).
"""

from __future__ import annotations

from .loading import MAX_EXTENDS_DEPTH, MAX_MODEL_BYTES, MAX_SCENARIO_BYTES, load_scenario
from .model_info import compile_model, joint_ranges
from .space import Scenario
from .types import (
    FEATURE_NAMES,
    PARAMETER_ROLES,
    PHYSICS_NAMES,
    TASK_KINDS,
    BagChannel,
    ColumnMap,
    FeatureSettings,
    Hardware,
    Objective,
    Parameter,
    PhysicsRange,
    ShiftSettings,
    Task,
)

__all__ = [
    "FEATURE_NAMES",
    "MAX_EXTENDS_DEPTH",
    "MAX_MODEL_BYTES",
    "MAX_SCENARIO_BYTES",
    "PARAMETER_ROLES",
    "PHYSICS_NAMES",
    "TASK_KINDS",
    "BagChannel",
    "ColumnMap",
    "FeatureSettings",
    "Hardware",
    "Objective",
    "Parameter",
    "PhysicsRange",
    "Scenario",
    "ShiftSettings",
    "Task",
    "compile_model",
    "joint_ranges",
    "load_scenario",
]
