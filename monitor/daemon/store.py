"""The daemon's state store: one SQLite file holding files, lot values, lots, verdicts, audit and the outbox.

Durability: WAL journal, ``synchronous=FULL`` (a committed transaction survives power loss), an
autocommit connection (``isolation_level=None``) and an explicit ``BEGIN IMMEDIATE`` for every write
transaction — a transaction that reads and then writes would otherwise get "database is locked" at once,
busy timeout or not (RELIABILITY.md, SQLite). Keep the database on local disk: WAL does not work on
network file systems.

Threads: a ``Store`` owns one connection guarded by a re-entrant lock; ``write()`` and ``read()`` hold
the lock for the whole block, so the watcher thread, the scheduler's jobs and the run loop may share
one ``Store``. Other processes (or a sender that wants its own connection) open their own ``Store``;
SQLite's file locking and the busy timeout serialise them.
"""

from __future__ import annotations

import json
import sqlite3
import threading
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterator

from monitor.alerts import outbox

DB_NAME = "lotwarden.db"
SCHEMA_VERSION = 2
BUSY_TIMEOUT_MS = 30_000

SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS files (
    id            INTEGER PRIMARY KEY,
    sha256        TEXT NOT NULL,
    path          TEXT NOT NULL,             -- where the file was taken from
    size          INTEGER NOT NULL,
    mtime         REAL NOT NULL,             -- unix seconds
    first_seen_at TEXT NOT NULL,             -- ISO 8601 UTC
    state         TEXT NOT NULL CHECK (state IN ('processing', 'done', 'rejected', 'duplicate')),
    processed_at  TEXT,
    archived_path TEXT,                      -- archive / quarantine target, chosen in the done transaction
    archived_at   TEXT,                      -- set once the move is done
    reason        TEXT,                      -- why rejected / duplicate of which file / revision of which file
    kind          TEXT,                      -- "values" | "summary" (reader's export kind)
    n_values      INTEGER NOT NULL DEFAULT 0,
    n_bad_rows    INTEGER NOT NULL DEFAULT 0,
    attempts      INTEGER NOT NULL DEFAULT 0,  -- start-ups that found this file still 'processing'
    duplicate_of  INTEGER REFERENCES files(id),
    revision_of   INTEGER REFERENCES files(id)
);
CREATE INDEX IF NOT EXISTS files_sha ON files(sha256, state);
CREATE INDEX IF NOT EXISTS files_path ON files(path, state);
CREATE INDEX IF NOT EXISTS files_unarchived ON files(state) WHERE archived_at IS NULL;
CREATE INDEX IF NOT EXISTS files_archived_path ON files(archived_path);
CREATE TABLE IF NOT EXISTS lots (
    id            INTEGER PRIMARY KEY,
    line          TEXT NOT NULL,
    product       TEXT NOT NULL,
    lot           TEXT NOT NULL,
    state         TEXT NOT NULL CHECK (state IN ('open', 'closed')),
    opened_at     TEXT NOT NULL,
    last_value_at TEXT NOT NULL,             -- arrival time (daemon clock) of the newest value
    last_value_ts REAL NOT NULL,             -- same, unix seconds (idle check)
    closed_at     TEXT,
    close_reason  TEXT,                      -- next-lot | end-marker | idle | forced
    n             INTEGER NOT NULL DEFAULT 0,
    times_closed  INTEGER NOT NULL DEFAULT 0,
    late_values   INTEGER NOT NULL DEFAULT 0, -- values that arrived after the lot had been closed
    UNIQUE (line, product, lot)
);
CREATE INDEX IF NOT EXISTS lots_open ON lots(state, line);
CREATE TABLE IF NOT EXISTS lot_values (
    id          INTEGER PRIMARY KEY,
    lot_id      INTEGER NOT NULL REFERENCES lots(id),
    line        TEXT NOT NULL,
    product     TEXT NOT NULL,
    lot         TEXT NOT NULL,
    seq         INTEGER NOT NULL,            -- arrival order within the lot, 1-based
    value       REAL,                        -- as exported (NULL for a non-finite value or an excluded row)
    unit        TEXT NOT NULL,
    density     REAL,                        -- g/mL from the feed profile, for mass <-> volume
    head        TEXT NOT NULL DEFAULT '',
    timestamp   TEXT,
    file_id     INTEGER NOT NULL REFERENCES files(id),
    source_line INTEGER,
    excluded    TEXT NOT NULL DEFAULT '',    -- why the row has no usable value (monitor.lot.EXCLUSION_REASONS)
    UNIQUE (lot_id, seq)
);
CREATE TABLE IF NOT EXISTS lot_summaries (
    id          INTEGER PRIMARY KEY,
    file_id     INTEGER NOT NULL REFERENCES files(id),
    source_line INTEGER,
    line        TEXT NOT NULL,
    product     TEXT NOT NULL,
    lot         TEXT NOT NULL,
    n           INTEGER NOT NULL,
    mean        REAL,
    sd          REAL,
    unit        TEXT NOT NULL,
    density     REAL,
    timestamp   TEXT,
    problem     TEXT NOT NULL DEFAULT ''     -- why the record cannot be used ("" when fine)
);
CREATE TABLE IF NOT EXISTS verdicts (
    id           INTEGER PRIMARY KEY,
    decided_at   TEXT NOT NULL,              -- ISO 8601 UTC
    line         TEXT NOT NULL,
    product      TEXT NOT NULL,
    lot          TEXT NOT NULL,
    rule         TEXT NOT NULL,
    rule_version TEXT NOT NULL,
    rule_hash    TEXT NOT NULL,
    verdict      TEXT NOT NULL,
    n            INTEGER NOT NULL,
    mean         REAL,
    target       REAL,
    unit         TEXT NOT NULL,
    payload      TEXT NOT NULL,              -- json of Verdict.to_json()
    lot_id       INTEGER REFERENCES lots(id),
    summary_id   INTEGER REFERENCES lot_summaries(id),
    close_reason TEXT,
    lot_rows     INTEGER                     -- rows of the lot stored when it was judged (values lots)
);
CREATE INDEX IF NOT EXISTS verdicts_lot ON verdicts(line, product, lot);
CREATE TABLE IF NOT EXISTS audit (
    id      INTEGER PRIMARY KEY,
    at      TEXT NOT NULL,                   -- ISO 8601 UTC
    event   TEXT NOT NULL,                   -- file-taken (names the lots it opened) | file-duplicate |
                                             -- file-revised | file-rejected | file-move-skipped |
                                             -- lot-reopened | verdict (one per closed lot, with its
                                             -- close_reason) | config-reloaded | config-rejected | ...
    file_id INTEGER,
    line    TEXT NOT NULL DEFAULT '',
    product TEXT NOT NULL DEFAULT '',
    lot     TEXT NOT NULL DEFAULT '',
    detail  TEXT NOT NULL DEFAULT '{}'       -- JSON object
);
"""

# Columns added after schema version 1: (table, column, declaration). ``Store.open`` adds any that an older
# database lacks (ALTER TABLE ... ADD COLUMN keeps every row; the default fills the old ones).
ADDED_COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("lot_values", "excluded", "TEXT NOT NULL DEFAULT ''"),
    ("lot_summaries", "problem", "TEXT NOT NULL DEFAULT ''"),
    ("verdicts", "lot_rows", "INTEGER"),
)


def add_missing_columns(conn: sqlite3.Connection) -> list[str]:
    """Add the columns of ``ADDED_COLUMNS`` an older database lacks (inside a write); return ``table.column``s added."""
    added = []
    for table, column, decl in ADDED_COLUMNS:
        have = {r[1] for r in conn.execute(f"PRAGMA table_info({table})")}
        if column not in have:
            conn.execute(f"ALTER TABLE {table} ADD COLUMN {column} {decl}")
            added.append(f"{table}.{column}")
    return added


def inserted_id(cur: sqlite3.Cursor) -> int:
    """The rowid of the row an INSERT on ``cur`` just wrote."""
    if cur.lastrowid is None:
        raise RuntimeError("no row was inserted")
    return int(cur.lastrowid)


def utc_iso(moment: datetime) -> str:
    """ISO 8601 text of an aware datetime in UTC, seconds precision kept to microseconds."""
    if moment.tzinfo is None:
        raise ValueError("timestamps in the state store must be timezone-aware")
    return moment.astimezone(timezone.utc).isoformat()


@dataclass
class Store:
    """An open state database. Build with ``Store.open(folder)``; close with ``close()``."""

    path: Path
    conn: sqlite3.Connection
    lock: threading.RLock

    @classmethod
    def open(cls, folder: str | Path) -> "Store":
        """Create ``folder`` and ``lotwarden.db`` in it if missing, set the pragmas, create the schema."""
        d = Path(folder)
        d.mkdir(parents=True, exist_ok=True)
        path = d / DB_NAME
        conn = sqlite3.connect(str(path), isolation_level=None, check_same_thread=False,
                               timeout=BUSY_TIMEOUT_MS / 1000)
        conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            conn.close()
            raise OSError(f"{path}: SQLite could not switch to WAL (got {mode!r}); use a local disk folder")
        conn.execute("PRAGMA synchronous = FULL")
        conn.execute("PRAGMA foreign_keys = ON")
        store = cls(path=path, conn=conn, lock=threading.RLock())
        with store.write() as c:
            for stmt in SCHEMA.split(";"):
                if stmt.strip():
                    c.execute(stmt)
            outbox.ensure_schema(c)
            add_missing_columns(c)
            c.execute("INSERT INTO meta(key, value) VALUES ('schema_version', ?) ON CONFLICT(key) DO UPDATE"
                      " SET value = excluded.value WHERE CAST(value AS INTEGER) < CAST(excluded.value AS INTEGER)",
                      (str(SCHEMA_VERSION),))
        return store

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
                self.conn.execute("PRAGMA synchronous = NORMAL")
            try:
                self.conn.execute("BEGIN IMMEDIATE")
                try:
                    yield self.conn
                except BaseException:
                    self.conn.execute("ROLLBACK")
                    raise
                self.conn.execute("COMMIT")
            finally:
                if not durable:
                    self.conn.execute("PRAGMA synchronous = FULL")

    def sync(self) -> None:
        """Make every commit so far durable: one small durable transaction, whose WAL sync covers the
        frames of the non-durable commits before it."""
        with self.write() as conn:
            conn.execute("INSERT OR REPLACE INTO meta(key, value) VALUES ('synced_at', ?)",
                         (utc_iso(datetime.now(timezone.utc)),))

    @contextmanager
    def read(self) -> Iterator[sqlite3.Connection]:
        """``with store.read() as conn:`` — reads under the store's lock (one consistent snapshot)."""
        with self.lock:
            self.conn.execute("BEGIN")
            try:
                yield self.conn
            finally:
                self.conn.execute("COMMIT")

    def close(self) -> None:
        """Checkpoint the WAL and close the connection."""
        with self.lock:
            try:
                self.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            finally:
                self.conn.close()

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- small helpers used inside a write() block ----------------------------------------------
    @staticmethod
    def audit(conn: sqlite3.Connection, at: str, event: str, *, file_id: int | None = None, line: str = "",
              product: str = "", lot: str = "", detail: dict[str, Any] | None = None) -> None:
        """Append one audit record (call inside ``write()``)."""
        conn.execute("INSERT INTO audit(at, event, file_id, line, product, lot, detail) VALUES (?,?,?,?,?,?,?)",
                     (at, event, file_id, line, product, lot,
                      json.dumps(detail or {}, sort_keys=True, ensure_ascii=False, default=str)))

    def record_event(self, at: datetime, event: str, **detail: Any) -> None:
        """One audit record in a transaction of its own (config reloaded / rejected, daemon started …)."""
        with self.write() as conn:
            self.audit(conn, utc_iso(at), event, detail=detail)
