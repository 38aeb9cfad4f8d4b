"""The history repository: the reads of a lot's record (latest verdicts, a lot's verdicts, files and audit).

Read-only: every function takes an open connection (a read transaction or a write) and never writes.
"""

from __future__ import annotations

import sqlite3
from typing import NamedTuple

from monitor.state import audit
from monitor.state.database import where_equal
from monitor.state.verdicts import _COLUMNS as VERDICT_COLUMNS
from monitor.state.verdicts import VerdictRow


class LotFile(NamedTuple):
    """A file that gave rows to a lot: where it was taken from, where it lies now, and how many rows."""

    file_id: int
    path: str
    archived_path: str | None
    sha256: str
    processed_at: str | None
    rows: int


def latest_verdicts(conn: sqlite3.Connection, *, line: str | None = None, product: str | None = None
                    ) -> list[VerdictRow]:
    """Each lot's latest verdict (highest id per line, product, lot), optionally of one line / product, in
    the order decided."""
    cond, args = where_equal(line=line, product=product)
    sql = (f"SELECT id, {VERDICT_COLUMNS} FROM verdicts WHERE id IN (SELECT max(id) FROM verdicts{cond}"
           " GROUP BY line, product, lot) ORDER BY id")
    return [VerdictRow(*r) for r in conn.execute(sql, args)]


def verdicts_of_lot(conn: sqlite3.Connection, line: str, product: str, lot: str) -> list[VerdictRow]:
    """Every verdict of the lot, oldest first."""
    return [VerdictRow(*r) for r in conn.execute(
        f"SELECT id, {VERDICT_COLUMNS} FROM verdicts WHERE line = ? AND product = ? AND lot = ? ORDER BY id",
        (line, product, lot))]


def files_of_lot(conn: sqlite3.Connection, line: str, product: str, lot: str) -> list[LotFile]:
    """The files whose rows (values or a summary record) made the lot, in the order their rows arrived."""
    values = conn.execute(
        "SELECT f.id, f.path, f.archived_path, f.sha256, f.processed_at, count(*) FROM lot_values v"
        " JOIN files f ON f.id = v.file_id WHERE v.line = ? AND v.product = ? AND v.lot = ?"
        " GROUP BY f.id ORDER BY min(v.seq)", (line, product, lot)).fetchall()
    summaries = conn.execute(
        "SELECT f.id, f.path, f.archived_path, f.sha256, f.processed_at, count(*) FROM lot_summaries s"
        " JOIN files f ON f.id = s.file_id WHERE s.line = ? AND s.product = ? AND s.lot = ?"
        " GROUP BY f.id ORDER BY min(s.id)", (line, product, lot)).fetchall()
    return [LotFile(*r) for r in [*values, *summaries]]


def audit_of_lot(conn: sqlite3.Connection, line: str, product: str, lot: str) -> list[audit.AuditRecord]:
    """The audit records naming the lot, plus those of the files that gave it rows, in the order written."""
    file_ids = [f.file_id for f in files_of_lot(conn, line, product, lot)]
    marks = ",".join("?" * len(file_ids))
    extra = f" OR (file_id IN ({marks}) AND line = '' AND lot = '')" if file_ids else ""
    return [audit.AuditRecord(*r) for r in conn.execute(
        "SELECT id, at, event, file_id, line, product, lot, detail FROM audit"
        f" WHERE (line = ? AND product = ? AND lot = ?){extra} ORDER BY id", (line, product, lot, *file_ids))]
