"""gapgauge: measure and bridge the gap between simulation and hardware when tuning balance controllers.

The Python API mirrors the command line (see README.md). Heavy modules load on first use.
"""

from __future__ import annotations

import importlib
from typing import Any

from .errors import ControllerError, GapgaugeError, LogError, ModelError, ScenarioError, StoreError
from .scenario import Scenario, load_scenario
from .trajectory import Trajectory
from .version import __version__

# public name -> "module:attribute", imported on first access
_LAZY = {
    "Store": "gapgauge.store:Store",
    "sweep": "gapgauge.app.sweep:sweep",
    "simulate": "gapgauge.sim.rollout:simulate",
    "compute_features": "gapgauge.features:compute_features",
    "read_log": "gapgauge.logs:read_log",
    "ingest": "gapgauge.app.ingest:ingest",
    "run_standin": "gapgauge.sim.standin:run_standin",
    "assess_shift": "gapgauge.app.shift:assess_shift",
    "fit_prior": "gapgauge.app.prior:fit_prior",
    "propose": "gapgauge.app.propose:propose",
    "plan_budget": "gapgauge.app.budget:plan_budget",
    "calibrate": "gapgauge.app.calibrate:calibrate",
    "write_report": "gapgauge.app.report:write_report",
    "run_demo": "gapgauge.app.demo:run_demo",
}

__all__ = [
    "__version__",
    "ControllerError",
    "GapgaugeError",
    "LogError",
    "ModelError",
    "ScenarioError",
    "StoreError",
    "Scenario",
    "Trajectory",
    "load_scenario",
    *_LAZY,
]


def __getattr__(name: str) -> Any:
    target = _LAZY.get(name)
    if target is None:
        raise AttributeError(f"module 'gapgauge' has no attribute {name!r}")
    module, attr = target.split(":")
    value = getattr(importlib.import_module(module), attr)
    globals()[name] = value
    return value
