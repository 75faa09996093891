"""Taking in hardware logs as a job: validate each, store each trial, give every trial matched simulations.

For each log: :func:`gapgauge.logs.read_log` validates it and resamples it to SI; the balance
features are computed with :func:`gapgauge.features.compute_features` on that trajectory (the same
code as for simulated rollouts) and the objective with ``scenario.objective.evaluate``; then the trial
is stored in one transaction with its sha256, source path, ingest time and tool version. A file
already stored (same sha256) changes nothing and is reported as such. A bad file is listed with its
one-line reason and nothing of it is stored; the good files of the batch are stored all the same.

Then every trial of the batch (new or already stored) is made to have ``matches`` simulations at
exactly its parameters: a run of kind ``match`` per trial, seeded with ``seed``, whose rollout 0 uses
the nominal physics and rollouts ``1..K-1`` the randomised draws of
:func:`gapgauge.sim.physics.draw_physics` (``default_rng([seed, i])``; every trial shares those draws,
so trials are compared under the same physical conditions). Only missing rollouts are simulated, so
an interrupted ingest completes on the next call.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from ..errors import GapgaugeError, LogError
from ..features import compute_features
from ..logs import LogTrial, read_log
from ..progress import Progress, or_silent
from ..records import DEFAULT_MATCHES, IngestedFile, IngestSummary, TrialRecord
from ..scenario import Scenario
from ..sim.physics import draw_physics
from ..sim.rollout import simulate
from ..sim.sweep import check_model
from ..store import Store
from ..trajectory import MissingChannelError
from ..version import __version__
from .common import as_scenario, open_store

MAX_MATCHES = 4096
STAGE = "ingest: logs"


def trial_record(
    scenario: Scenario, log: LogTrial, *, ingested_at: str = "", tool_version: str = ""
) -> TrialRecord:
    """Features, objective and provenance of a read log, as the record the store keeps.

    Raises:
        LogError: a feature the scenario asks for needs a channel the log does not map.
    """
    try:
        features = compute_features(log.trajectory, scenario.features, scenario.features.names)
    except MissingChannelError as exc:
        raise LogError(
            f"{log.path}: {exc}; map a log column to channel {exc.channel!r} in [hardware.columns] "
            f"of {scenario.path}, or drop the feature from [features].names"
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
    """Validate and store hardware logs, then make sure each has ``matches`` matched simulations.

    Args:
        scenario: the scenario the trials were run under (a :class:`Scenario` or its path).
        store: a :class:`gapgauge.store.Store` or the path of its file (created if missing).
        paths: logs (CSV with sidecar JSON, or ROS 2 bags); see :mod:`gapgauge.logs`.
        matches: K, simulations per trial at its parameters (nominal physics plus K - 1 draws), >= 1.
        seed: seed of the physics draws of the match runs (stored with each run).
        progress: ``progress(stage, done, total)`` per log, and once more for the matched simulations.

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
    check_model(scenario)  # matched simulations need the model: refuse a bad one before storing any trial
    report = or_silent(progress)
    with open_store(store, must_exist=False) as db:
        summary = _take_in(scenario, db, paths, matches, seed, report)
        report(STAGE, len(paths), len(paths) + 1)
        _match(scenario, db, summary)
        report(STAGE, len(paths) + 1, len(paths) + 1)
        db.save_result(summary.scenario_hash, summary)
    return summary


def _take_in(
    scenario: Scenario, store: Store, paths: Sequence[str | Path], matches: int, seed: int, report: Progress
) -> IngestSummary:
    """Read, check and store each log; a bad file is listed in ``failed`` and nothing of it is stored."""
    scenario_hash = store.add_scenario(scenario)
    summary = IngestSummary(scenario_hash=scenario_hash, matches=matches, seed=seed)
    for done, path in enumerate(paths):
        report(STAGE, done, len(paths) + 1)
        try:
            log = read_log(scenario, path)
            now = datetime.now(timezone.utc).isoformat(timespec="seconds")
            record = trial_record(scenario, log, ingested_at=now, tool_version=__version__)
            record.scenario_hash = scenario_hash
        except GapgaugeError as exc:
            summary.failed.append((str(path), str(exc)))
            continue
        trial_id, created = store.add_trial(record)
        record.id = trial_id
        fell = bool(record.features.get("fell", 0.0) == 1.0)
        warnings = list(log.warnings)
        if log.outcome is not None and (log.outcome == "fell") != fell:
            warnings.append(
                f"{path}: the operator's outcome is {log.outcome!r} but the features say "
                f"{'fell' if fell else 'stood'}; check the fall thresholds in [features]"
            )
        item = IngestedFile(
            str(path),
            trial_id,
            log.sha256,
            created,
            log.synthetic,
            log.outcome,
            fell,
            record.objective,
            list(log.ignored_columns),
            warnings,
        )
        (summary.stored if created else summary.skipped_duplicates).append(item)
        if all(t.id != trial_id for t in summary.trials):
            summary.trials.append(record)
    return summary


def _match(scenario: Scenario, store: Store, summary: IngestSummary) -> None:
    """Simulate every missing match of the batch's trials in one call, then store and link per trial."""
    k, seed = summary.matches, summary.seed
    nominal = draw_physics(scenario, seed, np.array([0]), nominal=True)
    drawn = draw_physics(scenario, seed, np.arange(1, k)) if k > 1 else np.empty((0, len(scenario.physics)))
    physics_all = np.vstack([nominal, drawn])  # (k x nphysics): row i is rollout i of every match run
    plan = []  # (trial, run_id, missing indices)
    for trial in summary.trials:
        run_id = store.start_run(
            "match",
            scenario,
            seed=seed,
            design=f"match:{trial.sha256}",
            planned=k,
            nominal=False,
            config={
                "trial_id": trial.id,
                "trial_sha256": trial.sha256,
                "params": trial.params,
                "matches": k,
                "row0": "nominal physics",
                "rows": "draw_physics(seed, i) for i >= 1",
            },
        )
        done = {int(i) for i in store.done_indices(run_id)}
        plan.append((trial, run_id, np.array([i for i in range(k) if i not in done], dtype=int)))
    todo = [(trial, run_id, missing) for trial, run_id, missing in plan if missing.size]
    if todo:
        params = np.vstack(
            [
                np.tile(scenario.params_from_mapping(trial.params), (missing.size, 1))
                for trial, _, missing in todo
            ]
        )
        physics = np.vstack([physics_all[missing] for _, _, missing in todo])
        indices = np.concatenate([missing for _, _, missing in todo])
        batch = simulate(scenario, params, physics, indices=indices)
        first = 0
        for _trial, run_id, missing in todo:
            rows = np.arange(first, first + missing.size)
            store.write_rollouts(run_id, batch.subset(rows))
            first += missing.size
        summary.simulated = int(indices.size)
    for trial, run_id, _ in plan:
        store.finish_run(run_id)
        store.link_matches(trial.id, run_id, list(range(k)))
        summary.matched[trial.id] = k
