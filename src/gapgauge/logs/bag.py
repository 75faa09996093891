"""ROS 2 bags and MCAP files as hardware logs, read with the rosbags library (the ``rosbag`` extra).

The scenario's ``[hardware.bag]`` table names, for each trajectory channel, the topic, the field of
the message and its unit::

    [hardware.bag]
    ankle_angle = { topic = "/joint_states", field = "position[0]", unit = "rad" }
    com_z = { topic = "/com", field = "point.z", unit = "m" }

A field is a dotted path of message attributes, each optionally indexed (``position[0]``,
``wrench.force.z``). A sample's time is the message's ``header.stamp`` when it has one, else the time
the bag recorded it; time is counted from the earliest sample of any mapped topic (the start of the
trial). Each topic is checked like a CSV log (finite, increasing, no long gaps, fast enough, plausible)
and resampled onto the common time base. The sidecar JSON has the bag's stem: ``trial_007/`` (a
folder) or ``trial_007.mcap`` -> ``trial_007.json``.
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import LogError
from ..scenario import BagChannel, Scenario
from ..trajectory import CHANNELS
from ..units import factor
from .common import LogTrial, Stream, build_trial, check_size, read_sidecar, sidecar_path_for

_FIELD = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\[\d+\])?(\.[A-Za-z_][A-Za-z0-9_]*(\[\d+\])?)*$")
_TOKEN = re.compile(r"([A-Za-z_][A-Za-z0-9_]*)|\[(\d+)\]")
#: the type definitions used when a bag carries none (ROS 2 Humble's standard messages)
DEFAULT_TYPESTORE = "ros2_humble"


def parse_field(text: str) -> list[str | int]:
    """Split a field path (``"position[0]"``, ``"pose.position.x"``) into attribute names and indices."""
    if not _FIELD.match(text):
        raise ValueError(text)
    return [name if name else int(index) for name, index in _TOKEN.findall(text)]


def field_value(message: Any, path: list[str | int]) -> float:
    """The number at ``path`` in a deserialised message; raises ``LookupError`` or ``TypeError``."""
    value = message
    for step in path:
        if isinstance(step, int):
            value = value[step]
        else:
            if step.startswith("_") or not hasattr(value, step):
                raise AttributeError(step)
            value = getattr(value, step)
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(type(value).__name__)
    return float(value)


def bag_sha256(path: Path) -> Any:
    """sha256 over a bag's bytes: a file, or every file of a folder in name order (with its relative name)."""
    hasher = hashlib.sha256()
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    for f in files:
        if path.is_dir():
            hasher.update(str(f.relative_to(path)).encode() + b"\0")
        with f.open("rb") as fh:
            for chunk in iter(lambda fh=fh: fh.read(1 << 20), b""):
                hasher.update(chunk)
    return hasher


def read_bag(scenario: Scenario, path: str | Path) -> LogTrial:
    """Read a ROS 2 bag (folder, ``.mcap`` or ``.db3``) and its sidecar into a :class:`LogTrial` in SI.

    Raises:
        LogError: rosbags not installed, no ``[hardware.bag]`` in the scenario, a topic or field missing,
            an unreadable bag, or any of the sample checks of :func:`gapgauge.logs.read_log`.
    """
    path = Path(path)
    try:
        # deferred: rosbags is the optional ``rosbag`` extra, needed only when a bag is read
        from rosbags.highlevel import AnyReader
        from rosbags.typesys import Stores, get_typestore
    except ImportError:
        raise LogError(
            f"{path}: reading ROS 2 bags needs the optional rosbags library; install it with "
            "pip install 'gapgauge[rosbag]', or export the log as CSV"
        ) from None
    if path.is_dir() and not (path / "metadata.yaml").is_file():
        raise LogError(
            f"{path}: a folder without metadata.yaml is not a ROS 2 bag; give the bag folder, "
            "an .mcap or .db3 file, or a CSV log"
        )
    hw = scenario.hardware
    if not hw.bag:
        raise LogError(
            f"{path}: the scenario {scenario.path} has no [hardware.bag] table; map each channel to "
            'a topic and field there, e.g. ankle_angle = { topic = "/joint_states", '
            'field = "position[0]", unit = "rad" }'
        )
    size = (
        sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
        if path.is_dir()
        else path.stat().st_size
    )
    check_size(path, size, scenario)
    sidecar = read_sidecar(scenario, sidecar_path_for(path))

    fields: dict[str, list[str | int]] = {}
    for ch in hw.bag:
        try:
            fields[ch.channel] = parse_field(ch.field)
        except ValueError:
            raise LogError(
                f"{scenario.path}: key 'hardware.bag.{ch.channel}.field': {ch.field!r} is not a field "
                'path; write attribute names with optional indices, e.g. "position[0]"'
            ) from None
    by_topic: dict[str, list[BagChannel]] = {}
    for ch in hw.bag:
        by_topic.setdefault(ch.topic, []).append(ch)

    raw: dict[str, tuple[list[int], dict[str, list[float]]]] = {
        t: ([], {c.channel: [] for c in chs}) for t, chs in by_topic.items()
    }
    try:
        with AnyReader([path], default_typestore=get_typestore(Stores(DEFAULT_TYPESTORE))) as reader:
            topics = reader.topics
            missing = [t for t in by_topic if t not in topics]
            if missing:
                raise LogError(
                    f"{path}: topic(s) {', '.join(missing)} that [hardware.bag] maps are not in the bag "
                    f"(it has {', '.join(sorted(topics)) or 'no topics'}); record them or fix the scenario"
                )
            ignored = sorted(t for t in topics if t not in by_topic)
            connections = [c for c in reader.connections if c.topic in by_topic]
            counts = {t: 0 for t in by_topic}
            for connection, stamp, data in reader.messages(connections=connections):
                topic = connection.topic
                counts[topic] += 1
                message = reader.deserialize(data, connection.msgtype)
                times, values = raw[topic]
                times.append(_stamp_ns(message, stamp))
                for ch in by_topic[topic]:
                    try:
                        values[ch.channel].append(field_value(message, fields[ch.channel]))
                    except (LookupError, TypeError, AttributeError) as exc:
                        raise LogError(
                            f"{path}: topic {topic!r} message {counts[topic]}: field {ch.field!r} "
                            f"({connection.msgtype}) is not there or not a number "
                            f"({type(exc).__name__}: {exc}); "
                            f"fix hardware.bag.{ch.channel}.field in the scenario"
                        ) from None
    except LogError:
        raise
    except Exception as exc:  # rosbags raises many types for a damaged or foreign file; all mean the same here
        raise LogError(
            f"{path}: not a readable ROS 2 bag ({type(exc).__name__}: {_first_line(exc)}); "
            "check the file was copied completely, or export the log as CSV"
        ) from None

    empty = [t for t, (times, _) in raw.items() if not times]
    if empty:
        raise LogError(f"{path}: topic(s) {', '.join(empty)} have no messages; record the trial with them")
    origin = min(min(times) for times, _ in raw.values())
    streams = []
    for topic, (times, values) in raw.items():
        units = {c.channel: c.unit for c in by_topic[topic]}
        labels = {c.channel: f"{topic} {c.field}" for c in by_topic[topic]}
        labels["time"] = f"{topic} stamp"
        streams.append(
            Stream(
                t=(np.array(times, dtype=np.int64) - origin) * 1e-9,
                values={
                    ch: np.array(v, dtype=float) * factor(units[ch], CHANNELS[ch][0])
                    for ch, v in values.items()
                },
                units=units | {"time": "s"},
                labels=labels,
                locate=lambda i, topic=topic: f"{path}: topic {topic!r} message {i + 1}",
                locate_cell=lambda i, ch, topic=topic, labels=labels: (
                    f"{path}: topic {topic!r} message {i + 1} field {labels.get(ch, ch)!r}"
                ),
            )
        )
    hasher = bag_sha256(path)
    hasher.update(b"\n--sidecar--\n")
    hasher.update(sidecar.raw)
    return build_trial(scenario, path, streams, sidecar, hasher.hexdigest(), ignored)


def _stamp_ns(message: Any, bag_time_ns: int) -> int:
    header = getattr(message, "header", None)
    stamp = getattr(header, "stamp", None)
    if stamp is not None and hasattr(stamp, "sec") and hasattr(stamp, "nanosec"):
        ns = int(stamp.sec) * 1_000_000_000 + int(stamp.nanosec)
        if ns > 0:  # publishers that leave the header empty get the bag's time
            return ns
    return int(bag_time_ns)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0][:200] if text else "no detail"
