"""The reads of open holds and of a period's full verdict rows, for reminders and the digest (read-only)."""

from __future__ import annotations

import sqlite3

from monitor.state import dispositions, history
from monitor.state.dispositions import DispositionRow
from monitor.state.verdicts import _COLUMNS as VERDICT_COLUMNS
from monitor.state.verdicts import VerdictRow

DISPOSABLE = ("hold", "review")


def open_hold_rows(conn: sqlite3.Connection) -> list[VerdictRow]:
    """Each lot's latest verdict when it is a hold or review with no disposition of that verdict, in the
    order decided (a disposition of an earlier verdict does not dispose of a later hold)."""
    rows = [r for r in history.latest_verdicts(conn) if r.verdict in DISPOSABLE]
    disposed = dispositions.for_verdicts(conn, [r.id for r in rows]) if rows else {}
    return [r for r in rows if r.id not in disposed]


def verdicts_between(conn: sqlite3.Connection, start_iso: str, end_iso: str) -> list[VerdictRow]:
    """Full verdict rows with ``start_iso <= decided_at < end_iso`` compared as text (loose bounds: callers
    parse ``decided_at`` and filter exactly), in the order stored."""
    return [VerdictRow(*r) for r in conn.execute(
        f"SELECT id, {VERDICT_COLUMNS} FROM verdicts WHERE decided_at >= ? AND decided_at < ? ORDER BY id",
        (start_iso, end_iso))]


def dispositions_of(conn: sqlite3.Connection, verdict_ids: list[int]) -> dict[int, DispositionRow]:
    """The latest disposition of each of ``verdict_ids`` that has one."""
    return dispositions.for_verdicts(conn, verdict_ids) if verdict_ids else {}
