"""ROS 2 bags (sqlite3 and MCAP storage) as hardware logs: written here with rosbags itself, read back."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from gapgauge.errors import LogError
from gapgauge.logs import read_log
from test_logs_support import make_scenario, sidecar

rosbags = pytest.importorskip("rosbags")
from rosbags.rosbag2 import StoragePlugin, Writer  # noqa: E402
from rosbags.typesys import Stores, get_typestore  # noqa: E402

BAG_TABLE = """
[hardware.bag]
ankle_angle = { topic = "/joint_states", field = "position[0]", unit = "rad" }
knee_angle = { topic = "/joint_states", field = "position[1]", unit = "rad" }
hip_angle = { topic = "/joint_states", field = "position[2]", unit = "rad" }
ankle_rate = { topic = "/joint_states", field = "velocity[0]", unit = "rad/s" }
knee_rate = { topic = "/joint_states", field = "velocity[1]", unit = "rad/s" }
hip_rate = { topic = "/joint_states", field = "velocity[2]", unit = "rad/s" }
ankle_torque = { topic = "/joint_states", field = "effort[0]", unit = "N m" }
knee_torque = { topic = "/joint_states", field = "effort[1]", unit = "N m" }
hip_torque = { topic = "/joint_states", field = "effort[2]", unit = "N m" }
heel_force = { topic = "/heel_ft", field = "wrench.force.z", unit = "N" }
toe_force = { topic = "/toe_ft", field = "wrench.force.z", unit = "N" }
heel_x = { topic = "/heel", field = "point.x", unit = "m" }
toe_x = { topic = "/toe", field = "point.x", unit = "m" }
com_x = { topic = "/com", field = "point.x", unit = "mm" }
com_z = { topic = "/com", field = "point.z", unit = "mm" }
com_vx = { topic = "/com_velocity", field = "vector.x", unit = "m/s" }
com_vz = { topic = "/com_velocity", field = "vector.z", unit = "m/s" }
trunk_pitch = { topic = "/trunk_pitch", field = "data", unit = "deg" }
"""

RATE = 500.0  # Hz, the scenario's sample_rate_hz: the common time base is the samples themselves
START_NS = 1_700_000_000 * 10**9  # an epoch stamp: bag time is counted from the first sample


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    return make_scenario(tmp_path_factory.mktemp("bag_sc"), append=BAG_TABLE)


def signals(n: int) -> dict[str, np.ndarray]:
    t = np.arange(n) / RATE
    return {
        "ankle": 0.05 * np.sin(2 * np.pi * t),
        "knee": -0.1 + 0.02 * np.cos(3 * t),
        "hip": 0.1 + 0.0 * t,
        "heel": 200.0 + 10 * np.sin(t),
        "toe": 190.0 + 0.0 * t,
        "com_x_mm": 30.0 + 5 * np.sin(2 * t),
        "com_z_mm": 700.0 + 0.0 * t,
        "pitch_deg": 2.0 + np.sin(t),
    }


def write_bag(
    path: Path, scenario, n: int = 600, storage=StoragePlugin.SQLITE3, skip_topic: str = ""
) -> Path:
    ts = get_typestore(Stores.ROS2_HUMBLE)
    T = ts.types
    Time, Header = T["builtin_interfaces/msg/Time"], T["std_msgs/msg/Header"]
    JointState, Float64 = T["sensor_msgs/msg/JointState"], T["std_msgs/msg/Float64"]
    Wrench, WrenchStamped = T["geometry_msgs/msg/Wrench"], T["geometry_msgs/msg/WrenchStamped"]
    Vector3, Vector3Stamped = T["geometry_msgs/msg/Vector3"], T["geometry_msgs/msg/Vector3Stamped"]
    Point, PointStamped = T["geometry_msgs/msg/Point"], T["geometry_msgs/msg/PointStamped"]
    s = signals(n)
    with Writer(path, version=9, storage_plugin=storage) as writer:
        topics = {
            "/joint_states": JointState,
            "/heel_ft": WrenchStamped,
            "/toe_ft": WrenchStamped,
            "/heel": PointStamped,
            "/toe": PointStamped,
            "/com": PointStamped,
            "/com_velocity": Vector3Stamped,
            "/trunk_pitch": Float64,
            "/battery": Float64,
        }
        conn = {
            name: writer.add_connection(name, typ.__msgtype__, typestore=ts)
            for name, typ in topics.items()
            if name != skip_topic
        }
        for k in range(n):
            ns = START_NS + int(round(k * 1e9 / RATE))
            header = Header(stamp=Time(sec=ns // 10**9, nanosec=ns % 10**9), frame_id="base")
            zero = Vector3(x=0.0, y=0.0, z=0.0)
            msgs = {
                "/joint_states": JointState(
                    header=header,
                    name=["ankle", "knee", "hip"],
                    position=np.array([s["ankle"][k], s["knee"][k], s["hip"][k]]),
                    velocity=np.array([0.1, 0.2, 0.3]),
                    effort=np.array([5.0, -3.0, 2.0]),
                ),
                "/heel_ft": WrenchStamped(
                    header=header, wrench=Wrench(force=Vector3(x=0.0, y=0.0, z=s["heel"][k]), torque=zero)
                ),
                "/toe_ft": WrenchStamped(
                    header=header, wrench=Wrench(force=Vector3(x=0.0, y=0.0, z=s["toe"][k]), torque=zero)
                ),
                "/heel": PointStamped(header=header, point=Point(x=-0.045, y=0.0, z=0.0)),
                "/toe": PointStamped(header=header, point=Point(x=0.137, y=0.0, z=0.0)),
                "/com": PointStamped(
                    header=header, point=Point(x=s["com_x_mm"][k], y=0.0, z=s["com_z_mm"][k])
                ),
                "/com_velocity": Vector3Stamped(header=header, vector=Vector3(x=0.0, y=0.0, z=0.0)),
                "/trunk_pitch": Float64(data=s["pitch_deg"][k]),  # no header: the bag's time is used
                "/battery": Float64(data=48.0),
            }
            for name, msg in msgs.items():
                if name in conn:
                    writer.write(conn[name], ns, ts.serialize_cdr(msg, msg.__msgtype__))
    side = path.parent / f"{path.stem if path.suffix else path.name}.json"
    side.write_text(json.dumps(sidecar(scenario)))
    return path


def test_bag_channels_arrive_in_si_on_the_common_time_base(tmp_path, scenario):
    log = read_log(scenario, write_bag(tmp_path / "trial_bag", scenario))
    s = signals(600)
    tr = log.trajectory
    np.testing.assert_allclose(tr.t, np.arange(600) / RATE, atol=1e-9)  # time from the first stamp, s
    np.testing.assert_allclose(tr.channels["ankle_angle"][0], s["ankle"], atol=1e-12)
    np.testing.assert_allclose(tr.channels["com_x"][0], s["com_x_mm"] * 1e-3, atol=1e-12)  # mm = 1e-3 m
    np.testing.assert_allclose(
        tr.channels["trunk_pitch"][0], s["pitch_deg"] * math.pi / 180, atol=1e-12
    )  # deg
    assert log.ignored_columns == ["/battery"]
    assert log.params == sidecar(scenario)["params"]


def test_a_bag_in_one_mcap_file_reads_like_a_bag_folder(tmp_path, scenario):
    folder = write_bag(tmp_path / "trial_mcap", scenario, storage=StoragePlugin.MCAP)
    (mcap,) = folder.glob("*.mcap")
    (mcap.parent / f"{mcap.stem}.json").write_text(json.dumps(sidecar(scenario)))  # beside the file
    from_folder, from_file = read_log(scenario, folder), read_log(scenario, mcap)
    np.testing.assert_array_equal(
        from_folder.trajectory.channels["knee_angle"], from_file.trajectory.channels["knee_angle"]
    )


def test_a_bag_without_a_mapped_topic_is_refused_naming_it(tmp_path, scenario):
    path = write_bag(tmp_path / "trial_nocom", scenario, n=500, skip_topic="/com")
    with pytest.raises(LogError, match="topic.*/com.*not in the bag"):
        read_log(scenario, path)


def test_a_damaged_bag_is_refused_in_one_line(tmp_path, scenario):
    path = write_bag(tmp_path / "trial_cut", scenario, n=500)
    (db,) = path.glob("*.db3")
    db.write_bytes(db.read_bytes()[:2000])
    with pytest.raises(LogError) as info:
        read_log(scenario, path)
    assert "\n" not in str(info.value) and "trial_cut" in str(info.value)
