"""The store's connection: opening one SQLite file (WAL), its schema and migration, transactions that
retry while another process holds the lock. :class:`gapgauge.store.Store` adds what is stored.

Durability: every write is one ``BEGIN IMMEDIATE ... COMMIT`` transaction, so a crash (even kill -9)
loses at most the write in flight. Concurrency: WAL lets readers and one writer work at once; other
writers wait (``busy_timeout``) and a write that still finds the database locked is retried with
exponential backoff.
"""

from __future__ import annotations

import sqlite3
import threading
import time
from collections.abc import Callable, Sequence
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, TypeVar

from ..errors import StoreError
from ..version import __version__
from . import schema

T = TypeVar("T")

SQLITE_HEADER = b"SQLite format 3\x00"
BUSY_TIMEOUT_MS = 30_000
RETRIES = 8  # on "database is locked" after the busy timeout: 0.05 s doubling, about 13 s more in all
RETRY_FIRST_WAIT_S = 0.05
READ_CHUNK = 65_536  # rows decoded at a time by a large read (memory stays ~50 MB above the arrays)


def utc_now() -> str:
    """ISO-8601 time in UTC, seconds."""
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


class Connection:
    """An open gapgauge store file. Use as a context manager, or call :meth:`close`.

    Opening creates the file if needed (unless ``create=False``), migrates an older schema after
    writing a backup copy ``<store>.v<old>.bak``, and refuses a newer schema or a file that is not a
    gapgauge store with a :class:`StoreError`. One ``Store`` may be shared by threads; its calls are
    serialised.
    """

    def __init__(self, path: str | Path = "gapgauge.sqlite", *, create: bool = True):
        self.path = Path(path)
        self._lock = threading.RLock()
        self.backup_path: Path | None = None  # set when opening migrated an older schema
        if not create and not self.path.exists():
            raise StoreError(f"{self.path}: no store here; run a sweep into it first or give the right store path")
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
                f"{self.path}: folder {self.path.parent} does not exist; create it or pick another store path"
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
                    "(pip install -U gapgauge) or use another store"
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
        return StoreError(f"{self.path}: SQLite cannot use the store ({exc}); run the store health check "
                          "(gapgauge store check) "
                          "and restore the file from a backup if it reports damage")

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

    def _read_chunks(self, sql: str, args: Sequence[Any], decode: Callable[[list[tuple]], T]) -> list[T]:
        """``decode`` applied to the rows of one query ``READ_CHUNK`` rows at a time (one statement, so one
        consistent snapshot in WAL mode); at least one chunk, possibly empty."""

        def action() -> list[T]:
            cursor = self._conn.execute(sql, args)
            out = []
            while rows := cursor.fetchmany(READ_CHUNK):
                out.append(decode(rows))
            return out or [decode([])]

        return self._retry(action)

    # ---- life cycle ---------------------------------------------------------------------------
    def close(self) -> None:
        with self._lock:
            self._conn.close()

    def __enter__(self) -> Connection:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"{type(self).__name__}({str(self.path)!r})"
