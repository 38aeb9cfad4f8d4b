"""Which file names in a folder are checkweigher exports: the one name filter of the daemon and ``check DIR``.

Never exports: hidden names (``.x``, also the daemon's own ``.x.partial`` copies), names a writer uses
while a file is unfinished (``*.tmp``, ``*.part``, ``~*`` …), end-of-lot / end-of-file marker files
(``x.csv.done`` …, plus any suffix a feed profile names) and the reason files the daemon writes beside
quarantined files (``x.csv.reason.txt``). Matching is on the bare name and ignores letter case.
"""

from __future__ import annotations

import fnmatch
import os
from collections.abc import Iterable
from pathlib import Path

# Names a writer uses while a file is not finished yet (common practice, no source).
TEMP_PATTERNS: tuple[str, ...] = ("*.tmp", "*.temp", "*.part", "*.partial", "*.crdownload", "*.swp",
                                  "*~", "~*", "*.lock", "*.filepart")
# What the daemon writes beside a quarantined file (monitor/daemon/archive.py writes ``<name>.reason.txt``).
REASON_SUFFIX = ".reason.txt"
# Marker files a writer drops once a file is complete (common practice, no source); a feed profile's
# ``marker_suffix`` adds its own.
MARKER_SUFFIXES: tuple[str, ...] = (".done", ".ready", ".complete", ".ok")


def is_marker_name(name: str, marker_suffixes: Iterable[str] = ()) -> bool:
    """True if ``name`` ends in a marker suffix (a built-in one or one of ``marker_suffixes``) after a stem."""
    low = name.lower()
    return any(s and low.endswith(s.lower()) and len(low) > len(s)
               for s in MARKER_SUFFIXES + tuple(marker_suffixes))


def is_export_name(name: str, marker_suffixes: Iterable[str] = ()) -> bool:
    """True if the bare file name ``name`` may be an export: not hidden, temporary, a marker or a reason file.

    >>> [is_export_name(n) for n in ("a.csv", "a.csv.done", "b.csv.reason.txt", ".a.csv", "a.csv.tmp")]
    [True, False, False, False, False]
    """
    if not name or name.startswith(".") or "/" in name or os.sep in name:
        return False
    low = name.lower()
    if low.endswith(REASON_SUFFIX) or is_marker_name(name, marker_suffixes):
        return False
    return not any(fnmatch.fnmatchcase(low, p) for p in TEMP_PATTERNS)


def export_files(folder: Path, marker_suffixes: Iterable[str] = ()) -> list[Path]:
    """The regular files directly in ``folder`` (symbolic links not followed) whose names pass
    :func:`is_export_name`, in name order."""
    suffixes = tuple(marker_suffixes)
    found: list[Path] = []
    with os.scandir(folder) as it:
        for entry in it:
            try:
                if entry.is_file(follow_symlinks=False) and is_export_name(entry.name, suffixes):
                    found.append(Path(entry.path))
            except OSError:   # vanished between listing and the type check
                continue
    return sorted(found, key=lambda p: p.name)
