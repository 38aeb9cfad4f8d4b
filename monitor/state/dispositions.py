"""The dispositions repository: every SQL statement on dispositions (what people decided about a held lot).

Rows are only ever added: a lot's dispositions are never changed or deleted, and the latest one (highest id)
is the one shown. Functions take the open transaction's connection and never commit.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable
from typing import NamedTuple

from monitor.state.database import inserted_id

ACTIONS = ("release", "rework", "scrap")


class DispositionRow(NamedTuple):
    """One stored disposition."""

    id: int
    at: str
    line: str
    product: str
    lot: str
    verdict_id: int
    action: str
    by: str
    note: str


_COLUMNS = "id, at, line, product, lot, verdict_id, action, by_name, note"


def insert(conn: sqlite3.Connection, *, at: str, line: str, product: str, lot: str, verdict_id: int, action: str,
           by: str, note: str) -> int:
    """Store one disposition (inside the caller's write transaction); returns its id."""
    if action not in ACTIONS:
        raise ValueError(f"disposition action must be one of {', '.join(ACTIONS)}, got {action!r}")
    cur = conn.execute("INSERT INTO dispositions(at, line, product, lot, verdict_id, action, by_name, note)"
                       " VALUES (?,?,?,?,?,?,?,?)", (at, line, product, lot, verdict_id, action, by, note))
    return inserted_id(cur)


def of_lot(conn: sqlite3.Connection, line: str, product: str, lot: str) -> list[DispositionRow]:
    """The lot's dispositions, oldest first."""
    return [DispositionRow(*r) for r in conn.execute(
        f"SELECT {_COLUMNS} FROM dispositions WHERE line = ? AND product = ? AND lot = ? ORDER BY id",
        (line, product, lot))]


def latest_per_lot(conn: sqlite3.Connection) -> dict[tuple[str, str, str], DispositionRow]:
    """Every lot's latest disposition, by (line, product, lot)."""
    out: dict[tuple[str, str, str], DispositionRow] = {}
    for r in conn.execute(f"SELECT {_COLUMNS} FROM dispositions ORDER BY id"):
        row = DispositionRow(*r)
        out[(row.line, row.product, row.lot)] = row
    return out


def for_verdicts(conn: sqlite3.Connection, verdict_ids: Iterable[int]) -> dict[int, DispositionRow]:
    """The latest disposition of each of ``verdict_ids`` that has one."""
    wanted = set(verdict_ids)
    return {k: v for k, v in ((row.verdict_id, row) for row in latest_per_lot(conn).values()) if k in wanted}
