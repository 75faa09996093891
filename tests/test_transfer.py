"""The scoring of benchmarks/transfer.py: trials to target, falls, first fall-free trial (no simulation)."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
transfer = pytest.importorskip("transfer")
from transfer_methods import TuningRun  # noqa: E402

REF = {"best": 0.0, "random_median": 1.0}  # target = 1 - 0.95 (1 - 0) = 0.05


def _run(objective: list[float], fell: list[bool]) -> TuningRun:
    objective = np.array(objective, dtype=float)
    fell = np.array(fell, dtype=bool)
    scored = np.where(fell, 5.0, objective)
    n = objective.size
    return TuningRun("gapgauge", "close", 0, np.zeros((n, 2)), np.where(fell, np.nan, objective), fell,
                     ~fell, scored, np.zeros(n, bool), 0.0)


def test_target_is_the_first_standing_trial_95_percent_of_the_way_from_median_to_best():
    # trial 2 falls (scored 5.0, never a hit); trial 3 at 0.04 <= 0.05 is the first hit (common practice)
    figures = transfer.run_figures(_run([0.5, 0.0, 0.04, 0.3], [False, True, False, False]), REF, 4)
    assert figures["trials_to_target"] == 3
    assert figures["falls"] == 1
    assert figures["first_fall_free"] == 1
    assert figures["best_so_far"].tolist() == [0.5, 0.5, 0.04, 0.04]


def test_a_run_that_never_gets_there_counts_as_trials_plus_one_and_as_not_reached():
    rows = [transfer.run_figures(_run([0.5, 0.4], [True, False]), REF, 2),
            transfer.run_figures(_run([0.01, 0.4], [False, False]), REF, 2)]
    assert rows[0]["trials_to_target"] == 3
    assert rows[0]["first_fall_free"] == 2
    summary = transfer.summarise(rows, 2)
    assert summary["not_reached_fraction"] == 0.5
    assert summary["fall_free_fraction"] == 0.75
    assert summary["first_trial_success"] == 0.5
