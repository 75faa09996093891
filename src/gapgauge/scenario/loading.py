"""Load a scenario file: read the TOML, apply ``extends`` overlays, check the model file, build the tables.

Validation happens here, once, at the edge: unknown keys, wrong types, reversed bounds, safe bounds
outside bounds, missing or escaping files are refused with a :class:`ScenarioError` that names the
file, the key path, what is wrong and the fix.

A scenario may ``extends = "other.toml"``: the other file is loaded first and this one's tables are
merged over it key by key (used by calibration overlays).
"""

from __future__ import annotations

import copy
import hashlib
import json
import sys
from pathlib import Path
from xml.etree import ElementTree

from ..errors import ScenarioError
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
from .types import PHYSICS_NAMES

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

MAX_SCENARIO_BYTES = 1_000_000
MAX_EXTENDS_DEPTH = 4


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


def _resolve_inside(path: Path, key: str, value: str, root: Path, suffix: str) -> Path:
    """Resolve a path named in a scenario, refusing absolute paths and paths that leave ``root``."""
    if Path(value).is_absolute():
        raise ScenarioError(
            f"{path}: key '{key}': absolute path {value!r} is not allowed; give a path relative to the file"
        )
    target = (path.parent / value).resolve()
    if not target.is_relative_to(root):
        raise ScenarioError(
            f"{path}: key '{key}': {value!r} leaves the scenario's project folder {root}; keep files inside it"
        )
    if target.suffix.lower() != suffix:
        raise ScenarioError(f"{path}: key '{key}': {value!r} is not a {suffix} file; name a {suffix} file")
    if not target.is_file():
        raise ScenarioError(f"{path}: key '{key}': file {value!r} not found (looked at {target}); check the path")
    return target


def _load_raw(path: Path, root: Path, depth: int = 0) -> tuple[dict, Path]:
    """Read a scenario and the chain it extends; return the merged tables and the file that named the model."""
    data = _read_toml(path)
    ext = data.pop("extends", None)
    if ext is None:
        return data, path
    if not isinstance(ext, str):
        raise ScenarioError(
            f"{path}: key 'extends': must be a string path, got {short_repr(ext)}; name the base scenario"
        )
    if depth >= MAX_EXTENDS_DEPTH:
        raise ScenarioError(
            f"{path}: key 'extends': more than {MAX_EXTENDS_DEPTH} levels of extends; flatten the chain"
        )
    base_path = _resolve_inside(path, "extends", ext, root, ".toml")
    base, model_origin = _load_raw(base_path, root, depth + 1)
    return _merge(base, data), (path if "model" in data else model_origin)


def load_scenario(path: str | Path) -> Scenario:
    """Load and validate a scenario file.

    Paths named inside (``model``, ``extends``) are relative to the file and must stay inside the
    scenario's project folder: the parent of the folder that holds the file.
    """
    path = Path(path).resolve() if Path(path).exists() else Path(path)
    root = path.parent.parent.resolve()
    raw, model_origin = _load_raw(path, root)
    return _build(path, raw, root, model_origin)


def _build(path: Path, raw: dict, root: Path, model_origin: Path) -> Scenario:
    top = TableReader(path, raw, "")
    name = top.get("name", str, fix='give the scenario a short name, e.g. name = "push_recovery"')
    description = top.get("description", str, "")
    model_value = top.get("model", str, fix='name the MJCF file, e.g. model = "../models/planar_body.xml"')
    model_path = _resolve_inside(model_origin, "model", model_value, root, ".xml")
    _check_mjcf(model_path, path, root)

    task = read_task(top.table_at("task", default_empty=False))
    parameters = read_parameters(top, path)
    physics = read_physics(top.table_at("physics", default_empty=False))
    feats = read_features(top.table_at("features"))
    objective = read_objective(top.table_at("objective", default_empty=False), feats)
    success = read_success(top.table_at("success"))
    hardware = read_hardware(top.table_at("hardware", default_empty=False))
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

    digest = hashlib.sha256(json.dumps(raw, sort_keys=True, default=str).encode()).hexdigest()
    digest = hashlib.sha256((digest + hashlib.sha256(model_path.read_bytes()).hexdigest()).encode()).hexdigest()
    return Scenario(
        name=name,
        path=path,
        content_hash=digest[:16],
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
    )


def _check_mjcf(model_path: Path, scenario_path: Path, root: Path) -> None:
    head = model_path.read_bytes()[:4096]
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError:
        raise ScenarioError(
            f"{scenario_path}: key 'model': {model_path} is not UTF-8 text; name an MJCF (.xml) file"
        ) from None
    if "<mujoco" not in text:
        raise ScenarioError(
            f"{scenario_path}: key 'model': {model_path} has no <mujoco> element near its start; name an MJCF file"
        )
    _check_model_files(model_path, scenario_path, root)


# MJCF attributes that name files or folders MuJoCo will read (include, meshes, textures, heightfields)
_FILE_ATTRIBUTES = ("file", "meshdir", "texturedir", "assetdir")
MAX_MODEL_BYTES = 20_000_000


def _check_model_files(model_path: Path, scenario_path: Path, root: Path) -> None:
    """Refuse a model whose includes or assets leave the scenario's project folder (or are absolute)."""
    size = model_path.stat().st_size
    if size > MAX_MODEL_BYTES:
        raise ScenarioError(
            f"{scenario_path}: key 'model': {model_path} is {size} bytes, more than {MAX_MODEL_BYTES}; "
            "name the MJCF of a planar balancing body"
        )
    try:
        tree = ElementTree.parse(model_path)
    except ElementTree.ParseError as exc:
        raise ScenarioError(f"{scenario_path}: key 'model': {model_path} is not well-formed XML ({exc}); "
                            "fix the MJCF file") from None
    for element in tree.iter():
        for attribute in _FILE_ATTRIBUTES:
            value = element.get(attribute)
            if value is None:
                continue
            target = (model_path.parent / value).resolve()
            if Path(value).is_absolute() or not target.is_relative_to(root):
                raise ScenarioError(
                    f"{scenario_path}: key 'model': {model_path} names {attribute}={value!r} in <{element.tag}>, "
                    f"which leaves the scenario's project folder {root}; keep model files inside it"
                )
