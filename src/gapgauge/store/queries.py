"""Read-side SQL of the store: record builders, the overview (:func:`info`) and the health check
(:func:`check`). Everything here reads; writes live in :mod:`gapgauge.store.db`."""

from __future__ import annotations

import json
import math
import sqlite3
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..records import STATUSES, TrialRecord
from . import schema
from .codec import npz_to_trajectory

#: the scenario versions that simulate what version ``?`` simulates (same simulation hash; a version-1
#: row without one matches only itself): their runs are its runs (gapgauge.scenario.identity)
SAME_SIMULATION = (
    "SELECT s.hash FROM scenarios s JOIN scenarios me ON me.hash = ?"
    " WHERE s.hash = me.hash OR s.simulation_hash = me.simulation_hash"
)
#: ... and read hardware logs the same way (same [hardware] table): their trials are its trials
SAME_TRIALS = SAME_SIMULATION + " AND (s.hash = me.hash OR json_extract(s.raw_json, '$.hardware') IS" \
    " json_extract(me.raw_json, '$.hardware'))"

# one count per run from the (run_id, idx) index: a grouped join sorted every rollout first (0.3 s at 10^6)
RUNS = (
    "SELECT r.id, r.kind, r.scenario_hash, r.seed, r.design, r.planned, r.nominal, r.config_json, r.status,"
    " (SELECT COUNT(*) FROM rollouts ro WHERE ro.run_id = r.id), r.created_at FROM runs r"
)

ROLLOUT_COLUMNS = (
    "ro.run_id, ro.idx, ro.params, ro.physics, ro.status, ro.reason, ro.objective, ro.features"
)

MATCHED_ROLLOUTS = (
    f"SELECT {ROLLOUT_COLUMNS} FROM matches m JOIN rollouts ro ON ro.run_id = m.run_id AND ro.idx = m.idx"
    " WHERE m.trial_id = ? ORDER BY m.run_id, m.idx"
)

TRIALS = (
    "SELECT id, scenario_hash, source_path, sha256, params_json, robot_id, recorded_at, outcome, notes,"
    " synthetic, features_json, objective, ingested_at, tool_version, {series}, extra_json FROM trials"
)


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


def where(*pairs: tuple[str, Any]) -> tuple[str, list]:
    """`` WHERE a = ? AND ...`` over the pairs whose value is not None."""
    used = [(col, val) for col, val in pairs if val is not None]
    if not used:
        return "", []
    return " WHERE " + " AND ".join(f"{col} = ?" for col, _ in used), [val for _, val in used]


def run_record(row: tuple) -> RunRecord:
    rid, kind, scenario_hash, seed, design, planned, nominal, config, status, done, created = row
    return RunRecord(int(rid), kind, scenario_hash, int(seed), design, int(planned), bool(nominal),
                     json.loads(config), status, int(done), created)


def rollout_select(
    scenario_hash: str, kinds: Sequence[str], run_ids: Iterable[int] | None, status: str | Sequence[str] | None
) -> tuple[str, list]:
    """SQL and arguments selecting a scenario's rollouts, ordered by run and index."""
    sql, args = rollout_filter(scenario_hash, kinds, run_ids, status)
    return f"SELECT {ROLLOUT_COLUMNS}" + sql + " ORDER BY ro.run_id, ro.idx", args


def rollout_state_select(
    scenario_hash: str, kinds: Sequence[str], run_ids: Iterable[int] | None, status: str | Sequence[str] | None
) -> tuple[str, list]:
    """SQL and arguments of what identifies the rows :func:`rollout_select` selects: per run its id,
    creation time, settings and row count, read from the runs table and the ``(run_id, idx)`` index alone
    (rollouts are only ever inserted, never updated or deleted, so a run's count changes exactly when a row
    is added to it). 0.03 s at 10^6 rows, where reading them takes seconds; one count per run, as a grouped
    join sorted all 10^6 rows first (0.3 s)."""
    runs, run_args, rows, row_args = _filters(scenario_hash, kinds, run_ids, status)
    count = "SELECT COUNT(*) FROM rollouts ro WHERE ro.run_id = r.id" + rows
    return (f"SELECT r.id, r.created_at, r.seed, r.design, r.planned, r.config_json, ({count}) FROM runs r"
            f" WHERE {runs} ORDER BY r.id", row_args + run_args)


def rollout_filter(
    scenario_hash: str, kinds: Sequence[str], run_ids: Iterable[int] | None, status: str | Sequence[str] | None
) -> tuple[str, list]:
    """The ``FROM ... WHERE ...`` part and arguments of :func:`rollout_select`."""
    runs, run_args, rows, row_args = _filters(scenario_hash, kinds, run_ids, status)
    return " FROM rollouts ro JOIN runs r ON r.id = ro.run_id WHERE " + runs + rows, run_args + row_args


def _filters(
    scenario_hash: str, kinds: Sequence[str], run_ids: Iterable[int] | None, status: str | Sequence[str] | None
) -> tuple[str, list, str, list]:
    """The conditions on runs ``r`` and on their rollouts ``ro`` (`` AND ...``), with their arguments, shared by
    :func:`rollout_select` and :func:`rollout_state_select` so that the key and its rows never disagree."""
    kinds = [kinds] if isinstance(kinds, str) else list(kinds)
    runs = f"r.scenario_hash IN ({SAME_SIMULATION}) AND r.kind IN ({','.join('?' * len(kinds))})"
    run_args: list = [scenario_hash, *kinds]
    if run_ids is not None:
        ids = [int(i) for i in run_ids]
        runs += f" AND r.id IN ({','.join('?' * len(ids))})"
        run_args += ids
    rows, row_args = "", []
    if status is not None:
        statuses = [status] if isinstance(status, str) else list(status)
        rows = f" AND ro.status IN ({','.join('?' * len(statuses))})"
        row_args = statuses
    return runs, run_args, rows, row_args


def trial_record(row: tuple) -> TrialRecord:

    (tid, scenario_hash, source, sha, params, robot, recorded, outcome, notes, synthetic, features, objective,
     ingested, tool_version, series, extra) = row
    return TrialRecord(
        scenario_hash=scenario_hash, source_path=source, sha256=sha, params=json.loads(params), robot_id=robot,
        recorded_at=recorded, outcome=outcome, notes=notes, synthetic=bool(synthetic),
        features={k: (math.nan if v is None else v) for k, v in json.loads(features).items()},
        objective=math.nan if objective is None else float(objective), ingested_at=ingested,
        tool_version=tool_version, series=None if series is None else npz_to_trajectory(series),
        extra=json.loads(extra), id=int(tid),
    )


def info(conn: sqlite3.Connection, path: Path) -> dict:
    """The overview behind ``gapgauge info`` (see :meth:`gapgauge.store.db.Store.info`)."""
    names = dict(conn.execute("SELECT hash, name FROM scenarios").fetchall())
    counts = dict(conn.execute("SELECT status, COUNT(*) FROM rollouts GROUP BY status").fetchall())
    rollouts = {"total": sum(counts.values()), **{s: int(counts.get(s, 0)) for s in STATUSES}}
    trial_total, synthetic = conn.execute("SELECT COUNT(*), COALESCE(SUM(synthetic), 0) FROM trials").fetchone()
    runs = [
        {"id": r[0], "kind": r[1], "scenario": names.get(r[2], r[2]), "scenario_hash": r[2], "seed": r[3],
         "design": r[4], "planned": r[5], "nominal": bool(r[6]), "status": r[8], "done": r[9], "created_at": r[10]}
        for r in conn.execute(RUNS + " GROUP BY r.id ORDER BY r.id").fetchall()
    ]
    scenarios = [
        {"hash": h, "name": n, "path": p, "created_at": c, "simulation_hash": sim,
         "trials": conn.execute("SELECT COUNT(*) FROM trials WHERE scenario_hash = ?", (h,)).fetchone()[0]}
        for h, n, p, c, sim in conn.execute(
            "SELECT hash, name, path, created_at, simulation_hash FROM scenarios ORDER BY created_at")
    ]
    models = [
        {"id": i, "kind": k, "scenario": names.get(h, h), "scenario_hash": h, "created_at": c}
        for i, k, h, c in conn.execute("SELECT id, kind, scenario_hash, created_at FROM models ORDER BY id")
    ]
    flagged = _flagged_trials(conn)
    return {
        "store": str(path),
        "schema_version": schema.SCHEMA_VERSION,
        "scenarios": scenarios,
        "runs": runs,
        "rollouts": rollouts,
        "trials": {"total": int(trial_total), "synthetic": int(synthetic),
                   "flagged": sum(1 for f in flagged if f["flags"]),
                   "unplaced": sum(1 for f in flagged if not f["placed"]), "checks": flagged},
        "matches": conn.execute("SELECT COUNT(*) FROM matches").fetchone()[0],
        "models": models,
    }


def _flagged_trials(conn: sqlite3.Connection) -> list[dict]:
    """Trials with unusual channels (``extra_json`` flags) or an onset not placed in time: id, file, the
    flags' lines, whether placed and why not."""
    out = []
    for tid, source, extra in conn.execute("SELECT id, source_path, extra_json FROM trials ORDER BY id"):
        try:
            data = json.loads(extra) if extra else {}
        except ValueError:
            continue
        flags = [str(f.get("detail", f.get("channel", ""))) for f in data.get("flags") or [] if isinstance(f, dict)]
        alignment = data.get("alignment") if isinstance(data.get("alignment"), dict) else {}
        placed = alignment.get("placed") is not False
        if flags or not placed:
            out.append({"trial": int(tid), "file": Path(source).name, "flags": flags, "placed": placed,
                        "reason": "" if placed else str(alignment.get("reason", ""))})
    return out


def check(conn: sqlite3.Connection, path: Path) -> list[str]:
    """Problems in the store, each one line saying what to do; empty when healthy.

    SQLite's own ``PRAGMA integrity_check`` and ``foreign_key_check`` first, then ours: every run
    complete or resumable, no duplicate rollouts, every trial's matched rollouts present, features
    and objective finite wherever the status is ok.
    """
    restore = f"restore {path} from a backup (or copy out what `sqlite3 {path} .recover` saves)"
    problems = [f"SQLite integrity check: {row[0]}; {restore}"
                for row in conn.execute("PRAGMA integrity_check").fetchall() if row[0] != "ok"]
    if problems:
        return problems  # our own checks read the same damaged pages
    for table, rowid, parent, _ in conn.execute("PRAGMA foreign_key_check").fetchall():
        problems.append(f"table {table} row {rowid} points at a missing row of {parent}; {restore}")
    for rid, done, planned, status, bad in conn.execute(
        "SELECT r.id, COUNT(ro.idx), r.planned, r.status, SUM(ro.idx < 0 OR ro.idx >= r.planned)"
        " FROM runs r LEFT JOIN rollouts ro ON ro.run_id = r.id GROUP BY r.id"
    ).fetchall():
        if bad:
            problems.append(f"run {rid} holds {bad} rollout(s) with an index outside 0..{planned - 1}; {restore}")
        elif status == "done" and done != planned:
            problems.append(f"run {rid} is marked done but holds {done} of {planned} rollouts; run the command that"
                            " made it (`gapgauge sweep` for a sweep) again to fill in the missing rows")
    for rid, idx, n in conn.execute(
        "SELECT run_id, idx, COUNT(*) FROM rollouts GROUP BY run_id, idx HAVING COUNT(*) > 1 LIMIT 20"
    ).fetchall():
        problems.append(f"run {rid} index {idx} is stored {n} times; {restore}")
    for tid, missing in conn.execute(
        "SELECT m.trial_id, COUNT(*) FROM matches m LEFT JOIN rollouts ro ON ro.run_id = m.run_id AND ro.idx = m.idx"
        " WHERE ro.idx IS NULL GROUP BY m.trial_id"
    ).fetchall():
        problems.append(f"trial {tid} lacks {missing} matched simulation(s); run `gapgauge ingest` on its log again")
    for (tid,) in conn.execute(
        "SELECT t.id FROM trials t WHERE NOT EXISTS (SELECT 1 FROM matches m WHERE m.trial_id = t.id)"
    ).fetchall():
        problems.append(f"trial {tid} has no matched simulations; run `gapgauge ingest` on its log again")
    problems += _nonfinite_ok_rows(conn, restore)
    return problems


def _nonfinite_ok_rows(conn: sqlite3.Connection, restore: str) -> list[str]:
    bad: dict[int, int] = {}
    for scenario_hash, columns in conn.execute("SELECT hash, columns_json FROM scenarios").fetchall():
        width = len(json.loads(columns)["features"])
        cursor = conn.execute(
            "SELECT ro.run_id, ro.objective, ro.features FROM rollouts ro JOIN runs r ON r.id = ro.run_id"
            " WHERE r.scenario_hash = ? AND ro.status = 'ok'", (scenario_hash,))
        while rows := cursor.fetchmany(50_000):
            run_ids = np.array([r[0] for r in rows])
            objective = np.array([r[1] for r in rows], dtype=float)
            nan_row = np.full(width, np.nan).astype("<f8").tobytes()  # a malformed row counts as damaged
            blobs = [r[2] if isinstance(r[2], bytes) and len(r[2]) == 8 * width else nan_row for r in rows]
            features = np.frombuffer(b"".join(blobs), dtype="<f8").reshape(len(rows), width)
            broken = ~(np.isfinite(objective) & np.isfinite(features).all(axis=1))
            for rid in run_ids[broken].tolist():
                bad[rid] = bad.get(rid, 0) + 1
    return [f"run {rid} has {n} rollout(s) with status ok but a missing or non-finite feature or objective; {restore}"
            for rid, n in sorted(bad.items())]
