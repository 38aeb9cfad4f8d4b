"""The state database: its connection, the ``Database`` with its transactions, and the engine's own SQL.

One SQLite file holds files, lot values, lots, verdicts, audit and the outbox.

Durability: WAL journal, ``synchronous=FULL`` (a committed transaction survives power loss), an
autocommit connection (``isolation_level=None``) and an explicit ``BEGIN IMMEDIATE`` for every write
transaction — a transaction that reads and then writes would otherwise get "database is locked" at once,
busy timeout or not. Keep the database on local disk: WAL does not work on network file systems.

Threads: a ``Database`` owns one connection guarded by a re-entrant lock; ``write()`` and ``read()`` hold
the lock for the whole block, so the watcher thread, the scheduler's jobs and the run loop may share
one ``Database``. Other processes (or a sender that wants its own connection) open their own ``Database``;
SQLite's file locking and the busy timeout serialise them.

Engine-specific SQL lives in one spot, the section "engine: SQLite" below: connecting and the pragmas
(``connect``), the transaction statements (``BEGIN IMMEDIATE`` / ``COMMIT`` / ``ROLLBACK``, savepoints,
the per-transaction ``synchronous`` switch), the checkpoint at close, the catalogue look-ups
(``table_names``, ``table_columns`` = ``PRAGMA table_info``) and the ``meta`` upsert (``INSERT ... ON
CONFLICT``). A second engine (PostgreSQL) replaces that section; the schema (``monitor.state.schema``) and
the repositories (``files``, ``lots``, ``verdicts``, ``audit``, ``outbox``) use portable SQL with ``?``
parameters on the connection they are handed — except ``verdicts.decided_between``, whose screen column
uses SQLite's JSON functions (``json_type`` / ``json_extract``) on the stored payload.
"""

from __future__ import annotations

import sqlite3
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

DB_NAME = "lotwarden.db"
BUSY_TIMEOUT_MS = 30_000

Connection = sqlite3.Connection          # what repositories are handed: the open transaction's connection
Cursor = sqlite3.Cursor
DatabaseError = sqlite3.Error            # what a failed statement raises (callers catch this, not sqlite3's)


# --- engine: SQLite ----------------------------------------------------------------------------------------
def connect(path: Path) -> sqlite3.Connection:
    """An autocommit connection to ``path`` with the pragmas: busy timeout, WAL, synchronous FULL, foreign keys.

    Raises OSError when the journal cannot be WAL (a network file system, for one)."""
    conn = sqlite3.connect(str(path), isolation_level=None, check_same_thread=False,
                           timeout=BUSY_TIMEOUT_MS / 1000)
    conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
    mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
    if str(mode).lower() != "wal":
        conn.close()
        raise OSError(f"{path}: SQLite could not switch to WAL (got {mode!r}); use a local disk folder")
    conn.execute("PRAGMA synchronous = FULL")
    conn.execute("PRAGMA foreign_keys = ON")
    return conn


@contextmanager
def write_tx(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """One write transaction: BEGIN IMMEDIATE (takes the write lock first, so no mid-way 'locked'), COMMIT."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        if conn.in_transaction:   # SQLite has already rolled back on a full disk or an I/O error
            conn.execute("ROLLBACK")
        raise
    try:
        conn.execute("COMMIT")
    except BaseException:   # e.g. the disk filled at commit: leave no transaction open behind
        if conn.in_transaction:
            conn.execute("ROLLBACK")
        raise


@contextmanager
def _read_tx(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    conn.execute("BEGIN")
    try:
        yield conn
    finally:
        conn.execute("COMMIT")


def _set_synchronous(conn: sqlite3.Connection, full: bool) -> None:
    conn.execute("PRAGMA synchronous = FULL" if full else "PRAGMA synchronous = NORMAL")


def _checkpoint(conn: sqlite3.Connection) -> None:
    conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")


class Savepoint:
    """A named savepoint inside an open transaction: ``rollback()`` undoes what followed ``begin()``."""

    def __init__(self, conn: sqlite3.Connection, name: str) -> None:
        if not name.isidentifier():
            raise ValueError(f"savepoint name {name!r} must be an identifier")
        self.conn, self.name = conn, name

    def begin(self) -> None:
        self.conn.execute(f"SAVEPOINT {self.name}")

    def rollback(self) -> None:
        """Undo everything since ``begin()``; the savepoint stays open (``release()`` it)."""
        self.conn.execute(f"ROLLBACK TO {self.name}")

    def release(self) -> None:
        self.conn.execute(f"RELEASE {self.name}")


def table_names(conn: sqlite3.Connection) -> set[str]:
    """The tables the database holds."""
    return {str(r[0]) for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}


def table_columns(conn: sqlite3.Connection, table: str) -> set[str]:
    """The column names of ``table`` (empty if there is no such table)."""
    if not table.isidentifier():
        raise ValueError(f"table name {table!r} must be an identifier")
    return {str(r[1]) for r in conn.execute(f"PRAGMA table_info({table})")}


def get_meta(conn: sqlite3.Connection, key: str) -> str | None:
    """The ``meta`` value of ``key`` (None when unset)."""
    row = conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
    return None if row is None else str(row[0])


def set_meta(conn: sqlite3.Connection, key: str, value: str) -> None:
    """Set the ``meta`` value of ``key`` (inside a write)."""
    conn.execute("INSERT INTO meta(key, value) VALUES (?, ?) ON CONFLICT(key) DO UPDATE SET value = excluded.value",
                 (key, value))


@contextmanager
def read_only(path: str | Path) -> Iterator[sqlite3.Connection]:
    """A read-only connection to the database file at ``path`` (for tools beside a running daemon)."""
    conn = sqlite3.connect(f"file:{Path(path)}?mode=ro", uri=True, timeout=5)
    try:
        yield conn
    finally:
        conn.close()
# --- end of engine: SQLite ---------------------------------------------------------------------------------


def where_equal(**columns: str | None) -> tuple[str, list[str]]:
    """`` WHERE a = ? AND b = ?`` for the columns given a value (None: no condition), and its arguments;
    ``("", [])`` when none is given. Column names come from the caller's code, never from data."""
    given = [(c, v) for c, v in columns.items() if v is not None]
    if not given:
        return "", []
    return " WHERE " + " AND ".join(f"{c} = ?" for c, _ in given), [v for _, v in given]


def inserted_id(cur: sqlite3.Cursor) -> int:
    """The rowid of the row an INSERT on ``cur`` just wrote."""
    if cur.lastrowid is None:
        raise RuntimeError("no row was inserted")
    return int(cur.lastrowid)


def utc_iso(moment: datetime) -> str:
    """ISO 8601 text of an aware datetime in UTC, seconds precision kept to microseconds."""
    if moment.tzinfo is None:
        raise ValueError("timestamps in the state store must be timezone-aware")
    return moment.astimezone(UTC).isoformat()


@dataclass
class Database:
    """An open state database. Build with ``Database.open(folder)``; close with ``close()``."""

    path: Path
    conn: sqlite3.Connection
    lock: threading.RLock

    @classmethod
    def open(cls, folder: str | Path) -> Database:
        """Create ``folder`` and ``lotwarden.db`` in it if missing, set the pragmas, create or upgrade the
        schema (``monitor.state.schema.migrate``; a database newer than this code is refused)."""
        from monitor.state import schema

        d = Path(folder)
        d.mkdir(parents=True, exist_ok=True)
        path = d / DB_NAME
        conn = connect(path)
        db = cls(path=path, conn=conn, lock=threading.RLock())
        try:
            with db.write() as c:
                schema.migrate(c, path)
        except BaseException:
            conn.close()
            raise
        return db

    @contextmanager
    def write(self, *, durable: bool = True) -> Iterator[sqlite3.Connection]:
        """``with store.write() as conn:`` — one BEGIN IMMEDIATE … COMMIT; ROLLBACK if the block raises.

        ``durable=False`` commits without waiting for the disk (``synchronous=NORMAL`` for this one
        transaction): it survives a killed process but may be lost with a power cut, together with nothing
        after it. Only for records whose loss is harmless (e.g. a file marked 'processing', which is then
        simply found again in the drop folder); the next durable commit makes it durable too.
        """
        with self.lock:
            if not durable:
                _set_synchronous(self.conn, full=False)
            try:
                with write_tx(self.conn) as conn:
                    yield conn
            finally:
                if not durable:
                    _set_synchronous(self.conn, full=True)

    def sync(self) -> None:
        """Make every commit so far durable: one small durable transaction, whose WAL sync covers the
        frames of the non-durable commits before it."""
        with self.write() as conn:
            set_meta(conn, "synced_at", utc_iso(datetime.now(UTC)))

    @contextmanager
    def read(self) -> Iterator[sqlite3.Connection]:
        """``with store.read() as conn:`` — reads under the store's lock (one consistent snapshot)."""
        with self.lock, _read_tx(self.conn) as conn:
            yield conn

    def close(self, *, checkpoint: bool = True) -> None:
        """Checkpoint the WAL (unless ``checkpoint`` is False: a tool beside a running daemon leaves that
        to the daemon, so it never waits on the daemon's readers) and close the connection."""
        with self.lock:
            try:
                if checkpoint:
                    _checkpoint(self.conn)
            finally:
                self.conn.close()

    def __enter__(self) -> Database:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- small helpers used inside a write() block ----------------------------------------------
    @staticmethod
    def audit(conn: sqlite3.Connection, at: str, event: str, *, file_id: int | None = None, line: str = "",
              product: str = "", lot: str = "", detail: dict[str, Any] | None = None) -> None:
        """Append one audit record (call inside ``write()``); the same as ``monitor.state.audit.append``."""
        from monitor.state import audit

        audit.append(conn, at, event, file_id=file_id, line=line, product=product, lot=lot, detail=detail)

    def record_event(self, at: datetime, event: str, **detail: Any) -> None:
        """One audit record in a transaction of its own (config reloaded / rejected, daemon started …)."""
        with self.write() as conn:
            self.audit(conn, utc_iso(at), event, detail=detail)
