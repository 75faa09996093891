"""ingest(): validate hardware logs, store each trial, and give it matched simulations.

For each log: :func:`gapgauge.store.logs.read_log` validates it and resamples it to SI; the balance
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
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import GapgaugeError, LogError
from ..records import TrialRecord
from ..scenario import Scenario
from ..trajectory import MissingChannelError
from .logs import LogTrial, read_log

DEFAULT_MATCHES = 32
MAX_MATCHES = 4096


@dataclass
class IngestedFile:
    """One log that went in (or was already in)."""

    path: str
    trial_id: int
    sha256: str
    created: bool
    synthetic: bool
    outcome: str | None
    fell: bool
    objective: float
    ignored_columns: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


@dataclass
class IngestSummary:
    """What :func:`ingest` did.

    Attributes:
        scenario_hash: the scenario version the trials belong to.
        stored: files stored now.
        skipped_duplicates: files whose trial was already stored (nothing changed for them).
        failed: ``(path, one-line reason)`` of every refused file; nothing of them was stored.
        trials: the :class:`TrialRecord` of every stored or already-stored file of this batch (with ``id``).
        matched: trial id -> number of matched simulations linked to it (``matches`` when complete).
        simulated: rollouts simulated by this call (0 when every match was already there).
        matches: K asked for. seed: seed of the match runs.
    """

    scenario_hash: str
    stored: list[IngestedFile] = field(default_factory=list)
    skipped_duplicates: list[IngestedFile] = field(default_factory=list)
    failed: list[tuple[str, str]] = field(default_factory=list)
    trials: list[TrialRecord] = field(default_factory=list)
    matched: dict[int, int] = field(default_factory=dict)
    simulated: int = 0
    matches: int = DEFAULT_MATCHES
    seed: int = 0

    @property
    def ok(self) -> bool:
        """True when no file failed."""
        return not self.failed


def trial_record(
    scenario: Scenario, log: LogTrial, *, ingested_at: str = "", tool_version: str = ""
) -> TrialRecord:
    """Features, objective and provenance of a read log, as the record the store keeps.

    Raises:
        LogError: a feature the scenario asks for needs a channel the log does not map.
    """
    from ..features import compute_features

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
    scenario: Scenario,
    paths: Sequence[str | Path],
    *,
    store: Any,
    matches: int = DEFAULT_MATCHES,
    seed: int = 0,
    progress: bool = True,
) -> IngestSummary:
    """Validate and store hardware logs, then make sure each has ``matches`` matched simulations.

    Args:
        scenario: the scenario the trials were run under.
        paths: logs (CSV with sidecar JSON, or ROS 2 bags); see :mod:`gapgauge.store.logs`.
        store: a :class:`gapgauge.store.Store`.
        matches: K, simulations per trial at its parameters (nominal physics plus K - 1 draws), >= 1.
        seed: seed of the physics draws of the match runs (stored with each run).
        progress: show a progress bar on stderr.

    Returns:
        :class:`IngestSummary`. Bad files are in ``failed``; this function raises only for bad arguments.
    """
    from ..version import __version__

    if (
        isinstance(matches, bool)
        or not isinstance(matches, (int, np.integer))
        or not 1 <= matches <= MAX_MATCHES
    ):
        raise GapgaugeError(f"--matches {matches!r}: give a whole number from 1 to {MAX_MATCHES}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise GapgaugeError(f"--seed {seed!r}: give a non-negative whole number")
    matches, seed = int(matches), int(seed)
    from ..sim.sweep import check_model

    check_model(scenario)  # matched simulations need the model: refuse a bad one before storing any trial
    scenario_hash = store.add_scenario(scenario)
    summary = IngestSummary(scenario_hash=scenario_hash, matches=matches, seed=seed)
    bar = _Progress(progress, len(paths))
    try:
        for path in paths:
            bar.step(f"reading {Path(path).name}")
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
        bar.step("simulating matches")
        _match(scenario, store, summary)
    finally:
        bar.close()
    return summary


def _match(scenario: Scenario, store: Any, summary: IngestSummary) -> None:
    """Simulate every missing match of the batch's trials in one call, then store and link per trial."""
    from ..sim.physics import draw_physics
    from ..sim.rollout import simulate

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


class _Progress:
    """A rich progress bar on stderr, or nothing."""

    def __init__(self, enabled: bool, total: int):
        self.bar = None
        if enabled and total:
            from rich.console import Console
            from rich.progress import Progress

            self.bar = Progress(console=Console(stderr=True), transient=True)
            self.bar.start()
            self.task = self.bar.add_task("ingest", total=total + 1)

    def step(self, text: str) -> None:
        if self.bar is not None:
            self.bar.update(self.task, advance=1, description=text)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.stop()
