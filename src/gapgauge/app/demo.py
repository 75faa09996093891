"""The whole path on the bundled push-recovery scenario with the stand-in robot: no robot needed.

:func:`run_demo` copies the bundled scenario, its model and a stand-in profile into a folder (so the
store, the logs, the calibrated overlay and the report all live there), then runs, printing each
step with its figures: sweep, 5 proposed trials on the stand-in robot, ingest with matched
simulations, shift, prior, propose, budget, calibrate, report. Every step is seeded from ``seed``.

The stand-in profile is ``heavy_slippery`` (trunk mass +15 %, friction 0.6), chosen because it shows
a gap: some features move and the calibration has something to find. The demo's trials are
synthetic and labelled so in the store and the report.
"""

from __future__ import annotations

import shutil
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..compare.budget import book_text
from ..errors import ModelError, ScenarioError
from ..progress import Progress
from ..scenario import Scenario, load_scenario
from ..sim.standin import run_standin
from ..store import Store
from .budget import plan_budget
from .calibrate import calibrate
from .ingest import ingest
from .prior import fit_prior
from .propose import propose
from .report import write_report
from .shift import assess_shift
from .sweep import sweep

SCENARIO_FILE = "push_recovery.toml"
MODEL_FILE = "planar_body.xml"
PROFILE_FILE = "heavy_slippery.toml"
STORE_FILE = "gapgauge.sqlite"
# Sized for about a minute (full: 2^13, where Sobol points balance) and a few seconds (quick) of sweeping
# on 2 idle cores at ~130 rollouts/s (measured CPU cost ~15 ms per rollout). Quick stays at the
# multi-fidelity prior's SPARSE_THRESHOLD (500 simulated points), so both of its fits (first proposals,
# prior) are exact GPs of a few seconds; above it the sparse fit took ~20 s CPU each whatever the sweep size
# (its hyperparameters are fitted on a 600-point subsample). Whole demo within 5 minutes, quick within 1.
SWEEP_ROLLOUTS = {False: 8_192, True: 500}
MATCHES = {False: 32, True: 8}
FIRST_TRIALS = 5
MAX_FALL_RISK = 0.05


@dataclass
class DemoStep:
    """One step of the demo: its number and name, its figures (name -> value), its wall time once done."""

    number: int
    name: str
    seconds: float = 0.0
    figures: dict[str, Any] = field(default_factory=dict)
    done: bool = False


@dataclass
class DemoResult:
    """Where the demo wrote everything, each step with its figures, and the whole wall time."""

    out_dir: Path
    scenario_path: Path
    store_path: Path
    report_path: Path | None
    json_path: Path | None
    seed: int
    quick: bool
    steps: list[DemoStep]
    seconds: float


def repo_root() -> Path:
    """The source checkout the package runs from (``src/gapgauge/app/demo.py`` is three folders down)."""
    return Path(__file__).resolve().parents[3]


def bundled_files() -> dict[str, Path]:
    """The bundled scenario, model and stand-in profile; a clear error outside a source checkout."""
    root = repo_root()
    files = {
        "scenario": root / "scenarios" / SCENARIO_FILE,
        "model": root / "models" / MODEL_FILE,
        "profile": root / "scenarios" / "standin" / PROFILE_FILE,
    }
    for what, path in files.items():
        if not path.is_file():
            raise ScenarioError(
                f"{path}: the demo's bundled {what} file is missing; run the demo from a source checkout "
                "installed with `pip install -e .` (see README.md), or restore the file"
            )
    return files


def copy_bundle(out_dir: Path) -> dict[str, Path]:
    """Copy scenario, model and profile into ``out_dir`` keeping their relative layout (the scenario
    names its model as ``../models/...``); return the copies."""
    files = bundled_files()
    copies = {
        "scenario": out_dir / "scenarios" / SCENARIO_FILE,
        "model": out_dir / "models" / MODEL_FILE,
        "profile": out_dir / "scenarios" / "standin" / PROFILE_FILE,
    }
    for key, source in files.items():
        copies[key].parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(source, copies[key])
    return copies


class _Steps:
    """Runs the demo's steps in order, timing each and telling ``on_step`` when it starts and ends."""

    def __init__(self, on_step: Callable[[DemoStep], None] | None) -> None:
        self.steps: list[DemoStep] = []
        self.on_step = on_step or (lambda step: None)

    def run(self, name: str, body: Callable[[], dict[str, Any]]) -> Any:
        step = DemoStep(len(self.steps) + 1, name)
        self.steps.append(step)
        self.on_step(step)
        started = time.perf_counter()
        step.figures = body()
        step.seconds = time.perf_counter() - started
        step.done = True
        self.on_step(step)
        return step.figures


def run_demo(
    out_dir: str | Path = "gapgauge-demo",
    quick: bool = False,
    seed: int = 0,
    *,
    progress: Progress | None = None,
    on_step: Callable[[DemoStep], None] | None = None,
) -> DemoResult:
    """Run the whole path on the bundled scenario with the stand-in robot; write the report in ``out_dir``.

    Args:
        out_dir: folder for the scenario copy, the store, the stand-in logs, the overlay and the report
            (created; a store already there is reused, so a second run resumes the sweep).
        quick: a smaller sweep (500 rollouts, a few seconds) and fewer matched simulations (8 per trial).
        seed: seed of every step (sweep design and physics draws, stand-in noise, bootstraps,
            proposals, budget draws, calibration); stored with each result.
        progress: ``progress(stage, done, total)`` of the long steps.
        on_step: called with each :class:`DemoStep` when it starts and again when it is done (figures set).

    Returns:
        :class:`DemoResult` with the report's path and each step's wall time and figures.
    """
    started = time.perf_counter()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    copies = copy_bundle(out)
    scenario = load_scenario(copies["scenario"])
    store_path = out / STORE_FILE
    steps = _Steps(on_step)
    with Store(store_path) as store:
        report = _whole_path(scenario, store, copies, out, quick, seed, progress, steps)
    return DemoResult(out, copies["scenario"], store_path, report.path, report.json_path, seed, quick, steps.steps,
                      time.perf_counter() - started)


def _whole_path(scenario: Scenario, store: Store, copies: dict[str, Path], out: Path, quick: bool, seed: int,
                progress: Progress | None, steps: _Steps) -> Any:
    """Every step in the order a lab works; returns what the report writer returned."""
    first: dict[str, Any] = {"params": None}

    def sweep_step() -> dict[str, Any]:
        summary = sweep(scenario, SWEEP_ROLLOUTS[quick], store=store, design="sobol", seed=seed, progress=progress)
        figures: dict[str, Any] = {"rollouts": summary.done, "fell": summary.fell, "diverged": summary.diverged}
        if summary.best_objective is not None:
            figures["best objective"] = summary.best_objective
        if summary.ran_now:
            figures["rollouts per second"] = summary.rollouts_per_second
        return figures

    def first_proposals_step() -> dict[str, Any]:
        try:
            result = propose(scenario, store, count=FIRST_TRIALS, max_fall_risk=MAX_FALL_RISK, seed=seed)
        except ModelError as exc:  # a real answer: the model finds no set it trusts; hand-pick instead
            return {"no proposal": str(exc), "instead": "a Sobol design inside the safe bounds"}
        first["params"] = [p.params for p in result.proposals]
        return {"proposed": len(result.proposals), "max fall risk": max(p.fall_risk for p in result.proposals)}

    def standin_step() -> dict[str, Any]:
        logs_dir = out / "logs"
        if first["params"] is not None:
            paths = run_standin(scenario, copies["profile"], params_list=first["params"], out_dir=logs_dir, seed=seed)
        else:  # no proposals: a Sobol design inside the safe bounds, as a lab's first hand-picked trials
            paths = run_standin(scenario, copies["profile"], design=FIRST_TRIALS, out_dir=logs_dir, seed=seed)
        first["logs"] = paths
        return {"profile": PROFILE_FILE, "logs written": len(paths), "folder": str(logs_dir)}

    def ingest_step() -> dict[str, Any]:
        summary = ingest(scenario, store, first["logs"], matches=MATCHES[quick], seed=seed, progress=progress)
        return {"stored": len(summary.stored), "already stored": len(summary.skipped_duplicates),
                "failed": len(summary.failed), "matched simulations per trial": summary.matches}

    def shift_step() -> dict[str, Any]:
        report = assess_shift(scenario, store, seed=seed)
        verdicts = [f.verdict for f in report.features]
        figures: dict[str, Any] = {v: verdicts.count(v) for v in dict.fromkeys(verdicts)}
        figures["MMD p"] = report.joint.mmd_p_value
        figures["classifier AUC"] = report.joint.classifier_auc
        return figures

    def prior_step() -> dict[str, Any]:
        prior = fit_prior(scenario, store, seed=seed, progress=progress)
        return {"rho": prior.rho, "rho interval": prior.rho_interval, "fit seconds": prior.fit_seconds}

    def proposals_step() -> dict[str, Any]:
        try:
            result = propose(scenario, store, count=FIRST_TRIALS, max_fall_risk=MAX_FALL_RISK, seed=seed)
        except ModelError as exc:  # shown, not hidden: the report's proposals section will say what to run
            return {"no proposal": str(exc)}
        return {"proposed": len(result.proposals), "max fall risk": max(p.fall_risk for p in result.proposals)}

    def budget_step() -> dict[str, Any]:
        plan = plan_budget(scenario, store, seed=seed, progress=progress,
                           **({"draws": 16, "max_trials": 30} if quick else {}))
        # a P80 beyond the simulated horizon is None in the result: say "> T trials", not "None"
        return {"P80 with prior": f"{book_text(plan.with_prior.p80, plan.max_trials)} trials",
                "P80 cold start": f"{book_text(plan.cold_start.p80, plan.max_trials)} trials"}

    def calibrate_step() -> dict[str, Any]:
        extra = {"generations": 4, "popsize": 2, "spread_draws": 4} if quick else {}
        overlay = copies["scenario"].with_name(copies["scenario"].stem + ".calibrated.toml")
        result = calibrate(scenario, store, overlay_path=overlay, seed=seed, progress=progress, **extra)
        figures: dict[str, Any] = {
            p.name: f"{p.estimate:.3g} [{p.interval[0]:.3g}, {p.interval[1]:.3g}]"
            + ("" if p.identifiable else " (not pinned)")
            for p in result.parameters
        }
        figures["overlay"] = str(overlay)
        return figures

    steps.run("sweep", sweep_step)
    steps.run("propose the first trials", first_proposals_step)
    steps.run("run them on the stand-in robot", standin_step)
    steps.run("ingest the logs", ingest_step)
    steps.run("shift: does simulation carry over?", shift_step)
    steps.run("prior", prior_step)
    steps.run("propose the next trials", proposals_step)
    steps.run("budget", budget_step)
    steps.run("calibrate the simulator", calibrate_step)
    def report_step() -> dict[str, Any]:
        first["report"] = write_report(scenario, store, out / "report.html", progress=progress)
        return {"verdict": first["report"].decision.verdict, "next step": first["report"].decision.next_step}

    steps.run("report", report_step)
    return first["report"]

