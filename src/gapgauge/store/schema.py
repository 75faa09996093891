"""The store's SQLite schema, its version, and the migrations between versions.

The schema is the ``Store`` data contract of DEVELOPERS.md. ``meta`` holds ``schema_version`` and an
``application`` marker, so a SQLite file that is not ours is told apart from an old store of ours.

A rollout's parameters, physics draw and features are float64 little-endian BLOBs (``(dim,)``,
``(k,)``, ``(nfeatures,)``; NaN kept as NaN): reading 10^5 rollouts is then one ``numpy.frombuffer``
per column instead of parsing three million decimal numbers (JSON text took 3 to 4 s for 10^5 rows
on the shared two-core machine, BLOBs well under one; see benchmarks/sweep_throughput.py). Their
column names are frozen per scenario version in ``scenarios.columns_json``
(``{"parameters": [...], "physics": [...], "features": [...]}``), so a later change of defaults can
never reinterpret stored numbers.

Version 2 keys runs by what they simulate: each scenario version also stores its ``simulation_hash``
(the sweep's key), its ``trajectory_hash`` (the simulation alone), their parts as ``identity_json`` and its
objective as ``objective_json`` (:mod:`gapgauge.scenario.identity`). A run belongs to every version with
its version's simulation hash. Migrating a version-1 store leaves them NULL / empty; they are filled in
when that scenario version is next added, so old runs are found again as soon as the unchanged
scenario is used.

Migrations: ``MIGRATIONS[v]`` takes a connection inside an open write transaction from version ``v``
to ``v + 1``. Opening an older store runs them in order after a backup copy ``<store>.v<old>.bak``
has been written (see :func:`gapgauge.store.db.Store`); a newer store is refused.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable

#: the schema this code writes and reads
SCHEMA_VERSION = 2
APPLICATION = "gapgauge"
RUN_KINDS = ("sweep", "match", "standin", "calibration")
RUN_STATUSES = ("running", "done")



def _v1_to_v2(conn: sqlite3.Connection) -> None:
    """Runs keyed by simulation content: the scenario versions' simulation and trajectory hashes."""
    for column in ("simulation_hash TEXT", "trajectory_hash TEXT", "identity_json TEXT NOT NULL DEFAULT '{}'",
                   "objective_json TEXT NOT NULL DEFAULT '{}'"):
        conn.execute(f"ALTER TABLE scenarios ADD COLUMN {column}")
    conn.execute("CREATE INDEX IF NOT EXISTS scenarios_simulation ON scenarios(simulation_hash)")


#: version -> step that migrates a connection from that version to the next (inside one transaction)
MIGRATIONS: dict[int, Callable[[sqlite3.Connection], None]] = {1: _v1_to_v2}

TABLES_V1 = """
CREATE TABLE IF NOT EXISTS meta (
    key TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS scenarios (
    hash TEXT PRIMARY KEY,
    name TEXT NOT NULL,
    path TEXT NOT NULL,
    raw_json TEXT NOT NULL,
    columns_json TEXT NOT NULL,
    created_at TEXT NOT NULL,
    simulation_hash TEXT,
    trajectory_hash TEXT,
    identity_json TEXT NOT NULL DEFAULT '{}',
    objective_json TEXT NOT NULL DEFAULT '{}'
);
CREATE INDEX IF NOT EXISTS scenarios_simulation ON scenarios(simulation_hash);
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY,
    kind TEXT NOT NULL CHECK (kind IN ('sweep', 'match', 'standin', 'calibration')),
    scenario_hash TEXT NOT NULL REFERENCES scenarios(hash),
    seed INTEGER NOT NULL,
    design TEXT NOT NULL,
    planned INTEGER NOT NULL CHECK (planned >= 0),
    nominal INTEGER NOT NULL,
    config_json TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('running', 'done')),
    created_at TEXT NOT NULL,
    UNIQUE (kind, scenario_hash, seed, design, planned, nominal, config_json)
);
CREATE TABLE IF NOT EXISTS rollouts (
    run_id INTEGER NOT NULL REFERENCES runs(id),
    idx INTEGER NOT NULL,
    params BLOB NOT NULL,
    physics BLOB NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('ok', 'fell', 'diverged')),
    reason TEXT NOT NULL DEFAULT '',
    objective REAL,
    features BLOB NOT NULL,
    UNIQUE (run_id, idx)
);
CREATE INDEX IF NOT EXISTS rollouts_status ON rollouts(run_id, status);
CREATE TABLE IF NOT EXISTS trials (
    id INTEGER PRIMARY KEY,
    sha256 TEXT NOT NULL UNIQUE,
    scenario_hash TEXT NOT NULL REFERENCES scenarios(hash),
    source_path TEXT NOT NULL,
    params_json TEXT NOT NULL,
    robot_id TEXT NOT NULL,
    recorded_at TEXT NOT NULL,
    outcome TEXT CHECK (outcome IS NULL OR outcome IN ('stood', 'fell')),
    notes TEXT NOT NULL,
    synthetic INTEGER NOT NULL,
    features_json TEXT NOT NULL,
    objective REAL,
    ingested_at TEXT NOT NULL,
    tool_version TEXT NOT NULL,
    series_npz BLOB,
    extra_json TEXT NOT NULL DEFAULT '{}'
);
CREATE INDEX IF NOT EXISTS trials_scenario ON trials(scenario_hash);
CREATE TABLE IF NOT EXISTS matches (
    trial_id INTEGER NOT NULL REFERENCES trials(id),
    run_id INTEGER NOT NULL REFERENCES runs(id),
    idx INTEGER NOT NULL,
    PRIMARY KEY (trial_id, run_id, idx)
);
CREATE TABLE IF NOT EXISTS models (
    id INTEGER PRIMARY KEY,
    kind TEXT NOT NULL,
    scenario_hash TEXT NOT NULL,
    params_json TEXT NOT NULL,
    arrays_npz BLOB,
    created_at TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS models_lookup ON models(kind, scenario_hash, id);
"""


def create_schema(conn: sqlite3.Connection) -> None:
    """Create the current schema in an empty database (inside the caller's write transaction)."""
    for statement in TABLES_V1.split(";"):
        if statement.strip():
            conn.execute(statement)
    conn.execute("INSERT OR REPLACE INTO meta(key, value) VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))
    conn.execute("INSERT OR REPLACE INTO meta(key, value) VALUES ('application', ?)", (APPLICATION,))


def user_tables(conn: sqlite3.Connection) -> list[str]:
    """Names of the tables in the database, SQLite's own excluded."""
    rows = conn.execute("SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")
    return [r[0] for r in rows]


def read_version(conn: sqlite3.Connection) -> int | None:
    """The stored schema version, or None when the database is not a gapgauge store."""
    if "meta" not in user_tables(conn):
        return None
    try:
        rows = dict(conn.execute("SELECT key, value FROM meta").fetchall())
    except sqlite3.OperationalError:  # another program's meta table, with other columns
        return None  # (a damaged page raises plain DatabaseError, which goes up: the store is damaged)
    if rows.get("application") != APPLICATION:
        return None
    try:
        return int(rows["schema_version"])
    except (KeyError, ValueError):
        return None


def migrate(conn: sqlite3.Connection, from_version: int, to_version: int = SCHEMA_VERSION) -> None:
    """Run the migration steps ``from_version -> to_version`` inside the caller's write transaction."""
    for version in range(from_version, to_version):
        step = MIGRATIONS.get(version)
        if step is None:
            raise KeyError(version)
        step(conn)
    conn.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(to_version),))
