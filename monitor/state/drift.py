"""The drift repository: every SQL statement on drift_tracks, drift_lots and drift_signals.

A track row holds one chart's state as JSON (``monitor.drift.Track.to_json()``) and is replaced as lots
close; a lot taken by a chart is recorded once (so a lot judged again adds nothing twice); signals are only
added. Functions take the open transaction's connection and never commit.
"""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Mapping
from typing import Any, NamedTuple

from monitor.state.database import inserted_id


class SignalRow(NamedTuple):
    """One stored drift signal."""

    id: int
    at: str
    line: str
    product: str
    head: str
    lot: str
    method: str
    direction: str
    statistic: float
    limit: float
    rule: str
    rule_version: str
    data: dict[str, Any]


def track(conn: sqlite3.Connection, line: str, product: str, head: str) -> dict[str, Any] | None:
    """The stored track of (line, product, head) as its JSON object, or None."""
    row = conn.execute("SELECT track_json FROM drift_tracks WHERE line = ? AND product = ? AND head = ?",
                       (line, product, head)).fetchone()
    if row is None:
        return None
    value = json.loads(row[0])
    return value if isinstance(value, dict) else None


def put_track(conn: sqlite3.Connection, line: str, product: str, head: str, track_json: Mapping[str, Any],
              at: str) -> None:
    """Store (replace) the track of (line, product, head)."""
    conn.execute("INSERT INTO drift_tracks(line, product, head, track_json, updated_at) VALUES (?, ?, ?, ?, ?) "
                 "ON CONFLICT(line, product, head) DO UPDATE SET track_json = excluded.track_json, "
                 "updated_at = excluded.updated_at",
                 (line, product, head, json.dumps(track_json, sort_keys=True, allow_nan=False), at))


def take_lot(conn: sqlite3.Connection, *, line: str, product: str, head: str, lot: str, verdict_id: int,
             z: float, at: str) -> bool:
    """Record that the chart of (line, product, head) took ``lot``; False when it had taken it already."""
    cur = conn.execute("INSERT OR IGNORE INTO drift_lots(line, product, head, lot, verdict_id, z, at) "
                       "VALUES (?, ?, ?, ?, ?, ?, ?)", (line, product, head, lot, verdict_id, z, at))
    return cur.rowcount == 1


def add_signal(conn: sqlite3.Connection, *, at: str, line: str, product: str, head: str, lot: str, method: str,
               direction: str, statistic: float, limit: float, rule: str, rule_version: str,
               data: Mapping[str, Any]) -> int:
    """Store one signal; returns its id."""
    cur = conn.execute(
        "INSERT INTO drift_signals(at, line, product, head, lot, method, direction, statistic, limit_value, rule, "
        "rule_version, data_json) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        (at, line, product, head, lot, method, direction, statistic, limit, rule, rule_version,
         json.dumps(data, sort_keys=True, allow_nan=False)))
    return inserted_id(cur)


def signals(conn: sqlite3.Connection, *, since: str | None = None, until: str | None = None,
            line: str | None = None, product: str | None = None) -> list[SignalRow]:
    """Stored signals, oldest first; ``since`` inclusive, ``until`` exclusive (ISO UTC text)."""
    where, args = [], []
    for column, op, value in (("at", ">=", since), ("at", "<", until), ("line", "=", line),
                              ("product", "=", product)):
        if value is not None:
            where.append(f"{column} {op} ?")
            args.append(value)
    sql = ("SELECT id, at, line, product, head, lot, method, direction, statistic, limit_value, rule, rule_version, "
           "data_json FROM drift_signals" + (" WHERE " + " AND ".join(where) if where else "") + " ORDER BY id")
    out = []
    for r in conn.execute(sql, args):
        out.append(SignalRow(int(r[0]), str(r[1]), str(r[2]), str(r[3]), str(r[4]), str(r[5]), str(r[6]), str(r[7]),
                             float(r[8]), float(r[9]), str(r[10]), str(r[11]), json.loads(r[12])))
    return out
