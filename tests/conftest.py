"""Fixtures shared across test modules.

``report_lab`` is the small real store of ``test_report_support.py`` (a sweep, five stand-in trials with a
hostile file name, robot id and notes in the first, every job's result), built once per session for the
report's tests that only read it (units, motion, run sheet, browser) and its report written once.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pytest

from gapgauge.app.report import ReportResult, write_report
from gapgauge.results import Result
from gapgauge.scenario import Scenario
from gapgauge.store import Store
from test_report_support import build_store, project, run_jobs


@dataclass
class ReportLab:
    """The shared store: its scenario, the open store, what each job returned, and the report of it."""

    folder: Path
    scenario: Scenario
    store: Store
    results: dict[str, Result]
    report: ReportResult

    @property
    def html(self) -> str:
        return self.report.path.read_text(encoding="utf-8")


@pytest.fixture(scope="session")
def report_lab(tmp_path_factory) -> ReportLab:
    folder = tmp_path_factory.mktemp("report_lab")
    scenario = project(folder)
    store = build_store(scenario, folder / "store.sqlite", hostile=True, kinds=())
    results = run_jobs(scenario, store)
    report = write_report(scenario, store, folder / "report.html", plots_dir=folder / "plots")
    yield ReportLab(folder, scenario, store, results, report)
    store.close()
