"""ROS 2 bags and MCAP files as hardware logs, read with the rosbags library (the ``rosbag`` extra).

The scenario's ``[hardware.bag]`` table names, for each trajectory channel, the topic, the field of
the message and its unit::

    [hardware.bag]
    ankle_angle = { topic = "/joint_states", field = "position[0]", unit = "rad" }
    com_z = { topic = "/com", field = "point.z", unit = "m" }

A field is a dotted path of message attributes, each optionally indexed (``position[0]``,
``wrench.force.z``). A sample's time is the message's ``header.stamp`` when it has one (a stamp of zero
is a stamp too: a bag recorded on simulated time starts there), else the time the bag recorded it;
``stamp = "record"`` in a channel's entry takes the recorded time even when the message has a header
(for a publisher that leaves the header unset). A bag's clock is not the scenario's: the trial is placed
in time by the sidecar's ``disturbance_at``, ``trial_start_at`` or ``trigger``, or else by the onset
estimated from the log, never silently from the first message (:mod:`gapgauge.logs.align`). Each topic is
checked like a CSV log (:mod:`gapgauge.logs.checks`) and resampled onto the common time base.

The sidecar JSON has the bag's stem: ``trial_007/`` (a folder) or ``trial_007.mcap`` ->
``trial_007.json``; a file inside a bag folder without its own sidecar uses the folder's. A trial's
identity is its content (every message's topic, type, time and bytes, then the sidecar's bytes), not its
path: the folder and the file inside it are the same trial.
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import LogError
from ..scenario import BagChannel, Scenario
from ..trajectory import channel_dimension
from ..units import factor
from .common import LogTrial, Stream, TriggerSamples, build_trial
from .sidecar import check_size, read_sidecar, sidecar_path_for

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


def _message_digest(hasher: Any, topic: str, msgtype: str, stamp: int, data: bytes) -> None:
    """Feed one message to the trial's content hash (its length first, so messages cannot run together)."""
    head = f"{topic}\0{msgtype}\0{int(stamp)}\0{len(data)}\0".encode()
    hasher.update(head)
    hasher.update(bytes(data))


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

    trigger = sidecar.trigger
    trigger_field = None
    if trigger is not None and trigger.field is not None:
        try:
            trigger_field = parse_field(trigger.field)
        except ValueError:
            raise LogError(
                f"{sidecar.path}: key 'trigger': field {trigger.field!r} is not a field path; write attribute "
                'names with optional indices, e.g. "data"'
            ) from None
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
    record = {t: any(c.stamp == "record" for c in chs) for t, chs in by_topic.items()}
    trigger_times: list[int] = []
    trigger_values: list[float] = []
    hasher = hashlib.sha256()
    try:
        with AnyReader([path], default_typestore=get_typestore(Stores(DEFAULT_TYPESTORE))) as reader:
            topics = reader.topics
            missing = [t for t in by_topic if t not in topics]
            if missing:
                raise LogError(
                    f"{path}: topic(s) {', '.join(missing)} that [hardware.bag] maps are not in the bag "
                    f"(it has {', '.join(sorted(topics)) or 'no topics'}); record them or fix the scenario"
                )
            if trigger is not None and trigger.name not in topics:
                raise LogError(
                    f"{sidecar.path}: key 'trigger': topic {trigger.name!r} is not in the bag {path} (it has "
                    f"{', '.join(sorted(topics)) or 'no topics'}); name a topic of the bag"
                )
            wanted_topics = set(by_topic) | ({trigger.name} if trigger is not None else set())
            ignored = sorted(t for t in topics if t not in wanted_topics)
            counts = {t: 0 for t in wanted_topics}
            for connection, stamp, data in reader.messages():
                topic = connection.topic
                _message_digest(hasher, topic, connection.msgtype, stamp, data)
                if topic not in wanted_topics:
                    continue
                counts[topic] += 1
                message = reader.deserialize(data, connection.msgtype)
                if trigger is not None and topic == trigger.name:
                    trigger_times.append(_stamp_ns(message, stamp, record=False))
                    if trigger_field is not None:
                        try:
                            trigger_values.append(field_value(message, trigger_field))
                        except (LookupError, TypeError, AttributeError) as exc:
                            raise LogError(
                                f"{sidecar.path}: key 'trigger': field {trigger.field!r} of topic {topic!r} "
                                f"({connection.msgtype}) is not there or not a number ({type(exc).__name__}); "
                                "name a numeric field"
                            ) from None
                if topic not in by_topic:
                    continue
                times, values = raw[topic]
                times.append(_stamp_ns(message, stamp, record=record[topic]))
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
        hint = "" if record[topic] else (
            f" (these are the messages' header stamps: if the publisher of {topic} leaves them unset, set "
            f'stamp = "record" for its channels in [hardware.bag] to use the time the bag recorded them)'
        )
        streams.append(
            Stream(
                t=(np.array(times, dtype=np.int64) - origin) * 1e-9,
                values={
                    ch: np.array(v, dtype=float) * factor(units[ch], channel_dimension(ch))
                    for ch, v in values.items()
                },
                units=units | {"time": "s"},
                labels=labels,
                locate=lambda i, topic=topic: f"{path}: topic {topic!r} message {i + 1}",
                locate_cell=lambda i, ch, topic=topic, labels=labels: (
                    f"{path}: topic {topic!r} message {i + 1} field {labels.get(ch, ch)!r}"
                ),
                table="[hardware.bag]",
                time_hint=hint,
            )
        )
    found = None
    if trigger is not None:
        label = f"topic {trigger.name!r}" + (f" field {trigger.field!r}" if trigger.field else "")
        found = TriggerSamples((np.array(trigger_times, dtype=np.int64) - origin) * 1e-9,
                               None if trigger_field is None else np.array(trigger_values, dtype=float), label)
    hasher.update(b"\n--sidecar--\n")
    hasher.update(sidecar.raw)
    return build_trial(scenario, path, streams, sidecar, hasher.hexdigest(), ignored, origin=origin * 1e-9,
                       trigger=found, log_clock_is_scenario=False)


def _stamp_ns(message: Any, bag_time_ns: int, record: bool) -> int:
    """A message's time, ns: its ``header.stamp`` when it has one (zero included), else (or with ``record``)
    the time the bag recorded it."""
    header = getattr(message, "header", None)
    stamp = getattr(header, "stamp", None)
    if not record and stamp is not None and hasattr(stamp, "sec") and hasattr(stamp, "nanosec"):
        return int(stamp.sec) * 1_000_000_000 + int(stamp.nanosec)
    return int(bag_time_ns)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0][:200] if text else "no detail"
