"""The shift assessment as a job: read the hardware trials and their matched simulations from the
store, compute the per-feature and joint statistics and verdicts (:mod:`gapgauge.compare.shift`),
save the :class:`ShiftReport` in the store for the report, and optionally write JSON and plots.

A trial whose disturbance onset could not be placed in time (``extra["alignment"]["placed"]`` false, see
:mod:`gapgauge.logs.align`) is left out, with the reason in the notes: its features are measured from an
unknown moment. On request (``leave_out_flagged``) the features that read a flagged channel
(:class:`gapgauge.logs.ChannelFlag`) are left out of that trial; otherwise the notes say which trials
carry flags."""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from ..compare.shift import ScenarioRef, ShiftReport, shift_from_arrays
from ..errors import GapgaugeError, ModelError
from ..features import channels_needed
from ..progress import Progress, or_silent
from ..report.shift_plots import plot_shift
from ..scenario import Scenario
from ..store import Store
from .common import as_scenario, open_store

READ_STAGE = "shift: matched simulations read"


def assess_shift(
    scenario: Scenario | str | Path,
    store: Store | str | Path,
    *,
    seed: int = 0,
    level: float | None = None,
    json_path: str | Path | None = None,
    plots_dir: str | Path | None = None,
    leave_out_flagged: bool = False,
    progress: Progress | None = None,
) -> ShiftReport:
    """Assess, feature by feature, whether the scenario's simulation carries over to the hardware trials.

    Args:
        scenario: a loaded :class:`Scenario` or the path of its TOML file (its ``[shift]`` table gives
            the level, limits and resample counts).
        store: a :class:`gapgauge.store.Store`, or the path of its file (opened and closed here).
        seed: seeds every bootstrap and permutation; stored in the result.
        level: overrides ``[shift] level``.
        json_path: also write the result as JSON here.
        plots_dir: also save one PNG per feature here (their paths are in ``plots``).
        leave_out_flagged: leave out, trial by trial, the features that read a channel flagged as unusual
            when the log was taken in (beyond its plausible range, spikes, a scale far from the simulation's).
        progress: ``progress(stage, done, total)`` per trial read, then per feature and for the joint
            tests (see :func:`gapgauge.compare.shift.shift_from_arrays`).

    Returns:
        The :class:`ShiftReport`, also saved in the store under the kind ``"shift"``.

    Raises:
        StoreError: the store file does not exist.
        ModelError: ``level`` is not a significance level, or the store holds no hardware trials of
            the scenario, or none with matched simulations.
    """
    scenario = as_scenario(scenario)
    settings = scenario.shift if level is None else replace(scenario.shift, level=float(level))
    if not 0 < settings.level < 0.5:
        raise ModelError(
            f"level {settings.level:g} is not a sensible significance level; give one between 0 and 0.5, "
            "such as 0.05 (the level argument, or [shift] level in the scenario)"
        )
    with open_store(store, scenario=scenario) as db:
        hardware, simulated, hardware_objective, simulated_objective, ids, notes = _read_matched(
            scenario, db, or_silent(progress), leave_out_flagged
        )
        report = shift_from_arrays(
            hardware, simulated, list(scenario.features.names), settings, int(seed),
            hardware_objective=hardware_objective, simulated_objective=simulated_objective, trial_ids=ids,
            progress=progress,
        )
        report.scenario = ScenarioRef(scenario.name, scenario.content_hash, str(scenario.path))
        report.notes.extend(notes)
        report.leave_out_flagged = bool(leave_out_flagged)
        if plots_dir is not None:
            try:
                report.plots = [str(p) for p in plot_shift(report, plots_dir)]
            except OSError as exc:
                raise GapgaugeError(
                    f"{plots_dir}: cannot write the shift plots ({exc.strerror}); check the plots_dir folder"
                ) from None
        db.save_result(scenario.content_hash, report)
    if json_path is not None:
        report.write_json(json_path)
    return report


def _read_matched(
    scenario: Scenario, db: Store, progress: Progress, leave_out_flagged: bool = False
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, list[int], list[str]]:
    """The trials' features ``(n x f)`` and objective ``(n,)``, their matched simulations
    ``(n x K x f)`` and ``(n x K)`` (NaN-padded to the largest K, diverged rows left out), the trial
    ids and notes on what was left out (module docstring: unplaced trials, flagged channels)."""
    trials = db.trials(scenario.content_hash)
    if not trials:
        raise ModelError(
            f"no hardware trials in the store for scenario {scenario.name!r}; ingest the trials' logs first "
            f"(gapgauge.ingest, or gapgauge ingest {scenario.path} LOGS...)"
        )
    names = list(scenario.features.names)
    hw_rows, sim_blocks, hw_obj, sim_obj, ids, notes = [], [], [], [], [], []
    reads = {name: set(channels_needed([name])) for name in names}
    flagged_trials = []
    for done, trial in enumerate(trials):
        progress(READ_STAGE, done, len(trials))
        alignment = trial.extra.get("alignment") or {}
        if alignment.get("placed") is False:
            notes.append(f"trial {trial.id} was left out: its disturbance onset could not be placed in time "
                         f"({alignment.get('reason') or 'no reason recorded'})")
            continue
        batch = db.matches(trial.id)
        keep = np.asarray(batch.status) != "diverged" if len(batch) else np.zeros(0, bool)
        if not np.any(keep):
            notes.append(f"trial {trial.id} has no usable matched simulations; it was left out")
            continue
        if not np.all(keep):
            notes.append(f"trial {trial.id}: {int(np.sum(~keep))} matched simulation(s) diverged and were left out")
        flagged = sorted({str(f.get("channel")) for f in trial.extra.get("flags") or []})
        row = [_as_float(trial.features.get(name)) for name in names]
        if flagged and leave_out_flagged:
            dropped = [name for name in names if reads[name] & set(flagged)]
            row = [math.nan if name in dropped else v for name, v in zip(names, row, strict=True)]
            if dropped:
                notes.append(f"trial {trial.id}: {', '.join(dropped)} left out (flagged channel(s) "
                             f"{', '.join(flagged)})")
        elif flagged:
            flagged_trials.append(f"{trial.id} ({', '.join(flagged)})")
        hw_rows.append(row)
        sim_blocks.append(
            np.column_stack(
                [
                    np.asarray(batch.features[name], float)[keep]
                    if name in batch.features
                    else np.full(int(keep.sum()), np.nan)
                    for name in names
                ]
            )
        )
        hw_obj.append(_as_float(trial.objective))
        sim_obj.append(np.asarray(batch.objective, float)[keep])
        ids.append(trial.id)
    progress(READ_STAGE, len(trials), len(trials))
    if flagged_trials:
        notes.append(f"trial(s) {'; '.join(flagged_trials)} carry flagged channels (unusual values, kept); "
                     "leave_out_flagged leaves the features that read them out")
    if not hw_rows:
        unplaced = sum(1 for t in trials if (t.extra.get("alignment") or {}).get("placed") is False)
        if unplaced:
            raise ModelError(
                f"none of the {len(trials)} hardware trials can be assessed: {unplaced} have a disturbance onset "
                "that could not be placed in time; give disturbance_at, trial_start_at or trigger in their "
                "sidecars and ingest them again"
            )
        raise ModelError(
            f"none of the {len(trials)} hardware trials has matched simulations; ingest them again "
            "(with matches of at least 2) to simulate them"
        )
    k = max(b.shape[0] for b in sim_blocks)
    simulated = np.full((len(sim_blocks), k, len(names)), np.nan)
    simulated_objective = np.full((len(sim_blocks), k), np.nan)
    for i, (block, obj) in enumerate(zip(sim_blocks, sim_obj, strict=True)):
        simulated[i, : block.shape[0]] = block
        simulated_objective[i, : obj.size] = obj
    return np.asarray(hw_rows, float), simulated, np.asarray(hw_obj, float), simulated_objective, ids, notes


def _as_float(value: Any) -> float:
    """A stored feature or objective as a float; NaN when missing or not a number."""
    if value is None:
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan
