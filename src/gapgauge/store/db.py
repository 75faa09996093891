"""The store: one SQLite file holding scenarios, runs, sim rollouts, hardware trials, matches, fitted
models and typed results. The connection (WAL, retries, migration) is :mod:`gapgauge.store.connection`,
the schema :mod:`gapgauge.store.schema`, the read-side SQL :mod:`gapgauge.store.queries`.

Rollouts are ``UNIQUE(run_id, idx)`` and written with ``INSERT OR IGNORE``, so a resumed run never
duplicates a row.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

import numpy as np

from ..errors import StoreError
from ..records import RolloutBatch, TrialRecord
from ..version import __version__
from . import codec, queries, schema
from . import identity as run_identity
from .connection import Connection, utc_now
from .queries import RunRecord

if TYPE_CHECKING:
    from ..scenario import Scenario
    from ..trajectory import Trajectory

R = TypeVar("R")


def _trial_values(trial: TrialRecord) -> tuple:
    series = None if trial.series is None else codec.trajectory_to_npz(trial.series)
    return (
        trial.sha256, trial.scenario_hash, trial.source_path, codec.dumps(trial.params), trial.robot_id,
        trial.recorded_at, trial.outcome, trial.notes, int(bool(trial.synthetic)), codec.dumps(trial.features),
        float(trial.objective) if trial.objective is not None and np.isfinite(trial.objective) else None,
        trial.ingested_at or utc_now(), trial.tool_version or __version__, series, codec.dumps(trial.extra),
    )


def _insert_trial(c: sqlite3.Connection, values: tuple) -> tuple[int, bool]:
    cur = c.execute(
        "INSERT OR IGNORE INTO trials(sha256, scenario_hash, source_path, params_json, robot_id,"
        " recorded_at, outcome, notes, synthetic, features_json, objective, ingested_at, tool_version,"
        " series_npz, extra_json) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", values,
    )
    created = cur.rowcount == 1
    trial_id = c.execute("SELECT id FROM trials WHERE sha256 = ?", (values[0],)).fetchone()[0]
    return int(trial_id), created


def _insert_rollouts(c: sqlite3.Connection, rows: list[tuple]) -> int:
    """Insert rollout rows (``INSERT OR IGNORE``: a row already stored is kept); the number written."""
    before = c.total_changes
    c.executemany(
        "INSERT OR IGNORE INTO rollouts(run_id, idx, params, physics, status, reason,"
        " objective, features) VALUES (?, ?, ?, ?, ?, ?, ?, ?)", rows,
    )
    return c.total_changes - before


class Store(Connection):
    """A gapgauge store (one SQLite file): what is stored and how it is read back.

    Opening creates the file if needed (unless ``create=False``), migrates an older schema after
    writing a backup copy ``<store>.v<old>.bak``, and refuses a newer schema or a file that is not a
    gapgauge store with a :class:`StoreError`. One ``Store`` may be shared by threads; its calls are
    serialised. Use as a context manager, or call :meth:`close`.
    """

    def __init__(self, path: str | Path = "gapgauge.sqlite", *, create: bool = True):
        self._run_columns_cache: dict[int, dict[str, list[str]]] = {}  # scenario versions never change
        super().__init__(path, create=create)

    # ---- scenarios and runs ----------------------------------------------------------------
    def add_scenario(self, scenario: Scenario) -> str:
        """Store a scenario version (name, path, raw JSON, its simulation and trajectory hashes, identity and
        objective) under its content hash; returns the hash. A version stored before runs were keyed by
        simulation (schema 1) gets its hashes now."""
        raw = codec.json.dumps(scenario.raw, default=str)
        columns = codec.dumps({"parameters": scenario.parameter_names,
                               "physics": [r.name for r in scenario.physics],
                               "features": list(scenario.features.names)})
        sim = scenario.simulation_hash or None
        identity = codec.json.dumps(scenario.identity or {}, sort_keys=True, default=str)
        objective = codec.json.dumps(run_identity.objective_definition(scenario), sort_keys=True)

        def body(c: sqlite3.Connection) -> None:
            c.execute(
                "INSERT OR IGNORE INTO scenarios(hash, name, path, raw_json, columns_json, created_at,"
                " simulation_hash, trajectory_hash, identity_json, objective_json)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (scenario.content_hash, scenario.name, str(scenario.path), raw, columns, utc_now(), sim,
                 scenario.trajectory_hash or None, identity, objective),
            )
            if sim is not None:
                c.execute("UPDATE scenarios SET simulation_hash = ?, trajectory_hash = ?, identity_json = ?,"
                          " objective_json = ? WHERE hash = ? AND simulation_hash IS NULL",
                          (sim, scenario.trajectory_hash or None, identity, objective, scenario.content_hash))

        self._write(body)
        return scenario.content_hash

    def start_run(
        self, kind: str, scenario: Scenario, *, seed: int, design: str, planned: int, nominal: bool,
        config: dict | None = None,
    ) -> int:
        """Get or create the run with these settings (so the same command resumes); returns its id.

        The run is found among those of every scenario version that simulates the same thing (same
        simulation hash, :mod:`gapgauge.scenario.identity`): editing the hardware map, the shift thresholds,
        the objective weights or the description resumes the same run."""
        if kind not in schema.RUN_KINDS:
            raise ValueError(f"run kind {kind!r} is not one of {schema.RUN_KINDS}")
        scenario_hash = self.add_scenario(scenario)
        key = (kind, scenario_hash, int(seed), str(design), int(planned), int(bool(nominal)),
               codec.json.dumps(codec.jsonable(config or {}), sort_keys=True, allow_nan=False))

        def body(c: sqlite3.Connection) -> int:
            found = c.execute(
                f"SELECT id FROM runs WHERE scenario_hash IN ({queries.SAME_SIMULATION}) AND kind = ? AND seed = ?"
                " AND design = ? AND planned = ? AND nominal = ? AND config_json = ? ORDER BY id LIMIT 1",
                (scenario_hash, kind, *key[2:]),
            ).fetchone()
            if found is not None:
                return found[0]
            c.execute(
                "INSERT OR IGNORE INTO runs(kind, scenario_hash, seed, design, planned, nominal, config_json,"
                " status, created_at) VALUES (?, ?, ?, ?, ?, ?, ?, 'running', ?)", (*key, utc_now()),
            )
            return c.execute(
                "SELECT id FROM runs WHERE kind = ? AND scenario_hash = ? AND seed = ? AND design = ?"
                " AND planned = ? AND nominal = ? AND config_json = ?", key,
            ).fetchone()[0]

        return int(self._write(body))

    def run(self, run_id: int) -> RunRecord:
        """The run with this id; StoreError if there is none."""
        rows = self._read(queries.RUNS + " WHERE r.id = ? GROUP BY r.id", (int(run_id),))
        if not rows:
            raise StoreError(f"{self.path}: no run {run_id}; see what the store holds (its info)")
        return queries.run_record(rows[0])

    def runs(self, scenario_hash: str | None = None, kind: str | None = None) -> list[RunRecord]:
        """Runs, oldest first, optionally only those a scenario version can use (its own and those of
        every version with its simulation hash) and/or of one kind."""
        where, args = queries.where(("r.kind", kind))
        if scenario_hash is not None:
            where += (" AND " if where else " WHERE ") + f"r.scenario_hash IN ({queries.SAME_SIMULATION})"
            args.append(scenario_hash)
        rows = self._read(queries.RUNS + where + " GROUP BY r.id ORDER BY r.id", args)
        return [queries.run_record(r) for r in rows]

    def usable_runs(self, scenario: Scenario) -> list[dict]:
        """Every run as ``scenario`` sees it: usable, stale or other, with why
        (:func:`gapgauge.store.identity.run_usability`). Writes nothing."""
        return self._retry(lambda: run_identity.run_usability(self._conn, scenario))

    def stale_runs(self, scenario: Scenario, kind: str, *, seed: int, design: str, planned: int,
                   nominal: bool) -> list[str]:
        """Lines naming each stale run with these settings and why ``scenario`` cannot use it."""
        return self._retry(lambda: run_identity.stale_like(self._conn, scenario, kind, seed, design, planned,
                                                           nominal))

    def done_indices(self, run_id: int) -> np.ndarray:
        """Sorted rollout indices ``(m,)`` already stored for a run."""
        rows = self._read("SELECT idx FROM rollouts WHERE run_id = ? ORDER BY idx", (int(run_id),))
        return np.array([r[0] for r in rows], dtype=np.int64)

    def finish_run(self, run_id: int) -> None:
        """Mark a run done (only when all its planned rollouts are stored; otherwise it stays resumable)."""
        self._write(lambda c: c.execute(
            "UPDATE runs SET status = 'done' WHERE id = ? AND"
            " (SELECT COUNT(*) FROM rollouts WHERE run_id = ?) >= planned", (int(run_id), int(run_id)),
        ))

    # ---- rollouts ---------------------------------------------------------------------------
    def write_rollouts(self, run_id: int, batch: RolloutBatch) -> int:
        """Store a batch of rollouts of one run in ONE transaction; rows already stored (same run and
        index) are left as they are. Returns the number of rows written."""
        if len(batch) == 0:
            return 0
        rows = self._rollout_rows(run_id, batch)

        def body(c: sqlite3.Connection) -> int:
            return _insert_rollouts(c, rows)

        return int(self._write(body))

    def _rollout_rows(self, run_id: int, batch: RolloutBatch) -> list[tuple]:
        """The rows of ``batch`` for the rollouts table (shapes checked against the run's scenario)."""
        n = len(batch)
        columns = self._run_columns(run_id)
        if batch.params.shape != (n, len(columns["parameters"])) or batch.physics.shape != (n, len(columns["physics"])):
            raise ValueError(f"batch params {batch.params.shape} / physics {batch.physics.shape} do not fit the "
                             f"scenario's {len(columns['parameters'])} parameters / {len(columns['physics'])} physics")
        rows = list(zip(
            [int(run_id)] * n,
            batch.indices.astype(np.int64).tolist(),
            codec.row_blobs(batch.params),
            codec.row_blobs(batch.physics),
            [str(s) for s in batch.status],
            [str(s) for s in batch.reason],
            [float(v) if np.isfinite(v) else None for v in np.asarray(batch.objective, dtype=float)],
            codec.row_blobs(codec.feature_matrix(batch.features, columns["features"], n)),
            strict=True,
        ))
        return rows

    def rollouts(
        self, scenario_hash: str, kinds: Sequence[str] = ("sweep",), run_ids: Iterable[int] | None = None,
        status: str | Sequence[str] | None = None,
    ) -> RolloutBatch:
        """All stored rollouts of a scenario (runs of the given kinds, optionally only some runs and
        statuses), ordered by run and index; params columns in scenario parameter order."""
        columns = self._columns(scenario_hash)
        sql, args = queries.rollout_select(scenario_hash, kinds, run_ids, status)
        # decoded chunk by chunk: SQLite's rows as Python objects take ~0.7 kB each, the arrays ~0.25 kB,
        # so 10^6 rows read whole would hold ~1 GB at once
        chunks = self._read_chunks(sql, args, lambda rows: codec.batch_from_rows(rows, columns))
        batch = chunks[0] if len(chunks) == 1 else RolloutBatch.concat(chunks)
        # rows of runs written under other objective weights: recomputed from their stored features
        return self._retry(lambda: run_identity.recompute_objective(self._conn, scenario_hash, batch))

    def rollouts_state(
        self, scenario_hash: str, kinds: Sequence[str] = ("sweep",), run_ids: Iterable[int] | None = None,
        status: str | Sequence[str] | None = None,
    ) -> str:
        """A key (sha256 hex) of the rows :meth:`rollouts` with the same arguments returns, read from the
        runs and the rollouts' index without reading a row (see :func:`gapgauge.store.queries.rollout_state_select`):
        it changes when a row is added. About 0.1 s at 10^6 rows."""
        sql, args = queries.rollout_state_select(scenario_hash, kinds, run_ids, status)
        return codec.digest_text(codec.dumps([list(r) for r in self._read(sql, args)]))

    def run_summary(self, run_id: int, scenario_hash: str | None = None) -> dict:
        """Counts by status and the best (lowest-objective) ok rollout of a run:
        ``{"ok", "fell", "diverged", "best_objective", "best_index", "best_params" (dim,) | None}``; with
        ``scenario_hash``, the objective is that version's (recomputed when the run was written under other
        weights)."""
        if scenario_hash is not None:
            rows = self._read("SELECT s.objective_json, me.objective_json FROM runs r JOIN scenarios s ON"
                              " s.hash = r.scenario_hash JOIN scenarios me ON me.hash = ? WHERE r.id = ?",
                              (scenario_hash, int(run_id)))
            if rows and rows[0][0] != rows[0][1]:  # other weights: from the rows, objective recomputed
                return run_identity.summary(self.rollouts(scenario_hash, kinds=schema.RUN_KINDS, run_ids=[run_id]))
        counts = dict(self._read("SELECT status, COUNT(*) FROM rollouts WHERE run_id = ? GROUP BY status",
                                 (int(run_id),)))
        best = self._read(
            "SELECT idx, objective, params FROM rollouts WHERE run_id = ? AND status = 'ok'"
            " AND objective IS NOT NULL ORDER BY objective, idx LIMIT 1", (int(run_id),),
        )
        out = {s: int(counts.get(s, 0)) for s in ("ok", "fell", "diverged")}
        out.update(best_objective=None, best_index=None, best_params=None)
        if best:
            out.update(best_index=int(best[0][0]), best_objective=float(best[0][1]),
                       best_params=codec.parse_blobs([best[0][2]], len(self._run_columns(run_id)["parameters"]))[0])
        return out

    def _columns(self, scenario_hash: str) -> dict[str, list[str]]:
        """Stored column names ``{"parameters", "physics", "features"}`` of a scenario version."""
        rows = self._read("SELECT columns_json FROM scenarios WHERE hash = ?", (scenario_hash,))
        if not rows:
            raise StoreError(
                f"{self.path}: no scenario with hash {scenario_hash}; sweep it first"
                f" or see what the store holds (its info)"
            )
        return codec.json.loads(rows[0][0])

    def _run_columns(self, run_id: int) -> dict[str, list[str]]:
        if run_id not in self._run_columns_cache:
            rows = self._read("SELECT scenario_hash FROM runs WHERE id = ?", (int(run_id),))
            if not rows:
                raise StoreError(f"{self.path}: no run {run_id}; see what the store holds (its info)")
            self._run_columns_cache[run_id] = self._columns(rows[0][0])
        return self._run_columns_cache[run_id]

    # ---- hardware trials and matches --------------------------------------------------------
    def add_trial(self, trial: TrialRecord) -> tuple[int, bool]:
        """Store a trial unless one with the same sha256 is stored; returns ``(trial_id, created)``.

        A trial stored on its own has no matched simulations yet; an ingest stores each trial with them
        (:meth:`add_trial_with_matches`)."""
        values = _trial_values(trial)
        return self._write(lambda c: _insert_trial(c, values))

    def add_trial_with_matches(
        self, trial: TrialRecord, run_id: int, batch: RolloutBatch | None, indices: Iterable[int]
    ) -> tuple[int, bool]:
        """Store a trial (unless one with its sha256 is stored), the rollouts ``batch`` (or None) of its match
        run ``run_id`` (rows already stored are kept) and its links to rollouts ``indices`` of that run, in ONE
        transaction, and mark the run done once complete: a trial is never visible without its matches.
        Returns ``(trial_id, created)``."""
        values = _trial_values(trial)
        rows = self._rollout_rows(run_id, batch) if batch is not None and len(batch) else []
        wanted = [int(i) for i in indices]

        def body(c: sqlite3.Connection) -> tuple[int, bool]:
            trial_id, created = _insert_trial(c, values)
            _insert_rollouts(c, rows)
            c.executemany("INSERT OR IGNORE INTO matches(trial_id, run_id, idx) VALUES (?, ?, ?)",
                          [(trial_id, int(run_id), i) for i in wanted])
            c.execute("UPDATE runs SET status = 'done' WHERE id = ? AND"
                      " (SELECT COUNT(*) FROM rollouts WHERE run_id = ?) >= planned", (int(run_id), int(run_id)))
            return trial_id, created

        return self._write(body)

    def find_trial(self, sha256: str) -> int | None:
        """Id of the stored trial with this sha256, or None."""
        rows = self._read("SELECT id FROM trials WHERE sha256 = ?", (str(sha256),))
        return int(rows[0][0]) if rows else None

    def discard_run(self, run_id: int) -> bool:
        """Delete a run that holds no rollouts and no matches (one started for a trial that was then
        refused); True if it was deleted."""
        def body(c: sqlite3.Connection) -> bool:
            cur = c.execute(
                "DELETE FROM runs WHERE id = ? AND NOT EXISTS (SELECT 1 FROM rollouts WHERE run_id = ?)"
                " AND NOT EXISTS (SELECT 1 FROM matches WHERE run_id = ?)", (int(run_id),) * 3)
            return cur.rowcount == 1

        return bool(self._write(body))

    def trials(self, scenario_hash: str, with_series: bool = False) -> list[TrialRecord]:
        """Trials of a scenario, in the order they were stored; series loaded only if asked. They include
        the trials of every version that simulates the same and reads logs the same way (same simulation
        hash and ``[hardware]`` table), with the objective recomputed from their features where that
        version's weights differ."""
        column = "series_npz" if with_series else "NULL"
        rows = self._read(queries.TRIALS.format(series=column) + f" WHERE scenario_hash IN ({queries.SAME_TRIALS})"
                          " ORDER BY id", (scenario_hash,))
        trials = [queries.trial_record(r) for r in rows]
        return self._retry(lambda: run_identity.recompute_trial_objectives(self._conn, scenario_hash, trials))

    def trial_series(self, trial_id: int) -> Trajectory | None:
        """The stored resampled series (a :class:`~gapgauge.trajectory.Trajectory`) of a trial, or None."""
        rows = self._read("SELECT series_npz FROM trials WHERE id = ?", (int(trial_id),))
        if not rows:
            raise StoreError(f"{self.path}: no trial {trial_id}; see what the store holds (its info)")
        return None if rows[0][0] is None else codec.npz_to_trajectory(rows[0][0])

    def link_matches(self, trial_id: int, run_id: int, indices: Iterable[int]) -> None:
        """Record that rollouts ``indices`` of ``run_id`` are the matched simulations of a trial."""
        rows = [(int(trial_id), int(run_id), int(i)) for i in indices]
        self._write(lambda c: c.executemany(
            "INSERT OR IGNORE INTO matches(trial_id, run_id, idx) VALUES (?, ?, ?)", rows))

    def matches(self, trial_id: int) -> RolloutBatch:
        """The matched simulations of a trial, ordered by run and index (row 0: nominal physics)."""
        rows = self._read("SELECT scenario_hash FROM trials WHERE id = ?", (int(trial_id),))
        if not rows:
            raise StoreError(f"{self.path}: no trial {trial_id}; see what the store holds (its info)")
        columns = self._columns(rows[0][0])
        return codec.batch_from_rows(self._read(queries.MATCHED_ROLLOUTS, (int(trial_id),)), columns)

    # ---- fitted models ----------------------------------------------------------------------
    def save_model(self, kind: str, scenario_hash: str, params: dict,
                   arrays: dict[str, np.ndarray] | None = None) -> int:
        """Store a fitted model: ``params`` as JSON, ``arrays`` as npz. Returns its id."""
        blob = None if arrays is None else codec.arrays_to_npz(arrays)
        values = (kind, scenario_hash, codec.dumps(params), blob, utc_now())
        return int(self._write(lambda c: c.execute(
            "INSERT INTO models(kind, scenario_hash, params_json, arrays_npz, created_at) VALUES (?, ?, ?, ?, ?)",
            values).lastrowid))

    def load_model(self, kind: str, scenario_hash: str) -> tuple[dict, dict[str, np.ndarray]] | None:
        """The newest model of this kind for the scenario as ``(params, arrays)``, or None."""
        rows = self._read("SELECT params_json, arrays_npz FROM models WHERE kind = ? AND scenario_hash = ?"
                          " ORDER BY id DESC LIMIT 1", (kind, scenario_hash))
        if not rows:
            return None
        params, blob = rows[0]
        return codec.json.loads(params), ({} if blob is None else codec.npz_to_arrays(blob))

    # ---- typed results -----------------------------------------------------------------------
    def save_result(self, scenario_hash: str, result: Any) -> int:
        """Store a typed result (a :class:`gapgauge.results.Result`) under its ``kind``. Returns its id."""
        return self.save_model(result.kind, scenario_hash, result.to_dict())

    def load_result(self, cls: type[R], scenario_hash: str) -> R | None:
        """The newest stored result of ``cls.kind`` for the scenario, rebuilt as ``cls``; None if none."""
        loaded = self.load_model(cls.kind, scenario_hash)
        if loaded is None:
            return None
        try:
            return cls.from_dict(loaded[0])
        except (TypeError, ValueError, KeyError) as exc:
            raise StoreError(
                f"{self.path}: the stored {cls.kind} result cannot be read ({exc}); run the {cls.kind} step again"
            ) from None

    # ---- overview and health ----------------------------------------------------------------
    def info(self, json_path: str | Path | None = None, scenario: Scenario | None = None) -> dict:
        """What the store holds: scenarios, runs with progress, rollouts by status, trials, models.
        With ``scenario``, also ``"usable"``: which runs that scenario can use, which are stale and why
        (:meth:`usable_runs`). With ``json_path``, also written there as JSON."""
        summary = self._retry(lambda: queries.info(self._conn, self.path))
        if scenario is not None:
            summary["usable"] = {"scenario": scenario.name, "scenario_hash": scenario.content_hash,
                                 "simulation_hash": scenario.simulation_hash, "runs": self.usable_runs(scenario)}
        if json_path is not None:
            try:
                Path(json_path).write_text(codec.json.dumps(summary, indent=2) + "\n")
            except OSError as exc:
                raise StoreError(f"{json_path}: cannot write the JSON ({exc.strerror}); check the folder") from None
        return summary

    def check(self) -> list[str]:
        """Problems found (empty when healthy): SQLite's integrity check, then ours. Each says what to do."""
        try:
            with self._lock:
                return queries.check(self._conn, self.path)
        except sqlite3.DatabaseError as exc:  # a store too damaged to check is itself the finding
            return [f"SQLite cannot read the store ({exc}); restore {self.path} from a backup "
                    f"(or copy out what `sqlite3 {self.path} .recover` saves)"]

    def __enter__(self) -> Store:
        return self
