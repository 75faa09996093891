"""simulate(), draw_physics() and the control arrays: reproducibility, divergence handling, the task.

Outside checks: the push's impulse is force x duration (Newton's second law, integrated); the
platform follows a minimum-jerk profile (Flash and Hogan 1985, J. Neurosci. 5(7):1688-1703),
whose peak speed is 1.875 D / T (from memory).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from gapgauge import load_scenario
from gapgauge.scenario import Scenario
from gapgauge.sim.controls import build_controls, minimum_jerk
from gapgauge.sim.model import base_model, build_models, model_layout
from gapgauge.sim.physics import draw_physics
from gapgauge.sim.rollout import simulate

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def push() -> Scenario:
    return load_scenario(ROOT / "scenarios" / "push_recovery.toml")


@pytest.fixture(scope="module")
def platform() -> Scenario:
    return load_scenario(ROOT / "scenarios" / "platform_shift.toml")


def _design(scenario: Scenario, n: int, seed: int) -> np.ndarray:
    return scenario.from_unit(np.random.default_rng(seed).random((n, scenario.dim)))


def test_physics_draw_of_an_index_does_not_depend_on_chunking(push: Scenario) -> None:
    whole = draw_physics(push, 11, np.arange(10))
    pieces = np.vstack([draw_physics(push, 11, np.arange(0, 3)), draw_physics(push, 11, np.arange(3, 10))])
    reversed_order = draw_physics(push, 11, np.arange(9, -1, -1))[::-1]
    np.testing.assert_array_equal(whole, pieces)
    np.testing.assert_array_equal(whole, reversed_order)
    # The documented generator: numpy.random.default_rng([seed, index]), uniform in scenario order.
    low = np.array([r.low for r in push.physics])
    high = np.array([r.high for r in push.physics])
    np.testing.assert_array_equal(whole[4], np.random.default_rng([11, 4]).uniform(low, high))


def test_nominal_physics_draw_is_the_nominal_values(push: Scenario) -> None:
    draw = draw_physics(push, 3, np.arange(4), nominal=True)
    np.testing.assert_array_equal(draw, np.tile([r.nominal for r in push.physics], (4, 1)))


def test_same_inputs_give_identical_results_whatever_threads_and_sub_batches(push: Scenario) -> None:
    params = _design(push, 6, seed=1)
    physics = draw_physics(push, 5, np.arange(6))
    a = simulate(push, params, physics, nthread=2, sub_batch=6)
    b = simulate(push, params, physics, nthread=1, sub_batch=4)
    np.testing.assert_array_equal(a.status, b.status)
    np.testing.assert_array_equal(a.objective, b.objective)
    for name in a.features:
        np.testing.assert_array_equal(a.features[name], b.features[name])


def test_models_reused_across_sub_batches_equal_fresh_copies(push: Scenario) -> None:
    params = _design(push, 2, seed=2)
    physics = draw_physics(push, 9, np.arange(2))
    stale = build_models(push, params[::-1], physics[::-1])
    reused = build_models(push, params, physics, out=stale)
    fresh = build_models(push, params, physics)
    for r, f in zip(reused, fresh, strict=True):
        for field in ("actuator_gainprm", "actuator_biasprm", "actuator_forcerange", "actuator_dynprm",
                      "body_mass", "body_inertia", "body_subtreemass", "geom_friction", "dof_damping"):
            np.testing.assert_array_equal(getattr(r, field), getattr(f, field), err_msg=field)


def test_divergent_and_non_finite_rollouts_are_marked_and_leave_the_others_alone(push: Scenario) -> None:
    params = np.tile(push.nominal_parameters(), (4, 1))
    physics = np.tile([r.nominal for r in push.physics], (4, 1))
    damping = [r.name for r in push.physics].index("joint_damping")
    params[1, push.parameter_names.index("ankle_kd")] = np.nan  # a NaN injected in the inputs
    physics[2, damping] = -1e4  # negative passive damping: the state blows up at once
    physics[3, damping] = -50.0  # MuJoCo's own warning stops this one
    batch = simulate(push, params, physics, nthread=2)
    assert list(batch.status[1:]) == ["diverged"] * 3
    assert all(reason for reason in batch.reason[1:])
    assert np.isnan(batch.objective[1:]).all()
    assert all(np.isnan(v[1:]).all() for v in batch.features.values())
    alone = simulate(push, params[:1], physics[:1], nthread=1)
    assert batch.status[0] == alone.status[0] == "ok"
    assert batch.objective[0] == alone.objective[0]


def test_push_impulse_is_force_times_duration(push: Scenario) -> None:
    physics = draw_physics(push, 0, [0], nominal=True)
    controls = build_controls(push, push.nominal_parameters()[None], physics)
    model = base_model(push)
    trunk = model.body(push.task.body).id
    force_x = controls[0, :, model.nu + 6 * trunk]
    # Impulse = integral of F dt over the steps the control acts on (one step of dt each).
    impulse = force_x.sum() * push.task.timestep
    assert impulse == pytest.approx(push.task.magnitude * push.task.duration, rel=1e-9)


def test_platform_target_follows_minimum_jerk(platform: Scenario) -> None:
    physics = draw_physics(platform, 0, [0], nominal=True)
    controls = build_controls(platform, platform.nominal_parameters()[None], physics)
    drive = model_layout(platform).platform_drive_id
    target = controls[0, :, drive]
    task = platform.task
    assert target[-1] == pytest.approx(task.magnitude)
    # Minimum-jerk peak speed 1.875 D / T at mid-movement (Flash and Hogan 1985; from memory).
    speed = np.diff(target) / task.timestep
    assert speed.max() == pytest.approx(1.875 * task.magnitude / task.duration, rel=1e-3)
    middle = np.array([task.onset + task.duration / 2])
    assert minimum_jerk(middle, task.onset, task.duration)[0] == pytest.approx(0.5)


@pytest.mark.parametrize("name", ["push", "platform"])
def test_nominal_parameters_stand_and_recover(name: str, request: pytest.FixtureRequest) -> None:
    scenario = request.getfixturevalue(name)
    batch = simulate(scenario, scenario.nominal_parameters()[None], nthread=1)
    assert batch.status[0] == "ok", batch.reason[0]
    window = scenario.task.horizon - scenario.task.onset
    assert batch.features["recovery_time"][0] < window - 0.1  # settled before the end


def test_low_ankle_stiffness_falls(push: Scenario) -> None:
    # Well below m g h of the body above the ankle (about 257 N m/rad at the nominal posture).
    params = push.nominal_parameters()[None].copy()
    params[0, push.parameter_names.index("ankle_kp")] = 150.0
    assert simulate(push, params, nthread=1).status[0] == "fell"


def test_trajectory_time_base_starts_at_the_initial_state(push: Scenario) -> None:
    batch, traj = simulate(push, push.nominal_parameters()[None], nthread=1, return_trajectory=True)
    assert traj.t[0] == 0.0 and traj.t[1] == pytest.approx(push.task.timestep)
    assert traj.onset == push.task.onset
    # Sample 0 is the released initial posture: joints at their set-points, nothing moving yet.
    for joint in ("ankle", "knee", "hip"):
        assert traj.channels[f"{joint}_angle"][0, 0] == pytest.approx(
            push.nominal_parameters()[push.parameter_names.index(f"{joint}_setpoint")])
        assert traj.channels[f"{joint}_rate"][0, 0] == 0.0
