"""Plain records passed between sim/, store/ and compare/ (numpy arrays in, dataclasses out)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .results import Result

STATUSES = ("ok", "fell", "diverged")


@dataclass
class RolloutBatch:
    """A batch of simulated rollouts, as simulated or as read back from the store.

    Attributes:
        indices: rollout index within its run, ``(n,)`` int.
        params: policy parameters, ``(n x dim)``, in scenario units, columns in scenario order.
        physics: physics draw, ``(n x k)``, columns named by ``physics_names``.
        physics_names: names of the physics columns (scenario [physics] order).
        status: ``(n,)`` array of ``"ok" | "fell" | "diverged"``.
        reason: ``(n,)`` array of str, why a rollout diverged ("" otherwise).
        objective: ``(n,)`` float, lower is better; NaN where diverged.
        features: feature name -> ``(n,)`` float (``fell`` as 0/1); NaN where diverged.
        run_ids: ``(n,)`` int run of each row when read from the store, else None.
    """

    indices: np.ndarray
    params: np.ndarray
    physics: np.ndarray
    physics_names: tuple[str, ...]
    status: np.ndarray
    reason: np.ndarray
    objective: np.ndarray
    features: dict[str, np.ndarray]
    run_ids: np.ndarray | None = None

    def __len__(self) -> int:
        return int(self.indices.shape[0])

    def subset(self, mask) -> RolloutBatch:
        return RolloutBatch(
            self.indices[mask],
            self.params[mask],
            self.physics[mask],
            self.physics_names,
            self.status[mask],
            self.reason[mask],
            self.objective[mask],
            {k: v[mask] for k, v in self.features.items()},
            None if self.run_ids is None else self.run_ids[mask],
        )

    @staticmethod
    def concat(batches: list[RolloutBatch]) -> RolloutBatch:
        if not batches:
            raise ValueError("no batches to concatenate")
        first = batches[0]
        runs = None if any(b.run_ids is None for b in batches) else np.concatenate([b.run_ids for b in batches])
        return RolloutBatch(
            np.concatenate([b.indices for b in batches]),
            np.concatenate([b.params for b in batches]),
            np.concatenate([b.physics for b in batches]),
            first.physics_names,
            np.concatenate([b.status for b in batches]),
            np.concatenate([b.reason for b in batches]),
            np.concatenate([b.objective for b in batches]),
            {k: np.concatenate([b.features[k] for b in batches]) for k in first.features},
            runs,
        )


@dataclass
class TrialRecord:
    """One hardware (or stand-in) trial as stored.

    ``params`` and ``features`` are by name; ``series`` is the resampled trajectory (batch of one).
    """

    scenario_hash: str
    source_path: str
    sha256: str
    params: dict[str, float]
    robot_id: str
    recorded_at: str
    outcome: str | None  # "stood" | "fell" | None (not given by the operator)
    notes: str
    synthetic: bool
    features: dict[str, float]
    objective: float
    ingested_at: str = ""
    tool_version: str = ""
    series: object | None = None  # gapgauge.trajectory.Trajectory or None
    extra: dict = field(default_factory=dict)
    id: int | None = None


DEFAULT_MATCHES = 32  # matched simulations per hardware trial (nominal physics plus 31 draws)


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
    flags: list[str] = field(default_factory=list)  # one line per unusual channel (gapgauge.logs.ChannelFlag)
    alignment: str = ""  # how the trial was placed in time (gapgauge.logs.Alignment.detail)


@dataclass
class IngestSummary(Result):
    """What :func:`gapgauge.app.ingest.ingest` did.

    Attributes:
        scenario_hash: the scenario version the trials belong to.
        stored: files stored now.
        skipped_duplicates: files whose trial was already stored (nothing changed for them).
        failed: ``(path, one-line reason)`` of every refused file; nothing of them was stored.
        trials: the :class:`TrialRecord` of every stored or already-stored file of this batch (with ``id``;
            not part of the stored summary: the trials themselves are in the store).
        matched: trial id -> number of matched simulations linked to it (``matches`` when complete).
        simulated: rollouts simulated by this call (0 when every match was already there).
        matches: K asked for. seed: seed of the match runs.
    """

    scenario_hash: str
    stored: list[IngestedFile] = field(default_factory=list)
    skipped_duplicates: list[IngestedFile] = field(default_factory=list)
    failed: list[tuple[str, str]] = field(default_factory=list)
    trials: list[TrialRecord] = field(default_factory=list, metadata={"stored": False})
    matched: dict[int, int] = field(default_factory=dict)
    simulated: int = 0
    matches: int = DEFAULT_MATCHES
    seed: int = 0

    kind = "ingest"
    schema_version = 1

    @property
    def ok(self) -> bool:
        """True when no file failed."""
        return not self.failed
