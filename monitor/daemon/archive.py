"""Moving handled files out of the drop folder into dated archive / quarantine folders, never overwriting.

Names come from the drop folder's own file names (never from data values inside a file). A name that is
already taken gets a suffix (``name-1.csv``, ``name-2.csv`` …). Nothing is ever deleted: a move is a
rename on one file system, or copy + fsync + rename + removal of the
source (the move's end) on two.
"""

from __future__ import annotations

import errno
import os
import shutil
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path

REASON_SUFFIX = ".reason.txt"


def dated_folder(root: Path, moment: datetime) -> Path:
    """``root/YYYY-MM-DD`` for the UTC date of ``moment``."""
    return root / moment.astimezone(UTC).strftime("%Y-%m-%d")


def free_name(folder: Path, name: str, taken: Callable[[Path], bool] = lambda p: False) -> Path:
    """``folder/name``, or ``folder/<stem>-<k><suffix>`` with the smallest k >= 1 that is free on disk
    and not ``taken`` (e.g. planned for another file but not moved yet)."""
    candidate = folder / name
    if not candidate.exists() and not taken(candidate) and not _reason_exists(candidate):
        return candidate
    p = Path(name)
    stem, suffix = (p.stem, p.suffix) if p.suffix else (name, "")
    k = 1
    while True:
        candidate = folder / f"{stem}-{k}{suffix}"
        if not candidate.exists() and not taken(candidate) and not _reason_exists(candidate):
            return candidate
        k += 1


def _reason_exists(candidate: Path) -> bool:
    return candidate.with_name(candidate.name + REASON_SUFFIX).exists()


def move_file(src: Path, dst: Path) -> None:
    """Move ``src`` to ``dst`` without ever overwriting ``dst`` (FileExistsError if it exists)."""
    dst.parent.mkdir(parents=True, exist_ok=True)
    if dst.exists():
        raise FileExistsError(errno.EEXIST, "archive target exists", str(dst))
    try:
        os.rename(src, dst)
    except OSError as exc:
        if exc.errno != errno.EXDEV:
            raise
        tmp = dst.with_name("." + dst.name + ".partial")
        shutil.copy2(src, tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.rename(tmp, dst)
        os.unlink(src)  # the verified copy is in place; this ends the move
    # No directory fsync here: the state store records the move afterwards, and a rename lost to a power
    # cut only puts a done file back in the drop folder, where intake finishes the move (never re-counts).


def write_reason(target: Path, text: str) -> Path:
    """Write ``<target name>.reason.txt`` beside ``target`` (UTF-8, fsynced); return its path."""
    reason = target.with_name(target.name + REASON_SUFFIX)
    reason.parent.mkdir(parents=True, exist_ok=True)
    tmp = reason.with_name("." + reason.name + ".partial")
    with open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text if text.endswith("\n") else text + "\n")
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, reason)
    return reason


def move_beside(src: Path, placed: Path) -> Path:
    """Move ``src`` (e.g. an export's marker file) into the folder where ``placed`` now lies, under a free
    name (never overwrites); return where it went."""
    dst = free_name(placed.parent, src.name)
    move_file(src, dst)
    return dst
