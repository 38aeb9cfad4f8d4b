"""The verdicts repository: every SQL statement on the verdicts table (one row per lot judged, never changed)."""

from __future__ import annotations

import sqlite3
from typing import NamedTuple

from monitor.state.database import inserted_id


class NewVerdict(NamedTuple):
    """A verdict row to store; ``payload`` is the JSON text of ``Verdict.to_json()``."""

    decided_at: str
    line: str
    product: str
    lot: str
    rule: str
    rule_version: str
    rule_hash: str
    verdict: str
    n: int
    mean: float | None
    target: float | None
    unit: str
    payload: str
    lot_id: int | None = None
    summary_id: int | None = None
    close_reason: str | None = None
    lot_rows: int | None = None


class VerdictRow(NamedTuple):
    """A stored verdict row."""

    id: int
    decided_at: str
    line: str
    product: str
    lot: str
    rule: str
    rule_version: str
    rule_hash: str
    verdict: str
    n: int
    mean: float | None
    target: float | None
    unit: str
    payload: str
    lot_id: int | None
    summary_id: int | None
    close_reason: str | None
    lot_rows: int | None


class LatestVerdict(NamedTuple):
    """What a lot's latest verdict says for judging it again (``lot_rows`` None: stored before it was kept)."""

    id: int
    verdict: str
    decided_at: str
    rule: str
    rule_version: str
    n: int
    payload: str
    lot_rows: int | None


class DecidedVerdict(NamedTuple):
    """A verdict as the digest counts it; ``screen`` is the average-quantity screen's outcome "met" /
    "not met" / "undecided", None when the rule has none."""

    decided_at: str
    line: str
    product: str
    lot: str
    verdict: str
    mean: float | None
    target: float | None
    unit: str
    screen: str | None


class ListedVerdict(NamedTuple):
    """A verdict as a listing shows it."""

    line: str
    product: str
    lot: str
    n: int
    mean: float | None
    target: float | None
    unit: str
    verdict: str
    payload: str


_COLUMNS = ("decided_at, line, product, lot, rule, rule_version, rule_hash, verdict, n, mean, target, unit,"
            " payload, lot_id, summary_id, close_reason, lot_rows")


def insert(conn: sqlite3.Connection, row: NewVerdict) -> int:
    """Store one verdict (inside the caller's write transaction); returns its id."""
    cur = conn.execute(f"INSERT INTO verdicts({_COLUMNS}) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)", tuple(row))
    return inserted_id(cur)


def latest_for_lot(conn: sqlite3.Connection, line: str, product: str, lot: str, lot_id: int) -> LatestVerdict | None:
    """The lot's latest stored verdict, or None when it was never judged (looked up by the indexed key)."""
    row = conn.execute("SELECT id, verdict, decided_at, rule, rule_version, n, payload, lot_rows FROM verdicts"
                       " WHERE line = ? AND product = ? AND lot = ? AND lot_id = ? ORDER BY id DESC LIMIT 1",
                       (line, product, lot, lot_id)).fetchone()
    return None if row is None else LatestVerdict(*row)


def decided_between(conn: sqlite3.Connection, start_iso: str, end_iso: str) -> list[DecidedVerdict]:
    """Verdicts with ``start_iso <= decided_at < end_iso`` compared as text (loose bounds: callers that need
    exact times parse ``decided_at`` and filter), in the order stored."""
    return [DecidedVerdict(*r) for r in conn.execute(
        "SELECT decided_at, line, product, lot, verdict, mean, target, unit, CASE"
        " WHEN json_type(payload, '$.average_quantity') IS NOT 'object' THEN NULL"
        " WHEN json_extract(payload, '$.average_quantity.passed') = 1 THEN 'met'"
        " WHEN json_extract(payload, '$.average_quantity.passed') = 0 THEN 'not met'"
        " ELSE 'undecided' END FROM verdicts WHERE decided_at >= ? AND decided_at < ? ORDER BY id",
        (start_iso, end_iso))]


def listing(conn: sqlite3.Connection) -> list[ListedVerdict]:
    """Every verdict (line, product, lot, n, mean, target, unit, verdict, payload), by line, product, then
    the order decided."""
    return [ListedVerdict(*r) for r in conn.execute(
        "SELECT line, product, lot, n, mean, target, unit, verdict, payload FROM verdicts"
        " ORDER BY line, product, id")]


def all_rows(conn: sqlite3.Connection) -> list[VerdictRow]:
    """Every stored verdict row in the order decided."""
    return [VerdictRow(*r) for r in conn.execute(f"SELECT id, {_COLUMNS} FROM verdicts ORDER BY id")]
