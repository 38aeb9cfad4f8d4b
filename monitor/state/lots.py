"""The lots repository: every SQL statement on lots, lot_values and lot_summaries.

A lot (line, product, lot) is open while values arrive and closed when judged; late values reopen it.
Its values are stored in arrival order (``seq`` from 1), a row without a usable value in its place with
``excluded`` naming why. A lot summary is one exported (n, mean, sd) record. Functions take the open
transaction's connection and never commit. The two reads naming a lot's files join ``files`` for the path
where each file now lies.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable, Iterator
from typing import Any, NamedTuple

from monitor.state.database import inserted_id


class LotName(NamedTuple):
    line: str
    product: str
    lot: str


class LotState(NamedTuple):
    """A lot's id, state and number of stored rows."""

    id: int
    state: str
    n: int


class OpenLot(NamedTuple):
    """An open lot and the time (unix seconds) of its newest value."""

    line: str
    product: str
    lot: str
    last_value_ts: float


class LotRow(NamedTuple):
    """A whole lots row."""

    id: int
    line: str
    product: str
    lot: str
    state: str
    opened_at: str
    last_value_at: str
    last_value_ts: float
    closed_at: str | None
    close_reason: str | None
    n: int
    times_closed: int
    late_values: int


class ValueGroup(NamedTuple):
    """Rows of a lot sharing unit, density and exclusion reason; ``first`` is the lowest seq."""

    unit: str
    density: float | None
    excluded: str
    first: int
    rows: int


class FileShare(NamedTuple):
    """A file (where it lies now) and how many of a lot's rows came from it."""

    path: str
    rows: int


class ValueRow(NamedTuple):
    """One stored value row (``lot_values``), as ``values_of`` gives it back."""

    seq: int
    value: float | None
    unit: str
    density: float | None
    head: str
    timestamp: str | None
    file_id: int
    source_line: int | None
    excluded: str


class SummaryRow(NamedTuple):
    """One stored lot summary record."""

    id: int
    file_id: int
    source_line: int | None
    line: str
    product: str
    lot: str
    n: int
    mean: float | None
    sd: float | None
    unit: str
    density: float | None
    timestamp: str | None
    problem: str


# --- lots --------------------------------------------------------------------------------------------------
def open_lot_names(conn: sqlite3.Connection) -> list[LotName]:
    """The open lots, oldest first."""
    return [LotName(*r) for r in conn.execute("SELECT line, product, lot FROM lots WHERE state = 'open' ORDER BY id")]


def open_lots(conn: sqlite3.Connection) -> list[OpenLot]:
    """The open lots with the time of their newest value, oldest first (the idle check)."""
    return [OpenLot(*r) for r in conn.execute(
        "SELECT line, product, lot, last_value_ts FROM lots WHERE state='open' ORDER BY id")]


def find(conn: sqlite3.Connection, line: str, product: str, lot: str) -> LotState | None:
    """The lot's id, state and rows, or None when it was never stored."""
    row = conn.execute("SELECT id, state, n FROM lots WHERE line=? AND product=? AND lot=?",
                       (line, product, lot)).fetchone()
    return None if row is None else LotState(int(row[0]), str(row[1]), int(row[2]))


def find_open(conn: sqlite3.Connection, line: str, product: str, lot: str) -> LotState | None:
    """The lot if it is open, else None."""
    row = conn.execute("SELECT id, state, n FROM lots WHERE line=? AND product=? AND lot=? AND state='open'",
                       (line, product, lot)).fetchone()
    return None if row is None else LotState(int(row[0]), str(row[1]), int(row[2]))


def get(conn: sqlite3.Connection, lot_id: int) -> LotRow | None:
    """The whole row of lot ``lot_id``."""
    row = conn.execute("SELECT id, line, product, lot, state, opened_at, last_value_at, last_value_ts, closed_at,"
                       " close_reason, n, times_closed, late_values FROM lots WHERE id = ?", (lot_id,)).fetchone()
    return None if row is None else LotRow(*row)


def insert_open(conn: sqlite3.Connection, line: str, product: str, lot: str, *, at: str, ts: float,
                n: int) -> int:
    """A new open lot with ``n`` rows arriving at ``at`` (``ts`` unix seconds); returns its id."""
    cur = conn.execute("INSERT INTO lots(line, product, lot, state, opened_at, last_value_at, last_value_ts, n)"
                       " VALUES (?,?,?,'open',?,?,?,?)", (line, product, lot, at, at, ts, n))
    return inserted_id(cur)


def reopen(conn: sqlite3.Connection, lot_id: int, late_values: int) -> None:
    """A closed lot is open again; ``late_values`` more values arrived after it closed."""
    conn.execute("UPDATE lots SET state='open', closed_at=NULL, close_reason=NULL, late_values=late_values+?"
                 " WHERE id=?", (late_values, lot_id))


def add_rows(conn: sqlite3.Connection, lot_id: int, count: int, *, at: str, ts: float) -> None:
    """``count`` more rows arrived at ``at``."""
    conn.execute("UPDATE lots SET n = n + ?, last_value_at = ?, last_value_ts = ? WHERE id = ?",
                 (count, at, ts, lot_id))


def close(conn: sqlite3.Connection, lot_id: int, *, at: str, reason: str) -> None:
    conn.execute("UPDATE lots SET state='closed', closed_at=?, close_reason=?, times_closed=times_closed+1"
                 " WHERE id=?", (at, reason, lot_id))


# --- lot_values --------------------------------------------------------------------------------------------
INSERT_VALUE = ("INSERT INTO lot_values(lot_id, line, product, lot, seq, value, unit, density, head, timestamp,"
                " file_id, source_line, excluded) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)")

ValueInsert = tuple[int, str, str, str, int, float | None, str, float | None, str, str | None, int, int | None, str]


def insert_values(conn: sqlite3.Connection, rows: Iterable[ValueInsert]) -> None:
    """Store value rows, each (lot_id, line, product, lot, seq, value, unit, density, head, timestamp,
    file_id, source_line, excluded), in one statement run per row."""
    conn.executemany(INSERT_VALUE, rows)


def value_groups(conn: sqlite3.Connection, lot_id: int) -> list[ValueGroup]:
    """The lot's rows grouped by (unit, density, excluded), in order of each group's first row."""
    return [ValueGroup(*r) for r in conn.execute(
        "SELECT unit, density, excluded, min(seq) AS first, count(*) FROM lot_values"
        " WHERE lot_id = ? GROUP BY unit, density, excluded ORDER BY first", (lot_id,))]


def file_paths(conn: sqlite3.Connection, lot_id: int) -> tuple[str, ...]:
    """The files the lot's rows came from, where each lies now (archive path), in order of first row."""
    return tuple(str(r[0]) for r in conn.execute(
        "SELECT COALESCE(f.archived_path, f.path) FROM lot_values v JOIN files f ON f.id = v.file_id"
        " WHERE v.lot_id = ? GROUP BY v.file_id ORDER BY min(v.seq)", (lot_id,)))


def files_after(conn: sqlite3.Connection, lot_id: int, seq: int) -> list[FileShare]:
    """The files of the lot's rows after ``seq`` (where each lies now) with their row counts, in order."""
    return [FileShare(str(p), int(c)) for p, c in conn.execute(
        "SELECT COALESCE(f.archived_path, f.path), count(*) FROM lot_values v JOIN files f ON f.id = v.file_id"
        " WHERE v.lot_id = ? AND v.seq > ? GROUP BY v.file_id ORDER BY min(v.seq)", (lot_id, seq))]


def value_chunks(conn: sqlite3.Connection, lot_id: int, *, with_units: bool,
                 chunk: int) -> Iterator[list[tuple[Any, ...]]]:
    """The lot's (value, head) rows in arrival order, ``chunk`` rows at a time; with ``with_units``
    (value, head, unit, density). The rows are fetched lazily: keep the transaction open while iterating."""
    cols = "value, head, unit, density" if with_units else "value, head"
    cur = conn.execute(f"SELECT {cols} FROM lot_values WHERE lot_id = ? ORDER BY seq", (lot_id,))
    while True:
        rows = cur.fetchmany(chunk)
        if not rows:
            return
        yield rows


def values_of(conn: sqlite3.Connection, lot_id: int) -> list[ValueRow]:
    """Every stored row of the lot in arrival order."""
    return [ValueRow(*r) for r in conn.execute(
        "SELECT seq, value, unit, density, head, timestamp, file_id, source_line, excluded FROM lot_values"
        " WHERE lot_id = ? ORDER BY seq", (lot_id,))]


# --- lot_summaries -----------------------------------------------------------------------------------------
def insert_summary(conn: sqlite3.Connection, *, file_id: int, source_line: int | None, line: str, product: str,
                   lot: str, n: int, mean: float | None, sd: float | None, unit: str, density: float | None,
                   timestamp: str | None, problem: str) -> int:
    """Store one lot summary record; returns its id."""
    cur = conn.execute("INSERT INTO lot_summaries(file_id, source_line, line, product, lot, n, mean, sd, unit,"
                       " density, timestamp, problem) VALUES (?,?,?,?,?,?,?,?,?,?,?,?)",
                       (file_id, source_line, line, product, lot, n, mean, sd, unit, density, timestamp, problem))
    return inserted_id(cur)


def summaries(conn: sqlite3.Connection) -> list[SummaryRow]:
    """Every stored lot summary record, in the order stored."""
    return [SummaryRow(*r) for r in conn.execute(
        "SELECT id, file_id, source_line, line, product, lot, n, mean, sd, unit, density, timestamp, problem"
        " FROM lot_summaries ORDER BY id")]
