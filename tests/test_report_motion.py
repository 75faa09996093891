"""Motion seen: each trial's trajectories over its matched simulations, and the stick-figure filmstrip.

Outside checks: the re-simulated matched set measures exactly as the stored matches were measured (the
same parameters, physics draws and logger model give the same features); the stick figure's joints sit
where planar forward kinematics puts them, with the segment lengths read from the MJCF file itself
(``xml.etree``) and the sign convention of DEVELOPERS.md (every hinge turns about +y; a positive angle
moves the distal segment's top towards +x); the centre of pressure of two contacts is the lever rule of
statics, (F1 x1 + F2 x2) / (F1 + F2); images decode with Pillow (``matplotlib.image.imread``).
"""

from __future__ import annotations

import io
import math
import xml.etree.ElementTree as ET
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from matplotlib.image import imread

from gapgauge.app.report import read_inputs
from gapgauge.features import compute_features
from gapgauge.report import kinematics
from gapgauge.report.inputs import TrialMotion
from gapgauge.report.sections.motion import most_different, motion_section, with_cop
from gapgauge.scenario import compile_model
from gapgauge.trajectory import Trajectory

ROOT = Path(__file__).resolve().parents[1]
MODEL = ROOT / "models" / "planar_body.xml"


@pytest.fixture(scope="module")
def inputs(report_lab):
    return read_inputs(report_lab.scenario, report_lab.store)


def test_every_trial_gets_a_trajectory_figure_that_decodes(report_lab):
    plots = report_lab.folder / "plots"
    for number in range(1, len(report_lab.store.trials(report_lab.scenario.content_hash)) + 1):
        image = imread(io.BytesIO((plots / f"motion_trial_{number}.png").read_bytes()), format="png")
        assert image.shape[0] > 300 and image.shape[1] > 900
    assert (plots / "motion_filmstrip.png").is_file()


def test_the_resimulated_matched_set_measures_as_the_stored_matches(inputs, report_lab):
    store, scenario = report_lab.store, report_lab.scenario
    for trial, motion in zip(inputs.trials, inputs.motion, strict=True):
        stored = store.matches(trial.id)
        kept = np.flatnonzero(np.asarray(stored.status) != "diverged")[: motion.simulated.nbatch]
        again = compute_features(motion.simulated, scenario.features)
        for name in scenario.features.names:
            np.testing.assert_allclose(again[name], stored.features[name][kept], rtol=1e-7, atol=1e-12,
                                       err_msg=f"trial {trial.id}, {name}")
        assert motion.hardware is not None and motion.hardware.has("com_x")


def _lengths_from_the_mjcf(path: Path) -> dict[str, float]:
    """Each body's offset along z from its parent, as the MJCF file writes it (``pos="0 0 z"``)."""
    bodies = {b.get("name"): b for b in ET.parse(path).getroot().iter("body")}
    return {name: float(b.get("pos", "0 0 0").split()[2]) for name, b in bodies.items()}


def test_the_stick_figure_follows_planar_forward_kinematics_of_the_model_file():
    model = compile_model(MODEL)
    lengths = _lengths_from_the_mjcf(MODEL)
    ankle, knee, hip = 0.12, -0.35, 0.4
    pose = kinematics.poses(model, {"ankle_angle": np.array([ankle]), "knee_angle": np.array([knee]),
                                    "hip_angle": np.array([hip])})[0]
    # the foot stands where the model puts it; the ankle is at the foot's origin
    a = np.array([0.0, lengths["foot"]])
    k = a + lengths["thigh"] * np.array([math.sin(ankle), math.cos(ankle)])
    h = k + lengths["trunk"] * np.array([math.sin(ankle + knee), math.cos(ankle + knee)])
    np.testing.assert_allclose(pose.joints, np.vstack([a, k, h]), atol=1e-9)


def test_joint_channels_map_onto_model_joints_by_name_whatever_the_joints_are_called(tmp_path):
    text = MODEL.read_text(encoding="utf-8")
    for old, new in (("ankle", "left_talocrural"), ("knee", "left_tibiofemoral"), ("hip", "left_coxa")):
        text = text.replace(f'name="{old}"', f'name="{new}"').replace(f'joint="{old}"', f'joint="{new}"')
    renamed = tmp_path / "renamed.xml"
    renamed.write_text(text, encoding="utf-8")
    model = compile_model(renamed)
    knee = -0.5
    bent = kinematics.poses(model, {"left_tibiofemoral_angle": np.array([knee]), "knee_angle": np.array([1.0]),
                                    "heel_force": np.array([100.0])})[0]
    assert kinematics.joint_map(model, {"left_tibiofemoral_angle": 0, "knee_angle": 0, "heel_force": 0}) == {
        "left_tibiofemoral_angle": int(model.jnt_qposadr[model.joint("left_tibiofemoral").id])
    }
    # the renamed knee bends the trunk's base (the hip) back; "knee_angle" names no joint here: ignored
    lengths = _lengths_from_the_mjcf(renamed)
    hip = bent.bones[-1, 1]  # the last bone ends at the trunk's origin, the hip
    expected = (lengths["trunk"] * math.sin(knee),
                lengths["foot"] + lengths["thigh"] + lengths["trunk"] * math.cos(knee))
    np.testing.assert_allclose(hip, expected, atol=1e-9)


def test_the_centre_of_pressure_of_two_contacts_is_the_lever_rule():
    t = np.linspace(0.0, 1.0, 5)
    heel, toe = np.array([[300.0, 200.0, 100.0, 50.0, 0.0]]), np.array([[100.0, 200.0, 300.0, 350.0, 400.0]])
    heel_x, toe_x = np.full((1, 5), -0.045), np.full((1, 5), 0.137)
    channels = with_cop(Trajectory(t, {"heel_force": heel, "toe_force": toe, "heel_x": heel_x, "toe_x": toe_x}))
    expected = (heel * heel_x + toe * toe_x) / (heel + toe)
    np.testing.assert_allclose(channels["cop_x"], expected, rtol=1e-12)


def _shifted(m: TrialMotion, metres: float) -> TrialMotion:
    channels = dict(m.hardware.channels)
    after = m.hardware.t >= m.hardware.onset
    channels["com_x"] = channels["com_x"] + metres * after
    return replace(m, hardware=Trajectory(m.hardware.t, channels, m.hardware.onset, dict(m.hardware.meta)))


def test_the_filmstrip_is_of_the_trial_moved_furthest_from_its_simulations(inputs):
    """Without a shift assessment the trajectories decide: a trial whose centre of mass is moved 5 cm
    away from its simulations after the push is the one the filmstrip shows."""
    moved = [(_shifted(m, 0.05) if m.number == 3 else m) for m in inputs.motion]
    pick, why = most_different(replace(inputs, shift=None, motion=moved), moved)
    assert pick.number == 3 and "trajectories" in why
    section = motion_section(replace(inputs, shift=None, motion=moved))
    assert section["most_different"] == 3
    assert section["filmstrip"] is not None and "Trial 3" in section["filmstrip"].caption
    assert [t["number"] for t in section["trials"]] == [m.number for m in inputs.motion]


def test_a_trial_without_matches_or_series_is_said_so_not_drawn_empty(inputs):
    alone = [TrialMotion(1, inputs.motion[0].hardware, None, "no matched simulations")]
    section = motion_section(replace(inputs, motion=alone))
    assert section["trials"][0]["note"] == "no matched simulations" and section["filmstrip"] is None
    assert motion_section(replace(inputs, motion=[TrialMotion(1, None, None, "no series")])) is None
