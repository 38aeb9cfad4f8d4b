"""The audit repository: every SQL statement on the audit table (append-only records of what happened)."""

from __future__ import annotations

import json
import sqlite3
from typing import Any, NamedTuple


class AuditRecord(NamedTuple):
    """One stored audit record; ``detail`` is the JSON text as stored."""

    id: int
    at: str
    event: str
    file_id: int | None
    line: str
    product: str
    lot: str
    detail: str


def append(conn: sqlite3.Connection, at: str, event: str, *, file_id: int | None = None, line: str = "",
           product: str = "", lot: str = "", detail: dict[str, Any] | None = None) -> None:
    """Append one audit record (inside the caller's write transaction; never commits)."""
    conn.execute("INSERT INTO audit(at, event, file_id, line, product, lot, detail) VALUES (?,?,?,?,?,?,?)",
                 (at, event, file_id, line, product, lot,
                  json.dumps(detail or {}, sort_keys=True, ensure_ascii=False, default=str)))


def records(conn: sqlite3.Connection, event: str | None = None) -> list[AuditRecord]:
    """Every audit record (of ``event`` only, if given) in the order written."""
    sql = "SELECT id, at, event, file_id, line, product, lot, detail FROM audit"
    rows = (conn.execute(sql + " WHERE event = ? ORDER BY id", (event,)) if event is not None
            else conn.execute(sql + " ORDER BY id"))
    return [AuditRecord(*r) for r in rows]


def file_ids_since(conn: sqlite3.Connection, event: str, stop_iso: str) -> set[int]:
    """Files with an ``event`` record written at or after ``stop_iso``. The audit table is append-only and has
    no index on ``at``: it is read newest first and the read stops at the first record older than ``stop_iso``."""
    found: set[int] = set()
    cur = conn.execute("SELECT at, event, file_id FROM audit ORDER BY id DESC")
    for at, ev, file_id in cur:
        if at < stop_iso:
            break
        if ev == event and file_id is not None:
            found.add(int(file_id))
    cur.close()
    return found
