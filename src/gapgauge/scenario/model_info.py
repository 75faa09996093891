"""Facts about a scenario's model as MuJoCo compiles it (not as its XML reads).

The MJCF text is not the model: ``<compiler angle="degree">`` (MuJoCo's default for MJCF) turns a
hinge's ``range`` from degrees into radians, ``limited`` / ``autolimits`` decide whether a range
applies at all, and ``<default>`` classes and includes supply attributes the joint element never
names. Reading ``model.jnt_range`` and ``model.jnt_limited`` of the compiled model gets all of these
right, so the log checks use it.
"""

from __future__ import annotations

from pathlib import Path

import mujoco

from ..errors import ScenarioError
from .space import Scenario

# Compiled models by resolved path: compiling costs milliseconds, and a log check or an ingest of many
# logs asks again and again. The modification time is part of the key, so an edited file is compiled
# afresh (an edited include is not noticed: edit the main file too, or restart).
_COMPILED: dict[Path, tuple[int, mujoco.MjModel]] = {}


def compile_model(model_path: Path, scenario_path: Path | None = None) -> mujoco.MjModel:
    """The compiled MJCF at ``model_path`` (cached per resolved path and modification time).

    The returned model is shared: copy it (``copy.copy``) before changing any field.

    Raises:
        ScenarioError: MuJoCo cannot compile the file (cut-off XML, a missing include, a bad attribute),
            naming the scenario's ``model`` key.
    """
    path = Path(model_path).resolve()
    mtime = path.stat().st_mtime_ns
    hit = _COMPILED.get(path)
    if hit is not None and hit[0] == mtime:
        return hit[1]
    try:
        model = mujoco.MjModel.from_xml_path(str(path))
    except ValueError as exc:
        # the scenario loader only checks the XML is well formed; compiling is MuJoCo's job
        text = " ".join(str(exc).split())
        raise ScenarioError(
            f"{scenario_path or path}: key 'model': MuJoCo cannot compile {path} ({text}); fix the MJCF file"
        ) from None
    _COMPILED[path] = (mtime, model)
    return model


def joint_ranges(scenario: Scenario) -> dict[str, tuple[float, float]]:
    """Hinge joint name -> ``(low, high)`` rad, for every limited hinge of the compiled model.

    Taken from ``model.jnt_range`` where ``model.jnt_limited`` is set, so ``<compiler angle="degree">``
    and ``limited="false"`` (or a range without ``autolimits``) are honoured. Unlimited hinges, slide
    joints (ranges in m), ball and free joints are left out.
    """
    model = compile_model(scenario.model_path, scenario.path)
    out: dict[str, tuple[float, float]] = {}
    for j in range(model.njnt):
        if model.jnt_type[j] != mujoco.mjtJoint.mjJNT_HINGE or not model.jnt_limited[j]:
            continue
        low, high = model.jnt_range[j]
        out[model.joint(j).name] = (float(low), float(high))
    return out
