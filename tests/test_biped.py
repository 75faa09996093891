"""The second bundled body, a 3-D biped (models/biped_3d.xml, scenarios/biped_push.toml): its physics
against outside checks, and the whole lab day on it with its model outside the project folder.

Outside checks (../shared/REFERENCES.md, "Balance and biomechanics"): standing still the vertical ground
reaction equals m g and the centre of pressure lies under the centre of mass (statics); the segment
masses are Winter's (2009) fractions (from memory, as REFERENCES.md says); a rigid inverted pendulum on
its ankles topples below an ankle stiffness of m g h and stands above it (textbook statics), with m and h
from MuJoCo's own body masses and subtree centres of mass (``data.subtree_com``), not from our code.
"""

from __future__ import annotations

import dataclasses
import json
import shutil
from pathlib import Path

import mujoco
import numpy as np
import pytest
from click.testing import CliRunner

from gapgauge import load_scenario
from gapgauge.app.budget import plan_budget
from gapgauge.app.calibrate import calibrate
from gapgauge.app.ingest import ingest
from gapgauge.app.prior import fit_prior
from gapgauge.app.propose import propose
from gapgauge.app.report import write_report
from gapgauge.app.shift import assess_shift
from gapgauge.app.sweep import sweep
from gapgauge.cli import main
from gapgauge.scenario import Scenario
from gapgauge.sim.model import base_model
from gapgauge.sim.rollout import simulate
from gapgauge.sim.standin import run_standin
from gapgauge.store import Store

ROOT = Path(__file__).resolve().parents[1]
BIPED = ROOT / "scenarios" / "biped_push.toml"
PROFILE = ROOT / "scenarios" / "standin" / "biped_worn.toml"
G = 9.81  # the model's gravity, m/s^2


@pytest.fixture(scope="module")
def biped() -> Scenario:
    return load_scenario(BIPED)


def _params(scenario: Scenario, **values: float) -> np.ndarray:
    x = scenario.nominal_parameters()
    for name, v in values.items():
        x[scenario.parameter_names.index(name)] = v
    return x[None, :]


def _physics(scenario: Scenario, **values: float) -> np.ndarray:
    x = np.array([r.nominal for r in scenario.physics])
    for name, v in values.items():
        x[[r.name for r in scenario.physics].index(name)] = v
    return x[None, :]


def _task(scenario: Scenario, **task) -> Scenario:
    return dataclasses.replace(scenario, task=dataclasses.replace(scenario.task, **task))


def test_total_mass_and_segment_fractions_follow_winter(biped: Scenario) -> None:
    # Winter (2009) anthropometric table, segment mass / body mass (from memory, per REFERENCES.md):
    # foot 0.0145, leg (shank) 0.0465, thigh 0.100 each side, head-arms-trunk 0.678; they sum to 1.000.
    model = mujoco.MjModel.from_xml_path(str(biped.model_path))
    total = float(model.body_subtreemass[model.body("torso").id])
    assert total == pytest.approx(50.0, rel=1e-9)  # the stated body mass in the MJCF
    winter = {"torso": 0.678}
    for side in ("left", "right"):
        winter |= {f"{side}_thigh": 0.100, f"{side}_shank": 0.0465, f"{side}_foot": 0.0145}
    assert sum(winter.values()) == pytest.approx(1.0, abs=1e-12)
    for body, fraction in winter.items():
        assert model.body(body).mass[0] / total == pytest.approx(fraction, rel=1e-9), body


def test_standing_still_ground_reaction_is_weight_and_cop_is_under_com_in_both_axes(biped: Scenario) -> None:
    quiet = _task(biped, magnitude=0.0, horizon=5.0)
    params = _params(quiet, reaction_ankle=0.0, reaction_hip=0.0, ankle_kd=60.0, hip_kd=50.0)
    batch, traj = simulate(quiet, params, nthread=1, return_trajectory=True)
    assert batch.status[0] == "ok"
    model = base_model(quiet)
    weight = float(model.body_subtreemass[model.body("torso").id]) * -model.opt.gravity[2]
    tail = traj.t >= 4.5
    vertical = (traj.channels["heel_force"] + traj.channels["toe_force"])[0, tail]
    # Statics: vertical ground reaction = m g, within 1%
    assert np.mean(vertical) == pytest.approx(weight, rel=0.01)
    # Statics: the centre of pressure lies under the centre of mass, within 3 mm, front-back and sideways
    for axis in ("x", "y"):
        gap = traj.channels[f"cop_{axis}"][0, tail] - traj.channels[f"com_{axis}"][0, tail]
        assert np.max(np.abs(gap)) < 0.003, axis


def _mgh_above_the_ankles(scenario: Scenario) -> float:
    """m g h of the body above the ankle axes in the upright reference pose, from MuJoCo: m the mass
    without the feet, h the height of its centre of mass (data.subtree_com) over the ankle axis."""
    model = base_model(scenario)
    data = mujoco.MjData(model)
    mujoco.mj_kinematics(model, data)
    mujoco.mj_comPos(model, data)
    torso = model.body("torso").id
    feet = [model.body(f"{side}_foot").id for side in ("left", "right")]
    whole = float(model.body_subtreemass[torso])
    foot_mass = sum(float(model.body_mass[f]) for f in feet)
    com = (whole * data.subtree_com[torso] - sum(model.body_mass[f] * data.subtree_com[f] for f in feet))
    com /= whole - foot_mass
    h = float(com[2] - data.xanchor[model.joint("left_ankle_pitch").id, 2])
    return (whole - foot_mass) * -model.opt.gravity[2] * h


@pytest.mark.parametrize(("factor", "expected"), [(0.6, "fell"), (1.6, "ok")])
def test_rigid_inverted_pendulum_on_two_ankles_topples_below_mgh_and_stands_above(
    biped: Scenario, factor: float, expected: str
) -> None:
    # Hips, knees and ankle rolls locked by very stiff servos, upright posture (COM above the ankles), no
    # servo lag, light ankle damping, a small forward push. The two ankles act in parallel, so each gets
    # half of factor x m g h (textbook statics: it topples unless the stiffness exceeds m g h). The feet's
    # finite support blurs the threshold (here between 0.8 and 1.2 m g h), so the factors sit well apart.
    small = _task(biped, magnitude=40.0, horizon=4.0, direction=(1.0, 0.0, 0.0))
    mgh = _mgh_above_the_ankles(small)
    params = _params(small, ankle_kp=factor * mgh / 2, ankle_kd=10.0, knee_kp=1e5, hip_kp=1e5, hip_kd=500.0,
                     hip_roll_kp=1e5, ankle_roll_kp=1e5, ankle_setpoint=0.0, knee_setpoint=0.0, hip_setpoint=0.0,
                     reaction_ankle=0.0, reaction_hip=0.0)
    batch = simulate(small, params, _physics(small, servo_lag=0.0), nthread=1)
    assert batch.status[0] == expected, batch.reason[0]


def test_the_diagonal_push_moves_the_body_sideways_and_the_lateral_features_measure_it(biped: Scenario) -> None:
    batch, traj = simulate(biped, biped.nominal_parameters(), nthread=1, return_trajectory=True)
    assert batch.status[0] == "ok"
    after = traj.t >= biped.task.onset
    # pushed forward and to the left (+y): the centre of mass moves to +y and the lateral sway is not zero
    assert np.max(traj.channels["com_y"][0, after]) > 0.002
    for name in ("cop_range_ml", "cop_path_length_ml", "peak_com_excursion_ml", "sway_area_2d"):
        assert batch.features[name][0] > 0, name
    assert batch.features["cop_path_length_2d"][0] >= batch.features["cop_path_length"][0]


def _project_with_model_elsewhere(tmp_path: Path) -> Path:
    """The biped scenario in a lab folder, its model in another folder named by absolute path."""
    robot = tmp_path / "robot_description" / "biped.xml"
    robot.parent.mkdir()
    shutil.copy(ROOT / "models" / "biped_3d.xml", robot)
    lab = tmp_path / "lab"
    lab.mkdir()
    text = BIPED.read_text().replace('file = "../models/biped_3d.xml"', f'file = "{robot}"', 1)
    assert str(robot) in text
    (lab / "biped.toml").write_text(text)
    return lab / "biped.toml"


def test_the_whole_lab_day_runs_on_the_biped_from_the_python_api(tmp_path: Path) -> None:
    scenario = load_scenario(_project_with_model_elsewhere(tmp_path))
    assert scenario.model_path.parent.name == "robot_description"
    with Store(tmp_path / "lab.sqlite") as store:
        swept = sweep(scenario, 24, seed=1, store=store)
        assert swept.ok > 0 and swept.done == 24
        logs = run_standin(scenario, PROFILE, design=3, out_dir=tmp_path / "logs", seed=0)
        header = logs[0].read_text().splitlines()[0].split(",")
        assert "left_ankle_roll_deg" in header and "heel_y_mm" in header and "com_vy" in header
        assert json.loads(logs[0].with_suffix(".json").read_text())["synthetic"] is True
        taken = ingest(scenario, store, logs, matches=4, seed=0)
        assert not taken.failed and len(taken.stored) == len(logs)
        shift = assess_shift(scenario, store, seed=0)
        assert "cop_range_ml" in [v.name for v in shift.features]
        fit_prior(scenario, store, seed=0)
        proposals = propose(scenario, store, count=2, seed=0)
        assert len(proposals.proposals) == 2
        plan_budget(scenario, store, seed=0, draws=8, max_trials=15)
        calibrate(scenario, store, seed=0, generations=2, popsize=2, spread_draws=2)
        report = write_report(scenario, store, tmp_path / "report.html")
        assert all(section.filled for section in report.sections), report.sections
        # an edit of the shift thresholds keeps the sweep and the trials
        edited_path = tmp_path / "lab" / "edited.toml"
        edited_path.write_text(scenario.path.read_text().replace("residual_limit = 2.0", "residual_limit = 2.5"))
        edited = load_scenario(edited_path)
        assert edited.simulation_hash == scenario.simulation_hash != "" and edited.content_hash != scenario.content_hash
        assert len(assess_shift(edited, store, seed=0).trial_ids) == 3  # the trials carry over ...
        assert fit_prior(edited, store, seed=0).n_sim == swept.ok  # ... and so does the sweep (its rollouts that stood)
        assert sweep(edited, 24, seed=1, store=store).nothing_to_do


def test_the_lab_day_from_the_command_line_on_the_biped(tmp_path: Path) -> None:
    scenario = str(_project_with_model_elsewhere(tmp_path))
    store = str(tmp_path / "cli.sqlite")
    runner = CliRunner()

    def run(*argv: str) -> str:
        result = runner.invoke(main, list(argv))
        assert result.exit_code == 0, (argv, result.output)
        return result.output

    run("sweep", scenario, "--rollouts", "16", "--seed", "2", "--store", store)
    run("standin", scenario, "--profile", str(PROFILE), "--design", "2", "--out", str(tmp_path / "cli_logs"))
    logs = sorted(str(p) for p in (tmp_path / "cli_logs").glob("*.csv"))
    run("ingest", scenario, *logs, "--matches", "3", "--store", store)
    assert "cop_range_ml" in run("shift", scenario, "--store", store)
    run("prior", scenario, "--store", store)
    run("propose", scenario, "--count", "2", "--store", store, "--out", str(tmp_path / "next.json"))
    run("budget", scenario, "--draws", "8", "--max-trials", "15", "--store", store)
    run("report", scenario, "--store", store, "--out", str(tmp_path / "cli_report.html"))
    info = run("info", "--store", store, "--scenario", scenario)
    assert "usable" in info
