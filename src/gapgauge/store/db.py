"""The store: one SQLite file (standard library, WAL) holding scenarios, runs, sim rollouts, hardware
trials, matches and fitted models. Schema in :mod:`gapgauge.store.schema`, read-side queries in
:mod:`gapgauge.store.queries`.

Durability: every write is one ``BEGIN IMMEDIATE ... COMMIT`` transaction, so a crash (even kill -9)
loses at most the write in flight. Rollouts are ``UNIQUE(run_id, idx)`` and written with
``INSERT OR IGNORE``, so a resumed run never duplicates a row. Concurrency: WAL lets readers and one
writer work at once; other writers wait (``busy_timeout``) and a write that still finds the
database locked is retried with exponential backoff.
"""

from __future__ import annotations

import sqlite3
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

import numpy as np

from ..version import __version__
from ..errors import StoreError
from ..records import RolloutBatch, TrialRecord
from . import codec, queries, schema

if TYPE_CHECKING:
    from ..scenario import Scenario
    from ..trajectory import Trajectory

T = TypeVar("T")
R = TypeVar("R")

SQLITE_HEADER = b"SQLite format 3\x00"
BUSY_TIMEOUT_MS = 30_000
RETRIES = 8  # on "database is locked" after the busy timeout: 0.05 s doubling, about 13 s more in all
RETRY_FIRST_WAIT_S = 0.05


def utc_now() -> str:
    """ISO-8601 time in UTC, seconds."""
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


@dataclass(frozen=True)
class RunRecord:
    """One run: a planned set of rollouts of one scenario (kind ``sweep``, ``match``, ``standin`` or
    ``calibration``). ``done`` counts the rollouts stored so far."""

    id: int
    kind: str
    scenario_hash: str
    seed: int
    design: str
    planned: int
    nominal: bool
    config: dict
    status: str  # "running" | "done"
    done: int
    created_at: str


class Store:
    """A gapgauge store (one SQLite file). Use as a context manager, or call :meth:`close`.

    Opening creates the file if needed (unless ``create=False``), migrates an older schema after
    writing a backup copy ``<store>.v<old>.bak``, and refuses a newer schema or a file that is not a
    gapgauge store with a :class:`StoreError`. One ``Store`` may be shared by threads; its calls are
    serialised.
    """

    def __init__(self, path: str | Path = "gapgauge.sqlite", *, create: bool = True):
        self.path = Path(path)
        self._lock = threading.RLock()
        self.backup_path: Path | None = None  # set when opening migrated an older schema
        self._run_columns_cache: dict[int, dict[str, list[str]]] = {}  # scenario versions never change
        if not create and not self.path.exists():
            raise StoreError(f"{self.path}: no store here; run `gapgauge sweep` first or give --store PATH")
        self._check_file()
        try:
            self._conn = sqlite3.connect(
                str(self.path), timeout=BUSY_TIMEOUT_MS / 1000, isolation_level=None, check_same_thread=False
            )
        except sqlite3.Error as exc:
            raise StoreError(
                f"{self.path}: cannot open the store ({exc}); check the path and its permissions"
            ) from None
        try:
            self._retry(self._configure)
            self._retry(self._prepare_schema)
        except sqlite3.DatabaseError as exc:
            self._conn.close()
            raise StoreError(
                f"{self.path}: is not a usable SQLite database ({exc}); give a gapgauge store or a new file name"
            ) from None
        except BaseException:
            self._conn.close()
            raise

    # ---- opening ---------------------------------------------------------------------------
    def _check_file(self) -> None:
        if self.path.is_dir():
            raise StoreError(f"{self.path}: is a folder; give a store file such as {self.path / 'gapgauge.sqlite'}")
        if not self.path.parent.exists():
            raise StoreError(
                f"{self.path}: folder {self.path.parent} does not exist; create it or pick another --store"
            )
        if self.path.exists() and self.path.stat().st_size > 0:
            with open(self.path, "rb") as fh:
                head = fh.read(len(SQLITE_HEADER))
            if head != SQLITE_HEADER:
                raise StoreError(
                    f"{self.path}: is not a SQLite database (no SQLite header); "
                    "give a gapgauge store or a new file name"
                )

    def _configure(self) -> None:
        self._conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        mode = self._conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            raise StoreError(
                f"{self.path}: SQLite could not switch to WAL mode (got {mode}); put the store on a local disk"
            )
        # With WAL, NORMAL keeps every committed transaction through a process crash (kill -9).
        self._conn.execute("PRAGMA synchronous = NORMAL")
        self._conn.execute("PRAGMA foreign_keys = ON")

    def _prepare_schema(self) -> None:
        conn = self._conn
        conn.execute("BEGIN IMMEDIATE")
        try:
            version = schema.read_version(conn)
            if version is None:
                if schema.user_tables(conn):
                    raise StoreError(
                        f"{self.path}: is a SQLite database but not a gapgauge store (no gapgauge meta table); "
                        "give a gapgauge store or a new file name"
                    )
                schema.create_schema(conn)
            elif version > schema.SCHEMA_VERSION:
                raise StoreError(
                    f"{self.path}: store schema version {version} is newer than this gapgauge "
                    f"({__version__}) reads (version {schema.SCHEMA_VERSION}); upgrade gapgauge "
                    "(pip install -U gapgauge) or use another --store"
                )
            elif version < schema.SCHEMA_VERSION:
                self.backup_path = self._backup(version)
                try:
                    schema.migrate(conn, version, schema.SCHEMA_VERSION)
                except KeyError as exc:
                    raise StoreError(
                        f"{self.path}: no migration from store schema version {exc.args[0]}; "
                        f"a backup is at {self.backup_path}; open it with the gapgauge version that wrote it"
                    ) from None
            conn.execute("COMMIT")
        except BaseException:
            conn.execute("ROLLBACK")
            raise

    def _backup(self, version: int) -> Path:
        """Copy the store (as committed) to ``<store>.v<version>.bak`` with SQLite's online backup.

        Called while this connection holds the write lock, so the copy is read through a second
        connection (WAL readers see the last committed state: the store before migration).
        """
        target = self.path.with_name(f"{self.path.name}.v{version}.bak")
        n = 1
        while target.exists():
            n += 1
            target = self.path.with_name(f"{self.path.name}.v{version}.{n}.bak")
        source = sqlite3.connect(str(self.path), timeout=BUSY_TIMEOUT_MS / 1000)
        dest = sqlite3.connect(str(target))
        try:
            source.backup(dest)
        finally:
            dest.close()
            source.close()
        return target

    # ---- transactions ----------------------------------------------------------------------
    def _retry(self, action: Callable[[], T]) -> T:
        """Run ``action``; on "database is locked/busy" wait (0.05 s doubling) and try again."""
        wait = RETRY_FIRST_WAIT_S
        for attempt in range(RETRIES + 1):
            try:
                with self._lock:
                    return action()
            except sqlite3.OperationalError as exc:
                text = str(exc).lower()
                if ("locked" not in text and "busy" not in text) or attempt == RETRIES:
                    if "locked" in text or "busy" in text:
                        raise StoreError(
                            f"{self.path}: the store stayed locked by another process; "
                            "wait for it to finish or check no stuck process holds the file"
                        ) from None
                    raise self._damaged(exc) from None
                time.sleep(wait)
                wait *= 2
            except sqlite3.DatabaseError as exc:
                if type(exc) is not sqlite3.DatabaseError:  # IntegrityError, ProgrammingError: our bugs
                    raise
                raise self._damaged(exc) from None
        raise AssertionError("unreachable")

    def _damaged(self, exc: sqlite3.Error) -> StoreError:
        return StoreError(f"{self.path}: SQLite cannot use the store ({exc}); run `gapgauge store check --store "
                          f"{self.path}` and restore the file from a backup if it reports damage")

    def _write(self, body: Callable[[sqlite3.Connection], T]) -> T:
        """Run ``body(conn)`` in one write transaction (retried as a whole when locked)."""

        def action() -> T:
            self._conn.execute("BEGIN IMMEDIATE")
            try:
                result = body(self._conn)
                self._conn.execute("COMMIT")
            except BaseException:
                if self._conn.in_transaction:
                    self._conn.execute("ROLLBACK")
                raise
            return result

        return self._retry(action)

    def _read(self, sql: str, args: Sequence[Any] = ()) -> list[tuple]:
        return self._retry(lambda: self._conn.execute(sql, args).fetchall())

    # ---- scenarios and runs ----------------------------------------------------------------
    def add_scenario(self, scenario: Scenario) -> str:
        """Store a scenario version (name, path, raw JSON) under its content hash; returns the hash."""
        raw = codec.json.dumps(scenario.raw, default=str)
        columns = codec.dumps({"parameters": scenario.parameter_names,
                               "physics": [r.name for r in scenario.physics],
                               "features": list(scenario.features.names)})
        self._write(lambda c: c.execute(
            "INSERT OR IGNORE INTO scenarios(hash, name, path, raw_json, columns_json, created_at)"
            " VALUES (?, ?, ?, ?, ?, ?)", (scenario.content_hash, scenario.name, str(scenario.path), raw, columns,
                                          utc_now()),
        ))
        return scenario.content_hash

    def start_run(
        self, kind: str, scenario: Scenario, *, seed: int, design: str, planned: int, nominal: bool,
        config: dict | None = None,
    ) -> int:
        """Get or create the run with these settings (so the same command resumes); returns its id."""
        if kind not in schema.RUN_KINDS:
            raise ValueError(f"run kind {kind!r} is not one of {schema.RUN_KINDS}")
        scenario_hash = self.add_scenario(scenario)
        key = (kind, scenario_hash, int(seed), str(design), int(planned), int(bool(nominal)),
               codec.json.dumps(codec.jsonable(config or {}), sort_keys=True, allow_nan=False))

        def body(c: sqlite3.Connection) -> int:
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
            raise StoreError(f"{self.path}: no run {run_id}; see `gapgauge info --store {self.path}`")
        return queries.run_record(rows[0])

    def runs(self, scenario_hash: str | None = None, kind: str | None = None) -> list[RunRecord]:
        """Runs, oldest first, optionally of one scenario and/or kind."""
        where, args = queries.where(("r.scenario_hash", scenario_hash), ("r.kind", kind))
        rows = self._read(queries.RUNS + where + " GROUP BY r.id ORDER BY r.id", args)
        return [queries.run_record(r) for r in rows]

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
        n = len(batch)
        if n == 0:
            return 0
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

        def body(c: sqlite3.Connection) -> int:
            before = c.total_changes
            c.executemany(
                "INSERT OR IGNORE INTO rollouts(run_id, idx, params, physics, status, reason,"
                " objective, features) VALUES (?, ?, ?, ?, ?, ?, ?, ?)", rows,
            )
            return c.total_changes - before

        return int(self._write(body))

    def rollouts(
        self, scenario_hash: str, kinds: Sequence[str] = ("sweep",), run_ids: Iterable[int] | None = None,
        status: str | Sequence[str] | None = None,
    ) -> RolloutBatch:
        """All stored rollouts of a scenario (runs of the given kinds, optionally only some runs and
        statuses), ordered by run and index; params columns in scenario parameter order."""
        columns = self._columns(scenario_hash)
        sql, args = queries.rollout_select(scenario_hash, kinds, run_ids, status)
        return codec.batch_from_rows(self._read(sql, args), columns)

    def run_summary(self, run_id: int) -> dict:
        """Counts by status and the best (lowest-objective) ok rollout of a run:
        ``{"ok", "fell", "diverged", "best_objective", "best_index", "best_params" (dim,) | None}``."""
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
                f"{self.path}: no scenario with hash {scenario_hash}; run `gapgauge sweep` on it first"
                f" or see `gapgauge info --store {self.path}`"
            )
        return codec.json.loads(rows[0][0])

    def _run_columns(self, run_id: int) -> dict[str, list[str]]:
        if run_id not in self._run_columns_cache:
            rows = self._read("SELECT scenario_hash FROM runs WHERE id = ?", (int(run_id),))
            if not rows:
                raise StoreError(f"{self.path}: no run {run_id}; see `gapgauge info --store {self.path}`")
            self._run_columns_cache[run_id] = self._columns(rows[0][0])
        return self._run_columns_cache[run_id]

    # ---- hardware trials and matches --------------------------------------------------------
    def add_trial(self, trial: TrialRecord) -> tuple[int, bool]:
        """Store a trial unless one with the same sha256 is stored; returns ``(trial_id, created)``."""
        series = None if trial.series is None else codec.trajectory_to_npz(trial.series)
        values = (
            trial.sha256, trial.scenario_hash, trial.source_path, codec.dumps(trial.params), trial.robot_id,
            trial.recorded_at, trial.outcome, trial.notes, int(bool(trial.synthetic)), codec.dumps(trial.features),
            float(trial.objective) if trial.objective is not None and np.isfinite(trial.objective) else None,
            trial.ingested_at or utc_now(), trial.tool_version or __version__, series, codec.dumps(trial.extra),
        )

        def body(c: sqlite3.Connection) -> tuple[int, bool]:
            cur = c.execute(
                "INSERT OR IGNORE INTO trials(sha256, scenario_hash, source_path, params_json, robot_id,"
                " recorded_at, outcome, notes, synthetic, features_json, objective, ingested_at, tool_version,"
                " series_npz, extra_json) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", values,
            )
            created = cur.rowcount == 1
            trial_id = c.execute("SELECT id FROM trials WHERE sha256 = ?", (trial.sha256,)).fetchone()[0]
            return int(trial_id), created

        return self._write(body)

    def trials(self, scenario_hash: str, with_series: bool = False) -> list[TrialRecord]:
        """Trials of a scenario, in the order they were stored; series loaded only if asked."""
        column = "series_npz" if with_series else "NULL"
        rows = self._read(queries.TRIALS.format(series=column) + " WHERE scenario_hash = ? ORDER BY id",
                          (scenario_hash,))
        return [queries.trial_record(r) for r in rows]

    def trial_series(self, trial_id: int) -> Trajectory | None:
        """The stored resampled series (a :class:`~gapgauge.trajectory.Trajectory`) of a trial, or None."""
        rows = self._read("SELECT series_npz FROM trials WHERE id = ?", (int(trial_id),))
        if not rows:
            raise StoreError(f"{self.path}: no trial {trial_id}; see `gapgauge info --store {self.path}`")
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
            raise StoreError(f"{self.path}: no trial {trial_id}; see `gapgauge info --store {self.path}`")
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
    def info(self, json_path: str | Path | None = None) -> dict:
        """What the store holds: scenarios, runs with progress, rollouts by status, trials, models.
        With ``json_path``, also written there as JSON."""
        summary = self._retry(lambda: queries.info(self._conn, self.path))
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

    # ---- life cycle ---------------------------------------------------------------------------
    def close(self) -> None:
        with self._lock:
            self._conn.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Store({str(self.path)!r})"


def check_store(path: str | Path) -> tuple[list[str], list[RunRecord]]:
    """The health check behind ``gapgauge store check``: ``(problems, unfinished runs)``.

    Like :meth:`Store.check`, but a store too damaged to open at all (its first pages or its ``meta``
    table overwritten) is a finding, not an error: when opening fails and SQLite's own integrity check
    of the file (read-only) is not "ok", that verdict is returned as the problems. A file that is no
    SQLite database, not a gapgauge store, newer than this gapgauge or missing still raises
    :class:`StoreError`.
    """
    path = Path(path)
    try:
        store = Store(path, create=False)
    except StoreError:
        problems = _raw_integrity(path)
        if problems:
            return problems, []
        raise
    with store:
        problems = store.check()
        try:
            unfinished = [r for r in store.runs() if r.status != "done"]
        except StoreError:  # the damage already reported may hide the runs
            unfinished = []
    return problems, unfinished


def _raw_integrity(path: Path) -> list[str]:
    """SQLite's integrity verdict on a file with the SQLite header, read-only; [] when ok or not SQLite."""
    try:
        with open(path, "rb") as fh:
            if fh.read(len(SQLITE_HEADER)) != SQLITE_HEADER:
                return []
    except OSError:
        return []
    restore = f"restore {path} from a backup (or copy out what `sqlite3 {path} .recover` saves)"
    try:
        conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True, timeout=BUSY_TIMEOUT_MS / 1000)
    except sqlite3.Error:
        return []
    try:
        verdict = [row[0] for row in conn.execute("PRAGMA integrity_check").fetchall()]
    except sqlite3.DatabaseError as exc:
        if "locked" in str(exc).lower() or "busy" in str(exc).lower():
            return []
        return [f"SQLite cannot read the store ({exc}); {restore}"]
    finally:
        conn.close()
    return [] if verdict == ["ok"] else [f"SQLite integrity check: {line}; {restore}" for line in verdict]
