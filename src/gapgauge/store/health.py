"""The health check of a store file, including one too damaged to open."""

from __future__ import annotations

import sqlite3
from pathlib import Path

from ..errors import StoreError
from .connection import BUSY_TIMEOUT_MS, SQLITE_HEADER
from .db import Store
from .queries import RunRecord


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
