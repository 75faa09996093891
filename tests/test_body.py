"""Any body: the [model.channels] map, checked against the compiled model before any sweep.

Outside checks: MuJoCo's own compiled model (mujoco.MjModel.from_xml_path) and its rollout of the model
as written, without gapgauge's sensors; the MJCF conventions of MuJoCo's XML reference (compiler/angle,
include, sensors do not act on the dynamics).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import mujoco
import mujoco.rollout
import numpy as np
import pytest

from gapgauge import ScenarioError, load_scenario
from gapgauge.scenario.model_info import compiled
from gapgauge.sim.controls import CONTROL_SPEC, build_controls, initial_state
from gapgauge.sim.model import base_model, build_models
from gapgauge.sim.rollout import simulate

ROOT = Path(__file__).resolve().parents[1]
PUSH = ROOT / "scenarios" / "push_recovery.toml"
BIPED = ROOT / "scenarios" / "biped_push.toml"

#: the bundled planar body's map written out: it must mean exactly what the default map means
EXPLICIT_PLANAR = '''[model]
file = "../models/planar_body.xml"

[model.channels]
joints = ["ankle", "knee", "hip"]
com_body = "foot"
trunk = "trunk"
support = "platform_top"
fall_contacts = ["thigh_touch", "trunk_touch"]
platform = "platform"

[model.channels.contacts]
heel = "heel_site"
toe = "toe_site"
'''


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    for sub in ("models", "scenarios"):
        (tmp_path / sub).mkdir()
    for name in ("planar_body.xml", "biped_3d.xml"):
        shutil.copy(ROOT / "models" / name, tmp_path / "models")
    for scenario in (PUSH, BIPED):
        shutil.copy(scenario, tmp_path / "scenarios")
    return tmp_path


def _edit(path: Path, old: str, new: str, name: str = "variant.toml") -> Path:
    text = path.read_text()
    assert old in text, f"test set-up: {old!r} not in {path.name}"
    out = path.with_name(name)
    out.write_text(text.replace(old, new, 1))
    return out


def test_the_planar_map_written_out_is_the_default_map_and_simulates_the_same(project: Path) -> None:
    default = load_scenario(project / "scenarios" / "push_recovery.toml")
    text = (project / "scenarios" / "push_recovery.toml").read_text()
    text = text.replace('model = "../models/planar_body.xml"\n', "", 1) + "\n" + EXPLICIT_PLANAR
    path = project / "scenarios" / "explicit.toml"
    path.write_text(text)
    explicit = load_scenario(path)
    assert explicit.body == default.body
    assert explicit.simulation_hash == default.simulation_hash
    assert list(explicit.channels) == list(default.channels)
    params = default.nominal_parameters()
    a, b = simulate(default, params, nthread=1), simulate(explicit, params, nthread=1)
    for name in default.features.names:
        np.testing.assert_array_equal(a.features[name], b.features[name], err_msg=name)


def test_channels_follow_the_map_trade_names_per_joint_and_contact_group(project: Path) -> None:
    biped = load_scenario(project / "scenarios" / "biped_push.toml")
    assert biped.lateral and len(biped.joint_names) == 10
    assert biped.body.joints[1].name == "left_hip" and biped.body.joints[1].joint == "left_hip_pitch"
    for joint in biped.joint_names:
        assert {f"{joint}_angle", f"{joint}_rate", f"{joint}_torque"} <= set(biped.channels)
    assert {"heel_force", "heel_x", "heel_y", "toe_force", "toe_x", "toe_y", "cop_x", "cop_y", "com_y",
            "com_vy"} <= set(biped.channels)
    planar = load_scenario(project / "scenarios" / "push_recovery.toml")
    assert not planar.lateral and "cop_y" not in planar.channels and "com_y" not in planar.channels


@pytest.mark.parametrize(("old", "new", "key", "says"), [
    ('left_knee = "left_knee"', 'left_knee = "left_knees"', "model.channels.joints.left_knee", "no joint named"),
    ('trunk = "torso"', 'trunk = "chest"', "model.channels.trunk", "no body named"),
    ('support = "floor"', 'support = "ground"', "model.channels.support", "no geom named"),
    ('heel = ["left_heel_in"', 'heel = ["left_heel_inn"', "model.channels.contacts.heel", "no site, geom"),
    ('fall_contacts = ["torso"', 'fall_contacts = ["chest"', "model.channels.fall_contacts", "no site, geom"),
    ('joints = ["left_ankle", "right_ankle"]', 'joints = ["left_ankle", "right_ankel"]', "parameters[0].joints",
     "needs a joint"),
])
def test_a_name_the_model_lacks_is_one_line_naming_the_key(project: Path, old: str, new: str, key: str,
                                                           says: str) -> None:
    path = _edit(project / "scenarios" / "biped_push.toml", old, new)
    with pytest.raises(ScenarioError) as info:
        load_scenario(path)
    text = str(info.value)
    assert f"'{key}'" in text and says in text and "\n" not in text and ";" in text


def test_an_actuator_that_is_not_a_position_servo_is_refused_for_the_builtin_controller(project: Path) -> None:
    model = project / "models" / "planar_body.xml"
    text = model.read_text().replace('<position name="knee_servo" joint="knee" kp="800" kv="30" forcerange="-120 120"'
                                     ' timeconst="0.01"/>', '<motor name="knee_servo" joint="knee" gear="1"/>', 1)
    assert "<motor" in text
    model.write_text(text)
    with pytest.raises(ScenarioError, match=r"key 'model'.*knee_servo.*not a position servo"):
        load_scenario(project / "scenarios" / "push_recovery.toml")


def test_hinge_ranges_in_degrees_under_a_radian_compiler_are_refused(project: Path) -> None:
    # MuJoCo XML reference, compiler/angle: with angle="radian" a range of -40 40 is +-40 rad, over 6 turns
    model = project / "models" / "planar_body.xml"
    model.write_text(model.read_text().replace('range="-0.7 0.7"', 'range="-40 40"', 1))
    with pytest.raises(ScenarioError, match=r"joint 'ankle' range .* more than a turn"):
        load_scenario(project / "scenarios" / "push_recovery.toml")


def test_gravity_that_does_not_point_down_is_refused(project: Path) -> None:
    model = project / "models" / "planar_body.xml"
    model.write_text(model.read_text().replace('gravity="0 0 -9.81"', 'gravity="0 -9.81 0"', 1))
    with pytest.raises(ScenarioError, match=r"gravity .* not straight down"):
        load_scenario(project / "scenarios" / "push_recovery.toml")


def test_medio_lateral_features_on_a_planar_model_name_the_channel_it_lacks(project: Path) -> None:
    path = _edit(project / "scenarios" / "push_recovery.toml", "[features]\n",
                 '[features]\nnames = ["recovery_time", "cop_range_ml"]\n')
    with pytest.raises(ScenarioError, match=r"'features.names'.*cop_range_ml.*'cop_y'"):
        load_scenario(path)


def test_a_sideways_push_on_a_planar_model_is_refused(project: Path) -> None:
    path = _edit(project / "scenarios" / "push_recovery.toml", "duration = 0.1",
                 "duration = 0.1\ndirection = [0, 1, 0]")
    with pytest.raises(ScenarioError, match=r"'task.direction'.*planar"):
        load_scenario(path)


def test_sensors_gapgauge_adds_leave_the_dynamics_as_mujoco_compiles_them(project: Path) -> None:
    # The biped's MJCF declares no sensor; gapgauge adds the ones its channels read (MjSpec). A sensor
    # does not act on the simulation (MuJoCo XML reference, sensor): qpos must equal, to the bit, that
    # of mujoco.rollout on the model MuJoCo compiles from the file as written.
    biped = load_scenario(project / "scenarios" / "biped_push.toml")
    raw = mujoco.MjModel.from_xml_path(str(biped.model_path))
    ours = base_model(biped)
    assert raw.nsensor == 0 and ours.nsensor > 0 and compiled(biped).added
    assert (ours.nq, ours.nv, ours.nu, ours.nbody) == (raw.nq, raw.nv, raw.nu, raw.nbody)
    params = biped.nominal_parameters()[None, :]
    physics = np.array([[r.nominal for r in biped.physics]])
    model = build_models(biped, params, physics)[0]
    twin = mujoco.MjModel.from_xml_path(str(biped.model_path))
    for field in ("actuator_gainprm", "actuator_biasprm", "actuator_forcerange", "actuator_dynprm", "body_mass",
                  "body_inertia", "geom_friction", "dof_damping"):
        getattr(twin, field)[:] = getattr(model, field)[:getattr(twin, field).shape[0]]
    twin.opt.timestep = model.opt.timestep
    mujoco.mj_setConst(twin, mujoco.MjData(twin))
    controls = build_controls(biped, params, physics)[:, :400]
    x0 = initial_state(biped, params)
    state_ours, _ = mujoco.rollout.rollout([model], [mujoco.MjData(model)], x0, controls, control_spec=CONTROL_SPEC,
                                           nstep=400)
    state_raw, _ = mujoco.rollout.rollout([twin], [mujoco.MjData(twin)], x0, controls, control_spec=CONTROL_SPEC,
                                          nstep=400)
    np.testing.assert_array_equal(state_ours, state_raw)


#: a planar body rooted at the trunk (not at the foot), with an arm and one leg hanging below it; no sensors
TRUNK_ROOTED = """<mujoco model="trunk_rooted">
  <compiler angle="radian" autolimits="true"/>
  <option timestep="0.002" gravity="0 0 -9.81"/>
  <default><joint damping="0.3" armature="0.05"/></default>
  <worldbody>
    <geom name="ground" type="plane" size="3 1 0.1"/>
    <body name="chest" pos="0 0 1.0">
      <joint name="slide_x" type="slide" axis="1 0 0"/>
      <joint name="slide_z" type="slide" axis="0 0 1"/>
      <joint name="tilt" type="hinge" axis="0 -1 0"/>
      <geom name="chest_geom" type="capsule" fromto="0 0 0 0 0 0.4" size="0.1" mass="20"/>
      <body name="arm" pos="0 0 0.35">
        <joint name="shoulder" type="hinge" axis="0 1 0" range="-1 1"/>
        <geom type="capsule" fromto="0 0 0 0 0 -0.3" size="0.03" mass="2"/>
      </body>
      <body name="upper_leg" pos="0 0 0">
        <joint name="hip_joint" type="hinge" axis="0 1 0" range="-1 1"/>
        <geom name="upper_leg_geom" type="capsule" fromto="0 0 -0.05 0 0 -0.4" size="0.05" mass="6"/>
        <body name="lower_leg" pos="0 0 -0.45">
          <joint name="knee_joint" type="hinge" axis="0 1 0" range="-0.1 2"/>
          <geom type="capsule" fromto="0 0 -0.05 0 0 -0.4" size="0.04" mass="3"/>
          <body name="sole" pos="0 0 -0.45">
            <joint name="ankle_joint" type="hinge" axis="0 1 0" range="-0.8 0.8"/>
            <geom name="heel_ball" type="sphere" size="0.012" pos="-0.05 0 -0.04" mass="0.5"/>
            <geom name="toe_ball" type="sphere" size="0.012" pos="0.15 0 -0.04" mass="0.5"/>
          </body>
        </body>
      </body>
    </body>
  </worldbody>
  <actuator>
    <position name="hip_servo" joint="hip_joint" kp="500" kv="20"/>
    <position name="knee_servo" joint="knee_joint" kp="500" kv="20"/>
    <position name="ankle_servo" joint="ankle_joint" kp="500" kv="20"/>
    <position name="shoulder_servo" joint="shoulder" kp="50" kv="2"/>
  </actuator>
</mujoco>
"""


def test_a_planar_body_rooted_at_its_trunk_starts_level_and_reads_its_pitch_from_the_hinges(project: Path) -> None:
    (project / "models" / "trunk_rooted.xml").write_text(TRUNK_ROOTED)
    text = (project / "scenarios" / "push_recovery.toml").read_text()
    text = text.replace('model = "../models/planar_body.xml"\n', "", 1).replace('body = "trunk"', 'body = "chest"', 1)
    text += """
[model]
file = "../models/trunk_rooted.xml"

[model.channels]
trunk = "chest"
fall_contacts = ["chest", "upper_leg"]

[model.channels.joints]
ankle = "ankle_joint"
knee = "knee_joint"
hip = "hip_joint"

[model.channels.contacts]
heel = "heel_ball"
toe = "toe_ball"
"""
    path = project / "scenarios" / "trunk_rooted.toml"
    path.write_text(text)
    scenario = load_scenario(path)
    assert not scenario.lateral and scenario.body.support == "ground" and scenario.body.com_body == "chest"
    model = base_model(scenario)
    params = scenario.nominal_parameters()[None, :]  # set-points ankle 0.08, knee -0.1, hip 0.1: sum 0.08
    x0 = initial_state(scenario, params)[0]
    data = mujoco.MjData(model)
    mujoco.mj_setState(model, data, x0, mujoco.mjtState.mjSTATE_FULLPHYSICS)
    mujoco.mj_kinematics(model, data)
    sole = data.xmat[model.body("sole").id].reshape(3, 3)
    assert abs(np.arctan2(sole[0, 2], sole[2, 2])) < 1e-12  # the foot starts level ...
    lowest = min(data.geom_xpos[model.geom(g).id, 2] - 0.012 for g in ("heel_ball", "toe_ball"))
    assert abs(lowest) < 1e-12  # ... on the ground
    # trunk pitch from the hinge chain (the root tilt turns about -y, so it counts negative) against
    # MuJoCo's own orientation of the chest: atan2(R[0, 2], R[2, 2]), the lean of its long axis
    _, traj = simulate(scenario, params, nthread=1, return_trajectory=True)
    chest = data.xmat[model.body("chest").id].reshape(3, 3)
    assert abs(np.arctan2(chest[0, 2], chest[2, 2])) > 0.05  # levelling the foot tilted the chest
    assert traj.channels["trunk_pitch"][0, 0] == pytest.approx(np.arctan2(chest[0, 2], chest[2, 2]), abs=1e-12)
