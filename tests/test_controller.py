"""A controller of your own (the ``[controller]`` callable): same trajectories as the built-in controller
when written to do the same, what it is handed, its errors, where its module comes from, and the lab day
with the bundled example (examples/com_feedback.toml).

Outside checks: the built-in controller itself (the callable below is written to do what
``gapgauge.sim.controls`` does, servo targets through the same MuJoCo position actuators), MuJoCo's own
``mj_forward`` and sensor data for what the callable sees, SQLite (read with the standard library) for
what a failed sweep left in the store, and Python's own ``sys.modules`` for what was imported.
"""

from __future__ import annotations

import re
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import mujoco
import numpy as np
import pytest
from click.testing import CliRunner

import gapgauge
from gapgauge import load_scenario
from gapgauge.app.sweep import sweep
from gapgauge.cli import main
from gapgauge.errors import ControllerError, ScenarioError
from gapgauge.scenario.controller import controller_fingerprint
from gapgauge.sim.physics import draw_physics
from gapgauge.sim.rollout import simulate

ROOT = Path(__file__).resolve().parents[1]
#: the parameters the built-in controller's set-points and reaction read, in push_recovery.toml
SERVO_PARAMETERS = ["ankle_setpoint", "knee_setpoint", "hip_setpoint", "reaction_delay", "reaction_ankle",
                    "reaction_hip", "reaction_duration"]

#: the built-in controller of gapgauge.sim.controls written as a callable (the bundled template)
SERVO_REACTION = (ROOT / "examples" / "servo_reaction.py").read_text(encoding="utf-8")


def project(root: Path, warm_start: bool = True, horizon: float | None = None) -> Path:
    """A copy of the bundled models/, scenarios/ and examples/ under ``root``; the planar body with
    MuJoCo's solver warm start disabled unless ``warm_start``; returns the push_recovery copy."""
    for folder in ("models", "scenarios", "examples"):
        shutil.copytree(ROOT / folder, root / folder)
    if not warm_start:
        model = root / "models" / "planar_body.xml"
        text, count = re.subn(r"<option([^>]*)/>", r'<option\1><flag warmstart="disable"/></option>',
                              model.read_text(encoding="utf-8"), count=1)
        assert count == 1
        model.write_text(text, encoding="utf-8")
    scenario = root / "scenarios" / "push_recovery.toml"
    if horizon is not None:
        text = scenario.read_text(encoding="utf-8")
        assert "horizon = 3.0" in text
        scenario.write_text(text.replace("horizon = 3.0", f"horizon = {horizon}"), encoding="utf-8")
    return scenario


def callable_scenario(base: Path, module_text: str, *, rate_hz: float = 500.0, name: str = "servo_callable",
                      observation: str = "[]", parameters: list[str] | None = None, file: str = "servo_reaction.py",
                      extra: str = "") -> Path:
    """A scenario beside ``base`` that extends it with ``[controller]`` naming ``file`` (written there)."""
    (base.parent / file).write_text(module_text, encoding="utf-8")
    handed = ", ".join(f'"{p}"' for p in (SERVO_PARAMETERS if parameters is None else parameters))
    path = base.parent / f"{name}.toml"
    path.write_text(f'extends = "{base.name}"\nname = "{name}"\n\n[controller]\nkind = "callable"\n'
                    f'module = "{file}:controller"\nrate_hz = {rate_hz}\nobservation = {observation}\n'
                    f"parameters = [{handed}]\n{extra}", encoding="utf-8")
    return path


def servo_reaction_text(scenario) -> str:
    """The template's text, after checking its two constants are those of ``scenario``."""
    assert f"ONSET = {scenario.task.onset!r}" in SERVO_REACTION
    assert f"HALF_STEP = {0.5 * scenario.task.timestep!r}" in SERVO_REACTION
    return SERVO_REACTION


def max_difference(one, other) -> float:
    assert set(one.channels) == set(other.channels)
    return max(float(np.max(np.abs(one.channels[c] - other.channels[c]))) for c in one.channels)


@pytest.fixture(scope="module")
def cold(tmp_path_factory) -> Path:
    """push_recovery on the planar body with the solver warm start off."""
    return project(tmp_path_factory.mktemp("cold"), warm_start=False)


@pytest.mark.parametrize("rate_hz", [500.0, 100.0])
def test_the_callable_servo_law_reproduces_the_builtin_controller_to_1e9(cold, rate_hz):
    # Reference: the built-in controller (set-points and timed reaction through MuJoCo's position servos).
    # With the warm start off the solver starts every step alike, so closing the loop once per control
    # period must change nothing; at 100 Hz the reaction's edges are put on the 10 ms control grid.
    builtin = load_scenario(cold)
    servo_reaction_text(builtin)
    template = cold.parent.parent / "examples" / "servo_reaction.toml"
    overlay = template.with_name(f"servo_reaction_{int(rate_hz)}.toml")
    overlay.write_text(f'extends = "{template.name}"\n\n[controller]\nrate_hz = {rate_hz}\n', encoding="utf-8")
    own = load_scenario(overlay)
    assert own.controller.rate_hz == rate_hz and own.controller.source == template.with_suffix(".py").resolve()
    rng = np.random.default_rng(7)
    params = np.vstack([builtin.nominal_parameters(), builtin.from_unit(rng.random((7, builtin.dim)))])
    if rate_hz != 500.0:
        for name in ("reaction_delay", "reaction_duration"):
            column = builtin.parameter_names.index(name)
            params[:, column] = np.round(params[:, column] / 0.01) * 0.01
    physics = draw_physics(builtin, 11, np.arange(len(params)))
    want_batch, want = simulate(builtin, params, physics, return_trajectory=True, nthread=2)
    got_batch, got = simulate(own, params, physics, return_trajectory=True, nthread=2)
    assert max_difference(got, want) <= 1e-9
    assert list(got_batch.status) == list(want_batch.status)
    for name in builtin.features.names:
        np.testing.assert_allclose(got_batch.features[name], want_batch.features[name], rtol=1e-9, atol=1e-12)


def test_the_example_with_its_gains_at_zero_is_the_builtin_controller_without_a_reaction(cold):
    # Reference: the built-in controller holding the same set-points with no reaction, the servo gains the
    # example leaves to the model (knee kp, every kd) given as the MJCF's own values.
    builtin = load_scenario(cold)
    example = load_scenario(cold.parent.parent / "examples" / "com_feedback.toml")
    model = mujoco.MjModel.from_xml_path(str(builtin.model_path))
    rng = np.random.default_rng(5)
    mine = example.from_unit(rng.random((6, example.dim)))
    for name in ("com_gain", "com_velocity_gain", "hip_gain"):
        mine[:, example.parameter_names.index(name)] = 0.0
    values = []
    for row in mine:
        given = example.params_to_mapping(row)
        theirs = builtin.params_to_mapping(builtin.nominal_parameters())
        theirs.update({k: given[k] for k in theirs if k in given})
        for joint in ("ankle", "knee", "hip"):
            actuator = model.actuator(f"{joint}_servo")
            if f"{joint}_kp" not in given:
                theirs[f"{joint}_kp"] = float(actuator.gainprm[0])
            theirs[f"{joint}_kd"] = float(-actuator.biasprm[2])
        theirs.update(reaction_ankle=0.0, reaction_hip=0.0)
        values.append(builtin.params_from_mapping(theirs))
    physics = draw_physics(builtin, 2, np.arange(len(mine)))
    _, want = simulate(builtin, np.array(values), physics, return_trajectory=True, nthread=2)
    _, got = simulate(example, mine, physics, return_trajectory=True, nthread=2)
    assert max_difference(got, want) <= 1e-9


def test_with_the_warm_start_on_the_difference_is_the_solvers(tmp_path):
    # What differs on the bundled model as it is: qacc_warmstart is not part of the state mujoco.rollout
    # returns, so each control period starts MuJoCo's constraint solver cold and its answer moves within
    # the solver tolerance (opt.tolerance, 1e-8 by default, MuJoCo XML reference). Standing at the
    # nominal parameters nothing chatters, so every channel still agrees to 1e-9; over a random batch
    # the statuses agree and the objectives to 1e-6, contact forces of a chattering or falling rollout less.
    base = project(tmp_path)
    builtin = load_scenario(base)
    servo_reaction_text(builtin)
    own = load_scenario(tmp_path / "examples" / "servo_reaction.toml")
    rng = np.random.default_rng(3)
    params = np.vstack([builtin.nominal_parameters(), builtin.from_unit(rng.random((15, builtin.dim)))])
    physics = draw_physics(builtin, 5, np.arange(len(params)))
    want_batch, want = simulate(builtin, params, physics, return_trajectory=True, nthread=2)
    got_batch, got = simulate(own, params, physics, return_trajectory=True, nthread=2)
    assert max_difference(got.select(0), want.select(0)) <= 1e-9
    assert list(got_batch.status) == list(want_batch.status)
    np.testing.assert_allclose(got_batch.objective, want_batch.objective, rtol=1e-6)


RECORDER = '''
import numpy as np

SEEN = []


def controller(t, observation, params):
    SEEN.append((t, observation.copy(), params.copy()))
    return np.column_stack([params[:, 0], params[:, 1], params[:, 2]])
'''


def test_the_callable_sees_the_last_logged_sample_and_its_own_parameter_columns(tmp_path):
    # Outside reference: MuJoCo's sensor data as recorded by mujoco.rollout (the trajectory) and
    # mj_forward at the initial state for the first call.
    base = project(tmp_path, horizon=1.0)
    own = load_scenario(callable_scenario(base, RECORDER, rate_hz=100.0, name="recorder", file="recorder.py",
                                          observation='["com_x", "ankle_angle", "com_pos[2]"]',
                                          parameters=["ankle_setpoint", "knee_setpoint", "hip_setpoint", "ankle_kp"]))
    params = own.nominal_parameters()[None, :].repeat(2, axis=0)
    params[1, own.parameter_names.index("ankle_kp")] = 900.0
    _, trajectory = simulate(own, params, return_trajectory=True, nthread=1)
    module = next(m for name, m in sys.modules.items() if name.startswith("_gapgauge_controller_recorder"))
    seen = module.SEEN
    period = 5  # 100 Hz on 2 ms steps
    assert [t for t, _, _ in seen] == pytest.approx([k * period * 0.002 for k in range(own.task.nstep // period)])
    columns = [own.parameter_names.index(n) for n in ("ankle_setpoint", "knee_setpoint", "hip_setpoint", "ankle_kp")]
    for _, _, handed in seen:
        np.testing.assert_array_equal(handed, params[:, columns])
    for k, (_, observation, _) in enumerate(seen[1:], start=1):
        sample = k * period - 1  # the last sample logged before the call at t = k * period * dt
        np.testing.assert_array_equal(observation[:, 0], trajectory.channels["com_x"][:, sample])
        np.testing.assert_array_equal(observation[:, 1], trajectory.channels["ankle_angle"][:, sample])
    # the first call: mj_forward on the initial state gives what step 0 records for position sensors
    np.testing.assert_allclose(seen[0][1][:, 0], trajectory.channels["com_x"][:, 0], rtol=0, atol=1e-12)
    np.testing.assert_allclose(seen[0][1][:, 1], trajectory.channels["ankle_angle"][:, 0], rtol=0, atol=1e-12)
    model = mujoco.MjModel.from_xml_path(str(own.model_path))
    assert model.sensor("com_pos").dim[0] == 3  # com_pos[2] is the third component of a 3-vector


def broken(tmp_path: Path, body: str, **kwargs) -> Path:
    base = project(tmp_path, horizon=1.0)
    return callable_scenario(base, "import numpy as np\n\n\ndef controller(t, observation, params):\n" + body,
                             name="broken", file="broken.py", **kwargs)


@pytest.mark.parametrize(("body", "said"), [
    ("    raise RuntimeError('gain table empty')\n", r"raised RuntimeError: gain table empty at t = 0\.0000 s.*line 5"),
    ("    return np.zeros((len(params), 2))\n",
     r"returned shape \(3, 2\).*\(3 x 3\).*ankle_servo, knee_servo, hip_servo"),
    ("    return np.full((len(params), 3), np.nan) if t > 0.5 else params[:, :3]\n",
     r"returned NaN or infinity for 3 of 3 rollout\(s\) at t = 0\.50"),
    ("    return 'ankle'\n", r"returned str, not an array of numbers"),
])
def test_a_controller_that_fails_is_one_error_naming_the_key(tmp_path, body, said):
    scenario = load_scenario(broken(tmp_path, body))
    with pytest.raises(ControllerError, match=said) as caught:
        simulate(scenario, np.tile(scenario.nominal_parameters(), (3, 1)), nthread=1)
    message = str(caught.value)
    assert "key 'controller.module'" in message and str(scenario.path) in message and "\n" not in message


def test_a_sweep_stops_before_writing_the_chunk_whose_controller_failed(tmp_path):
    # The controller raises on its 50 * 2 + 11th call: 50 Hz over 1 s is 50 calls per chunk of 4, so
    # the first two chunks complete and the third fails part way. SQLite must hold exactly 8 whole rows.
    body = ("    global CALLS\n    CALLS += 1\n    if CALLS > 110:\n        raise ValueError('sensor dropout')\n"
            "    return params[:, :3]\n")
    path = broken(tmp_path, body, rate_hz=50.0)
    path.with_name("broken.py").write_text(path.with_name("broken.py").read_text().replace(
        "import numpy as np\n", "import numpy as np\n\nCALLS = 0\n"), encoding="utf-8")
    store = tmp_path / "store.sqlite"
    with pytest.raises(ControllerError, match="sensor dropout"):
        sweep(path, 16, seed=0, store=store, workers=1, chunk_size=4, progress=False)
    with sqlite3.connect(store) as conn:
        stored = [row[0] for row in conn.execute("SELECT idx FROM rollouts ORDER BY idx")]
        statuses = {row[0] for row in conn.execute("SELECT status FROM rollouts")}
    assert stored == list(range(8))
    assert statuses <= {"ok", "fell", "diverged"}


def test_rollouts_mujoco_halts_are_diverged_and_left_out_of_later_calls(tmp_path):
    # Outside check: MuJoCo's own stop on an unstable acceleration (as in test_robust_divergence), with the
    # example's feedback law, which would return NaN from a NaN observation if a halted rollout were
    # still handed to it; the well-behaved rollout must equal itself simulated alone.
    project(tmp_path, horizon=1.5)
    example = load_scenario(tmp_path / "examples" / "com_feedback.toml")
    names, physics_names = example.parameter_names, [r.name for r in example.physics]
    params = np.tile(example.nominal_parameters(), (3, 1))
    physics = np.tile([r.nominal for r in example.physics], (3, 1))
    strength = physics_names.index("servo_strength")
    for joint in ("ankle", "hip"):
        params[1, names.index(f"{joint}_kp")] = 1e8
        params[2, names.index(f"{joint}_kp")] = 1e6
    physics[1, strength], physics[2, strength] = 1e6, 1e4
    batch = simulate(example, params, physics, nthread=2)
    assert list(batch.status) == ["ok", "diverged", "diverged"]
    assert all(re.search(r"at t = \d", reason) for reason in batch.reason[1:])
    alone = simulate(example, params[:1], physics[:1], nthread=1)
    assert batch.objective[0] == alone.objective[0]


def test_the_cli_prints_the_controller_error_on_one_line_and_exits_2(tmp_path):
    path = broken(tmp_path, "    raise KeyError('com_x')\n")
    result = CliRunner().invoke(main, ["sweep", str(path), "--rollouts", "2", "--store", str(tmp_path / "s.sqlite")])
    assert result.exit_code == 2, result.output
    assert "controller.module" in result.output and "KeyError" in result.output
    assert "Traceback" not in result.output


def test_loading_a_scenario_runs_none_of_the_controllers_code(tmp_path):
    marker = tmp_path / "ran"
    base = project(tmp_path, horizon=1.0)
    path = callable_scenario(base, f"from pathlib import Path\nPath({str(marker)!r}).write_text('ran')\n"
                                   "raise SystemExit('import time side effect')\n", name="eager", file="eager.py")
    before = set(sys.modules)
    scenario = load_scenario(path)
    fingerprint = controller_fingerprint(scenario)
    assert b"import time side effect" in fingerprint  # the source is keyed, read as bytes
    assert not marker.exists() and not any("eager" in name for name in set(sys.modules) - before)
    with pytest.raises(ControllerError, match=r"importing 'eager.py:controller' failed with SystemExit"):
        simulate(scenario, scenario.nominal_parameters(), nthread=1)
    assert marker.exists()  # it ran only when a simulation asked for it


def test_reading_a_store_never_imports_the_controller_it_swept(tmp_path):
    # `info` (with and without the scenario) and `store check` in a fresh interpreter: the module writes a
    # marker file when it is imported, and the marker must not come back.
    marker = tmp_path / "imported"
    base = project(tmp_path, horizon=1.0)
    path = callable_scenario(base, f"from pathlib import Path\nPath({str(marker)!r}).write_text('yes')\n\n\n"
                                   "def controller(t, observation, params):\n    return params[:, :3]\n",
                             rate_hz=50.0, name="marked", file="marked.py")
    store = tmp_path / "marked.sqlite"
    sweep(path, 4, seed=0, store=store, workers=1, progress=False)
    assert marker.read_text() == "yes"  # the sweep imported it
    marker.unlink()
    for args in (["info", "--store", str(store)], ["info", "--store", str(store), "--scenario", str(path)],
                 ["store", "check", "--store", str(store)]):
        done = subprocess.run([sys.executable, "-m", "gapgauge.cli", *args], capture_output=True, text=True,
                              timeout=120)
        assert done.returncode == 0, done.stderr
    assert not marker.exists()


def test_the_fingerprint_follows_the_module_source_not_its_place(tmp_path):
    base = project(tmp_path / "a", horizon=1.0)
    text = servo_reaction_text(load_scenario(base))
    first = controller_fingerprint(load_scenario(callable_scenario(base, text)))
    other = project(tmp_path / "b", horizon=1.0)
    assert controller_fingerprint(load_scenario(callable_scenario(other, text))) == first
    edited = controller_fingerprint(load_scenario(callable_scenario(base, text.replace("HALF_STEP =", "HALF_STEP  ="))))
    assert edited != first
    assert controller_fingerprint(load_scenario(base)) != first


def test_a_dotted_module_is_found_beside_the_scenario_then_in_the_environment(tmp_path, monkeypatch):
    base = project(tmp_path / "project", horizon=1.0)
    text = servo_reaction_text(load_scenario(base))
    package = base.parent / "lab_controllers"
    package.mkdir()
    (package / "__init__.py").write_text("", encoding="utf-8")
    (package / "servo.py").write_text(text, encoding="utf-8")
    beside = callable_scenario(base, text, name="dotted")
    text_of = beside.read_text
    beside.write_text(text_of().replace('"servo_reaction.py:controller"', '"lab_controllers.servo:controller"'))
    spec = load_scenario(beside).controller
    assert spec.source == (package / "servo.py").resolve() and spec.import_name is None
    env = tmp_path / "site"
    (env / "installed_lab").mkdir(parents=True)
    (env / "installed_lab" / "__init__.py").write_text("raise ImportError('found, never imported on load')\n")
    (env / "installed_lab" / "law.py").write_text(text, encoding="utf-8")
    monkeypatch.syspath_prepend(str(env))
    beside.write_text(text_of().replace('"lab_controllers.servo:controller"', '"installed_lab.law:controller"'))
    spec = load_scenario(beside).controller
    assert spec.source == (env / "installed_lab" / "law.py").resolve() and spec.import_name == "installed_lab.law"
    assert "installed_lab" not in sys.modules
    with pytest.raises(ControllerError, match="failed with ImportError: found, never imported on load"):
        simulate(load_scenario(beside), load_scenario(beside).nominal_parameters(), nthread=1)
    (env / "installed_lab" / "__init__.py").write_text("")
    batch = simulate(load_scenario(beside), load_scenario(beside).nominal_parameters(), nthread=1)
    assert batch.status[0] in ("ok", "fell") and sys.modules["installed_lab.law"].__file__ == str(spec.source)


@pytest.mark.parametrize(("table", "key", "said"), [
    ('kind = "callable"\nmodule = "nowhere.py:controller"\nrate_hz = 500.0', "controller.module", "not found"),
    ('kind = "callable"\nmodule = "servo.py"\nrate_hz = 500.0', "controller.module", "not a callable reference"),
    ('kind = "callable"\nmodule = "servo.py:controller"\nrate_hz = 300.0', "controller.rate_hz", "whole"),
    ('kind = "callable"\nmodule = "servo.py:controller"', "controller.rate_hz", "missing"),
    ('kind = "callable"\nmodule = "servo.py:controller"\nrate_hz = 500.0\nparameters = ["ankle_gain"]',
     "controller.parameters[0]", "not a [[parameters]] name"),
    ('kind = "callable"\nmodule = "servo.py:controller"\nrate_hz = 500.0\nobservation = ["com x"]',
     "controller.observation[0]", "not a channel or sensor name"),
    ('kind = "builtin"\nrate_hz = 500.0', "controller.rate_hz", 'set kind = "callable"'),
    ('kind = "neural"', "controller.kind", "unknown controller kind"),
])
def test_a_bad_controller_table_is_refused_with_its_key(tmp_path, table, key, said):
    base = project(tmp_path, horizon=1.0)
    (base.parent / "servo.py").write_text("def controller(t, observation, params):\n    return params\n")
    path = base.parent / "bad.toml"
    path.write_text(f'extends = "{base.name}"\n\n[controller]\n{table}\n', encoding="utf-8")
    with pytest.raises(ScenarioError, match=re.escape(f"key '{key}'")) as caught:
        load_scenario(path)
    assert said in str(caught.value)


def test_an_observation_the_model_lacks_is_refused_when_the_simulation_binds_it(tmp_path):
    base = project(tmp_path, horizon=1.0)
    path = callable_scenario(base, RECORDER, name="lacks", file="lacks.py", observation='["com_x", "com_pos[3]"]')
    with pytest.raises(ControllerError, match=r"key 'controller\.observation\[1\]'.*3 component"):
        simulate(load_scenario(path), load_scenario(path).nominal_parameters(), nthread=1)


def test_a_sweep_whose_controller_cannot_bind_leaves_no_store_behind(tmp_path):
    base = project(tmp_path, horizon=1.0)
    path = callable_scenario(base, RECORDER, name="unbound", file="unbound.py", observation='["com_w"]')
    store = tmp_path / "never.sqlite"
    with pytest.raises(ControllerError, match=r"key 'controller\.observation\[0\]'.*'com_w'"):
        sweep(path, 4, seed=0, store=store, workers=1, progress=False)
    assert not store.exists()


def test_a_dask_worker_imports_the_controller_from_the_path_and_stores_the_same_rows(tmp_path):
    distributed = pytest.importorskip("distributed")
    base = project(tmp_path, horizon=1.2)
    example = tmp_path / "examples" / "com_feedback.toml"
    local = sweep(example, 12, seed=2, store=tmp_path / "local.sqlite", workers=1, chunk_size=6, progress=False)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        remote = sweep(example, 12, seed=2, store=tmp_path / "dask.sqlite", dask=client, chunk_size=6, progress=False)
        worker_modules = client.run(lambda: sorted(m for m in sys.modules if m.startswith("_gapgauge_controller_")))
    assert (local.done, remote.done) == (12, 12)
    assert any(any("com_feedback" in m for m in names) for names in worker_modules.values())
    query = "SELECT idx, params, physics, status, objective, features FROM rollouts ORDER BY idx"
    with sqlite3.connect(tmp_path / "local.sqlite") as a, sqlite3.connect(tmp_path / "dask.sqlite") as b:
        assert a.execute(query).fetchall() == b.execute(query).fetchall()
    assert base.is_file()


@pytest.mark.slow
def test_the_whole_lab_day_runs_with_the_example_controller(tmp_path):
    # The bundled example (centre-of-mass feedback, examples/com_feedback.toml) through every job of the
    # day on tiny settings, from the Python API.
    project(tmp_path)
    example = tmp_path / "examples" / "com_feedback.toml"
    scenario = load_scenario(example)
    assert scenario.controller.is_callable and "com_gain" in scenario.parameter_names
    store = tmp_path / "lab.sqlite"
    profile = tmp_path / "scenarios" / "standin" / "heavy_slippery.toml"
    summary = gapgauge.sweep(example, 96, seed=0, store=store, workers=2, progress=False)
    assert summary.done == 96 and summary.ok > 0
    logs = gapgauge.run_standin(example, profile, design=4, out_dir=tmp_path / "logs", seed=0)
    assert len(logs) == 4
    taken = gapgauge.ingest(example, store, logs, matches=4, seed=0)
    assert len(taken.stored) == 4 and not taken.failed
    shift = gapgauge.assess_shift(example, store, seed=0)
    assert {f.name for f in shift.features} <= set(scenario.features.names)
    prior = gapgauge.fit_prior(example, store, seed=0)
    assert np.isfinite(prior.rho)
    proposals = gapgauge.propose(example, store, count=2, max_fall_risk=0.5, seed=0)
    low, high = scenario.bounds(safe=True).T
    for proposal in proposals.proposals:
        values = scenario.params_from_mapping(proposal.params)
        assert np.all(values >= low - 1e-12) and np.all(values <= high + 1e-12)
    plan = gapgauge.plan_budget(example, store, seed=0, draws=16, max_trials=30)
    assert plan.with_prior is not None
    overlay = example.with_name("com_feedback.calibrated.toml")
    gapgauge.calibrate(example, store, overlay_path=overlay, seed=0, generations=4, popsize=2, spread_draws=4)
    calibrated = load_scenario(overlay)
    assert calibrated.controller.source == example.with_suffix(".py").resolve()
    report = gapgauge.write_report(example, store, tmp_path / "report.html")
    assert Path(report.path).is_file()


def test_the_command_line_sweeps_runs_the_standin_and_ingests_with_the_example_controller(tmp_path):
    project(tmp_path, horizon=1.5)
    example = str(tmp_path / "examples" / "com_feedback.toml")
    store = str(tmp_path / "cli.sqlite")
    runner = CliRunner()
    result = runner.invoke(main, ["sweep", example, "--rollouts", "16", "--store", store, "--workers", "2"])
    assert result.exit_code == 0, result.output
    profile = str(tmp_path / "scenarios" / "standin" / "close.toml")
    result = runner.invoke(main, ["standin", example, "--profile", profile, "--design", "2",
                                  "--out", str(tmp_path / "logs")])
    assert result.exit_code == 0, result.output
    logs = sorted(str(p) for p in (tmp_path / "logs").glob("*.csv"))
    result = runner.invoke(main, ["ingest", example, *logs, "--store", store, "--matches", "2"])
    assert result.exit_code == 0, result.output
    with sqlite3.connect(store) as conn:
        assert conn.execute("SELECT COUNT(*) FROM trials").fetchone()[0] == 2
        assert conn.execute("SELECT COUNT(*) FROM rollouts").fetchone()[0] == 16 + 2 * 2


# The built-in law on the ten joints of models/biped_3d.xml (channel-map order: per side hip roll, hip,
# knee, ankle, ankle roll), the joints without a set-point parameter at their reference angle (qpos0 = 0).
BIPED_SERVO = '''
import numpy as np

ONSET = 0.8
HALF_STEP = 0.001


def controller(t, observation, params):
    knee, hip, ankle, delay, reaction_ankle, reaction_hip, duration = params.T
    start = ONSET + delay
    reacting = (t >= start - HALF_STEP) & (t < start + duration - HALF_STEP)
    zero = np.zeros_like(knee)
    side = [zero, hip + reacting * reaction_hip, knee, ankle + reacting * reaction_ankle, zero]
    return np.column_stack(side + side)
'''


def outside_biped(root: Path, warm_start: bool = True) -> tuple[Path, Path]:
    """The bundled biped's model in ``root/robot`` (outside any project, named by absolute path) and two
    scenarios in ``root/lab``: the bundled one and the same with the built-in law as a callable."""
    (root / "robot").mkdir(parents=True)
    (root / "lab").mkdir()
    model = root / "robot" / "biped_3d.xml"
    text = (ROOT / "models" / "biped_3d.xml").read_text(encoding="utf-8")
    if not warm_start:
        text, count = re.subn(r"<option([^>]*)/>", r'<option\1><flag warmstart="disable"/></option>', text, count=1)
        assert count == 1
    model.write_text(text, encoding="utf-8")
    scenario = (ROOT / "scenarios" / "biped_push.toml").read_text(encoding="utf-8")
    assert 'file = "../models/biped_3d.xml"' in scenario and "onset = 0.8" in scenario
    builtin = root / "lab" / "biped_builtin.toml"
    builtin.write_text(scenario.replace('file = "../models/biped_3d.xml"', f"file = {str(model)!r}"), encoding="utf-8")
    (root / "lab" / "biped_servo.py").write_text(BIPED_SERVO, encoding="utf-8")
    own = root / "lab" / "biped_callable.toml"
    own.write_text(f'extends = "{builtin.name}"\nname = "biped_callable"\n\n[controller]\nkind = "callable"\n'
                   'module = "biped_servo.py:controller"\nrate_hz = 500.0\n'
                   'parameters = ["knee_setpoint", "hip_setpoint", "ankle_setpoint", "reaction_delay", '
                   '"reaction_ankle", "reaction_hip", "reaction_duration"]\n', encoding="utf-8")
    return builtin, own


def test_on_the_biped_named_from_outside_the_project_the_callable_reproduces_the_builtin(tmp_path):
    # A body with ten actuated joints, its model given by an absolute path outside any project; the
    # reference is again the built-in controller, the warm start off as above.
    builtin_path, own_path = outside_biped(tmp_path, warm_start=False)
    builtin, own = load_scenario(builtin_path), load_scenario(own_path)
    assert own.model_path == (tmp_path / "robot" / "biped_3d.xml").resolve() and len(own.joint_names) == 10
    rng = np.random.default_rng(1)
    params = np.vstack([builtin.nominal_parameters(), builtin.from_unit(rng.random((3, builtin.dim)))])
    physics = draw_physics(builtin, 4, np.arange(len(params)))
    want_batch, want = simulate(builtin, params, physics, return_trajectory=True, nthread=2)
    got_batch, got = simulate(own, params, physics, return_trajectory=True, nthread=2)
    assert max_difference(got, want) <= 1e-9
    assert list(got_batch.status) == list(want_batch.status)


@pytest.mark.slow
def test_the_lab_day_runs_from_the_command_line_on_the_biped_with_a_controller_of_ones_own(tmp_path):
    _, own = outside_biped(tmp_path)
    scenario, store = str(own), str(tmp_path / "biped.sqlite")
    profile = str(ROOT / "scenarios" / "standin" / "biped_worn.toml")
    logs = tmp_path / "logs"
    runner = CliRunner()

    def run(*args: str) -> None:
        result = runner.invoke(main, list(args))
        assert result.exit_code == 0, (args[0], result.output)

    run("sweep", scenario, "--rollouts", "48", "--store", store, "--workers", "2")
    run("standin", scenario, "--profile", profile, "--design", "3", "--out", str(logs))
    run("ingest", scenario, *sorted(str(p) for p in logs.glob("*.csv")), "--store", store, "--matches", "2")
    run("shift", scenario, "--store", store)
    run("prior", scenario, "--store", store)
    run("propose", scenario, "--store", store, "--max-fall-risk", "0.5")
    run("budget", scenario, "--store", store, "--draws", "16", "--max-trials", "30")
    run("report", scenario, "--store", store, "--out", str(tmp_path / "report.html"))
    assert (tmp_path / "report.html").is_file()
    with sqlite3.connect(store) as conn:
        assert conn.execute("SELECT COUNT(*) FROM trials").fetchone()[0] == 3
