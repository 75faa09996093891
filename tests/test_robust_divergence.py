"""Divergence: parameter sets that make MuJoCo unstable are stored as diverged with their reason, counted
in the sweep's summary, never stop the run, and are left out of the prior with a note.

Outside checks: MuJoCo's own behaviour (its stop on an unstable acceleration, non-finite states), the
rows and statuses read with the standard library's ``sqlite3``, and a rollout simulated alone as the
reference for the well-behaved rollouts in a batch with diverging ones.
"""

from __future__ import annotations

import re
import sqlite3

import numpy as np
import pytest
from click.testing import CliRunner

from gapgauge import load_scenario
from gapgauge.app.prior import fit_prior
from gapgauge.cli import main
from gapgauge.sim.rollout import simulate
from gapgauge.store import Store
from test_robust_support import make_project

ROLLOUTS = 64
# Bounds no lab would set: servos up to 300 times stronger (gains and torque limits) and damping down to
# a micro-newton-metre-second, so part of the space is beyond what a 2 ms explicit step resolves.
ABSURD = {
    'low = 0.85\nhigh = 1.1\nnominal = 1.0\n\n[physics.servo_lag]': 'low = 0.85\nhigh = 300.0\nnominal = 1.0\n\n'
                                                                    '[physics.servo_lag]',
    "low = 5.0\nhigh = 80.0": "low = 1e-6\nhigh = 80.0",
}


@pytest.fixture(scope="module")
def absurd(tmp_path_factory):
    """A sweep of the absurd scenario through the command line; its printed summary and its store."""
    root = tmp_path_factory.mktemp("absurd")
    project = make_project(root, edits=ABSURD)
    store = root / "absurd.sqlite"
    result = CliRunner().invoke(main, ["sweep", str(project), "--rollouts", str(ROLLOUTS), "--seed", "1",
                                       "--store", str(store), "--workers", "2", "--chunk-size", "32"])
    return load_scenario(project), store, result


def test_out_of_bounds_gains_and_tiny_damping_diverge_with_a_reason_and_spare_the_rest(tmp_path):
    scenario = load_scenario(make_project(tmp_path))
    names, physics_names = scenario.parameter_names, [r.name for r in scenario.physics]
    params = np.tile(scenario.nominal_parameters(), (4, 1))
    physics = np.tile([r.nominal for r in scenario.physics], (4, 1))
    strength = physics_names.index("servo_strength")
    for joint in ("ankle", "knee", "hip"):  # far beyond the bounds (450..3000 N m/rad)
        params[1, names.index(f"{joint}_kp")] = 1e8
        params[2, names.index(f"{joint}_kp")], params[2, names.index(f"{joint}_kd")] = 1e6, 1e-6
        params[3, names.index(f"{joint}_kd")] = -10.0  # negative damping: energy pumped in
    physics[1, strength], physics[2, strength], physics[3, strength] = 1e6, 1e4, 1e3
    batch = simulate(scenario, params, physics, nthread=2)
    assert list(batch.status) == ["ok", "diverged", "diverged", "diverged"]
    assert all(re.search(r"at t = \d", reason) for reason in batch.reason[1:])  # says when and why
    assert np.isnan(batch.objective[1:]).all()
    alone = simulate(scenario, params[:1], physics[:1], nthread=1)
    assert batch.objective[0] == alone.objective[0]  # the well-behaved rollout is untouched


def test_a_sweep_over_absurd_bounds_finishes_and_stores_every_divergence_with_its_reason(absurd):
    scenario, store, result = absurd
    assert result.exit_code == 0, result.output
    with sqlite3.connect(store) as conn:
        counts = dict(conn.execute("SELECT status, COUNT(*) FROM rollouts GROUP BY status").fetchall())
        diverged = conn.execute("SELECT reason, objective, features FROM rollouts WHERE status = 'diverged'").fetchall()
    assert sum(counts.values()) == ROLLOUTS
    assert 0 < counts["diverged"] < ROLLOUTS and counts.get("ok", 0) > 0  # both kinds, or nothing is shown
    assert all(reason and objective is None for reason, objective, _ in diverged)
    assert np.isnan(np.frombuffer(b"".join(f for _, _, f in diverged), dtype="<f8")).all()
    printed = re.search(r"diverged\s*[│|]?\s*([\d,]+)", result.output)
    assert printed and int(printed.group(1).replace(",", "")) == counts["diverged"]
    assert CliRunner().invoke(main, ["store", "check", "--store", str(store)]).exit_code == 0


def test_the_prior_leaves_diverged_rollouts_out_and_says_so(absurd):
    scenario, store, _ = absurd
    with sqlite3.connect(store) as conn:
        n_diverged = conn.execute("SELECT COUNT(*) FROM rollouts WHERE status = 'diverged'").fetchone()[0]
        n_ok = conn.execute("SELECT COUNT(*) FROM rollouts WHERE status = 'ok' AND objective IS NOT NULL").fetchone()[0]
    with Store(store, create=False) as db:
        fit = fit_prior(scenario, db, seed=0, progress=False)
    assert fit.n_diverged == n_diverged
    assert fit.n_sim == n_ok
    assert f"{n_diverged} diverged rollout(s) left out (no measurement)" in fit.notes
