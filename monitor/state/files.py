"""The files repository: every SQL statement on the files table (each export taken, its state and archive move).

A file row goes processing -> done | rejected | duplicate; ``archived_path`` is chosen in the transaction
that settles it and ``archived_at`` is set once the move is done. Functions take the open transaction's
connection and never commit.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable
from typing import NamedTuple

from monitor.state import audit
from monitor.state.database import inserted_id


class LeftOver(NamedTuple):
    """A row for these bytes at this path whose move was never recorded."""

    id: int
    state: str
    archived_path: str | None


class DoneFile(NamedTuple):
    """The first done file with some content (a duplicate names it)."""

    id: int
    path: str
    processed_at: str | None
    archived_path: str | None


class EarlierVersion(NamedTuple):
    """The latest done file at a path with other content (a revision names it)."""

    id: int
    sha256: str
    processed_at: str | None


class RejectReason(NamedTuple):
    """What a quarantined file's reason file says."""

    reason: str | None
    sha256: str | None
    processed_at: str | None


class Unarchived(NamedTuple):
    """A file whose move is not recorded yet (start-up recovery)."""

    id: int
    path: str
    archived_path: str | None
    state: str
    sha256: str


class ProcessedFile(NamedTuple):
    """A settled file as the digest counts it."""

    state: str
    processed_at: str
    path: str
    reason: str | None


class TakenFile(NamedTuple):
    """A settled, archived file as it was when taken (size and mtime from the read), for the after-take check."""

    id: int
    path: str
    archived_path: str
    size: int
    mtime: float
    sha256: str
    processed_at: str
    state: str


class FileRow(NamedTuple):
    """A whole files row."""

    id: int
    sha256: str
    path: str
    size: int
    mtime: float
    first_seen_at: str
    state: str
    processed_at: str | None
    archived_path: str | None
    archived_at: str | None
    reason: str | None
    kind: str | None
    n_values: int
    n_bad_rows: int
    attempts: int
    duplicate_of: int | None
    revision_of: int | None


# --- reads -------------------------------------------------------------------------------------------------
def left_over(conn: sqlite3.Connection, sha256: str, path: str) -> LeftOver | None:
    """The newest row of these bytes at this path not yet recorded as moved, if any."""
    row = conn.execute("SELECT id, state, archived_path FROM files WHERE sha256 = ? AND path = ?"
                       " AND archived_at IS NULL ORDER BY id DESC LIMIT 1", (sha256, path)).fetchone()
    return None if row is None else LeftOver(*row)


def first_done(conn: sqlite3.Connection, sha256: str) -> DoneFile | None:
    """The first file with this content that was taken (done), if any."""
    row = conn.execute("SELECT id, path, processed_at, archived_path FROM files WHERE sha256 = ?"
                       " AND state = 'done' ORDER BY id LIMIT 1", (sha256,)).fetchone()
    return None if row is None else DoneFile(*row)


def earlier_version(conn: sqlite3.Connection, path: str, sha256: str) -> EarlierVersion | None:
    """The latest done file at ``path`` whose content differs from ``sha256``, if any."""
    row = conn.execute("SELECT id, sha256, processed_at FROM files WHERE path = ? AND state = 'done'"
                       " AND sha256 != ? ORDER BY id DESC LIMIT 1", (path, sha256)).fetchone()
    return None if row is None else EarlierVersion(*row)


def is_planned(conn: sqlite3.Connection, archived_path: str) -> bool:
    """True when some file is (or will be) archived at ``archived_path``."""
    return conn.execute("SELECT 1 FROM files WHERE archived_path = ? LIMIT 1", (archived_path,)).fetchone() is not None


def reject_reason(conn: sqlite3.Connection, file_id: int) -> RejectReason:
    """The reason, content hash and time a file was settled (for its quarantine reason file)."""
    row = conn.execute("SELECT reason, sha256, processed_at FROM files WHERE id=?", (file_id,)).fetchone()
    return RejectReason(None, None, None) if row is None else RejectReason(*row)


def unarchived(conn: sqlite3.Connection) -> list[Unarchived]:
    """Files whose move is not recorded yet, oldest first."""
    return [Unarchived(*r) for r in conn.execute("SELECT id, path, archived_path, state, sha256 FROM files"
                                                 " WHERE archived_at IS NULL ORDER BY id")]


def taken_since(conn: sqlite3.Connection, since_iso: str, stop_iso: str, event: str) -> list[TakenFile]:
    """Done or duplicate files archived and processed from ``since_iso`` on that have no audit record ``event``
    (the after-take check's list: a change is recorded once), oldest first.

    The files table has no index on ``processed_at``; ids grow with processing, so rows are read newest first
    and the read stops at the first row processed before ``stop_iso`` (some slack before ``since_iso``)."""
    out: list[TakenFile] = []
    cur = conn.execute("SELECT id, path, archived_path, size, mtime, sha256, processed_at, state, archived_at"
                       " FROM files ORDER BY id DESC")
    for row in cur:
        processed_at = row[6]
        if processed_at is not None and processed_at < stop_iso:
            break
        if (row[7] in ("done", "duplicate") and row[8] is not None and row[2] is not None
                and processed_at is not None and processed_at >= since_iso):
            out.append(TakenFile(*row[:8]))
    cur.close()
    if not out:
        return out
    recorded = audit.file_ids_since(conn, event, stop_iso)
    return [t for t in reversed(out) if t.id not in recorded]


def processed_since(conn: sqlite3.Connection, since_iso: str) -> list[ProcessedFile]:
    """Files (state, processed_at, path, reason) processed from ``since_iso`` on (a string bound), oldest first."""
    return [ProcessedFile(*r) for r in conn.execute(
        "SELECT state, processed_at, path, reason FROM files WHERE processed_at >= ?"
        " ORDER BY processed_at", (since_iso,))]


def get(conn: sqlite3.Connection, file_id: int) -> FileRow | None:
    """The whole row of file ``file_id``."""
    row = conn.execute("SELECT id, sha256, path, size, mtime, first_seen_at, state, processed_at, archived_path,"
                       " archived_at, reason, kind, n_values, n_bad_rows, attempts, duplicate_of, revision_of"
                       " FROM files WHERE id = ?", (file_id,)).fetchone()
    return None if row is None else FileRow(*row)


# --- writes ------------------------------------------------------------------------------------------------
def insert(conn: sqlite3.Connection, *, sha256: str, path: str, size: int, mtime: float, first_seen_at: str,
           state: str) -> int:
    """A new file row in ``state`` ('processing' or 'duplicate'); returns its id."""
    cur = conn.execute("INSERT INTO files(sha256, path, size, mtime, first_seen_at, state) VALUES (?,?,?,?,?,?)",
                       (sha256, path, size, mtime, first_seen_at, state))
    return inserted_id(cur)


def mark_duplicate(conn: sqlite3.Connection, file_id: int, *, at: str, archived_path: str, reason: str,
                   duplicate_of: int) -> None:
    conn.execute("UPDATE files SET state='duplicate', processed_at=?, archived_path=?, reason=?, duplicate_of=?"
                 " WHERE id=?", (at, archived_path, reason, duplicate_of, file_id))


def set_archived_path(conn: sqlite3.Connection, file_id: int, archived_path: str) -> None:
    conn.execute("UPDATE files SET archived_path=? WHERE id=?", (archived_path, file_id))


def set_revision_of(conn: sqlite3.Connection, file_id: int, earlier_id: int) -> None:
    conn.execute("UPDATE files SET revision_of = ? WHERE id = ?", (earlier_id, file_id))


def mark_done(conn: sqlite3.Connection, file_id: int, *, at: str, archived_path: str, kind: str, n_values: int,
              n_bad_rows: int) -> None:
    conn.execute("UPDATE files SET state='done', processed_at=?, archived_path=?, kind=?, n_values=?,"
                 " n_bad_rows=? WHERE id=?", (at, archived_path, kind, n_values, n_bad_rows, file_id))


def mark_rejected(conn: sqlite3.Connection, file_id: int | None, *, at: str, archived_path: str,
                  reason: str) -> None:
    conn.execute("UPDATE files SET state='rejected', processed_at=?, archived_path=?, reason=? WHERE id=?",
                 (at, archived_path, reason, file_id))


def mark_abandoned(conn: sqlite3.Connection, file_id: int, *, at: str, reason: str) -> None:
    """A 'processing' row whose file vanished or changed: rejected, with nothing left to move."""
    conn.execute("UPDATE files SET state='rejected', processed_at=?, archived_at=?, reason=? WHERE id=?",
                 (at, at, reason, file_id))


def record_moves(conn: sqlite3.Connection, moves: Iterable[tuple[str, str, int]]) -> None:
    """Record done moves, each (archived_at, archived_path, file id)."""
    conn.executemany("UPDATE files SET archived_at=?, archived_path=? WHERE id=?", moves)


def set_archived_at(conn: sqlite3.Connection, file_id: int, at: str) -> None:
    """Record that the file needs no (further) move."""
    conn.execute("UPDATE files SET archived_at=? WHERE id=?", (at, file_id))


def count_attempt(conn: sqlite3.Connection, file_id: int) -> int:
    """One more start-up found the file still 'processing'; returns its attempts so far."""
    conn.execute("UPDATE files SET attempts = attempts + 1 WHERE id = ?", (file_id,))
    return int(conn.execute("SELECT attempts FROM files WHERE id = ?", (file_id,)).fetchone()[0])
