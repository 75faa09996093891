"""The appendix: where every number came from (store, scenario, versions, runs, stored results)."""

from __future__ import annotations

import platform
from typing import Any

import matplotlib
import mujoco
import numpy as np

from ...version import __version__
from ..inputs import ReportInputs
from .common import fmt

RUN_COLUMNS = ("id", "kind", "seed", "design", "planned", "done", "status", "created_at")
COUNTED = ("planned", "done")  # formatted with thousands separators; ids and seeds are shown as they are


def provenance_section(inputs: ReportInputs, json_name: str) -> dict[str, Any]:
    """The provenance table, the runs, and which results are stored with which seed."""
    scenario = inputs.scenario
    table = [
        ("store", inputs.store_path),
        ("scenario file", str(scenario.path)),
        ("scenario hash", scenario.content_hash),
        ("model file", str(scenario.model_path)),
        ("gapgauge", __version__),
        ("python", platform.python_version()),
        ("numpy", np.__version__),
        ("mujoco", mujoco.__version__),
        ("matplotlib", matplotlib.__version__),
        ("generated", inputs.generated_at),
    ]
    runs = [
        [fmt(getattr(run, c)) if c in COUNTED else str(getattr(run, c)) for c in RUN_COLUMNS] for run in inputs.runs
    ]
    models = [
        {
            "kind": kind,
            "stored": "no" if result is None else "yes",
            "seed": "–" if result is None or result.seed is None else str(result.seed),
        }
        for kind, result in inputs.results().items()
    ]
    return {
        "table": table,
        "runs": runs,
        "run_columns": list(RUN_COLUMNS) if runs else [],
        "models": models,
        "json_name": json_name,
    }
