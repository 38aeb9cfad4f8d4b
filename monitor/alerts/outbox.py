"""The outbox: alerts stored in the state database, one row per (alert, channel), drained by senders.

``enqueue`` runs inside the caller's open write transaction (it never commits), so an alert is stored
if and only if the verdict that raised it is. Senders then claim, send and mark rows.
"""

from __future__ import annotations

import sqlite3
from typing import Iterable

from monitor.alerts.alert import Alert

SCHEMA = """
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
    state           TEXT NOT NULL DEFAULT 'pending',  -- pending | sent | dead
    attempts        INTEGER NOT NULL DEFAULT 0,
    next_attempt_at REAL NOT NULL DEFAULT 0,          -- unix seconds
    sent_at         TEXT,
    last_error      TEXT,
    PRIMARY KEY (alert_id, channel)
);
CREATE INDEX IF NOT EXISTS deliveries_pending ON deliveries(channel, state, next_attempt_at);
"""


def ensure_schema(conn: sqlite3.Connection) -> None:
    """Create the outbox tables if missing (idempotent; safe inside or outside a transaction)."""
    for stmt in SCHEMA.split(";"):
        if stmt.strip():
            conn.execute(stmt)


def enqueue(conn: sqlite3.Connection, alert: Alert, channels: Iterable[str]) -> bool:
    """Store ``alert`` for each channel unless its dedup key is already stored. Never commits.

    Returns True if the alert is new.
    """
    cur = conn.execute(
        "INSERT OR IGNORE INTO alerts(dedup_key, kind, created_at, line, product, lot, payload)"
        " VALUES (?,?,?,?,?,?,?)",
        (alert.dedup_key, alert.kind, alert.created_at, alert.line, alert.product, alert.lot, alert.dumps()),
    )
    if cur.rowcount == 0:
        return False
    alert_id = cur.lastrowid
    conn.executemany("INSERT OR IGNORE INTO deliveries(alert_id, channel) VALUES (?, ?)",
                     [(alert_id, ch) for ch in channels])
    return True


def pending(conn: sqlite3.Connection, channel: str, now: float, limit: int = 100) -> list[tuple[int, Alert]]:
    """Alerts due on ``channel`` in creation order, as (alert_id, Alert)."""
    import json

    rows = conn.execute(
        "SELECT a.id, a.payload FROM deliveries d JOIN alerts a ON a.id = d.alert_id"
        " WHERE d.channel = ? AND d.state = 'pending' AND d.next_attempt_at <= ?"
        " ORDER BY a.id LIMIT ?",
        (channel, now, limit),
    ).fetchall()
    return [(rid, Alert.from_json(json.loads(payload))) for rid, payload in rows]


def mark_sent(conn: sqlite3.Connection, alert_id: int, channel: str, sent_at: str) -> None:
    conn.execute("UPDATE deliveries SET state='sent', sent_at=?, attempts=attempts+1"
                 " WHERE alert_id=? AND channel=?", (sent_at, alert_id, channel))


def mark_retry(conn: sqlite3.Connection, alert_id: int, channel: str, next_at: float, error: str) -> None:
    conn.execute("UPDATE deliveries SET attempts=attempts+1, next_attempt_at=?, last_error=?"
                 " WHERE alert_id=? AND channel=?", (next_at, error[:500], alert_id, channel))


def mark_dead(conn: sqlite3.Connection, alert_id: int, channel: str, error: str) -> None:
    conn.execute("UPDATE deliveries SET state='dead', attempts=attempts+1, last_error=?"
                 " WHERE alert_id=? AND channel=?", (error[:500], alert_id, channel))


# --- sender side -----------------------------------------------------------------------------------------
# Delivery states: pending -> sent | dead | suppressed ("suppressed": a repeat hold inside the reminder
# interval; the row stays, with the reason in last_error). Nothing is ever deleted.

SENDER_SCHEMA = """
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


def ensure_sender_schema(conn: sqlite3.Connection) -> None:
    """Create the outbox tables plus the senders' own bookkeeping tables (idempotent)."""
    ensure_schema(conn)
    for stmt in SENDER_SCHEMA.split(";"):
        if stmt.strip():
            conn.execute(stmt)


def due_rows(conn: sqlite3.Connection, channel: str, limit: int = 1000) -> list[tuple[int, Alert, int, float]]:
    """All pending rows of ``channel`` in creation order as (alert_id, Alert, attempts, next_attempt_at)."""
    import json

    rows = conn.execute(
        "SELECT a.id, a.payload, d.attempts, d.next_attempt_at FROM deliveries d JOIN alerts a ON a.id = d.alert_id"
        " WHERE d.channel = ? AND d.state = 'pending' ORDER BY a.id LIMIT ?", (channel, limit)).fetchall()
    return [(rid, Alert.from_json(json.loads(payload)), att, nxt) for rid, payload, att, nxt in rows]


def mark_suppressed(conn: sqlite3.Connection, alert_id: int, channel: str, reason: str) -> None:
    conn.execute("UPDATE deliveries SET state='suppressed', last_error=? WHERE alert_id=? AND channel=?",
                 (reason[:500], alert_id, channel))


def delivery_counts(conn: sqlite3.Connection) -> dict[tuple[str, str], int]:
    """{(channel, state): rows} — for status output and tests."""
    return {(ch, st): n for ch, st, n in
            conn.execute("SELECT channel, state, COUNT(*) FROM deliveries GROUP BY channel, state")}
