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

import dataclasses
import importlib
import json
import shutil
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .errors import ModelError, ScenarioError
from .scenario import load_scenario

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
    """One step of the demo: what it printed as figures, its wall time, and whether it ran."""

    name: str
    seconds: float = 0.0
    figures: dict[str, Any] = field(default_factory=dict)
    skipped: str | None = None  # why the step did not run (its module has not landed), else None


@dataclass
class DemoResult:
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
    """The source checkout the package runs from: ``Path(gapgauge.__file__).parents[2]``."""
    import gapgauge

    return Path(gapgauge.__file__).resolve().parents[2]


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


def as_json(result: Any) -> dict[str, Any]:
    """The JSON form of an analysis result (``to_json``/``as_dict``/``to_dict``/``summary``, a dict)."""
    for method in ("to_json", "as_dict", "to_dict", "summary"):
        if hasattr(result, method):
            value = getattr(result, method)()
            if isinstance(value, str):
                value = json.loads(value)
            if isinstance(value, dict):
                return value
    if dataclasses.is_dataclass(result) and not isinstance(result, type):
        return dataclasses.asdict(result)
    if isinstance(result, dict):
        return result
    raise TypeError(f"cannot turn {type(result).__name__} into JSON")


def _api(name: str) -> Callable[..., Any]:
    """The public API function ``gapgauge.<name>``; ImportError while its module has not landed."""
    import gapgauge

    target = gapgauge._LAZY[name]
    module, attr = target.split(":")
    return getattr(importlib.import_module(module), attr)


class _Printer:
    def __init__(self, enabled: bool) -> None:
        from rich.console import Console

        self.console = Console(highlight=False) if enabled else None

    def step(self, number: int, name: str) -> None:
        if self.console:
            self.console.rule(f"[bold]{number}. {name}", align="left")

    def line(self, text: str) -> None:
        if self.console:
            from rich.markup import escape

            self.console.print(escape(text))


def _figures_text(figures: dict[str, Any]) -> str:
    parts = []
    for key, value in figures.items():
        if isinstance(value, float):
            value = f"{value:.3g}"
        parts.append(f"{key.replace('_', ' ')}: {value}")
    return "; ".join(parts)


def run_demo(
    out_dir: str | Path = "gapgauge-demo", quick: bool = False, seed: int = 0, progress: bool = True
) -> DemoResult:
    """Run the whole path on the bundled scenario with the stand-in robot; write the report in ``out_dir``.

    Args:
        out_dir: folder for the scenario copy, the store, the stand-in logs, the overlay and the report
            (created; a store already there is reused, so a second run resumes the sweep).
        quick: a smaller sweep (500 rollouts, a few seconds) and fewer matched simulations (8 per trial).
        seed: seed of every step (sweep design and physics draws, stand-in noise, bootstraps,
            proposals, budget draws, calibration); stored with each result.
        progress: print each step with its figures (and progress bars).

    Returns:
        :class:`DemoResult` with the report's path and each step's wall time and figures.
    """
    started = time.perf_counter()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    copies = copy_bundle(out)
    scenario = load_scenario(copies["scenario"])
    printer = _Printer(progress)
    from .store import Store

    store_path = out / STORE_FILE
    store = Store(store_path)
    steps: list[DemoStep] = []
    state: dict[str, Any] = {"first_params": None, "logs": [], "report": None}

    def run(name: str, body: Callable[[DemoStep], None]) -> None:
        step = DemoStep(name)
        printer.step(len(steps) + 1, name)
        t0 = time.perf_counter()
        try:
            body(step)
        except ImportError as exc:  # the step's module has not landed yet
            step.skipped = str(exc)
            printer.line(f"(step not available: {exc})")
        step.seconds = time.perf_counter() - t0
        if step.skipped is None:
            printer.line(_figures_text(step.figures) + f"  [{step.seconds:.1f} s]")
        steps.append(step)

    def sweep_step(step: DemoStep) -> None:
        sweep = _api("sweep")
        summary = sweep(
            scenario,
            store=store,
            rollouts=SWEEP_ROLLOUTS[quick],
            design="sobol",
            seed=seed,
            progress=progress,
        )
        info = as_json(summary) if not isinstance(summary, (int, type(None))) else {}
        batch = store.rollouts(scenario.content_hash)
        status = np.asarray(batch.status) if batch is not None else np.array([])
        step.figures = {
            "rollouts": int(status.size),
            "fell": int(np.sum(status == "fell")),
            "diverged": int(np.sum(status == "diverged")),
        }
        if batch is not None and np.any(status == "ok"):
            step.figures["best objective"] = float(
                np.nanmin(np.where(status == "ok", batch.objective, np.nan))
            )
        for key in ("wall_seconds", "rollouts_per_second"):
            if key in info:
                step.figures[key] = info[key]

    def first_proposals_step(step: DemoStep) -> None:
        propose = _api("propose")
        try:
            result = as_json(
                propose(scenario, store, count=FIRST_TRIALS, max_fall_risk=MAX_FALL_RISK, seed=seed)
            )
        except ModelError as exc:  # a real answer: the model finds no set it trusts; hand-pick instead
            step.figures = {"no proposal": str(exc), "instead": "a Sobol design inside the safe bounds"}
            return
        state["first_params"] = [p["params"] for p in result["proposals"]]
        step.figures = {
            "proposed": len(state["first_params"]),
            "max fall risk": max(float(p.get("fall_risk") or 0.0) for p in result["proposals"]),
        }

    def standin_step(step: DemoStep) -> None:
        run_standin = _api("run_standin")
        logs_dir = out / "logs"
        if state["first_params"] is not None:
            paths = run_standin(
                scenario, copies["profile"], params_list=state["first_params"], out_dir=logs_dir, seed=seed
            )
        else:  # no proposals: a Sobol design inside the safe bounds, as a lab's first hand-picked trials
            paths = run_standin(scenario, copies["profile"], design=FIRST_TRIALS, out_dir=logs_dir, seed=seed)
        state["logs"] = [Path(p) for p in paths]
        step.figures = {"profile": PROFILE_FILE, "logs written": len(paths), "folder": str(logs_dir)}

    def ingest_step(step: DemoStep) -> None:
        ingest = _api("ingest")
        summary = ingest(
            scenario,
            [str(p) for p in state["logs"]],
            store=store,
            matches=MATCHES[quick],
            seed=seed,
            progress=progress,
        )
        step.figures = {
            "stored": len(summary.stored),
            "already stored": len(summary.skipped_duplicates),
            "failed": len(summary.failed),
            "matched simulations per trial": summary.matches,
        }

    def shift_step(step: DemoStep) -> None:
        assess_shift = _api("assess_shift")
        result = as_json(assess_shift(scenario, store, seed=seed))  # stores itself for the report
        verdicts = [f["verdict"] for f in result["features"]]
        step.figures = {v: verdicts.count(v) for v in dict.fromkeys(verdicts)}
        step.figures["MMD p"] = result["joint"].get("mmd_p_value")
        step.figures["classifier AUC"] = result["joint"].get("classifier_auc")

    def prior_step(step: DemoStep) -> None:
        fit_prior = _api("fit_prior")
        prior = fit_prior(scenario, store, seed=seed, progress=progress)  # stores itself
        result = as_json(prior)
        step.figures = {
            "rho": result.get("rho"),
            "rho interval": result.get("rho_interval"),
            "fit seconds": result.get("fit_seconds"),
        }

    def proposals_step(step: DemoStep) -> None:
        propose = _api("propose")
        try:
            result = as_json(
                propose(scenario, store, count=FIRST_TRIALS, max_fall_risk=MAX_FALL_RISK, seed=seed)
            )
        except ModelError as exc:  # shown, not hidden: the report's proposals section will say what to run
            step.figures = {"no proposal": str(exc)}
            return
        risks = [float(p.get("fall_risk") or 0.0) for p in result["proposals"]]
        step.figures = {"proposed": len(risks), "max fall risk": max(risks) if risks else None}

    def budget_step(step: DemoStep) -> None:
        plan_budget = _api("plan_budget")
        result = as_json(
            plan_budget(
                scenario,
                store,
                seed=seed,
                progress=progress,
                **({"draws": 16, "max_trials": 30} if quick else {}),
            )
        )  # plan_budget stores its result for the report
        step.figures = {
            "P80 with prior": result["with_prior"].get("p80"),
            "P80 cold start": result["cold_start"].get("p80"),
        }

    def calibrate_step(step: DemoStep) -> None:
        _api("calibrate")  # the step is skipped, with a note, if calibration is not installed
        from .workflow import calibrate_from_store

        extra = {"generations": 4, "popsize": 2, "spread_draws": 4} if quick else {}
        overlay = copies["scenario"].with_name(copies["scenario"].stem + ".calibrated.toml")
        # writes the overlay, checks that it loads, and stores the result for the report
        result = calibrate_from_store(scenario, store, overlay_path=overlay, seed=seed, progress=progress, **extra)
        step.figures = {
            p.name: f"{p.estimate:.3g} [{p.interval[0]:.3g}, {p.interval[1]:.3g}]"
            + ("" if p.identifiable else " (not pinned)")
            for p in result.parameters
        }
        step.figures["overlay"] = str(overlay)

    def report_step(step: DemoStep) -> None:
        from .report.html import write_report

        result = write_report(scenario, store, out / "report.html")
        state["report"] = result
        step.figures = {"verdict": result.decision.verdict, "next step": result.decision.next_step}

    try:
        run("sweep", sweep_step)
        run("propose the first trials", first_proposals_step)
        run("run them on the stand-in robot", standin_step)
        run("ingest the logs", ingest_step)
        run("shift: does simulation carry over?", shift_step)
        run("prior", prior_step)
        run("propose the next trials", proposals_step)
        run("budget", budget_step)
        run("calibrate the simulator", calibrate_step)
        run("report", report_step)
    finally:
        getattr(store, "close", lambda: None)()
    seconds = time.perf_counter() - started
    report = state["report"]
    if report is not None:
        printer.line(
            f"report: {report.path.resolve()}  (JSON: {report.json_path.name}); demo took {seconds:.0f} s"
        )
    from .report.html import caution_text

    printer.line(caution_text())
    return DemoResult(
        out,
        copies["scenario"],
        store_path,
        None if report is None else report.path,
        None if report is None else report.json_path,
        seed,
        quick,
        steps,
        seconds,
    )
