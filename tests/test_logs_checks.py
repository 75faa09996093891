"""The two levels of check: impossible values refuse a log, unusual ones are kept with a flag per channel.

Outside checks: the bundled model's stated body mass, 40 kg (Winter 2009 segment fractions of a 40 kg body,
models/planar_body.xml), and its gravity, 9.81 m/s^2 (the file's <option gravity>), give one body weight of
392.4 N; the joints' ranges are read from the MJCF text by hand (ankle -0.7..0.7 rad).
"""

from __future__ import annotations

import pytest

from gapgauge.errors import LogError
from gapgauge.logs import body_weight, read_log
from gapgauge.logs.checks import FORCE_BODY_WEIGHTS, JOINT_LIMIT_SLACK
from test_logs_support import DEG, make_scenario, sidecar, table, write_log

BODY_WEIGHT = 40.0 * 9.81  # N: stated mass of models/planar_body.xml times its <option gravity="0 0 -9.81">
ANKLE_RANGE = (-0.7, 0.7)  # rad: <joint name="ankle" range="-0.7 0.7"> under <compiler angle="radian">


@pytest.fixture(scope="module")
def model_defaults(tmp_path_factory):
    """push_recovery without its [hardware.plausible] table: every range comes from the model."""
    return make_scenario(tmp_path_factory.mktemp("defaults"), edits={r"^(heel|toe)_force = \[.*$": "",
                                                                    r"^(ankle|knee|hip)_angle = \[.*$": "",
                                                                    r"^com_z = \[.*$": ""})


def read_with(scenario, tmp_path, column, values: dict[int, str]):
    header, rows = table()
    for row, text in values.items():
        rows[row][header.index(column)] = text
    return read_log(scenario, write_log(tmp_path, header, rows, sidecar(scenario)))


def test_the_robot_weighs_its_model_mass_times_gravity(model_defaults):
    assert body_weight(model_defaults) == pytest.approx(BODY_WEIGHT, rel=1e-9)


def test_a_heel_impact_beyond_the_force_range_from_the_body_weight_is_flagged_not_refused(tmp_path, model_defaults):
    high = FORCE_BODY_WEIGHTS[1] * BODY_WEIGHT  # 5 body weights = 1962 N
    log = read_with(model_defaults, tmp_path, "heel_fz", {40: f"{high - 5:.1f}", 80: "3024"})
    (flag,) = [f for f in log.flags if f.channel == "heel_force"]
    assert (flag.kind, flag.count, flag.worst) == ("plausible", 1, 3024.0)  # 1957 N is plausible, 3024 N is not
    assert "body weights" in flag.detail


def test_an_angle_inside_its_joint_range_but_off_its_plausible_one_is_flagged(tmp_path):
    sc = make_scenario(tmp_path / "sc", edits={r"^ankle_angle = \[.*$": "ankle_angle = [-0.3, 0.3]"})
    # 25 deg = 0.436 rad: inside the joint's [-0.7, 0.7] rad, outside the scenario's plausible [-0.3, 0.3]
    log = read_with(sc, tmp_path, "ankle_pos_deg", {10: "25", 11: "25"})
    (flag,) = [f for f in log.flags if f.channel == "ankle_angle"]  # two samples: no one-sample spike
    assert (flag.kind, flag.count, flag.worst) == ("plausible", 2, pytest.approx(25 * DEG, rel=1e-12))


def test_an_angle_beyond_the_joint_range_plus_slack_is_impossible_and_refused(tmp_path, model_defaults):
    beyond = (ANKLE_RANGE[1] + JOINT_LIMIT_SLACK) / DEG + 1.0  # deg: one degree past the mechanical stop + slack
    with pytest.raises(LogError) as info:
        read_with(model_defaults, tmp_path, "ankle_pos_deg", {10: f"{beyond:.3f}"})
    assert "trial_001.csv:12:2" in str(info.value) and "joint range" in str(info.value)


def test_a_one_sample_spike_in_a_position_is_flagged_with_its_sample(tmp_path, model_defaults):
    log = read_with(model_defaults, tmp_path, "com_x_mm", {100: "95"})  # 30 mm standing, one sample at 95 mm
    (flag,) = [f for f in log.flags if f.channel == "com_x"]
    assert (flag.kind, flag.count, flag.worst) == ("spike", 1, pytest.approx(0.095, rel=1e-12))
    assert flag.where.endswith("trial_001.csv:102:15")


def test_a_force_that_steps_and_stays_is_no_spike(tmp_path, model_defaults):
    header, rows = table()
    for r in rows[100:]:
        r[header.index("heel_fz")] = "260"  # the load moves to the heel and stays
    log = read_log(model_defaults, write_log(tmp_path, header, rows, sidecar(model_defaults)))
    assert [f for f in log.flags if f.channel == "heel_force"] == []
