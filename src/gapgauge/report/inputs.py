"""What the report is handed: the scenario, the sweep, the trials and each typed result (or None).

:class:`ReportInputs` is filled by the application layer (``gapgauge.app.report``), which reads the
store once; everything under ``report/`` renders from it and never reads a store.
"""

from __future__ import annotations

import datetime as _dt
import shlex
from dataclasses import dataclass, field
from pathlib import Path

from ..compare.budget import BudgetPlan
from ..compare.calibration import CalibrationResult
from ..compare.prior import PriorFit
from ..compare.propose import Proposals
from ..compare.shift import ShiftReport
from ..records import RolloutBatch, TrialRecord
from ..results import Result
from ..scenario import Scenario
from ..store.db import RunRecord
from ..trajectory import Trajectory

DEFAULT_STORE_NAME = "gapgauge.sqlite"
RESULT_KINDS = ("shift", "prior", "proposals", "budget", "calibration")


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def relative(path: str | Path) -> str:
    """``path`` relative to the working folder when it lies inside it (shorter commands to paste)."""
    try:
        return str(Path(path).resolve().relative_to(Path.cwd().resolve()))
    except ValueError:
        return str(path)


@dataclass
class TrialMotion:
    """One hardware trial's time series beside those of its matched simulations.

    Attributes:
        number: the trial's number in the report (1-based, the order of ``ReportInputs.trials``).
        hardware: the stored, resampled series of the trial (a batch of one), or None when none is stored.
        simulated: its matched simulations re-simulated (same parameters and physics draws as the match
            runs) and seen through the logger (:func:`gapgauge.observe.logger_view`), a batch of
            ``k``; or None when none could be simulated.
        note: why a part is missing, in words ("" when nothing is).
    """

    number: int
    hardware: Trajectory | None
    simulated: Trajectory | None
    note: str = ""


@dataclass
class ReportInputs:
    """Everything the report shows.

    Attributes:
        scenario: the scenario reported on.
        rollouts: the sweep's rollouts (runs of kind ``sweep`` only: matched runs sit on the trials'
            parameters and would distort the coverage), or None before any sweep.
        trials: the hardware trials, in the order they were stored.
        shift, prior, proposals, budget, calibration: the newest stored result of each kind, or None
            when that step has not been run. ``prior`` carries its fitted models (unstored fields)
            when they could be restored, for the prior's plots.
        store_path: the store's file (for the commands the report suggests and the provenance).
        runs: the scenario's runs, oldest first (provenance).
        motion: per hardware trial its series and its matched simulations' (the motion section); empty
            when not read.
        stale: result kind -> why its stored result was left out (stored in an older format).
        generated_at: when the report was made, ISO 8601, UTC.
    """

    scenario: Scenario
    rollouts: RolloutBatch | None
    trials: list[TrialRecord]
    shift: ShiftReport | None = None
    prior: PriorFit | None = None
    proposals: Proposals | None = None
    budget: BudgetPlan | None = None
    calibration: CalibrationResult | None = None
    store_path: str = ""
    runs: list[RunRecord] = field(default_factory=list)
    motion: list[TrialMotion] = field(default_factory=list)
    stale: dict[str, str] = field(default_factory=dict)
    generated_at: str = field(default_factory=_now)

    @property
    def n_rollouts(self) -> int:
        return 0 if self.rollouts is None else len(self.rollouts)

    @property
    def n_synthetic(self) -> int:
        return sum(1 for t in self.trials if t.synthetic)

    def results(self) -> dict[str, Result | None]:
        """Kind -> the stored result or None, in the report's order."""
        return {kind: getattr(self, kind) for kind in RESULT_KINDS}

    def command(self, verb: str, *extra: str) -> str:
        """A command line for this scenario and store, ready to paste."""
        words = ["gapgauge", verb, relative(self.scenario.path), *extra]
        if self.store_path and relative(self.store_path) != DEFAULT_STORE_NAME:
            words += ["--store", relative(self.store_path)]
        return " ".join(shlex.quote(w) if i >= 2 else w for i, w in enumerate(words))
