"""Load a scenario file: read the TOML, apply ``extends`` overlays, compile and check the model, build the
tables, and work out the scenario's identities.

Validation happens here, once, at the edge: unknown keys, wrong types, reversed bounds, safe bounds
outside bounds, missing files, a model MuJoCo cannot compile or that lacks a name of the channel map are
refused with a :class:`ScenarioError` that names the file, the key path, what is wrong and the fix.

The model may be anywhere on disk (absolute, or relative to the scenario file that names it); MuJoCo
resolves its includes and assets. A scenario may ``extends = "other.toml"`` (relative to it, or
absolute): the other file is loaded first and this one's tables are merged over it key by key (used by
calibration overlays).

Identities (:mod:`gapgauge.scenario.identity`): ``content_hash`` is the whole file and the model's bytes;
``simulation_hash`` only what the stored rollouts depend on (the sweep's key), so editing ``[hardware]``
columns, ``[shift]``, ``[success]``, objective weights or the description keeps a sweep.
"""

from __future__ import annotations

import copy
import sys
from pathlib import Path

from ..errors import ScenarioError
from .body import read_model, scenario_channels
from .controller import read_controller
from .identity import content_hash, identities, model_digest
from .model_files import MAX_MODEL_BYTES, check_mjcf, model_files, resolve_model
from .model_info import compile_body
from .reader import TableReader, short_repr
from .space import Scenario
from .tables import (
    read_features,
    read_hardware,
    read_objective,
    read_parameters,
    read_physics,
    read_shift,
    read_success,
    read_task,
)
from .types import PHYSICS_NAMES, PLANAR_BODY

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

MAX_SCENARIO_BYTES = 1_000_000
MAX_EXTENDS_DEPTH = 4
__all__ = ["MAX_EXTENDS_DEPTH", "MAX_MODEL_BYTES", "MAX_SCENARIO_BYTES", "load_scenario"]


def _merge(base: dict, over: dict) -> dict:
    out = copy.deepcopy(base)
    for key, value in over.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def _read_toml(path: Path) -> dict:
    if not path.exists():
        raise ScenarioError(f"{path}: file not found; check the path")
    if not path.is_file():
        raise ScenarioError(f"{path}: is not a file; give a scenario .toml file")
    size = path.stat().st_size
    if size > MAX_SCENARIO_BYTES:
        raise ScenarioError(
            f"{path}: file is {size} bytes, more than a scenario can be ({MAX_SCENARIO_BYTES}); "
            "check it is the right file"
        )
    raw = path.read_bytes()
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ScenarioError(f"{path}: not UTF-8 text (byte {exc.start}); save the scenario as UTF-8 TOML") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"{path}: not valid TOML ({exc}); fix the syntax at that line") from None


#: top-level keys whose relative paths are resolved from the file that names them
_ORIGIN_KEYS = ("model", "controller")


def _resolve_extends(path: Path, value: str) -> Path:
    target = Path(value).expanduser()
    target = (target if target.is_absolute() else path.parent / target).resolve()
    if target.suffix.lower() != ".toml":
        raise ScenarioError(f"{path}: key 'extends': {value!r} is not a .toml file; name the base scenario")
    if not target.is_file():
        raise ScenarioError(f"{path}: key 'extends': file {value!r} not found (looked at {target}); check the path")
    return target


def _load_raw(path: Path, depth: int = 0) -> tuple[dict, dict[str, Path]]:
    """Read a scenario and the chain it extends; return the merged tables and, for ``model`` and
    ``controller``, the file whose tables name them (their relative paths start there)."""
    data = _read_toml(path)
    ext = data.pop("extends", None)
    if ext is None:
        return data, {key: path for key in _ORIGIN_KEYS}
    if not isinstance(ext, str):
        raise ScenarioError(
            f"{path}: key 'extends': must be a string path, got {short_repr(ext)}; name the base scenario"
        )
    if depth >= MAX_EXTENDS_DEPTH:
        raise ScenarioError(
            f"{path}: key 'extends': more than {MAX_EXTENDS_DEPTH} levels of extends; flatten the chain"
        )
    base, origins = _load_raw(_resolve_extends(path, ext), depth + 1)
    return _merge(base, data), {key: (path if key in data else origins[key]) for key in _ORIGIN_KEYS}


def load_scenario(path: str | Path) -> Scenario:
    """Load and validate a scenario file.

    The model (``model = "file.xml"`` or ``[model] file = ...``) and ``extends`` may be absolute paths or
    paths relative to the file that names them, anywhere on disk. The model is compiled and every name
    of its ``[model.channels]`` map checked here, before any simulation.
    """
    path = Path(path).resolve() if Path(path).exists() else Path(path)
    raw, origins = _load_raw(path)
    return _build(path, raw, origins)


def _build(path: Path, raw: dict, origins: dict[str, Path]) -> Scenario:
    top = TableReader(path, raw, "")
    name = top.get("name", str, fix='give the scenario a short name, e.g. name = "push_recovery"')
    description = top.get("description", str, "")
    model_value, declared = read_model(top)
    model_key = "model" if isinstance(raw.get("model"), str) else "model.file"
    model_path = resolve_model(origins["model"], model_key, model_value)
    check_mjcf(model_path, path, model_key)
    body = PLANAR_BODY if declared is None else declared

    task = read_task(top.table_at("task", default_empty=False))
    parameters = read_parameters(top, path, body.joint_names)
    controller = read_controller(top.table_at("controller"), origins["controller"], parameters, task)
    compiled = compile_body(model_path, body, path, task_kind=task.kind, task_body=task.body,
                            servos=not controller.is_callable, declared=declared is not None)
    body, lateral = compiled.body, compiled.lateral
    if task.direction[1] != 0.0 and not lateral:
        raise ScenarioError(f"{path}: key 'task.direction': has a sideways component but the model is planar; "
                            "push along x, or use a 3-D model")
    channels = scenario_channels(body, lateral, platform=bool(body.platform))
    physics = read_physics(top.table_at("physics", default_empty=False))
    feats = read_features(top.table_at("features"), body, lateral)
    objective = read_objective(top.table_at("objective", default_empty=False), feats)
    success = read_success(top.table_at("success"))
    hardware = read_hardware(top.table_at("hardware", default_empty=False), channels)
    shift = read_shift(top.table_at("shift"))
    cal = top.table_at("calibration")
    cal_names = cal.get("physics", list, list(PHYSICS_NAMES))
    for n in cal_names:
        if n not in [r.name for r in physics]:
            raise cal.fail(
                "physics",
                f"names {n!r}, which is not in [physics]",
                f"use names from: {', '.join(r.name for r in physics)}",
            )
    cal.finish()
    top.finish()

    files = model_files(model_path)
    digest = model_digest(files)
    scenario = Scenario(
        name=name,
        path=path,
        content_hash=content_hash(raw, digest),
        model_path=model_path,
        description=description,
        task=task,
        parameters=parameters,
        physics=physics,
        features=feats,
        objective=objective,
        success_max=success,
        hardware=hardware,
        shift=shift,
        calibration_physics=tuple(cal_names),
        raw=raw,
        body=body,
        lateral=lateral,
        channels=channels,
        controller=controller,
        model_files=tuple(files),
    )
    scenario.identity, scenario.trajectory_hash, scenario.simulation_hash = identities(scenario, digest)
    return scenario
