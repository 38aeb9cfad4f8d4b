"""The outbox repository: every SQL statement on alerts, deliveries, the e-mail bookkeeping and digest_runs.

The tables are created by ``monitor.state.schema`` (``Database.open``).

``enqueue`` runs inside the caller's open write transaction (it never commits), so an alert is stored
if and only if the change that raised it is. Delivery states: pending -> sent | dead | suppressed
("suppressed": a repeat hold inside the reminder interval; the reason is kept in last_error). An e-mail
message is recorded in ``email_batches`` before it is sent and finished with its alerts. Nothing is ever
deleted.
"""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Iterable
from dataclasses import dataclass

from monitor.alerts.alert import Alert
from monitor.state.database import connect as connect  # re-exported: each delivery thread opens one

ERROR_CHARS = 500


# --- producers -------------------------------------------------------------------------------------------
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


# --- senders ---------------------------------------------------------------------------------------------
def pending(conn: sqlite3.Connection, channel: str, now: float, limit: int = 100) -> list[tuple[int, Alert]]:
    """Alerts due on ``channel`` in creation order, as (alert_id, Alert)."""
    rows = conn.execute(
        "SELECT a.id, a.payload FROM deliveries d JOIN alerts a ON a.id = d.alert_id"
        " WHERE d.channel = ? AND d.state = 'pending' AND d.next_attempt_at <= ?"
        " ORDER BY a.id LIMIT ?",
        (channel, now, limit),
    ).fetchall()
    return [(rid, Alert.from_json(json.loads(payload))) for rid, payload in rows]


def due_rows(conn: sqlite3.Connection, channel: str, limit: int = 1000) -> list[tuple[int, Alert, int, float]]:
    """All pending rows of ``channel`` in creation order as (alert_id, Alert, attempts, next_attempt_at)."""
    rows = conn.execute(
        "SELECT a.id, a.payload, d.attempts, d.next_attempt_at FROM deliveries d JOIN alerts a ON a.id = d.alert_id"
        " WHERE d.channel = ? AND d.state = 'pending' ORDER BY a.id LIMIT ?", (channel, limit)).fetchall()
    return [(rid, Alert.from_json(json.loads(payload)), att, nxt) for rid, payload, att, nxt in rows]


def mark_sent(conn: sqlite3.Connection, alert_id: int, channel: str, sent_at: str, note: str | None = None) -> None:
    """The delivery is done (``note``: e.g. recipients the server refused while others got it)."""
    conn.execute("UPDATE deliveries SET state='sent', sent_at=?, attempts=attempts+1,"
                 " last_error=COALESCE(?, last_error) WHERE alert_id=? AND channel=?",
                 (sent_at, None if note is None else note[:ERROR_CHARS], alert_id, channel))


def mark_retry(conn: sqlite3.Connection, alert_id: int, channel: str, next_at: float, error: str) -> None:
    conn.execute("UPDATE deliveries SET attempts=attempts+1, next_attempt_at=?, last_error=?"
                 " WHERE alert_id=? AND channel=?", (next_at, error[:ERROR_CHARS], alert_id, channel))


def mark_dead(conn: sqlite3.Connection, alert_id: int, channel: str, error: str) -> None:
    conn.execute("UPDATE deliveries SET state='dead', attempts=attempts+1, last_error=?"
                 " WHERE alert_id=? AND channel=?", (error[:ERROR_CHARS], alert_id, channel))


def mark_suppressed(conn: sqlite3.Connection, alert_id: int, channel: str, reason: str) -> None:
    conn.execute("UPDATE deliveries SET state='suppressed', last_error=? WHERE alert_id=? AND channel=?",
                 (reason[:ERROR_CHARS], alert_id, channel))


def delivery_counts(conn: sqlite3.Connection) -> dict[tuple[str, str], int]:
    """{(channel, state): rows} — for status output and tests."""
    return {(ch, st): n for ch, st, n in
            conn.execute("SELECT channel, state, COUNT(*) FROM deliveries GROUP BY channel, state")}


# --- the e-mail channel's bookkeeping (pacing, reminders, sent messages) ---------------------------------
def record_email(conn: sqlite3.Connection, *, message_id: str, sent_at: float, recipients: tuple[str, ...],
                 alert_ids: list[int], folded: bool, held_lots: list[tuple[str, str, str]]) -> None:
    """Book one sent message: the message, each recipient's send and the held lots it told about."""
    conn.execute("INSERT INTO email_messages(message_id, sent_at, recipients, alert_ids, folded)"
                 " VALUES (?,?,?,?,?)", (message_id, sent_at, json.dumps(list(recipients)),
                                         json.dumps(alert_ids), int(folded)))
    conn.executemany("INSERT INTO email_recipient_sends(recipient, sent_at) VALUES (?,?)",
                     [(rc, sent_at) for rc in recipients])
    conn.executemany("INSERT INTO email_lot_notices(line, product, lot, notified_at) VALUES (?,?,?,?)",
                     [(ln, p, lot, sent_at) for ln, p, lot in held_lots])


@dataclass(frozen=True)
class EmailBatch:
    """One e-mail message as recorded before it was handed to the server (``email_batches``)."""

    id: int
    message_id: str
    planned_at: float
    recipients: tuple[str, ...]
    alert_ids: tuple[int, ...]
    folded: bool
    attempts: int


def record_batch(conn: sqlite3.Connection, *, message_id: str, planned_at: float, recipients: tuple[str, ...],
                 alert_ids: Iterable[int], folded: bool) -> int:
    """Record a message about to be sent (state 'sending'); returns its batch id. Never commits."""
    cur = conn.execute("INSERT INTO email_batches(message_id, planned_at, recipients, alert_ids, folded)"
                       " VALUES (?,?,?,?,?)", (message_id, planned_at, json.dumps(list(recipients)),
                                               json.dumps(list(alert_ids)), int(folded)))
    if cur.lastrowid is None:
        raise RuntimeError("email_batches: no row was inserted")
    return int(cur.lastrowid)


def unfinished_batches(conn: sqlite3.Connection) -> list[EmailBatch]:
    """The recorded messages still 'sending' (cut short by a crash, or waiting for a retry), oldest first."""
    rows = conn.execute("SELECT id, message_id, planned_at, recipients, alert_ids, folded, attempts"
                        " FROM email_batches WHERE state = 'sending' ORDER BY id").fetchall()
    return [EmailBatch(int(i), str(mid), float(at), tuple(json.loads(rc)), tuple(int(x) for x in json.loads(ids)),
                       bool(folded), int(att)) for i, mid, at, rc, ids, folded, att in rows]


def batch_attempted(conn: sqlite3.Connection, batch_id: int) -> None:
    """One more attempt at sending a recorded message (before it is handed to the server again)."""
    conn.execute("UPDATE email_batches SET attempts = attempts + 1 WHERE id = ? AND state = 'sending'", (batch_id,))


def finish_batch(conn: sqlite3.Connection, batch_id: int, state: str, finished_at: float, note: str = "") -> None:
    """A recorded message is settled: 'sent', 'failed' (given up) or 'dropped' (none of its alerts is still
    pending). Runs in the transaction that settles its alerts; never commits."""
    if state not in ("sent", "failed", "dropped"):
        raise ValueError(f"email batch state {state!r}: must be sent, failed or dropped")
    conn.execute("UPDATE email_batches SET state = ?, finished_at = ?, note = ? WHERE id = ? AND state = 'sending'",
                 (state, finished_at, note[:ERROR_CHARS] or None, batch_id))


def pending_among(conn: sqlite3.Connection, channel: str, alert_ids: Iterable[int]) -> set[int]:
    """The alerts among ``alert_ids`` whose delivery on ``channel`` is still pending."""
    ids = list(alert_ids)
    out: set[int] = set()
    for start in range(0, len(ids), 500):
        chunk = ids[start:start + 500]
        marks = ",".join("?" * len(chunk))
        out.update(int(r[0]) for r in conn.execute(
            f"SELECT alert_id FROM deliveries WHERE channel = ? AND state = 'pending' AND alert_id IN ({marks})",
            [channel, *chunk]))
    return out


def alerts_by_id(conn: sqlite3.Connection, alert_ids: Iterable[int]) -> dict[int, Alert]:
    """{alert_id: Alert} of the stored alerts among ``alert_ids``."""
    ids = list(alert_ids)
    out: dict[int, Alert] = {}
    for start in range(0, len(ids), 500):
        chunk = ids[start:start + 500]
        marks = ",".join("?" * len(chunk))
        for rid, payload in conn.execute(f"SELECT id, payload FROM alerts WHERE id IN ({marks})", chunk):
            out[int(rid)] = Alert.from_json(json.loads(payload))
    return out


def recipient_sends(conn: sqlite3.Connection, since: float) -> dict[str, list[float]]:
    """{recipient: [unix seconds of each message sent to them after ``since``]}."""
    out: dict[str, list[float]] = {}
    for rc, t in conn.execute("SELECT recipient, sent_at FROM email_recipient_sends WHERE sent_at > ?", (since,)):
        out.setdefault(rc, []).append(t)
    return out


def last_lot_notices(conn: sqlite3.Connection, since: float) -> dict[tuple[str, str, str], float]:
    """{(line, product, lot): latest hold notice time after ``since``}."""
    rows = conn.execute("SELECT line, product, lot, MAX(notified_at) FROM email_lot_notices WHERE notified_at > ?"
                        " GROUP BY line, product, lot", (since,))
    return {(ln, p, lot): t for ln, p, lot, t in rows}


# --- digest runs -----------------------------------------------------------------------------------------
def digest_run_exists(conn: sqlite3.Connection, due_at: str) -> bool:
    return conn.execute("SELECT 1 FROM digest_runs WHERE due_at = ?", (due_at,)).fetchone() is not None


def last_digest_end(conn: sqlite3.Connection) -> str | None:
    """The end of the period the latest digest covered (ISO UTC), None before the first digest."""
    row = conn.execute("SELECT MAX(period_end) FROM digest_runs").fetchone()
    return None if row is None or row[0] is None else str(row[0])


def record_digest_run(conn: sqlite3.Connection, *, due_at: str, period_start: str, period_end: str,
                      created_at: str, dedup_key: str) -> None:
    """Book the digest for ``due_at`` (in the transaction that enqueues its alert). Never commits."""
    conn.execute("INSERT INTO digest_runs(due_at, period_start, period_end, created_at, dedup_key)"
                 " VALUES (?,?,?,?,?)", (due_at, period_start, period_end, created_at, dedup_key))

