"""Taking in hardware logs as a job: validate each, give it matched simulations, check its units against
them, and store the trial together with its matches.

For each log: :func:`gapgauge.logs.read_log` validates it (impossible values refuse it, unusual ones
become flags per channel), places it in time and resamples it to SI; the balance features are computed
with :func:`gapgauge.features.compute_features` on that trajectory (the same code as for simulated
rollouts) and the objective with ``scenario.objective.evaluate``. Each trial is given ``matches``
simulations at exactly its parameters: a run of kind ``match`` per trial, seeded with ``seed``, whose
rollout 0 uses the nominal physics and rollouts ``1..K-1`` the randomised draws of
:func:`gapgauge.sim.physics.draw_physics` (``default_rng([seed, i])``; every trial shares those draws, so
trials are compared under the same physical conditions). Each channel's scale is then compared with the
nominal matched simulation's (:func:`gapgauge.logs.check_units`): a unit mistake refuses the file with
the fix, another large mismatch is a flag. Then the trial, its simulated rollouts and its links to them
are stored in ONE transaction, so no trial is ever visible without its matches; a kill before that
commit stores nothing of the trial, and the next ingest does it again (rollouts already stored are kept).

A file already stored (same sha256: its content and its sidecar's) is reported as such; its missing
matches, if any, are completed. A bad file is listed with its one-line reason and nothing of it is stored;
the good files of the batch are stored all the same. Logs are taken in blocks of :data:`BLOCK_LOGS`, each
block's simulations run in one call.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from ..errors import GapgaugeError, LogError
from ..features import compute_features
from ..logs import ChannelFlag, LogTrial, check_units, read_log
from ..observe import logger_view
from ..progress import Progress, or_silent
from ..records import DEFAULT_MATCHES, IngestedFile, IngestSummary, RolloutBatch, TrialRecord
from ..scenario import Scenario
from ..sim.physics import draw_physics
from ..sim.rollout import simulate
from ..sim.sweep import check_model
from ..store import Store
from ..trajectory import MissingChannelError, Trajectory
from ..version import __version__
from .common import as_scenario, open_store

MAX_MATCHES = 4096
STAGE = "ingest: logs"
#: logs read, simulated and stored per block (bounds the nominal trajectories held at once)
BLOCK_LOGS = 16


def trial_record(
    scenario: Scenario, log: LogTrial, *, ingested_at: str = "", tool_version: str = ""
) -> TrialRecord:
    """Features, objective and provenance of a read log, as the record the store keeps (its flags and
    alignment in ``extra``).

    Raises:
        LogError: a feature the scenario asks for needs a channel the log does not map.
    """
    try:
        features = compute_features(log.trajectory, scenario.features, scenario.features.names)
    except MissingChannelError as exc:
        raise LogError(
            f"{log.path}: {exc}; map the log's {'topic and field' if 'bag' in log.table else 'column'} to "
            f"channel {exc.channel!r} in {log.table} of {scenario.path}, or drop the feature from [features].names"
        ) from None
    objective = float(np.asarray(scenario.objective.evaluate(features), dtype=float)[0])
    return TrialRecord(
        scenario_hash=scenario.content_hash,
        source_path=str(Path(log.path).resolve()),
        sha256=log.sha256,
        params=dict(log.params),
        robot_id=log.robot_id,
        recorded_at=log.recorded_at,
        outcome=log.outcome,
        notes=log.notes,
        synthetic=log.synthetic,
        features={name: float(values[0]) for name, values in features.items()},
        objective=objective,
        ingested_at=ingested_at,
        tool_version=tool_version,
        series=log.trajectory,
        extra={
            "ignored_columns": list(log.ignored_columns),
            "logged_rate_hz": log.logged_rate_hz,
            "warnings": list(log.warnings),
            "flags": [f.to_dict() for f in log.flags],
            "alignment": None if log.alignment is None else log.alignment.to_dict(),
        },
    )


def ingest(
    scenario: Scenario | str | Path,
    store: Store | str | Path,
    paths: Sequence[str | Path],
    *,
    matches: int = DEFAULT_MATCHES,
    seed: int = 0,
    progress: Progress | None = None,
) -> IngestSummary:
    """Validate and store hardware logs, each together with ``matches`` matched simulations.

    Args:
        scenario: the scenario the trials were run under (a :class:`Scenario` or its path).
        store: a :class:`gapgauge.store.Store` or the path of its file (created if missing).
        paths: logs (CSV with sidecar JSON, or ROS 2 bags); see :mod:`gapgauge.logs`.
        matches: K, simulations per trial at its parameters (nominal physics plus K - 1 draws), >= 1.
        seed: seed of the physics draws of the match runs (stored with each run).
        progress: ``progress(stage, done, total)`` per log, as each block is stored.

    Returns:
        :class:`IngestSummary` (also stored). Bad files are in ``failed``; this function raises only for
        bad arguments.
    """
    scenario = as_scenario(scenario)
    if isinstance(paths, (str, Path)):
        paths = [paths]
    if (
        isinstance(matches, bool)
        or not isinstance(matches, (int, np.integer))
        or not 1 <= matches <= MAX_MATCHES
    ):
        raise GapgaugeError(f"matches {matches!r}: give a whole number from 1 to {MAX_MATCHES}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise GapgaugeError(f"seed {seed!r}: give a non-negative whole number")
    matches, seed = int(matches), int(seed)
    check_model(scenario)  # matched simulations need the model: refuse a bad one before reading any log
    report = or_silent(progress)
    with open_store(store, must_exist=False) as db:
        summary = IngestSummary(scenario_hash=db.add_scenario(scenario), matches=matches, seed=seed)
        physics = _match_physics(scenario, matches, seed)
        paths = list(paths)
        for first in range(0, len(paths), BLOCK_LOGS):
            report(STAGE, first, len(paths))
            block = []
            for path in paths[first:first + BLOCK_LOGS]:
                try:
                    log = read_log(scenario, path)
                    now = datetime.now(timezone.utc).isoformat(timespec="seconds")
                    record = trial_record(scenario, log, ingested_at=now, tool_version=__version__)
                    record.scenario_hash = summary.scenario_hash
                except GapgaugeError as exc:
                    summary.failed.append((str(path), str(exc)))
                    continue
                block.append(_Pending(path, log, record))
            _take_in(scenario, db, block, physics, summary)
        report(STAGE, len(paths), len(paths))
        db.save_result(summary.scenario_hash, summary)
    return summary


@dataclass
class _Pending:
    """A log read and measured, waiting for its matched simulations."""

    path: str | Path
    log: LogTrial
    record: TrialRecord
    run_id: int = 0
    new: bool = True
    missing: np.ndarray | None = None  # rollout indices of its match run still to simulate


def _match_physics(scenario: Scenario, k: int, seed: int) -> np.ndarray:
    """``(k x nphysics)``: row 0 the nominal physics, row i the draw ``default_rng([seed, i])``."""
    nominal = draw_physics(scenario, seed, np.array([0]), nominal=True)
    drawn = draw_physics(scenario, seed, np.arange(1, k)) if k > 1 else np.empty((0, len(scenario.physics)))
    return np.vstack([nominal, drawn])


def _take_in(
    scenario: Scenario, store: Store, block: list[_Pending], physics: np.ndarray, summary: IngestSummary
) -> None:
    """Simulate the block's missing matches in two calls (the nominal rows of new trials with their
    trajectories, for the unit check), check units, then store each trial with its matches atomically."""
    k, seed = summary.matches, summary.seed
    for item in block:
        trial = item.record
        item.new = store.find_trial(trial.sha256) is None
        item.run_id = store.start_run(
            "match", scenario, seed=seed, design=f"match:{trial.sha256}", planned=k, nominal=False,
            config={"trial_sha256": trial.sha256, "params": trial.params, "matches": k,
                    "row0": "nominal physics", "rows": "draw_physics(seed, i) for i >= 1"},
        )
        done = {int(i) for i in store.done_indices(item.run_id)}
        # a new trial's nominal row is simulated again for its trajectory, even when already stored
        item.missing = np.array([i for i in range(k) if i not in done and not (item.new and i == 0)], dtype=int)
    fresh = [item for item in block if item.new]
    nominal_rows, nominal_traj = None, None
    if fresh:
        params = np.vstack([scenario.params_from_mapping(item.record.params) for item in fresh])
        nominal_rows, nominal_traj = simulate(scenario, params, np.tile(physics[0], (len(fresh), 1)),
                                              indices=np.zeros(len(fresh), dtype=int), return_trajectory=True)
    todo = [item for item in block if item.missing.size]
    rest = None
    if todo:
        params = np.vstack([np.tile(scenario.params_from_mapping(item.record.params), (item.missing.size, 1))
                            for item in todo])
        rest = simulate(scenario, params, np.vstack([physics[item.missing] for item in todo]),
                        indices=np.concatenate([item.missing for item in todo]))
    summary.simulated += len(fresh) + (0 if rest is None else len(rest))
    offset = 0
    for item in block:
        parts = []
        if item.new:
            i = fresh.index(item)
            parts.append(nominal_rows.subset(np.array([i])))
            refused = _check_units(scenario, item, logger_view(nominal_traj.select(i), scenario.hardware))
            if refused:
                summary.failed.append((str(item.path), refused))
                store.discard_run(item.run_id)
                if item.missing.size:
                    offset += item.missing.size
                continue
        if item.missing.size:
            parts.append(rest.subset(np.arange(offset, offset + item.missing.size)))
            offset += item.missing.size
        batch = RolloutBatch.concat(parts) if parts else None
        trial_id, created = store.add_trial_with_matches(item.record, item.run_id, batch, range(k))
        item.record.id = trial_id
        summary.matched[trial_id] = k
        _report(item, trial_id, created, summary)


def _check_units(scenario: Scenario, item: _Pending, simulated: Trajectory) -> str:
    """Compare the log's channel scales with the nominal matched simulation; the refusal text ("" if none).
    Mismatches that are no unit mistake are added to the record's flags."""
    log = item.log
    findings = check_units(log.trajectory, simulated, log.units, log.table, str(item.path))
    refusals = [f.message for f in findings if f.refuse]
    if refusals:
        more = f" (and {len(refusals) - 1} more channel(s) alike)" if len(refusals) > 1 else ""
        return refusals[0] + more
    for f in findings:
        flag = ChannelFlag(f.channel, "scale", 1, f.ratio, str(item.path), f.message)
        log.flags.append(flag)
        item.record.extra["flags"].append(flag.to_dict())
    return ""


def _report(item: _Pending, trial_id: int, created: bool, summary: IngestSummary) -> None:
    log, record = item.log, item.record
    fell = bool(record.features.get("fell", 0.0) == 1.0)
    warnings = list(log.warnings)
    if log.outcome is not None and (log.outcome == "fell") != fell:
        warnings.append(
            f"{item.path}: the operator's outcome is {log.outcome!r} but the features say "
            f"{'fell' if fell else 'stood'}; check the fall thresholds in [features]"
        )
    if log.alignment is not None and not log.alignment.placed:
        warnings.append(f"{item.path}: {log.alignment.detail}; it is left out of the shift assessment")
    entry = IngestedFile(
        str(item.path), trial_id, log.sha256, created, log.synthetic, log.outcome, fell, record.objective,
        list(log.ignored_columns), warnings, [f.detail for f in log.flags],
        "" if log.alignment is None else log.alignment.detail,
    )
    (summary.stored if created else summary.skipped_duplicates).append(entry)
    if all(t.id != trial_id for t in summary.trials):
        summary.trials.append(record)
