"""Load and validate a scenario file; the parameter space; facts about the compiled model.

A scenario (TOML) names the model file (anywhere on disk) and its channel map (``[model.channels]``:
the actuated joints, the contact points under the feet, the whole-body and trunk bodies, the fall
contacts), the controller, the task (what disturbs the body and when), the horizon and time step, the
policy parameters, the physics randomisation ranges, the features and the objective, the success rule,
how hardware log columns map onto trajectory channels, and the thresholds of the shift verdicts. See
``scenarios/push_recovery.toml`` (the planar body) and ``scenarios/biped_push.toml`` (a 3-D biped, with
its map written out) for commented examples.

Modules, bottom up: :mod:`.types` (one frozen dataclass per table, the channel map), :mod:`.space` (the
:class:`Scenario` and its parameter space), :mod:`.reader` and :mod:`.tables` (each table read and
validated with its key path), :mod:`.body` (the ``model`` key and ``[model.channels]``),
:mod:`.model_files` (the model's files: where, MJCF or not, their digest), :mod:`.sensors` and
:mod:`.model_info` (the model compiled and checked against the map, the sensors its channels read),
:mod:`.controller` (the ``[controller]`` table), :mod:`.identity` (content, trajectory and simulation
hashes), :mod:`.loading` (TOML, ``extends`` overlays, :func:`load_scenario`).
"""

from __future__ import annotations

from .loading import MAX_EXTENDS_DEPTH, MAX_MODEL_BYTES, MAX_SCENARIO_BYTES, load_scenario
from .model_info import CompiledBody, compile_body, compile_model, compiled, joint_angle_ranges, joint_ranges
from .space import Scenario
from .types import (
    ALL_FEATURE_NAMES,
    FEATURE_NAMES,
    LATERAL_FEATURE_NAMES,
    PARAMETER_ROLES,
    PHYSICS_NAMES,
    PLANAR_BODY,
    TASK_KINDS,
    BagChannel,
    BodyMap,
    ColumnMap,
    ContactGroup,
    FeatureSettings,
    Hardware,
    JointMap,
    Objective,
    Parameter,
    PhysicsRange,
    ShiftSettings,
    Task,
)

__all__ = [
    "ALL_FEATURE_NAMES",
    "FEATURE_NAMES",
    "LATERAL_FEATURE_NAMES",
    "PLANAR_BODY",
    "MAX_EXTENDS_DEPTH",
    "MAX_MODEL_BYTES",
    "MAX_SCENARIO_BYTES",
    "PARAMETER_ROLES",
    "PHYSICS_NAMES",
    "TASK_KINDS",
    "BagChannel",
    "BodyMap",
    "ColumnMap",
    "CompiledBody",
    "ContactGroup",
    "FeatureSettings",
    "Hardware",
    "JointMap",
    "Objective",
    "Parameter",
    "PhysicsRange",
    "Scenario",
    "ShiftSettings",
    "Task",
    "compile_body",
    "compile_model",
    "compiled",
    "joint_angle_ranges",
    "joint_ranges",
    "load_scenario",
]
