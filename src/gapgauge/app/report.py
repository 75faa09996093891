"""The report job: read what the store holds for a scenario once, render the transfer report, write it.

:func:`write_report` opens the store, loads the sweep, the trials and each typed result (or None
when its step has not been run), hands them to the pure renderer of ``gapgauge.report.html`` and
writes the HTML page, its JSON summary beside it and, if asked, every figure as a PNG.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from ..compare.budget import BudgetPlan
from ..compare.calibration import CalibrationResult
from ..compare.prior import PriorFit
from ..compare.propose import Proposals
from ..compare.shift import ShiftReport
from ..errors import StoreError
from ..progress import Progress, or_silent
from ..report.html import RenderedReport, render
from ..report.inputs import ReportInputs
from ..report.sections.decision import Decision
from ..report.sections.first_screen import SectionStatus
from ..scenario import Scenario
from ..store import Store
from .common import as_scenario, open_store
from .prior import load_prior

STAGE = "report"


@dataclass(frozen=True)
class ReportResult:
    """Where the report went, what its first screen decided and which sections have their data."""

    path: Path
    json_path: Path
    sections: list[SectionStatus]
    decision: Decision


def read_inputs(scenario: Scenario, store: Store) -> ReportInputs:
    """Everything the report shows for ``scenario``, read from an open ``store``."""
    h = scenario.content_hash
    try:
        rollouts = store.rollouts(h)  # runs of kind "sweep" only
    except StoreError:  # the store has never seen this scenario: nothing swept yet
        rollouts = None
    prior = store.load_result(PriorFit, h)
    return ReportInputs(
        scenario=scenario,
        rollouts=rollouts if rollouts is not None and len(rollouts) else None,
        trials=list(store.trials(h)),
        shift=store.load_result(ShiftReport, h),
        prior=None if prior is None else load_prior(scenario, store),
        proposals=store.load_result(Proposals, h),
        budget=store.load_result(BudgetPlan, h),
        calibration=store.load_result(CalibrationResult, h),
        store_path=str(store.path),
        runs=store.runs(h),
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
    with open_store(store) as opened:
        inputs = read_inputs(scenario, opened)
    tick(STAGE, 1, 3)
    json_path = out.with_suffix(".json")
    rendered = render(inputs, json_name=json_path.name)
    tick(STAGE, 2, 3)
    _write(rendered, out, json_path, None if plots_dir is None else Path(plots_dir))
    tick(STAGE, 3, 3)
    return ReportResult(out, json_path, rendered.sections, rendered.decision)
