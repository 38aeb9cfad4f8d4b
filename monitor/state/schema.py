"""The state database's versioned schema: every table's DDL and the numbered migrations run at start-up.

``meta.schema_version`` says which version a database has. ``migrate`` (called by ``Database.open`` inside
its first write transaction) runs each migration from the stored version up to ``CURRENT_VERSION`` in
order, setting the version after each, all in that one transaction: an upgrade is whole or not at all, and
every row is kept (tables are only created and columns only added). A new database is built by the same
migrations from nothing. A database newer than this code is refused (``SchemaVersionError``), never
touched.

Versions:
  1  the first schema (files, lots, lot_values, lot_summaries, verdicts, audit, the outbox).
  2  lot_values.excluded, lot_summaries.problem, verdicts.lot_rows (added columns; old rows get the default).
  3  the senders' bookkeeping tables (email_messages, email_recipient_sends, email_lot_notices, digest_runs)
     are part of the schema, created at start-up instead of by the first sender.
  4  email_batches: each e-mail message recorded (Message-ID, alerts, recipients) before it is handed to
     the server, so a message cut short by a crash is repeated as it was, under the same Message-ID.
  5  dispositions (what people decided about a held lot; append-only) and rule_texts (every rule version's
     full text, kept when first seen), for the lot record.
  6  drift_tracks (each line/product/head's drift chart since its last restart), drift_lots (which lots
     each chart has taken, so a lot judged again adds nothing twice) and drift_signals (every drift signal).

The DDL of each migration is frozen as it was at its version: a later change is a new migration, never an
edit of an old one.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from monitor.errors import LotwardenError
from monitor.state.database import get_meta, set_meta, table_columns, table_names

CURRENT_VERSION = 6
VERSION_KEY = "schema_version"

# Version 2's tables, as a database of version 2 has them (a version-1 database lacks some; each is
# created if missing). Indexes are created if missing too.
TABLES_V2 = """
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
CREATE TABLE IF NOT EXISTS alerts (
    id          INTEGER PRIMARY KEY,
    dedup_key   TEXT NOT NULL UNIQUE,
    kind        TEXT NOT NULL,
    created_at  TEXT NOT NULL,
    line        TEXT NOT NULL DEFAULT '',
    product     TEXT NOT NULL DEFAULT '',
    lot         TEXT NOT NULL DEFAULT '',
    payload     TEXT NOT NULL              -- Alert.dumps()
);
CREATE TABLE IF NOT EXISTS deliveries (
    alert_id        INTEGER NOT NULL REFERENCES alerts(id),
    channel         TEXT NOT NULL,          -- "log" | "email" | "command" | ...
    state           TEXT NOT NULL DEFAULT 'pending',  -- pending | sent | dead | suppressed
    attempts        INTEGER NOT NULL DEFAULT 0,
    next_attempt_at REAL NOT NULL DEFAULT 0,          -- unix seconds
    sent_at         TEXT,
    last_error      TEXT,
    PRIMARY KEY (alert_id, channel)
);
CREATE INDEX IF NOT EXISTS deliveries_pending ON deliveries(channel, state, next_attempt_at);
"""

# Columns version 2 added to version 1's tables: (table, column, declaration). ALTER TABLE ... ADD COLUMN
# keeps every row; the default fills the old ones.
ADDED_COLUMNS_V2: tuple[tuple[str, str, str], ...] = (
    ("lot_values", "excluded", "TEXT NOT NULL DEFAULT ''"),
    ("lot_summaries", "problem", "TEXT NOT NULL DEFAULT ''"),
    ("verdicts", "lot_rows", "INTEGER"),
)

# Version 3: the senders' bookkeeping (a version-2 database has them only if a sender ran).
TABLES_V3 = """
CREATE TABLE IF NOT EXISTS email_messages (
    id          INTEGER PRIMARY KEY,
    message_id  TEXT NOT NULL,
    sent_at     REAL NOT NULL,          -- unix seconds
    recipients  TEXT NOT NULL,          -- JSON list
    alert_ids   TEXT NOT NULL,          -- JSON list
    folded      INTEGER NOT NULL DEFAULT 0
);
CREATE TABLE IF NOT EXISTS email_recipient_sends (
    recipient   TEXT NOT NULL,
    sent_at     REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS email_recipient_sends_by ON email_recipient_sends(recipient, sent_at);
CREATE TABLE IF NOT EXISTS email_lot_notices (
    line        TEXT NOT NULL,
    product     TEXT NOT NULL,
    lot         TEXT NOT NULL,
    notified_at REAL NOT NULL           -- unix seconds of the message that told people the lot is held
);
CREATE INDEX IF NOT EXISTS email_lot_notices_by ON email_lot_notices(line, product, lot, notified_at);
CREATE TABLE IF NOT EXISTS digest_runs (
    due_at       TEXT PRIMARY KEY,      -- ISO UTC of the scheduled time this digest covers
    period_start TEXT NOT NULL,
    period_end   TEXT NOT NULL,
    created_at   TEXT NOT NULL,
    dedup_key    TEXT NOT NULL
);
"""


# Version 4: the e-mail messages planned and not yet finished. A row is written ('sending') in its own
# transaction before the message goes to the server and finished ('sent' | 'failed' | 'dropped') in the
# transaction that settles its alerts; a row still 'sending' at the next drain is sent again as recorded.
TABLES_V4 = """
CREATE TABLE IF NOT EXISTS email_batches (
    id          INTEGER PRIMARY KEY,
    message_id  TEXT NOT NULL,
    planned_at  REAL NOT NULL,          -- unix seconds: the message's Date
    recipients  TEXT NOT NULL,          -- JSON list: the envelope recipients
    alert_ids   TEXT NOT NULL,          -- JSON list of alerts.id, in the message's order
    folded      INTEGER NOT NULL DEFAULT 0,
    state       TEXT NOT NULL DEFAULT 'sending' CHECK (state IN ('sending', 'sent', 'failed', 'dropped')),
    attempts    INTEGER NOT NULL DEFAULT 1,
    finished_at REAL,                   -- unix seconds, once no longer 'sending'
    note        TEXT                    -- why failed / dropped
);
CREATE INDEX IF NOT EXISTS email_batches_state ON email_batches(state, id);
"""


# Version 5: the lot record. A disposition row is never changed or deleted: a later one for the same lot
# supersedes it for display. A rule version's text is stored once, the first time a daemon loads it.
TABLES_V5 = """
CREATE TABLE IF NOT EXISTS dispositions (
    id          INTEGER PRIMARY KEY,
    at          TEXT NOT NULL,          -- ISO 8601 UTC
    line        TEXT NOT NULL,
    product     TEXT NOT NULL,
    lot         TEXT NOT NULL,
    verdict_id  INTEGER NOT NULL REFERENCES verdicts(id),  -- the hold / review it disposes of
    action      TEXT NOT NULL CHECK (action IN ('release', 'rework', 'scrap')),
    by_name     TEXT NOT NULL,
    note        TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS dispositions_lot ON dispositions(line, product, lot, id);
CREATE TABLE IF NOT EXISTS rule_texts (
    rule_hash     TEXT PRIMARY KEY,     -- sha256 of the rule file's bytes (Rule.content_hash)
    rule          TEXT NOT NULL,        -- the rule's name
    version       TEXT NOT NULL,        -- Rule.version (the hash's first 12 hex digits)
    source        TEXT NOT NULL,        -- the file it was read from
    text          TEXT NOT NULL,        -- the file's full text as it was
    values_json   TEXT NOT NULL,        -- the rule's values after validation (JSON object)
    first_seen_at TEXT NOT NULL         -- ISO 8601 UTC
);
CREATE INDEX IF NOT EXISTS rule_texts_name ON rule_texts(rule, first_seen_at);
"""


# Version 6: drift across lots. A track row is replaced as lots close; lots and signals are only added.
TABLES_V6 = """
CREATE TABLE IF NOT EXISTS drift_tracks (
    line        TEXT NOT NULL,
    product     TEXT NOT NULL,
    head        TEXT NOT NULL,          -- '' = the series of whole lots, else a filler head
    track_json  TEXT NOT NULL,          -- monitor.drift.Track.to_json()
    updated_at  TEXT NOT NULL,
    PRIMARY KEY (line, product, head)
);
CREATE TABLE IF NOT EXISTS drift_lots (
    line        TEXT NOT NULL,
    product     TEXT NOT NULL,
    head        TEXT NOT NULL,
    lot         TEXT NOT NULL,
    verdict_id  INTEGER NOT NULL,       -- the verdict whose statistic the chart took
    z           REAL NOT NULL,
    at          TEXT NOT NULL,
    PRIMARY KEY (line, product, head, lot)
);
CREATE TABLE IF NOT EXISTS drift_signals (
    id          INTEGER PRIMARY KEY,
    at          TEXT NOT NULL,          -- ISO 8601 UTC
    line        TEXT NOT NULL,
    product     TEXT NOT NULL,
    head        TEXT NOT NULL,
    lot         TEXT NOT NULL,          -- the lot whose statistic crossed the limit
    method      TEXT NOT NULL,
    direction   TEXT NOT NULL CHECK (direction IN ('up', 'down')),
    statistic   REAL NOT NULL,
    limit_value REAL NOT NULL,
    rule        TEXT NOT NULL,
    rule_version TEXT NOT NULL,
    data_json   TEXT NOT NULL           -- monitor.drift.DriftSignal.to_json()
);
CREATE INDEX IF NOT EXISTS drift_signals_at ON drift_signals(at);
"""


class SchemaVersionError(LotwardenError):
    """The state database's schema version is one this code cannot use (newer than it, or not a number)."""


@dataclass(frozen=True)
class Migration:
    """One numbered step: ``apply`` turns a database of version ``version - 1`` into ``version``."""

    version: int
    summary: str
    apply: Callable[[sqlite3.Connection], None]


@dataclass(frozen=True)
class Upgrade:
    """What ``migrate`` did: the version found (0 for a new database), the version now, the steps run."""

    found: int
    now: int
    steps: tuple[int, ...]


def _run_script(conn: sqlite3.Connection, script: str) -> None:
    for stmt in script.split(";"):
        if stmt.strip():
            conn.execute(stmt)


def _to_v2(conn: sqlite3.Connection) -> None:
    _run_script(conn, TABLES_V2)
    for table, column, decl in ADDED_COLUMNS_V2:
        if column not in table_columns(conn, table):
            conn.execute(f"ALTER TABLE {table} ADD COLUMN {column} {decl}")


def _to_v3(conn: sqlite3.Connection) -> None:
    _run_script(conn, TABLES_V3)


def _to_v4(conn: sqlite3.Connection) -> None:
    _run_script(conn, TABLES_V4)


def _to_v5(conn: sqlite3.Connection) -> None:
    _run_script(conn, TABLES_V5)


def _to_v6(conn: sqlite3.Connection) -> None:
    _run_script(conn, TABLES_V6)


# Version 1 has no step: a new database (nothing in it) is treated as "before version 2" and built by the
# steps from 2 on, which create every table they need if missing.
MIGRATIONS: tuple[Migration, ...] = (
    Migration(2, "add lot_values.excluded, lot_summaries.problem, verdicts.lot_rows", _to_v2),
    Migration(3, "create the senders' tables (e-mail bookkeeping, digest_runs)", _to_v3),
    Migration(4, "create email_batches (messages recorded before they are sent)", _to_v4),
    Migration(5, "create dispositions and rule_texts (the lot record)", _to_v5),
    Migration(6, "create drift_tracks, drift_lots and drift_signals (drift across lots)", _to_v6),
)
assert [m.version for m in MIGRATIONS] == list(range(2, CURRENT_VERSION + 1))


def stored_version(conn: sqlite3.Connection, path: str | Path) -> int:
    """The database's schema version: ``meta.schema_version``; 0 for a new (table-less) database; 1 for
    tables without a version (the first schema did not always say)."""
    tables = table_names(conn)
    text = get_meta(conn, VERSION_KEY) if "meta" in tables else None
    if text is None:
        return 0 if not tables - {"meta"} else 1
    try:
        version = int(text)
    except ValueError:
        raise SchemaVersionError(f"meta.schema_version is {text!r}, not a whole number", path=path,
                                 hint="the file is not a lotwarden state database, or it was edited") from None
    if version < 1:
        raise SchemaVersionError(f"meta.schema_version is {version}; versions start at 1", path=path)
    return version


def migrate(conn: sqlite3.Connection, path: str | Path) -> Upgrade:
    """Bring the database on ``conn`` (inside an open write transaction) to ``CURRENT_VERSION``.

    Raises ``SchemaVersionError`` naming ``path`` and both versions when the database is newer than this
    code; nothing is changed then."""
    found = stored_version(conn, path)
    if found > CURRENT_VERSION:
        raise SchemaVersionError(
            f"the state database has schema version {found}, newer than this lotwarden knows"
            f" (schema version {CURRENT_VERSION})", path=path,
            hint="run the lotwarden release that wrote it (or a newer one); this one leaves its tables and rows"
                 " as they are")
    steps = []
    for m in MIGRATIONS:
        if m.version > found:
            m.apply(conn)
            set_meta(conn, VERSION_KEY, str(m.version))
            steps.append(m.version)
    return Upgrade(found=found, now=max(found, CURRENT_VERSION), steps=tuple(steps))
