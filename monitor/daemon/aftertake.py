"""Files that change after they were taken: look again at an archived file and say what changed.

A writer that pauses longer than ``settle_seconds`` has its file taken early; it then goes on writing into
the archived file (a rename keeps the inode its handle points at). Those rows were never read. Each archived
file is looked at again (``lstat``: size and mtime against what was read when it was taken) for
``WATCH_SECONDS`` after it was taken; a change is recorded once and reported. lotwarden never writes to the
archived file and does not take the new rows itself: the alert says how to have them judged.
"""

from __future__ import annotations

import hashlib
import os
import stat
from dataclasses import dataclass
from typing import Any

from monitor.state.files import TakenFile

EVENT = "file-changed-after-take"
WATCH_SECONDS = 15 * 60.0          # how long after taking a file its archived copy is looked at again
MAX_READ_BYTES = 256 * 1024 * 1024  # read at most this much of a changed file (prefix hash, new lines)
_CHUNK = 1024 * 1024


@dataclass(frozen=True)
class ChangedFile:
    """An archived file whose size or content no longer is what was taken."""

    file_id: int
    path: str                  # where it was taken from
    archived_path: str         # where it lies (and grew)
    taken_at: str
    size_before: int
    size_after: int
    mtime_before: float
    mtime_after: float
    first_bytes_unchanged: bool  # the bytes that were taken are still the file's first bytes
    lines_added: int           # newline characters in the bytes past what was taken (0 if not appended)

    @property
    def bytes_added(self) -> int:
        return self.size_after - self.size_before

    @property
    def appended(self) -> bool:
        """Rows were appended: the taken bytes are unchanged and more follow."""
        return self.first_bytes_unchanged and self.bytes_added > 0

    def what_changed(self) -> str:
        """What changed, in words."""
        if self.appended:
            return (f"{self.bytes_added} bytes (about {self.lines_added} line(s)) were appended after it was taken"
                    f" ({self.size_before} -> {self.size_after} bytes)")
        if self.first_bytes_unchanged:
            return f"its modification time changed ({self.size_before} bytes, same content)"
        return (f"its content was rewritten after it was taken ({self.size_before} -> {self.size_after} bytes;"
                " the bytes that were taken are no longer its first bytes)")

    def message(self) -> str:
        """The operator's text: the file, what changed, that the new rows were not judged, what to do."""
        return (f"{self.archived_path} changed after lotwarden took it: {self.what_changed()}. Only the rows"
                f" present when it was taken ({self.size_before} bytes, at {self.taken_at}) were stored and"
                " judged; the new rows were not. To have them judged, put them in a new export (the header line"
                " and the new rows only) and drop that file in the drop folder; lotwarden does not change the"
                " archived file. The writer paused longer than settle_seconds, or wrote after renaming the file:"
                " a longer settle_seconds, or writing to a temporary name and renaming when done, avoids this.")

    def detail(self) -> dict[str, Any]:
        """The audit record's detail (and the alert's data)."""
        return {"file": os.path.basename(self.path), "path": self.path, "archived_path": self.archived_path,
                "taken_at": self.taken_at, "size_before": self.size_before, "size_after": self.size_after,
                "bytes_added": self.bytes_added, "lines_added": self.lines_added,
                "mtime_before": self.mtime_before, "mtime_after": self.mtime_after,
                "first_bytes_unchanged": self.first_bytes_unchanged, "rows_appended": self.appended,
                "new_rows_judged": False, "message": self.message()}


def signature(path: str) -> tuple[int, float, int] | None:
    """(size, mtime, mtime_ns) of the regular file at ``path`` (not following a link), or None."""
    try:
        st = os.lstat(path)
    except OSError:
        return None
    if not stat.S_ISREG(st.st_mode):
        return None
    return int(st.st_size), float(st.st_mtime), int(st.st_mtime_ns)


def look_again(taken: TakenFile) -> tuple[ChangedFile | None, tuple[int, int] | None]:
    """Compare the archived file with what was taken. Returns (the change, if any, worth reporting; the
    (size, mtime_ns) seen, or None when the file is not there or not a regular file).

    Unchanged size and mtime: nothing to read. Otherwise the first ``size_before`` bytes are hashed against
    the taken content's SHA-256; a new mtime over the same bytes is no change worth reporting."""
    sig = signature(taken.archived_path)
    if sig is None:
        return None, None
    size, mtime, mtime_ns = sig
    seen = (size, mtime_ns)
    if size == taken.size and mtime == taken.mtime:
        return None, seen
    same, lines = _compare(taken.archived_path, taken.size, taken.sha256, size)
    if same is None:
        return None, None          # could not read it now: look again at the next check
    if same and size == taken.size:
        return None, seen          # touched, not changed
    change = ChangedFile(file_id=taken.id, path=taken.path, archived_path=taken.archived_path,
                         taken_at=taken.processed_at, size_before=int(taken.size), size_after=size,
                         mtime_before=float(taken.mtime), mtime_after=mtime, first_bytes_unchanged=same,
                         lines_added=lines if same else 0)
    return change, seen


def _compare(path: str, size_before: int, sha256: str, size_now: int) -> tuple[bool | None, int]:
    """(are the first ``size_before`` bytes the taken ones, newlines in what follows) — None if unreadable."""
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC)
    except OSError:
        return None, 0
    with os.fdopen(fd, "rb") as fh:
        try:
            if not stat.S_ISREG(os.fstat(fh.fileno()).st_mode):
                return None, 0
            if size_now < size_before or size_before > MAX_READ_BYTES:
                return False, 0
            h = hashlib.sha256()
            left = size_before
            while left > 0:
                chunk = fh.read(min(_CHUNK, left))
                if not chunk:
                    return False, 0
                h.update(chunk)
                left -= len(chunk)
            if h.hexdigest() != sha256:
                return False, 0
            lines, budget = 0, MAX_READ_BYTES - size_before
            while budget > 0:
                chunk = fh.read(min(_CHUNK, budget))
                if not chunk:
                    break
                lines += chunk.count(b"\n")
                budget -= len(chunk)
        except OSError:
            return None, 0
    return True, lines
