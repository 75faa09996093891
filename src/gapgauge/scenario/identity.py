"""A scenario's identities: what a stored rollout depends on, and what it does not.

- ``content_hash``: the whole scenario (every table as read, after ``extends``) and the model's files.
  Results (shift, prior, proposals...) are stored under it.
- ``trajectory_hash``: what MuJoCo is asked to simulate: the model's files (main file, includes, assets),
  the resolved channel map, the task, the parameters' names, roles, joints, bounds and log scales, the
  physics ranges, the controller (:func:`gapgauge.scenario.controller.controller_fingerprint`: kind,
  reference, rate, lists and the module's source) and :data:`SIMULATION_VERSION`. Two scenario versions
  with the same one give the same trajectories for the same run.
- ``simulation_hash``: the trajectory hash plus the feature definitions (the names and thresholds of
  ``[features]``, what the features read of the body, the logger's rate and low-pass of ``[hardware]``,
  which every simulated trajectory passes before it is measured, and :data:`FEATURES_VERSION`). It is
  the sweep's key: a run of one version is a run of every version with the same simulation hash.

Not in either: the description, ``[hardware]`` columns, bag topics and plausible ranges, the parameters'
units, safe bounds and nominal values, ``[objective]`` (recomputed from the stored features),
``[success]``, ``[shift]`` and ``[calibration]``. A stored run whose trajectory hash matches but whose
simulation hash does not was measured with other feature definitions: stale (its trajectories are not
kept, so its features cannot be recomputed; the store says which run and why).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .controller import controller_fingerprint
from .model_files import files_digest

if TYPE_CHECKING:
    from .space import Scenario

#: raise when the simulator's code changes what a run's rollouts are (model building, controls, channels)
SIMULATION_VERSION = 1
#: raise when a feature's code changes its values (its formula, window, the logger view)
FEATURES_VERSION = 1
HASH_LENGTH = 16


def model_digest(files: list[Path]) -> str:
    """Digest of the model's files: sha256 of the one file's bytes (as before includes were followed), else
    :func:`~gapgauge.scenario.model_files.files_digest` over them all."""
    if len(files) == 1:
        return hashlib.sha256(files[0].read_bytes()).hexdigest()
    return files_digest(files)


def content_hash(raw: dict, digest: str) -> str:
    """sha256 of the scenario's tables (JSON, sorted keys) and the model digest, first 16 hex digits."""
    tables = hashlib.sha256(json.dumps(raw, sort_keys=True, default=str).encode()).hexdigest()
    return hashlib.sha256((tables + digest).encode()).hexdigest()[:HASH_LENGTH]


def _hash(part: Any) -> str:
    return hashlib.sha256(json.dumps(part, sort_keys=True, allow_nan=False).encode()).hexdigest()[:HASH_LENGTH]


def simulation_part(scenario: Scenario, digest: str) -> dict[str, Any]:
    """What the trajectories depend on (JSON-ready)."""
    task = scenario.task
    return {
        "version": SIMULATION_VERSION,
        "model": digest,
        "body": scenario.body.canonical(),
        "task": {"kind": task.kind, "onset": task.onset, "duration": task.duration, "magnitude": task.magnitude,
                 "body": task.body, "horizon": task.horizon, "timestep": task.timestep,
                 "direction": list(task.direction)},
        "parameters": [{"name": p.name, "role": p.role, "joints": list(p.joints), "low": p.low, "high": p.high,
                        "log": p.log} for p in scenario.parameters],
        "physics": [{"name": r.name, "low": r.low, "high": r.high, "nominal": r.nominal} for r in scenario.physics],
        "controller": hashlib.sha256(controller_fingerprint(scenario)).hexdigest(),
    }


def measurement_part(scenario: Scenario) -> dict[str, Any]:
    """The feature definitions (JSON-ready)."""
    f = scenario.features
    return {
        "version": FEATURES_VERSION,
        "names": list(f.names),
        "fall_com_height": f.fall_com_height, "fall_trunk_pitch": f.fall_trunk_pitch,
        "recovery_speed": f.recovery_speed, "leg_length": f.leg_length,
        "joints": list(f.joints), "contacts": list(f.contacts), "rear": f.rear, "front": f.front,
        "lateral": f.lateral,
        "sample_rate_hz": scenario.hardware.sample_rate_hz, "lowpass_hz": scenario.hardware.lowpass_hz,
    }


def identities(scenario: Scenario, digest: str) -> tuple[dict[str, Any], str, str]:
    """``(identity, trajectory_hash, simulation_hash)``: ``identity`` is
    ``{"simulation": ..., "measurement": ...}``, stored with each scenario version so a stale run can be
    told apart and explained."""
    identity = {"simulation": simulation_part(scenario, digest), "measurement": measurement_part(scenario)}
    return identity, _hash(identity["simulation"]), _hash(identity)


def explain_difference(old: dict[str, Any], new: dict[str, Any]) -> str:
    """What differs between two stored identities, in words (for a stale run's message)."""
    parts = []
    for section in ("simulation", "measurement"):
        a, b = old.get(section, {}), new.get(section, {})
        for key in sorted(set(a) | set(b)):
            if a.get(key) != b.get(key):
                where = "[features]" if section == "measurement" else "the simulation"
                if key in ("sample_rate_hz", "lowpass_hz"):
                    where = "[hardware]"
                parts.append(f"{where} {key}: {_short(a.get(key))} -> {_short(b.get(key))}")
    return "; ".join(parts) or "nothing recorded differs"


def _short(value: Any) -> str:
    text = json.dumps(value, sort_keys=True)
    return text if len(text) <= 60 else text[:57] + "..."
