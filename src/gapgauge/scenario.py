"""Load and validate a scenario file; the parameter space.

A scenario (TOML) names the model file, the task (what disturbs the body and when), the horizon and
time step, the policy parameters, the physics randomisation ranges, the features and the objective,
the success rule, how hardware log columns map onto trajectory channels, and the thresholds of the
shift verdicts. See ``scenarios/push_recovery.toml`` for a commented example.

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
import math
import sys
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from xml.etree import ElementTree

import numpy as np

from .errors import ScenarioError
from .trajectory import CHANNELS, JOINTS
from .units import UNITS, units_for

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

MAX_SCENARIO_BYTES = 1_000_000
MAX_EXTENDS_DEPTH = 4
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


@dataclass
class Scenario:
    """A validated scenario. Build with :func:`load_scenario`."""

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
            "task": self.task.kind,
            "parameters": [p.as_dict() for p in self.parameters],
        }


# ---- loading -------------------------------------------------------------------------------


class _Reader:
    """Walks one TOML table, recording which keys were used, so leftovers can be refused."""

    def __init__(self, path: Path, table: dict, prefix: str):
        self.path = path
        self.table = table
        self.prefix = prefix
        self.used: set[str] = set()

    def _key(self, key: str) -> str:
        return f"{self.prefix}.{key}" if self.prefix else key

    def fail(self, key: str, problem: str, fix: str) -> ScenarioError:
        return ScenarioError(f"{self.path}: key '{self._key(key)}': {problem}; {fix}")

    def has(self, key: str) -> bool:
        return key in self.table

    def get(self, key: str, kind: type | tuple, default: Any = ..., fix: str = "") -> Any:
        self.used.add(key)
        if key not in self.table:
            if default is ...:
                raise self.fail(key, "is missing", fix or "add it")
            return default
        value = self.table[key]
        kinds = kind if isinstance(kind, tuple) else (kind,)
        if float in kinds and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if isinstance(value, bool) and bool not in kinds:
            ok = False
        else:
            ok = isinstance(value, kinds)
        if not ok:
            want = " or ".join(k.__name__ for k in kinds)
            raise self.fail(key, f"must be {want}, got {type(value).__name__} {_short(value)}", fix or f"give a {want}")
        if isinstance(value, float) and not math.isfinite(value):
            raise self.fail(key, f"must be finite, got {value}", "give a finite number")
        return value

    def number(self, key: str, default: Any = ..., positive: bool = False, nonneg: bool = False) -> float:
        value = self.get(key, float, default)
        if value is None:
            return value
        if positive and not value > 0:
            raise self.fail(key, f"must be positive, got {value}", "give a number above 0")
        if nonneg and value < 0:
            raise self.fail(key, f"must not be negative, got {value}", "give a number of 0 or more")
        return value

    def table_at(self, key: str, default_empty: bool = True) -> _Reader:
        value = self.get(key, dict, {} if default_empty else ...)
        return _Reader(self.path, value, self._key(key))

    def finish(self) -> None:
        extra = [k for k in self.table if k not in self.used]
        if extra:
            k = extra[0]
            raise self.fail(
                k, "is not a known key", "remove it or check its spelling (see scenarios/push_recovery.toml)"
            )


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


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
        raise ScenarioError(f"{path}: key 'extends': must be a string path, got {_short(ext)}; name the base scenario")
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
    top = _Reader(path, raw, "")
    name = top.get("name", str, fix='give the scenario a short name, e.g. name = "push_recovery"')
    description = top.get("description", str, "")
    model_value = top.get("model", str, fix='name the MJCF file, e.g. model = "../models/planar_body.xml"')
    model_path = _resolve_inside(model_origin, "model", model_value, root, ".xml")
    _check_mjcf(model_path, path, root)

    task = _task(top.table_at("task", default_empty=False))
    parameters = _parameters(top, path)
    physics = _physics(top.table_at("physics", default_empty=False))
    feats = _features(top.table_at("features"))
    objective = _objective(top.table_at("objective", default_empty=False), feats)
    success = _success(top.table_at("success"))
    hardware = _hardware(top.table_at("hardware", default_empty=False))
    shift = _shift(top.table_at("shift"))
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


def _task(r: _Reader) -> Task:
    kind = r.get("kind", str)
    if kind not in TASK_KINDS:
        raise r.fail("kind", f"unknown task {kind!r}", f"use one of {', '.join(TASK_KINDS)}")
    task = Task(
        kind=kind,
        onset=r.number("onset", nonneg=True),
        duration=r.number("duration", positive=True),
        magnitude=r.number("magnitude"),
        body=r.get("body", str, "trunk"),
        horizon=r.number("horizon", positive=True),
        timestep=r.number("timestep", 0.002, positive=True),
    )
    if task.onset + task.duration >= task.horizon:
        raise r.fail(
            "horizon",
            f"{task.horizon} s ends before the disturbance does ({task.onset + task.duration} s)",
            "make the horizon longer than onset + duration",
        )
    if task.nstep > 20000:
        raise r.fail(
            "horizon", f"{task.nstep} steps is more than 20000", "shorten the horizon or lengthen the time step"
        )
    r.finish()
    return task


def _parameters(top: _Reader, path: Path) -> list[Parameter]:
    items = top.get("parameters", list, fix="add [[parameters]] tables, one per policy parameter")
    if not 1 <= len(items) <= 40:
        raise top.fail("parameters", f"has {len(items)} entries", "give between 1 and 40 parameters")
    out: list[Parameter] = []
    seen: set[str] = set()
    for i, item in enumerate(items):
        key = f"parameters[{i}]"
        if not isinstance(item, dict):
            raise top.fail(key, "must be a table", "write it as [[parameters]] with name, unit, low, high, ...")
        r = _Reader(path, item, key)
        name = r.get("name", str)
        if name in seen:
            raise r.fail("name", f"{name!r} appears twice", "give each parameter a distinct name")
        seen.add(name)
        role = r.get("role", str)
        if role not in PARAMETER_ROLES:
            raise r.fail("role", f"unknown role {role!r}", f"use one of {', '.join(PARAMETER_ROLES)}")
        joint = r.get("joint", str, None)
        if role in ("stiffness", "damping", "setpoint", "reaction_offset"):
            if joint not in JOINTS:
                raise r.fail("joint", f"role {role!r} needs a joint, got {joint!r}", f"use one of {', '.join(JOINTS)}")
        elif joint is not None:
            raise r.fail("joint", f"role {role!r} takes no joint", "remove the key")
        low, high = r.number("low"), r.number("high")
        if not low < high:
            raise r.fail("high", f"bounds are reversed or empty (low {low} >= high {high})", "make low < high")
        safe_low, safe_high = r.number("safe_low", low), r.number("safe_high", high)
        if not low <= safe_low < safe_high <= high:
            raise r.fail(
                "safe_low" if safe_low < low or safe_low >= safe_high else "safe_high",
                f"safe bounds [{safe_low}, {safe_high}] are not inside bounds [{low}, {high}] or are reversed",
                "keep low <= safe_low < safe_high <= high",
            )
        log = r.get("log", bool, False)
        if log and low <= 0:
            raise r.fail("log", f"a log-scale parameter needs low > 0, got {low}", "set log = false or raise low")
        nominal = r.number("nominal", (safe_low + safe_high) / 2)
        if not safe_low <= nominal <= safe_high:
            raise r.fail("nominal", f"{nominal} is outside the safe bounds [{safe_low}, {safe_high}]", "move it inside")
        out.append(Parameter(name, r.get("unit", str), low, high, safe_low, safe_high, log, role, joint, nominal))
        r.finish()
    return out


def _physics(r: _Reader) -> list[PhysicsRange]:
    out = []
    for name in r.table:
        if name not in PHYSICS_NAMES:
            raise r.fail(name, "is not a known physical quantity", f"use names from: {', '.join(PHYSICS_NAMES)}")
        sub = r.table_at(name, default_empty=False)
        low, high = sub.number("low"), sub.number("high")
        if not low <= high:
            raise sub.fail("high", f"range is reversed (low {low} > high {high})", "make low <= high")
        if low < 0:
            raise sub.fail("low", f"must not be negative, got {low}", "physical scales and times are >= 0")
        nominal = sub.number("nominal", (low + high) / 2)
        if not low <= nominal <= high:
            raise sub.fail("nominal", f"{nominal} is outside [{low}, {high}]", "move it inside the range")
        out.append(PhysicsRange(name, sub.get("unit", str, "1"), low, high, nominal))
        sub.finish()
    missing = [n for n in PHYSICS_NAMES if n not in r.table]
    if missing:
        raise r.fail(
            missing[0],
            "is missing",
            "give a [physics.NAME] table with low, high and nominal for each of " + ", ".join(PHYSICS_NAMES),
        )
    r.finish()
    return out


def _features(r: _Reader) -> FeatureSettings:
    names = r.get("names", list, list(FEATURE_NAMES))
    for n in names:
        if n not in FEATURE_NAMES:
            raise r.fail("names", f"unknown feature {n!r}", f"use names from: {', '.join(FEATURE_NAMES)}")
    if "fell" not in names:
        names = ["fell", *names]
    fs = FeatureSettings(
        names=tuple(names),
        fall_com_height=r.number("fall_com_height", 0.35, positive=True),
        fall_trunk_pitch=r.number("fall_trunk_pitch", 1.2, positive=True),
        recovery_speed=r.number("recovery_speed", 0.05, positive=True),
        leg_length=r.number("leg_length", 0.66, positive=True),
    )
    r.finish()
    return fs


def _objective(r: _Reader, feats: FeatureSettings) -> Objective:
    weights_r = r.table_at("weights", default_empty=False)
    weights = {}
    for name in list(weights_r.table):
        if name not in feats.names or name == "fell":
            raise weights_r.fail(
                name,
                "is not a computed feature (or is 'fell')",
                f"weight features from [features].names: {', '.join(feats.names[1:])}",
            )
        weights[name] = weights_r.number(name)
    if not weights:
        raise weights_r.fail("", "is empty", "weight at least one feature")
    weights_r.finish()
    obj = Objective(weights=weights, fall_value=r.number("fall_value", 10.0))
    r.finish()
    return obj


def _success(r: _Reader) -> dict[str, float]:
    out = {}
    for name in list(r.table):
        if name not in FEATURE_NAMES or name == "fell":
            raise r.fail(
                name,
                "is not a feature",
                "bound features by name, e.g. recovery_time = 2.0 (success also needs no fall)",
            )
        out[name] = r.number(name)
    r.finish()
    return out


def _channel_tables(r: _Reader) -> Iterator[tuple[str, _Reader, str]]:
    """Each ``channel = {..., unit = ...}`` entry of a hardware table, with its unit checked against the
    channel's dimension; the caller reads the other keys before the entry is finished."""
    for channel in list(r.table):
        if channel not in CHANNELS:
            raise r.fail(channel, "is not a trajectory channel", f"use channels from: {', '.join(CHANNELS)}")
        c = r.table_at(channel, default_empty=False)
        unit = c.get("unit", str)
        dim = CHANNELS[channel][0]
        if unit not in UNITS or UNITS[unit][0] != dim:
            raise c.fail("unit", f"{unit!r} is not a unit of {dim}", f"use one of {', '.join(units_for(dim))}")
        yield channel, c, unit
        c.finish()
    r.finish()


def _hardware(r: _Reader) -> Hardware:
    time_r = r.table_at("time", default_empty=False)
    time_column = time_r.get("column", str)
    time_unit = time_r.get("unit", str, "s")
    if time_unit not in units_for("time"):
        raise time_r.fail("unit", f"unknown time unit {time_unit!r}", f"use one of {', '.join(units_for('time'))}")
    time_r.finish()
    columns = [ColumnMap(channel, c.get("column", str), unit)
               for channel, c, unit in _channel_tables(r.table_at("columns", default_empty=False))]
    bag = [BagChannel(channel, c.get("topic", str), c.get("field", str), unit)
           for channel, c, unit in _channel_tables(r.table_at("bag"))]
    plaus_r = r.table_at("plausible")
    plausible = {}
    for channel in list(plaus_r.table):
        if channel not in CHANNELS:
            raise plaus_r.fail(channel, "is not a trajectory channel", f"use channels from: {', '.join(CHANNELS)}")
        pair = plaus_r.get(channel, list)
        if (
            len(pair) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in pair)
            or pair[0] >= pair[1]
        ):
            raise plaus_r.fail(
                channel, f"must be [low, high] in SI with low < high, got {_short(pair)}", "e.g. [-0.7, 0.7]"
            )
        plausible[channel] = (float(pair[0]), float(pair[1]))
    plaus_r.finish()
    rate = r.number("sample_rate_hz", 500.0, positive=True)
    hw = Hardware(
        time_column=time_column,
        time_unit=time_unit,
        columns=tuple(columns),
        sample_rate_hz=rate,
        min_rate_hz=r.number("min_rate_hz", 100.0, positive=True),
        max_gap_s=r.number("max_gap_s", 0.05, positive=True),
        lowpass_hz=r.number("lowpass_hz", None, positive=True),
        max_file_mb=r.number("max_file_mb", 200.0, positive=True),
        bag=tuple(bag),
        plausible=plausible,
    )
    if hw.lowpass_hz is not None and hw.lowpass_hz >= hw.min_rate_hz / 2:
        raise r.fail(
            "lowpass_hz",
            f"{hw.lowpass_hz} Hz is not below the Nyquist rate of min_rate_hz ({hw.min_rate_hz / 2} Hz)",
            "lower the cut-off or raise min_rate_hz",
        )
    r.finish()
    return hw


def _shift(r: _Reader) -> ShiftSettings:
    s = ShiftSettings(
        level=r.number("level", 0.05, positive=True),
        residual_limit=r.number("residual_limit", 2.0, positive=True),
        offset_limit=r.number("offset_limit", 1.0, positive=True),
        rank_threshold=r.number("rank_threshold", 0.4),
        bootstrap=int(r.number("bootstrap", 2000, positive=True)),
        permutations=int(r.number("permutations", 1000, positive=True)),
    )
    if not 0 < s.level < 0.5:
        raise r.fail("level", f"{s.level} is not a sensible significance level", "use a value such as 0.05")
    r.finish()
    return s
