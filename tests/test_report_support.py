"""A small real store for the report tests, made by the real jobs: a short sweep, five stand-in trials
taken in through the hardware-log contract, then shift, prior, propose, budget and calibrate.

Everything is seeded, so the store is the same on every run. The sizes are the smallest at which
every job still does its real work (a few dozen rollouts, eight matched simulations per trial, a
quick budget and calibration): the report only has to be handed real result objects, not good ones.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Callable
from pathlib import Path

from gapgauge.app.budget import plan_budget
from gapgauge.app.calibrate import calibrate
from gapgauge.app.demo import copy_bundle
from gapgauge.app.ingest import ingest
from gapgauge.app.prior import fit_prior
from gapgauge.app.propose import propose
from gapgauge.app.shift import assess_shift
from gapgauge.app.sweep import sweep
from gapgauge.results import Result
from gapgauge.scenario import Scenario, load_scenario
from gapgauge.sim.standin import run_standin
from gapgauge.store import Store

REPO = Path(__file__).resolve().parents[1]
HOSTILE_ROBOT = "<script>alert(1)</script>"
HOSTILE_NOTE = '<img src=x onerror=alert(2)> & "quoted" </td></tr></table>'
HOSTILE_STEM = "trial_<b>bold<b>_<img src=x onerror=alert(3)>"  # no slash: a file name
HOSTILE_FILE = HOSTILE_STEM + ".csv"
SWEEP_ROLLOUTS = 48
SWEEP_SEED = 7
TRIALS = 5
MATCHES = 8
JOBS = ("shift", "prior", "proposals", "budget", "calibration")
QUICK_BUDGET = {"draws": 16, "max_trials": 30}  # the quick demo's sizes
QUICK_CALIBRATION = {"generations": 4, "popsize": 2, "spread_draws": 4}


def project(folder: Path) -> Scenario:
    """The bundled scenario and its model copied into ``folder`` (the calibrated overlay is written beside
    the scenario, so it must not be the repository's own)."""
    return load_scenario(copy_bundle(folder)["scenario"])


def _make_hostile(csv: Path) -> Path:
    """Give the first trial's log a hostile file name, robot id and notes, as a user's log could have."""
    sidecar = csv.with_suffix(".json")
    meta = json.loads(sidecar.read_text(encoding="utf-8"))
    meta["robot_id"] = HOSTILE_ROBOT
    meta["notes"] = HOSTILE_NOTE
    target = csv.with_name(HOSTILE_FILE)
    target.with_suffix(".json").write_text(json.dumps(meta), encoding="utf-8")
    shutil.move(csv, target)
    sidecar.unlink()
    return target


def run_jobs(scenario: Scenario, store: Store, kinds: tuple[str, ...] = JOBS) -> dict[str, Result]:
    """Run the analysis jobs named in ``kinds`` on ``store``, in the order a lab runs them; each stores its
    result. Returns what each job returned, by kind."""
    jobs: dict[str, Callable[[], Result]] = {
        "shift": lambda: assess_shift(scenario, store, seed=0),
        "prior": lambda: fit_prior(scenario, store, seed=0),
        "proposals": lambda: propose(scenario, store, count=3, seed=0),
        "budget": lambda: plan_budget(scenario, store, seed=0, **QUICK_BUDGET),
        "calibration": lambda: calibrate(scenario, store, seed=0, **QUICK_CALIBRATION),
    }
    return {kind: job() for kind, job in jobs.items() if kind in kinds}


def build_store(
    scenario: Scenario,
    path: Path,
    *,
    hostile: bool = False,
    sweep_rollouts: int = SWEEP_ROLLOUTS,
    trials: int = TRIALS,
    kinds: tuple[str, ...] = JOBS,
) -> Store:
    """A store at ``path`` holding a sweep of ``sweep_rollouts`` (none when 0), ``trials`` stand-in trials
    (the first with a hostile file name, robot id and notes if ``hostile``) and the results of the jobs
    named in ``kinds``; returned open."""
    store = Store(path)
    store.add_scenario(scenario)
    if sweep_rollouts:
        sweep(scenario, sweep_rollouts, seed=SWEEP_SEED, store=store)
    if trials:
        profile = REPO / "scenarios" / "standin" / "close.toml"
        logs = run_standin(scenario, profile, design=trials, out_dir=path.parent / "logs", seed=0)
        if hostile:
            logs[0] = _make_hostile(logs[0])
        ingest(scenario, store, logs, matches=MATCHES, seed=0)
    run_jobs(scenario, store, kinds)
    return store
