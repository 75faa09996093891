"""The report job: read what the store holds for a scenario once, render the transfer report, write it.

:func:`write_report` opens the store, loads the sweep, the trials and each typed result (or None
when its step has not been run), re-simulates a few of each trial's matched simulations for the
motion section (:func:`read_motion`), hands everything to the pure renderer of ``gapgauge.report.html``
and writes the HTML page, its JSON summary beside it and, if asked, every figure as a PNG.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..compare.budget import BudgetPlan
from ..compare.calibration import CalibrationResult
from ..compare.prior import PriorFit
from ..compare.propose import Proposals
from ..compare.shift import ShiftReport
from ..errors import ModelError, StoreError
from ..observe import logger_view
from ..progress import Progress, or_silent
from ..records import TrialRecord
from ..report.html import RenderedReport, render
from ..report.inputs import ReportInputs, TrialMotion
from ..report.sections.decision import Decision
from ..report.sections.first_screen import SectionStatus
from ..scenario import Scenario
from ..sim.rollout import simulate
from ..store import Store
from .common import as_scenario, open_store
from .prior import load_prior

STAGE = "report"
#: matched simulations re-simulated per trial for the motion section: enough for a median and a 5-95%
#: band to mean something, few enough that the report stays a matter of seconds (~15 ms CPU each)
MOTION_SIMULATIONS = 16


@dataclass(frozen=True)
class ReportResult:
    """Where the report went, what its first screen decided and which sections have their data."""

    path: Path
    json_path: Path
    sections: list[SectionStatus]
    decision: Decision
    first_screen: dict = field(default_factory=dict)  # the first screen's words (budget, stop rule, ...)


def _physics_columns(scenario: Scenario, names: tuple[str, ...], physics: np.ndarray) -> np.ndarray:
    """The stored physics draws ``(k x q)`` (columns ``names``) in the scenario's ``[physics]`` order."""
    order = [names.index(r.name) for r in scenario.physics]
    return np.asarray(physics, float)[:, order]


def read_motion(scenario: Scenario, store: Store, trials: list[TrialRecord],
                per_trial: int = MOTION_SIMULATIONS) -> list[TrialMotion]:
    """Per trial its stored series and up to ``per_trial`` of its matched simulations, simulated again.

    The matched rollouts are re-run with the parameters and physics draws stored with them (the first
    ``per_trial`` that did not diverge, nominal physics first) in one batch, and passed through
    :func:`gapgauge.observe.logger_view` as every simulated trajectory is before its features are
    measured, so the two sides are seen alike.
    """
    picked: list[tuple[int, np.ndarray, np.ndarray]] = []
    motions: list[TrialMotion] = []
    for number, trial in enumerate(trials, start=1):
        hardware = None if trial.id is None else store.trial_series(trial.id)
        matched = store.matches(trial.id) if trial.id is not None else None
        note = "" if hardware is not None else "no series stored for this trial"
        if matched is not None and len(matched):
            keep = np.flatnonzero(np.asarray(matched.status) != "diverged")[:per_trial]
            if keep.size:
                physics = _physics_columns(scenario, tuple(matched.physics_names), matched.physics[keep])
                picked.append((number, np.asarray(matched.params, float)[keep], physics))
        else:
            note = (note + "; " if note else "") + "no matched simulations"
        motions.append(TrialMotion(number, hardware, None, note))
    if picked:
        params = np.vstack([p for _, p, _ in picked])
        physics = np.vstack([q for _, _, q in picked])
        _, trajectory = simulate(scenario, params, physics, return_trajectory=True)
        # measured as the sweep measures: the centre of pressure from the contact forces with the last
        # value held while unloaded (the simulator's own cop_x is undefined then), not the raw channel
        trajectory.channels.pop("cop_x", None)
        seen = logger_view(trajectory, scenario.hardware)
        start = 0
        for number, p, _ in picked:
            rows = np.arange(start, start + len(p))
            motions[number - 1].simulated = seen.select(rows)
            start += len(p)
    return motions


def _load(store: Store, cls: type, scenario_hash: str, stale: dict[str, str]):
    """The newest stored result of ``cls``; None (and why, in ``stale``) when it is of an older format."""
    try:
        return store.load_result(cls, scenario_hash)
    except StoreError as exc:  # stored by an older gapgauge: the section asks for the step again
        stale[cls.kind] = str(exc)
        return None


def read_inputs(scenario: Scenario, store: Store, *, motion: bool = True) -> ReportInputs:
    """Everything the report shows for ``scenario``, read from an open ``store`` (``motion``: also
    re-simulate the trials' matched simulations for the motion section). A result stored in an older
    format is left out, its section saying to run the step again."""
    h = scenario.content_hash
    try:
        rollouts = store.rollouts(h)  # runs of kind "sweep" only
    except StoreError:  # the store has never seen this scenario: nothing swept yet
        rollouts = None
    stale: dict[str, str] = {}
    prior = _load(store, PriorFit, h, stale)
    if prior is not None:
        try:
            prior = load_prior(scenario, store)
        except (StoreError, ModelError) as exc:
            stale["prior"], prior = str(exc), None
    trials = list(store.trials(h))
    return ReportInputs(
        scenario=scenario,
        rollouts=rollouts if rollouts is not None and len(rollouts) else None,
        trials=trials,
        shift=_load(store, ShiftReport, h, stale),
        prior=prior,
        proposals=_load(store, Proposals, h, stale),
        budget=_load(store, BudgetPlan, h, stale),
        calibration=_load(store, CalibrationResult, h, stale),
        store_path=str(store.path),
        runs=store.runs(h),
        motion=read_motion(scenario, store, trials) if motion else [],
        stale=stale,
    )


def _write(rendered: RenderedReport, out: Path, json_path: Path, plots_dir: Path | None) -> None:
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(rendered.html, encoding="utf-8")
        json_path.write_text(json.dumps(rendered.summary, indent=2, allow_nan=False) + "\n", encoding="utf-8")
        if plots_dir is not None:
            plots_dir.mkdir(parents=True, exist_ok=True)
            for fig in rendered.figures:
                (plots_dir / f"{fig.name}.png").write_bytes(fig.png)
    except OSError as exc:
        raise StoreError(
            f"{exc.filename or out}: cannot write the report ({exc.strerror}); check the folder exists and is writable"
        ) from None


def write_report(
    scenario: Scenario | str | Path,
    store: Store | str | Path,
    out: str | Path = "report.html",
    *,
    plots_dir: str | Path | None = None,
    progress: Progress | None = None,
) -> ReportResult:
    """Write the transfer report for ``scenario`` from ``store``: ``out`` (HTML) and the same stem ``.json``.

    Args:
        scenario: a Scenario, or the path of its TOML (its content hash selects the store's rows).
        store: an open :class:`gapgauge.store.Store` (left open), or the path of its file.
        out: the HTML file to write; the JSON summary goes beside it with the suffix ``.json``.
        plots_dir: if given, every figure is also written there as ``NAME.png`` (for slides).
        progress: called as ``progress("report", done, 3)`` after reading, rendering and writing.

    Sections whose results are missing say which command fills them.

    Raises:
        StoreError: ``out`` does not end in ``.html``, the store file does not exist, or the output
            cannot be written.
    """
    out = Path(out)
    if out.suffix.lower() not in (".html", ".htm"):
        raise StoreError(f"{out}: the report is an HTML file; give an output path ending in .html")
    tick = or_silent(progress)
    scenario = as_scenario(scenario)
    with open_store(store, scenario=scenario) as opened:
        inputs = read_inputs(scenario, opened)
    tick(STAGE, 1, 3)
    json_path = out.with_suffix(".json")
    rendered = render(inputs, json_name=json_path.name)
    tick(STAGE, 2, 3)
    _write(rendered, out, json_path, None if plots_dir is None else Path(plots_dir))
    tick(STAGE, 3, 3)
    return ReportResult(out, json_path, rendered.sections, rendered.decision, rendered.summary["first_screen"])
