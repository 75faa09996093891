"""The validated scenario and its parameter space: bounds, the unit cube, name <-> vector maps.

A parameter vector is ``(dim,)`` (or a batch ``(n x dim)``) in scenario units, ordered as
``scenario.parameters``; the unit cube maps each axis's full bounds onto [0, 1], log axes in log space.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ScenarioError
from .controller import BUILTIN_CONTROLLER, ControllerSpec
from .types import (
    PLANAR_BODY,
    BodyMap,
    FeatureSettings,
    Hardware,
    Objective,
    Parameter,
    PhysicsRange,
    ShiftSettings,
    Task,
)


@dataclass
class Scenario:
    """A validated scenario. Build with :func:`load_scenario`.

    Besides the tables: ``body`` is the resolved ``[model.channels]`` map, ``lateral`` whether the model is
    3-D, ``channels`` every trajectory channel of its trajectories (name -> (dimension, meaning)),
    ``controller`` the ``[controller]`` table, ``model_files`` the model's main file, includes and assets;
    ``simulation_hash`` is the sweep's key and ``trajectory_hash`` the simulation alone (see
    :mod:`gapgauge.scenario.identity`), ``identity`` their JSON parts.
    """

    name: str
    path: Path
    content_hash: str
    model_path: Path
    description: str
    task: Task
    parameters: list[Parameter]
    physics: list[PhysicsRange]
    features: FeatureSettings
    objective: Objective
    success_max: dict[str, float]
    hardware: Hardware
    shift: ShiftSettings
    calibration_physics: tuple[str, ...]
    raw: dict[str, Any] = field(repr=False, default_factory=dict)
    body: BodyMap = PLANAR_BODY
    lateral: bool = False
    channels: dict[str, tuple[str, str]] = field(repr=False, default_factory=dict)
    controller: ControllerSpec = BUILTIN_CONTROLLER
    model_files: tuple[Path, ...] = ()
    simulation_hash: str = ""
    trajectory_hash: str = ""
    identity: dict[str, Any] = field(repr=False, default_factory=dict)

    @property
    def joint_names(self) -> tuple[str, ...]:
        """Trade names of the actuated joints, in channel-map order."""
        return self.body.joint_names

    @property
    def controller_kind(self) -> str:
        return self.controller.kind

    # ---- the parameter space -------------------------------------------------------------
    @property
    def parameter_names(self) -> list[str]:
        return [p.name for p in self.parameters]

    @property
    def dim(self) -> int:
        return len(self.parameters)

    def bounds(self, safe: bool = False) -> np.ndarray:
        """``(dim x 2)`` array of [low, high] (or the safe bounds)."""
        if safe:
            return np.array([[p.safe_low, p.safe_high] for p in self.parameters], dtype=float)
        return np.array([[p.low, p.high] for p in self.parameters], dtype=float)

    def nominal_parameters(self) -> np.ndarray:
        return np.array([p.nominal for p in self.parameters], dtype=float)

    def to_unit(self, x: np.ndarray) -> np.ndarray:
        """Map parameters ``(n x dim)`` to the unit cube of the full bounds (log axes in log space)."""
        x = np.atleast_2d(np.asarray(x, dtype=float))
        lo, hi = self.bounds().T
        logm = np.array([p.log for p in self.parameters])
        xx = np.where(logm, np.log(np.where(logm, x, 1.0)), x)
        lo = np.where(logm, np.log(np.where(logm, lo, 1.0)), lo)
        hi = np.where(logm, np.log(np.where(logm, hi, 1.0)), hi)
        return (xx - lo) / (hi - lo)

    def from_unit(self, u: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`to_unit`: unit cube ``(n x dim)`` to parameters."""
        u = np.atleast_2d(np.asarray(u, dtype=float))
        lo, hi = self.bounds().T
        logm = np.array([p.log for p in self.parameters])
        llo = np.where(logm, np.log(np.where(logm, lo, 1.0)), lo)
        lhi = np.where(logm, np.log(np.where(logm, hi, 1.0)), hi)
        v = llo + u * (lhi - llo)
        return np.where(logm, np.exp(v), v)

    def params_from_mapping(self, values: dict[str, float], source: str = "parameters") -> np.ndarray:
        """Parameter vector from ``{name: value}``; refuses missing, unknown and out-of-bounds names."""
        names = self.parameter_names
        missing = [n for n in names if n not in values]
        unknown = [k for k in values if k not in names]
        if missing:
            raise ScenarioError(f"{source}: missing parameter(s) {', '.join(missing)}; give a value for each")
        if unknown:
            raise ScenarioError(f"{source}: unknown parameter(s) {', '.join(unknown)}; known: {', '.join(names)}")
        out = np.empty(len(names))
        for i, p in enumerate(self.parameters):
            v = values[p.name]
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise ScenarioError(f"{source}: parameter {p.name!r} must be a finite number, got {v!r}")
            if not p.low <= v <= p.high:
                raise ScenarioError(
                    f"{source}: parameter {p.name!r} = {v} is outside its bounds [{p.low}, {p.high}] {p.unit}"
                )
            out[i] = float(v)
        return out

    def params_to_mapping(self, x: np.ndarray) -> dict[str, float]:
        return {p.name: float(v) for p, v in zip(self.parameters, np.asarray(x, dtype=float), strict=True)}

    def physics_nominal(self) -> dict[str, float]:
        return {r.name: r.nominal for r in self.physics}

    def physics_range(self, name: str) -> PhysicsRange:
        for r in self.physics:
            if r.name == name:
                return r
        raise KeyError(name)

    def summary(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "path": str(self.path),
            "hash": self.content_hash,
            "simulation_hash": self.simulation_hash,
            "task": self.task.kind,
            "parameters": [p.as_dict() for p in self.parameters],
        }
