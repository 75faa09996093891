"""The simulated body against physics laws and the anthropometric table.

Sources (../shared/REFERENCES.md, "Balance and biomechanics"): statics (standing still, vertical ground
reaction = m g, centre of pressure under the centre of mass); the rigid inverted pendulum on an ankle
(topples unless ankle stiffness exceeds m g h); free fall z(t) = z0 - g t^2 / 2; Winter (2009) segment
mass fractions (from memory, per REFERENCES.md).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import mujoco
import mujoco.rollout
import numpy as np
import pytest

from gapgauge import load_scenario
from gapgauge.scenario import Scenario
from gapgauge.sim.controls import CONTROL_SPEC, build_controls, initial_state, state_offsets
from gapgauge.sim.model import base_model, build_models, model_layout
from gapgauge.sim.rollout import simulate

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def push() -> Scenario:
    return load_scenario(ROOT / "scenarios" / "push_recovery.toml")


def _variant(scenario: Scenario, **task) -> Scenario:
    return dataclasses.replace(scenario, task=dataclasses.replace(scenario.task, **task))


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


def _body_mass(model: mujoco.MjModel) -> float:
    """Mass of the body above the platform: the subtree rooted at the foot, kg."""
    return float(model.body_subtreemass[model.body("foot").id])


def test_standing_still_ground_reaction_equals_weight_and_cop_under_com(push: Scenario) -> None:
    # No push, no reaction: quiet standing at the nominal posture; measure the last 0.5 s of 4 s.
    quiet = _variant(push, magnitude=0.0, horizon=4.0)
    params = _params(quiet, reaction_ankle=0.0, reaction_hip=0.0)
    batch, traj = simulate(quiet, params, nthread=1, return_trajectory=True)
    assert batch.status[0] == "ok"
    model = base_model(quiet)
    weight = _body_mass(model) * -model.opt.gravity[2]
    tail = traj.t >= 3.5
    vertical = (traj.channels["heel_force"] + traj.channels["toe_force"])[0, tail]
    # Statics (REFERENCES.md): vertical ground reaction = m g, within 1%.
    assert np.mean(vertical) == pytest.approx(weight, rel=0.01)
    # Statics (REFERENCES.md): the centre of pressure lies under the centre of mass, within 3 mm.
    gap = traj.channels["cop_x"][0, tail] - traj.channels["com_x"][0, tail]
    assert np.max(np.abs(gap)) < 0.003


def _mgh(scenario: Scenario, ankle: float, knee: float, hip: float) -> float:
    """m g h of the body above the ankle at a posture: m its mass, h its COM height over the ankle."""
    model = base_model(scenario)
    data = mujoco.MjData(model)
    lay = model_layout(scenario)
    data.qpos[lay.joint_qpos] = [ankle, knee, hip]
    mujoco.mj_kinematics(model, data)
    mujoco.mj_comPos(model, data)
    shank = model.body("shank").id  # the ankle hinge sits at the shank's origin
    h = data.subtree_com[shank, 2] - data.xpos[shank, 2]
    return float(model.body_subtreemass[shank] * -model.opt.gravity[2] * h)


@pytest.mark.parametrize(("factor", "expected"), [(0.6, "fell"), (1.6, "ok")])
def test_rigid_inverted_pendulum_topples_below_mgh_and_stands_above(
    push: Scenario, factor: float, expected: str
) -> None:
    # Knee and hip locked by very stiff servos, upright posture (COM straight above the ankle), no
    # servo lag, light ankle damping, a small push to leave the balance point. Rigid inverted pendulum
    # on an ankle (REFERENCES.md): it topples unless ankle stiffness exceeds m g h. Damping slows the
    # topple (hence 4 s) and the foot's finite support blurs the threshold (here it lies between 0.8
    # and 1.2 m g h), so the factors sit well either side of 1.
    small = _variant(push, magnitude=40.0, horizon=4.0)
    mgh = _mgh(small, 0.0, 0.0, 0.0)
    params = _params(
        small, ankle_kp=factor * mgh, ankle_kd=10.0, knee_kp=1e5, knee_kd=500.0, hip_kp=1e5, hip_kd=500.0,
        ankle_setpoint=0.0, knee_setpoint=0.0, hip_setpoint=0.0, reaction_ankle=0.0, reaction_hip=0.0,
    )
    batch = simulate(small, params, _physics(small, servo_lag=0.0), nthread=1)
    assert batch.status[0] == expected, batch.reason[0]


def test_free_fall_follows_z0_minus_half_g_t_squared(push: Scenario) -> None:
    # Released 0.2 m above the platform: only gravity acts on the centre of mass until touch-down,
    # whatever the servos do inside the body (Newton's second law for the whole body).
    drop = 0.2
    params = _params(push)
    physics = _physics(push)
    models = build_models(push, params, physics)
    controls = build_controls(push, params, physics)
    x0 = initial_state(push, params)
    lay = model_layout(push)
    x0[:, state_offsets(models[0])["qpos"] + lay.height_qpos] += drop
    nstep = push.task.nstep
    _, sensordata = mujoco.rollout.rollout(
        models, [mujoco.MjData(models[0])], x0, controls, control_spec=CONTROL_SPEC, nstep=nstep
    )
    adr = lay.sensor["com_pos"][0]
    com_z = sensordata[0, :, adr + 2]
    dt = push.task.timestep
    t = np.arange(nstep) * dt
    g = -models[0].opt.gravity[2]
    # Before touch-down at sqrt(2 drop / g) = 0.20 s; stop short of it.
    flight = t < 0.9 * np.sqrt(2 * drop / g)
    expected = com_z[0] - 0.5 * g * t[flight] ** 2
    # Free fall (REFERENCES.md). The integrator is first order in dt: its error after time t is at
    # most g dt t (semi-implicit Euler on constant acceleration), here under 4 mm.
    assert np.all(np.abs(com_z[flight] - expected) <= g * dt * t[flight] + 1e-9)
    assert np.ptp(com_z[flight]) > 0.15  # it really fell


def test_segment_masses_follow_winter_fractions(push: Scenario) -> None:
    # Winter (2009) anthropometric table, segment mass / body mass (from memory, per REFERENCES.md):
    # foot 0.0145, leg (shank) 0.0465, thigh 0.100, head-arms-trunk 0.678; two legs lumped, so doubled.
    winter = {"foot": 2 * 0.0145, "shank": 2 * 0.0465, "thigh": 2 * 0.100, "trunk": 0.678}
    model = base_model(push)
    total = _body_mass(model)
    assert total == pytest.approx(40.0, rel=1e-3)  # the stated body mass in the MJCF
    for body, fraction in winter.items():
        assert model.body(body).mass[0] / total == pytest.approx(fraction, rel=1e-3), body
