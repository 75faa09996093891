"""Placing a trial in time: the onset estimated from stand-in logs with a known clock shift, CSV logs on an
offset clock, late-starting ROS 2 bags (written by the rosbags library), sidecar times and triggers, header
stamps of zero.

Outside checks: the stand-in robot's disturbance starts at the scenario's onset (0.8 s) on its own clock,
so a log whose time column the test moves by a known amount must be placed at 0.8 s plus that amount,
within one sample period plus the uncertainty the estimate states; the bags are written with rosbags's own
Writer and typestore; features are compared with those of the same log placed by a stated time.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from gapgauge.app.ingest import trial_record
from gapgauge.errors import LogError
from gapgauge.logs import read_log
from gapgauge.scenario import load_scenario
from gapgauge.sim.standin import run_standin
from test_logs_support import ROOT, convert_log, csv_columns

RATE = 500.0  # Hz: the scenarios' sample_rate_hz and the stand-in profiles' logging rate
ONSET = 0.8  # s: [task].onset of both bundled scenarios (the stand-in's clock starts at the trial's start)
EPOCH_NS = 1_714_559_520 * 10**9  # a wall-clock stamp, as a robot's bag carries


def stood(paths):
    """The logs whose trial stood (the stand-in's sidecar outcome is what the simulation did)."""
    return [p for p in paths if json.loads(p.with_suffix(".json").read_text())["outcome"] == "stood"]


@pytest.fixture(scope="module")
def push(tmp_path_factory):
    scenario = load_scenario(ROOT / "scenarios" / "push_recovery.toml")
    out = tmp_path_factory.mktemp("push_logs")
    paths = []
    for profile in ("close", "heavy_slippery", "weak_laggy"):
        paths += run_standin(scenario, ROOT / f"scenarios/standin/{profile}.toml", design=4, out_dir=out, seed=11)
    return scenario, stood(paths)


@pytest.fixture(scope="module")
def platform(tmp_path_factory):
    scenario = load_scenario(ROOT / "scenarios" / "platform_shift.toml")
    out = tmp_path_factory.mktemp("platform_logs")
    paths = []
    for profile in ("close", "heavy_slippery", "weak_laggy"):
        paths += run_standin(scenario, ROOT / f"scenarios/standin/{profile}.toml", design=4, out_dir=out, seed=12)
    return scenario, stood(paths)


@pytest.mark.parametrize("which", ["push", "platform"])
def test_the_onset_of_a_log_on_a_shifted_clock_is_found_within_a_period_plus_its_stated_uncertainty(
    tmp_path, request, which
):
    scenario, paths = request.getfixturevalue(which)
    assert len(paths) >= 6
    placed = 0
    for i, path in enumerate(paths):
        shift = (0.137, 0.45, 1.3)[i % 3]  # s: the logger's clock started this much before the trial
        moved = convert_log(path, tmp_path / f"moved_{i}.csv", {"time_ms": lambda t, s=shift: t + 1000.0 * s})
        a = read_log(scenario, moved).alignment
        assert a.placed
        if a.source == "log_clock":  # the onset could not be estimated: the CSV's own clock was kept
            assert "could not be checked" in a.reason
            continue
        placed += 1
        assert a.source == "estimate"
        assert abs(a.onset_log_s - (ONSET + shift)) <= 1.0 / RATE + a.uncertainty_s, (path, a)
        assert a.uncertainty_s <= scenario.hardware.onset_tolerance_s
    assert placed >= 0.8 * len(paths)


def features_of(scenario, path) -> dict[str, float]:
    return trial_record(scenario, read_log(scenario, path)).features


def shifts(uncertainty: float) -> np.ndarray:
    """Onsets around the true one, s: from minus to plus (one sample period + the stated uncertainty), the
    band the estimate is checked to lie in, on a grid fine enough for features that are not monotonic in it."""
    reach = 1.0 / RATE + uncertainty
    return np.linspace(-reach, reach, 11)


def assert_within_envelope(got: dict, references: list[dict], what: str) -> None:
    """Each feature of ``got`` lies between the smallest and largest of the references (the same log placed
    by a stated onset across :func:`shifts`), with a hair for rounding."""
    for name, value in got.items():
        values = [r[name] for r in references]
        lo, hi = min(values), max(values)
        slack = 1e-6 * max(abs(lo), abs(hi), 1e-9)
        assert lo - slack <= value <= hi + slack, (what, name, value, values)


@pytest.mark.parametrize("offset", [0.25, -0.3], ids=["clock-early", "logging-started-late"])
def test_a_csv_on_an_offset_clock_gives_the_features_of_the_aligned_log_within_the_onset_uncertainty(
    tmp_path, push, offset
):
    scenario, paths = push
    path = paths[0]
    header, data = csv_columns(path)
    keep = data[:, header.index("time_ms")] / 1000.0 + offset >= 0.0  # a late start loses the first samples
    moved = convert_log(path, tmp_path / "offset.csv", {"time_ms": lambda t: t + 1000.0 * offset})
    if not keep.all():
        rows = moved.read_text().splitlines()
        moved.write_text("\n".join([rows[0]] + [r for r, k in zip(rows[1:], keep, strict=True) if k]) + "\n")
    log = read_log(scenario, moved)
    a = log.alignment
    assert a.source == "estimate" and abs(a.onset_log_s - (ONSET + offset)) <= 1.0 / RATE + a.uncertainty_s
    references = []
    for delta in shifts(a.uncertainty_s):  # the original log placed by a stated onset
        ref = convert_log(path, tmp_path / "ref.csv", {}, {"disturbance_at": ONSET + delta})
        references.append(features_of(scenario, ref))
    assert_within_envelope(trial_record(scenario, log).features, references, f"offset {offset}")


# ---- ROS 2 bags -------------------------------------------------------------------------------------------

rosbags = pytest.importorskip("rosbags")
from rosbags.rosbag2 import StoragePlugin, Writer  # noqa: E402
from rosbags.typesys import Stores, get_typestore  # noqa: E402

#: the push scenario's channels as topics; units as the stand-in's CSV columns declare them
BAG_MAP = """
[hardware.bag]
ankle_angle = { topic = "/joint_states", field = "position[0]", unit = "deg" }
knee_angle = { topic = "/joint_states", field = "position[1]", unit = "deg" }
hip_angle = { topic = "/joint_states", field = "position[2]", unit = "deg" }
ankle_rate = { topic = "/joint_states", field = "velocity[0]", unit = "deg/s" }
knee_rate = { topic = "/joint_states", field = "velocity[1]", unit = "deg/s" }
hip_rate = { topic = "/joint_states", field = "velocity[2]", unit = "deg/s" }
ankle_torque = { topic = "/joint_states", field = "effort[0]", unit = "N m" }
knee_torque = { topic = "/joint_states", field = "effort[1]", unit = "N m" }
hip_torque = { topic = "/joint_states", field = "effort[2]", unit = "N m" }
heel_force = { topic = "/feet", field = "wrench.force.x", unit = "N" }
toe_force = { topic = "/feet", field = "wrench.force.y", unit = "N" }
heel_x = { topic = "/feet", field = "wrench.torque.x", unit = "mm" }
toe_x = { topic = "/feet", field = "wrench.torque.y", unit = "mm" }
com_x = { topic = "/com", field = "point.x", unit = "mm" }
com_z = { topic = "/com", field = "point.z", unit = "mm" }
com_vx = { topic = "/com_velocity", field = "vector.x", unit = "m/s" }
com_vz = { topic = "/com_velocity", field = "vector.z", unit = "m/s" }
trunk_pitch = { topic = "/com_velocity", field = "vector.y", unit = "deg" }
"""


def bag_only_scenario(tmp: Path, stamp: str = "header"):
    """push_recovery with [hardware.columns] and [hardware.time] replaced by BAG_MAP (a bag-only scenario)."""
    (tmp / "models").mkdir(parents=True, exist_ok=True)
    (tmp / "models" / "planar_body.xml").write_bytes((ROOT / "models" / "planar_body.xml").read_bytes())
    text = (ROOT / "scenarios" / "push_recovery.toml").read_text()
    start, end = text.index("[hardware.time]"), text.index("[hardware.plausible]")
    table = BAG_MAP if stamp == "header" else BAG_MAP.replace('unit = "', f'stamp = "{stamp}", unit = "')
    path = tmp / "scenarios" / "bag_only.toml"
    path.parent.mkdir(exist_ok=True)
    path.write_text(text[:start] + table + "\n" + text[end:])
    return load_scenario(path)


def write_bag_from_csv(csv_path: Path, folder: Path, side: dict, *, start_s: float = 0.0, header_ns: int = EPOCH_NS,
                       record_ns: int = EPOCH_NS, zero_stamps: bool = False,
                       storage=StoragePlugin.SQLITE3, button_at: float | None = None) -> Path:
    """The stand-in CSV's samples as ROS 2 messages (rosbags's Writer), from trial time ``start_s`` on; header
    stamps ``header_ns`` + t (or all zero), recorded at ``record_ns`` + t; with ``button_at`` also a
    ``/push_button`` topic (std_msgs/Float64, 0 then 1 from that trial time on). The sidecar ``side`` beside it."""
    ts = get_typestore(Stores.ROS2_HUMBLE)
    T = ts.types
    Time, Header = T["builtin_interfaces/msg/Time"], T["std_msgs/msg/Header"]
    JointState, Vector3 = T["sensor_msgs/msg/JointState"], T["geometry_msgs/msg/Vector3"]
    Wrench, WrenchStamped = T["geometry_msgs/msg/Wrench"], T["geometry_msgs/msg/WrenchStamped"]
    Vector3Stamped, Point, PointStamped = (T["geometry_msgs/msg/Vector3Stamped"], T["geometry_msgs/msg/Point"],
                                           T["geometry_msgs/msg/PointStamped"])
    header_row, data = csv_columns(csv_path)
    col = {name: data[:, i] for i, name in enumerate(header_row)}
    t = col["time_ms"] / 1000.0
    with Writer(folder, version=9, storage_plugin=storage) as writer:
        types = {"/joint_states": JointState, "/feet": WrenchStamped, "/com": PointStamped,
                 "/com_velocity": Vector3Stamped}
        if button_at is not None:
            types["/push_button"] = T["std_msgs/msg/Float64"]
        conn = {name: writer.add_connection(name, typ.__msgtype__, typestore=ts) for name, typ in types.items()}
        for k in np.flatnonzero(t >= start_s - 1e-12):
            ns = 0 if zero_stamps else header_ns + int(round(t[k] * 1e9))
            header = Header(stamp=Time(sec=ns // 10**9, nanosec=ns % 10**9), frame_id="base")
            msgs = {
                "/joint_states": JointState(
                    header=header, name=["ankle", "knee", "hip"],
                    position=np.array([col["ankle_pos_deg"][k], col["knee_pos_deg"][k], col["hip_pos_deg"][k]]),
                    velocity=np.array([col["ankle_vel_dps"][k], col["knee_vel_dps"][k], col["hip_vel_dps"][k]]),
                    effort=np.array([col["ankle_tau"][k], col["knee_tau"][k], col["hip_tau"][k]])),
                "/feet": WrenchStamped(header=header, wrench=Wrench(
                    force=Vector3(x=col["heel_fz"][k], y=col["toe_fz"][k], z=0.0),
                    torque=Vector3(x=col["heel_x_mm"][k], y=col["toe_x_mm"][k], z=0.0))),
                "/com": PointStamped(header=header, point=Point(x=col["com_x_mm"][k], y=0.0, z=col["com_z_mm"][k])),
                "/com_velocity": Vector3Stamped(header=header, vector=Vector3(
                    x=col["com_vx"][k], y=col["trunk_pitch_deg"][k], z=col["com_vz"][k])),
            }
            if button_at is not None:
                msgs["/push_button"] = types["/push_button"](data=1.0 if t[k] >= button_at else 0.0)
            for name, msg in msgs.items():
                writer.write(conn[name], record_ns + int(round(t[k] * 1e9)), ts.serialize_cdr(msg, msg.__msgtype__))
    (folder.parent / f"{folder.name}.json").write_text(json.dumps(side))
    return folder


def sidecar_of(csv_path: Path, **extra) -> dict:
    return json.loads(csv_path.with_suffix(".json").read_text()) | extra


@pytest.fixture(scope="module")
def bag_scenario(tmp_path_factory):
    return bag_only_scenario(tmp_path_factory.mktemp("bag_only"))


def test_a_bag_only_scenario_loads_and_refuses_a_csv_naming_hardware_bag(tmp_path, bag_scenario, push):
    assert bag_scenario.hardware.columns == () and len(bag_scenario.hardware.bag) == 18
    with pytest.raises(LogError, match=r"\[hardware.bag\] only"):
        read_log(bag_scenario, push[1][0])


def test_a_late_starting_bag_gives_the_features_of_the_aligned_bag_within_the_onset_uncertainty(
    tmp_path, bag_scenario, push
):
    scenario, (path, *_) = bag_scenario, push[1]
    late = read_log(scenario, write_bag_from_csv(path, tmp_path / "late", sidecar_of(path), start_s=0.3))
    a = late.alignment
    assert a.source == "estimate" and a.placed  # never counted silently from the first message (0.3 s)
    assert abs(a.onset_log_s - (EPOCH_NS * 1e-9 + ONSET)) <= 1.0 / RATE + a.uncertainty_s
    assert late.trajectory.t[0] == pytest.approx(0.3, abs=1.0 / RATE + a.uncertainty_s)
    references = []
    for i, delta in enumerate(shifts(a.uncertainty_s)):
        side = sidecar_of(path, trial_start_at=EPOCH_NS * 1e-9 + delta)  # the whole bag, its start stated
        full = read_log(scenario, write_bag_from_csv(path, tmp_path / f"full{i}", side))
        assert full.alignment.source == "trial_start_at"
        references.append(trial_record(scenario, full).features)
    assert_within_envelope(trial_record(scenario, late).features, references, "late bag")


def test_header_stamps_of_zero_are_stamps_not_missing(tmp_path, bag_scenario, push):
    path = push[1][0]
    # a bag recorded on simulated time: header stamps start at 0, the recorder's clock at the wall-clock epoch
    bag = write_bag_from_csv(path, tmp_path / "simtime", sidecar_of(path, trial_start_at=0.0), header_ns=0)
    log = read_log(bag_scenario, bag)
    assert log.alignment.source == "trial_start_at" and log.alignment.onset_log_s == pytest.approx(ONSET)
    assert log.trajectory.t[0] == 0.0  # the first stamp (0 ns) is the scenario's zero


def test_all_zero_header_stamps_are_refused_with_the_fix_and_read_with_stamp_record(tmp_path, push):
    path = push[1][0]
    side = sidecar_of(path, trial_start_at=EPOCH_NS * 1e-9)
    bag = write_bag_from_csv(path, tmp_path / "unstamped", side, zero_stamps=True)
    with pytest.raises(LogError) as info:
        read_log(bag_only_scenario(tmp_path / "sc_header"), bag)
    assert "repeats" in str(info.value) and 'stamp = "record"' in str(info.value)
    log = read_log(bag_only_scenario(tmp_path / "sc_record", stamp="record"), bag)
    assert log.alignment.source == "trial_start_at"


def test_a_bag_folder_and_the_file_inside_it_are_one_trial(tmp_path, bag_scenario, push):
    path = push[1][0]
    folder = write_bag_from_csv(path, tmp_path / "trial_007", sidecar_of(path), storage=StoragePlugin.MCAP)
    (inner,) = folder.glob("*.mcap")  # no sidecar of its own: the folder's trial_007.json is its sidecar
    from_folder, from_file = read_log(bag_scenario, folder), read_log(bag_scenario, inner)
    assert from_folder.sha256 == from_file.sha256
    assert from_file.sidecar_path == tmp_path / "trial_007.json"


def test_a_sidecar_disturbance_time_or_trigger_column_places_the_trial(tmp_path, push):
    scenario, (path, *_) = push
    stated = read_log(scenario, convert_log(path, tmp_path / "stated.csv", {"time_ms": lambda t: t + 2000.0},
                                            {"disturbance_at": 2.8})).alignment
    assert (stated.source, stated.onset_log_s, stated.shift_s) == ("disturbance_at", 2.8, pytest.approx(2.0))
    # a trigger column: 0 before the push, 5 (volts) from the first sample at or after 2.8 s
    trig = convert_log(path, tmp_path / "trig.csv", {"time_ms": lambda t: t + 2000.0})
    header, data = csv_columns(trig)
    t = data[:, header.index("time_ms")] / 1000.0
    rows = trig.read_text().splitlines()
    volts = np.where(t >= 2.8, 5.0, 0.0)
    trig.write_text("\n".join([rows[0] + ",push_on"] + [f"{r},{v}" for r, v in zip(rows[1:], volts, strict=True)]))
    trig.with_suffix(".json").write_text(json.dumps(sidecar_of(path, trigger="push_on")))
    a = read_log(scenario, trig).alignment
    k = int(np.argmax(t >= 2.8))
    assert a.source == "trigger" and a.onset_log_s == t[k] and a.uncertainty_s == pytest.approx(t[k] - t[k - 1])


def test_two_ways_of_placing_a_trial_in_one_sidecar_are_refused(tmp_path, push):
    scenario, (path, *_) = push
    both = convert_log(path, tmp_path / "both.csv", {}, {"disturbance_at": 0.8, "trial_start_at": 0.0})
    with pytest.raises(LogError, match="key 'trial_start_at': is given together with 'disturbance_at'"):
        read_log(scenario, both)


def test_a_bag_trigger_topic_places_the_trial_at_its_first_sample_past_half_range(tmp_path, bag_scenario, push):
    path = push[1][0]
    side = sidecar_of(path, trigger={"topic": "/push_button", "field": "data"})
    bag = write_bag_from_csv(path, tmp_path / "button", side, button_at=ONSET)
    log = read_log(bag_scenario, bag)
    a = log.alignment
    t = csv_columns(path)[1][:, 0] / 1000.0
    k = int(np.argmax(t >= ONSET))  # the button's first 1: the bag recorded it at EPOCH + t[k]
    assert a.source == "trigger" and a.onset_log_s == pytest.approx(EPOCH_NS * 1e-9 + t[k], abs=1e-6)
    assert a.uncertainty_s == pytest.approx(t[k] - t[k - 1], abs=1e-6)
    assert "/push_button" not in log.ignored_columns
