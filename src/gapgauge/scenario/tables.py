"""The scenario's tables, one reader each: task, parameters, physics, features, objective, success,
hardware (the channel map of CSV columns and bag topics) and shift thresholds.

Each takes a :class:`~gapgauge.scenario.reader.TableReader` over its table, validates every key (with
the key path in the message) and returns the frozen dataclass of :mod:`gapgauge.scenario.types`.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from pathlib import Path

from ..units import UNITS, units_for
from .reader import TableReader, short_repr
from .types import (
    ALL_FEATURE_NAMES,
    EXTRA_FEATURE_NAMES,
    FEATURE_NAMES,
    JOINT_ROLES,
    LATERAL_FEATURE_NAMES,
    PARAMETER_ROLES,
    PHYSICS_NAMES,
    PLANAR_BODY,
    TASK_KINDS,
    BagChannel,
    BodyMap,
    ColumnMap,
    FeatureSettings,
    Hardware,
    Objective,
    Parameter,
    PhysicsRange,
    ShiftSettings,
    Task,
)


def _direction(r: TableReader) -> tuple[float, float, float]:
    value = r.get("direction", list, [1.0, 0.0, 0.0])
    ok = len(value) == 3 and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
    norm = math.sqrt(sum(float(v) ** 2 for v in value)) if ok else 0.0
    if not ok or not math.isfinite(norm) or norm == 0 or abs(float(value[2])) > 1e-12:
        raise r.fail("direction", f"must be a horizontal [x, y, 0] vector, got {short_repr(value)}",
                     "e.g. direction = [1.0, 0.0, 0.0] (forward); it is scaled to unit length")
    return (float(value[0]) / norm, float(value[1]) / norm, 0.0)


def read_task(r: TableReader) -> Task:
    kind = r.get("kind", str)
    if kind not in TASK_KINDS:
        raise r.fail("kind", f"unknown task {kind!r}", f"use one of {', '.join(TASK_KINDS)}")
    direction = _direction(r) if kind == "push" else (1.0, 0.0, 0.0)
    task = Task(
        kind=kind,
        onset=r.number("onset", nonneg=True),
        duration=r.number("duration", positive=True),
        magnitude=r.number("magnitude"),
        body=r.get("body", str, "trunk"),
        horizon=r.number("horizon", positive=True),
        timestep=r.number("timestep", 0.002, positive=True),
        direction=direction,
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


def _joints_of(r: TableReader, role: str, joints: tuple[str, ...]) -> tuple[str, ...]:
    """The joints a parameter acts on: ``joint = "name"`` or ``joints = ["a", "b"]`` (trade names)."""
    if r.has("joint") and r.has("joints"):
        raise r.fail("joints", "is given with 'joint'", "give one of them")
    if r.has("joints"):
        names = r.get("joints", list)
        if not names or not all(isinstance(n, str) for n in names) or len(set(names)) < len(names):
            raise r.fail("joints", f"must list distinct joint names, got {short_repr(names)}", 'e.g. ["left_ankle"]')
        key = "joints"
    else:
        one = r.get("joint", str, None)
        names, key = ([] if one is None else [one]), "joint"
    if role in JOINT_ROLES:
        if not names:
            raise r.fail("joint", f"role {role!r} needs a joint, got None", f"use one of {', '.join(joints)}")
        for n in names:
            if n not in joints:
                raise r.fail(key, f"role {role!r} needs a joint, got {n!r}",
                             f"use one of {', '.join(joints)} (the actuated joints of [model.channels])")
    elif names:
        raise r.fail(key, f"role {role!r} takes no joint", "remove the key")
    return tuple(names)


def read_parameters(top: TableReader, path: Path, joints: tuple[str, ...] = PLANAR_BODY.joint_names) -> list[Parameter]:
    items = top.get("parameters", list, fix="add [[parameters]] tables, one per policy parameter")
    if not 1 <= len(items) <= 40:
        raise top.fail("parameters", f"has {len(items)} entries", "give between 1 and 40 parameters")
    out: list[Parameter] = []
    seen: set[str] = set()
    for i, item in enumerate(items):
        key = f"parameters[{i}]"
        if not isinstance(item, dict):
            raise top.fail(key, "must be a table", "write it as [[parameters]] with name, unit, low, high, ...")
        r = TableReader(path, item, key)
        name = r.get("name", str)
        if name in seen:
            raise r.fail("name", f"{name!r} appears twice", "give each parameter a distinct name")
        seen.add(name)
        role = r.get("role", str)
        if role not in PARAMETER_ROLES:
            raise r.fail("role", f"unknown role {role!r}", f"use one of {', '.join(PARAMETER_ROLES)}")
        acts_on = _joints_of(r, role, joints)
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
        out.append(Parameter(name, r.get("unit", str), low, high, safe_low, safe_high, log, role,
                             acts_on[0] if acts_on else None, nominal, acts_on))
        r.finish()
    return out


def read_physics(r: TableReader) -> list[PhysicsRange]:
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


def read_features(r: TableReader, body: BodyMap = PLANAR_BODY, lateral: bool = False) -> FeatureSettings:
    """The [features] table; ``body`` and ``lateral`` (from the compiled model) say what the body offers:
    a 3-D model adds the medio-lateral and 2-D sway features to the default list, a planar model refuses them."""
    default = [*FEATURE_NAMES, *(LATERAL_FEATURE_NAMES if lateral else ())]
    names = r.get("names", list, default)
    for n in names:
        if n not in ALL_FEATURE_NAMES:
            raise r.fail("names", f"unknown feature {n!r}", f"use names from: {', '.join(ALL_FEATURE_NAMES)}")
        needs = LATERAL_FEATURE_NAMES.get(n) or EXTRA_FEATURE_NAMES.get(n)
        if needs and not lateral:
            raise r.fail("names", f"feature {n!r} needs channel {needs!r} (medio-lateral), which a planar model "
                         "does not have", "drop it, or use a 3-D model ([model.channels] lateral = true)")
    if "fell" not in names:
        names = ["fell", *names]
    fs = FeatureSettings(
        names=tuple(names),
        fall_com_height=r.number("fall_com_height", 0.35, positive=True),
        fall_trunk_pitch=r.number("fall_trunk_pitch", 1.2, positive=True),
        recovery_speed=r.number("recovery_speed", 0.05, positive=True),
        leg_length=r.number("leg_length", 0.66, positive=True),
        joints=body.joint_names,
        contacts=tuple(c.name for c in body.contacts),
        rear=body.rear,
        front=body.front,
        lateral=lateral,
    )
    r.finish()
    return fs


def read_objective(r: TableReader, feats: FeatureSettings) -> Objective:
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


def read_success(r: TableReader) -> dict[str, float]:
    out = {}
    for name in list(r.table):
        if name not in ALL_FEATURE_NAMES or name == "fell":
            raise r.fail(
                name,
                "is not a feature",
                "bound features by name, e.g. recovery_time = 2.0 (success also needs no fall)",
            )
        out[name] = r.number(name)
    r.finish()
    return out


def _unknown_channel(r: TableReader, channel: str, channels: dict[str, tuple[str, str]]) -> Exception:
    listed = ", ".join(list(channels)[:30]) + (" ..." if len(channels) > 30 else "")
    return r.fail(channel, "is not a trajectory channel of this scenario's body", f"use channels from: {listed}")


def channel_tables(r: TableReader, channels: dict[str, tuple[str, str]]) -> Iterator[tuple[str, TableReader, str]]:
    """Each ``channel = {..., unit = ...}`` entry of a hardware table (a channel of ``channels``, the
    scenario's: name -> (dimension, meaning)), with its unit checked against the channel's dimension; the
    caller reads the other keys before the entry is finished."""
    for channel in list(r.table):
        if channel not in channels:
            raise _unknown_channel(r, channel, channels)
        c = r.table_at(channel, default_empty=False)
        unit = c.get("unit", str)
        dim = channels[channel][0]
        if unit not in UNITS or UNITS[unit][0] != dim:
            raise c.fail("unit", f"{unit!r} is not a unit of {dim}", f"use one of {', '.join(units_for(dim))}")
        yield channel, c, unit
        c.finish()
    r.finish()


def read_hardware(r: TableReader, channels: dict[str, tuple[str, str]]) -> Hardware:
    """The [hardware] table; ``channels`` are the scenario's trajectory channels (name -> dimension, meaning)."""
    # a bag-only scenario ([hardware.bag] and no [hardware.columns]) needs no CSV time column either
    bag_only = r.has("bag") and not r.has("columns")
    time_r = r.table_at("time", default_empty=bag_only)
    time_column = time_r.get("column", str, "" if bag_only else ...)
    time_unit = time_r.get("unit", str, "s")
    if time_unit not in units_for("time"):
        raise time_r.fail("unit", f"unknown time unit {time_unit!r}", f"use one of {', '.join(units_for('time'))}")
    time_r.finish()
    columns = [ColumnMap(channel, c.get("column", str), unit)
               for channel, c, unit in channel_tables(r.table_at("columns", default_empty=bag_only), channels)]
    bag = [BagChannel(channel, c.get("topic", str), c.get("field", str), unit, _bag_stamp(c))
           for channel, c, unit in channel_tables(r.table_at("bag"), channels)]
    plaus_r = r.table_at("plausible")
    plausible = {}
    for channel in list(plaus_r.table):
        if channel not in channels:
            raise _unknown_channel(plaus_r, channel, channels)
        pair = plaus_r.get(channel, list)
        if (
            len(pair) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in pair)
            or pair[0] >= pair[1]
        ):
            raise plaus_r.fail(
                channel, f"must be [low, high] in SI with low < high, got {short_repr(pair)}", "e.g. [-0.7, 0.7]"
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
        onset_tolerance_s=r.number("onset_tolerance_s", 0.01, positive=True),
    )
    if hw.lowpass_hz is not None and hw.lowpass_hz >= hw.min_rate_hz / 2:
        raise r.fail(
            "lowpass_hz",
            f"{hw.lowpass_hz} Hz is not below the Nyquist rate of min_rate_hz ({hw.min_rate_hz / 2} Hz)",
            "lower the cut-off or raise min_rate_hz",
        )
    r.finish()
    return hw


def _bag_stamp(c: TableReader) -> str:
    stamp = c.get("stamp", str, "header")
    if stamp not in ("header", "record"):
        raise c.fail("stamp", f"must be \"header\" or \"record\", got {stamp!r}",
                     'use "record" for a topic whose publisher leaves header.stamp unset')
    return stamp


def read_shift(r: TableReader) -> ShiftSettings:
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
