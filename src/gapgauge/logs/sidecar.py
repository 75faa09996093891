"""The sidecar JSON beside every hardware log, and the size check made before a log is opened.

Fields (all but ``params``, ``robot_id`` and ``recorded_at`` optional)::

    {"params": {name: value}, "robot_id": str, "recorded_at": ISO-8601,
     "outcome": "stood" | "fell" | null, "notes": str, "synthetic": bool,
     "disturbance_at": s, "trial_start_at": s, "trigger": "column" | "/topic" | {"topic": ..., "field": ...}}

The last three say where the trial sits on the log's own clock (at most one of them): ``disturbance_at``
is the time the disturbance began, ``trial_start_at`` the time of the scenario's zero (the disturbance
then begins ``[task].onset`` later), both in seconds on the log's clock (a CSV's time column converted to
seconds; a bag's message stamps in seconds, e.g. ``1714559520.8``). ``trigger`` names a CSV column or a
bag topic (with an optional field) that marks the disturbance: the first sample past half its range,
or the first message of a topic given without a field. See :mod:`gapgauge.logs.align`.

Naming: ``trial_003.csv`` -> ``trial_003.json``; a bag folder ``trial_007/`` -> ``trial_007.json`` beside
it; an ``.mcap`` / ``.db3`` file -> the same stem beside it, and for a file inside a bag folder without
one of its own, the folder's sidecar (the folder and the file inside it are one trial).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from ..errors import GapgaugeError, LogError, where
from ..scenario import Scenario

#: largest sidecar JSON, bytes
MAX_SIDECAR_BYTES = 1 << 20
OUTCOMES = ("stood", "fell")
ALIGNMENT_KEYS = ("disturbance_at", "trial_start_at", "trigger")
SIDECAR_KEYS = ("params", "robot_id", "recorded_at", "outcome", "notes", "synthetic", *ALIGNMENT_KEYS)


@dataclass(frozen=True)
class Trigger:
    """A channel of the log that marks the disturbance: a CSV column, or a bag topic (and field)."""

    name: str  # the CSV column, or the bag topic
    field: str | None = None  # the message field of a bag topic; None: the topic's first message


@dataclass
class Sidecar:
    """The sidecar JSON of a log, validated. ``raw`` is its bytes (they enter the trial's sha256).

    ``disturbance_at`` and ``trial_start_at`` are seconds on the log's clock, ``trigger`` a channel of the
    log; at most one of the three is set (None otherwise).
    """

    path: Path
    params: dict[str, float]
    robot_id: str
    recorded_at: str
    outcome: str | None
    notes: str
    synthetic: bool
    raw: bytes
    warnings: list[str]
    disturbance_at: float | None = None
    trial_start_at: float | None = None
    trigger: Trigger | None = None


def sidecar_path_for(path: Path) -> Path:
    """Sidecar of a log: ``trial_003.csv``, ``.mcap`` or folder ``trial_003`` -> ``trial_003.json`` beside it;
    a bag file inside a bag folder without a sidecar of its own -> the folder's sidecar."""
    name = path.name if path.is_dir() else path.stem
    own = path.parent / f"{name}.json"
    if not path.is_dir() and not own.is_file() and (path.parent / "metadata.yaml").is_file():
        return path.parent.parent / f"{path.parent.name}.json"
    return own


def check_size(path: Path, size: int, scenario: Scenario) -> None:
    """Refuse a log over ``[hardware].max_file_mb`` (10^6 bytes per MB) or an empty one, before reading it."""
    limit = scenario.hardware.max_file_mb * 1e6
    if size > limit:
        raise LogError(
            f"{path}: {size / 1e6:.1f} MB is over the limit of {scenario.hardware.max_file_mb:g} MB "
            "([hardware].max_file_mb); split the log per trial or raise the limit in the scenario"
        )
    if size == 0:
        raise LogError(f"{path}: the file is empty; give the trial's log with a header row and data rows")


def read_sidecar(scenario: Scenario, path: Path) -> Sidecar:
    """Read and validate a sidecar JSON (see the module docstring for its fields).

    Raises:
        LogError: missing, too big, not UTF-8, not JSON, wrong types, parameters missing, unknown or
            outside the scenario's bounds.
    """
    if not path.is_file():
        raise LogError(
            f"{path}: sidecar JSON is missing; write it beside the log with the same stem: "
            '{"params": {...}, "robot_id": "...", "recorded_at": "2024-05-01T10:00:00", "outcome": null}'
        )
    size = path.stat().st_size
    if size > MAX_SIDECAR_BYTES:
        raise LogError(
            f"{path}: sidecar is {size} bytes, more than {MAX_SIDECAR_BYTES}; it should hold a few fields"
        )
    raw = path.read_bytes()
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line, col = _line_col(raw, exc.start)
        raise LogError(
            f"{where(path, line, col)}: sidecar is not UTF-8 text; save it as UTF-8 JSON"
        ) from None

    def no_constants(name: str) -> Any:
        raise ValueError(f"{name} is not a JSON number")

    try:
        data = json.loads(text, parse_constant=no_constants)
    except json.JSONDecodeError as exc:
        raise LogError(
            f"{where(path, exc.lineno, exc.colno)}: sidecar is not valid JSON ({exc.msg}); fix it there"
        ) from None
    except RecursionError:
        raise LogError(f"{path}: sidecar JSON is nested too deeply; it should be one flat object") from None
    except ValueError as exc:
        raise LogError(
            f"{path}: sidecar JSON holds an unusable value ({exc}); use plain finite numbers"
        ) from None
    if not isinstance(data, dict):
        raise LogError(
            f'{path}: sidecar must be a JSON object {{"params": {{...}}, ...}}, got {type(data).__name__}'
        )

    def fail(key: str, problem: str, fix: str) -> LogError:
        return LogError(f"{path}: key '{key}': {problem}; {fix}")

    params = data.get("params")
    if params is None:
        raise fail("params", "is missing", "give the trial's parameter values by name")
    if not isinstance(params, dict):
        raise fail(
            "params",
            f"must be an object of name: value, got {type(params).__name__}",
            'write {"name": value, ...}',
        )
    try:
        vector = scenario.params_from_mapping(params, source=f"{path}: key 'params'")
    except GapgaugeError as exc:
        raise LogError(str(exc)) from None
    values = scenario.params_to_mapping(vector)
    warnings = []
    outside = [p.name for p in scenario.parameters if not p.safe_low <= values[p.name] <= p.safe_high]
    if outside:
        warnings.append(f"{path}: parameter(s) {', '.join(outside)} outside the safe bounds for hardware")

    robot_id = data.get("robot_id")
    if not isinstance(robot_id, str) or not robot_id.strip() or len(robot_id) > 200:
        raise fail(
            "robot_id",
            f"must be a non-empty string of at most 200 characters, got {short_repr(robot_id)}",
            'name the robot, e.g. "robot_id": "biped-02"',
        )
    recorded_at = data.get("recorded_at")
    if not isinstance(recorded_at, str) or len(recorded_at) > 64:
        raise fail(
            "recorded_at",
            f"must be an ISO-8601 string, got {short_repr(recorded_at)}",
            'e.g. "recorded_at": "2024-05-01T10:32:00+02:00"',
        )
    try:
        datetime.fromisoformat(recorded_at.replace("Z", "+00:00"))
    except ValueError:
        raise fail(
            "recorded_at",
            f"{short_repr(recorded_at)} is not an ISO-8601 date and time",
            'e.g. "recorded_at": "2024-05-01T10:32:00+02:00"',
        ) from None
    outcome = data.get("outcome")
    if outcome is not None and outcome not in OUTCOMES:
        raise fail("outcome", f'must be "stood", "fell" or null, got {short_repr(outcome)}', "use one of those")
    notes = data.get("notes", "")
    if notes is None:
        notes = ""
    if not isinstance(notes, str) or len(notes) > 10_000:
        raise fail(
            "notes",
            f"must be a string of at most 10000 characters, got {short_repr(notes)}",
            "write the notes as text",
        )
    synthetic = data.get("synthetic", False)
    if not isinstance(synthetic, bool):
        raise fail("synthetic", f"must be true or false, got {short_repr(synthetic)}", "use a JSON boolean")
    extra = [k for k in data if k not in SIDECAR_KEYS]
    if extra:
        warnings.append(
            f"{path}: sidecar key(s) {', '.join(map(repr, extra[:5]))} not in the contract, ignored"
        )
    given = [k for k in ALIGNMENT_KEYS if data.get(k) is not None]
    if len(given) > 1:
        raise fail(given[1], f"is given together with '{given[0]}'", "give one way of placing the trial in time")
    times = {}
    for key in ("disturbance_at", "trial_start_at"):
        value = data.get(key)
        if value is not None and (
            isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value)
        ):
            raise fail(key, f"must be a number of seconds on the log's clock, got {short_repr(value)}",
                       f'e.g. "{key}": 0.8')
        times[key] = None if value is None else float(value)
    trigger = _trigger(data.get("trigger"), fail)
    return Sidecar(path, values, robot_id, recorded_at, outcome, notes, synthetic, raw, warnings,
                   times["disturbance_at"], times["trial_start_at"], trigger)


def _trigger(value: Any, fail: Any) -> Trigger | None:
    if value is None:
        return None
    fix = 'name a column, e.g. "trigger": "push_on", or a bag topic: {"topic": "/push", "field": "data"}'
    if isinstance(value, str) and value.strip() and len(value) <= 200:
        return Trigger(value.strip())
    if isinstance(value, dict) and set(value) <= {"topic", "field"} and isinstance(value.get("topic"), str):
        field = value.get("field")
        if field is None or (isinstance(field, str) and field.strip()):
            return Trigger(value["topic"].strip(), None if field is None else field.strip())
    raise fail("trigger", f"must name a column or a topic, got {short_repr(value)}", fix)


def _line_col(raw: bytes, offset: int) -> tuple[int, int]:
    before = raw[:offset]
    line = before.count(b"\n") + 1
    return line, offset - (before.rfind(b"\n") + 1) + 1


def short_repr(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."
