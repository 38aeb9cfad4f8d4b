"""Finds finished export files in the drop folder: name filter, settle tracker, watchdog observer, scans.

Every file-system event is only a *hint* that puts a path on the candidate list; whether a file is
finished is decided by :class:`SettleTracker` (renamed into place, a marker file, or size + mtime + inode
unchanged across two looks spanning ``settle_seconds``). The observer watches one folder, not recursively,
so the archive and quarantine folders may live inside it.

Export order is **name order**: exporters name their files with a sortable stamp, so finished files are
handed out sorted by name, and a finished file waits while a candidate with a smaller name is still being
written (settling), at most ``hold_seconds`` (default max(60 s, 10 × settle_seconds)); after that it goes on
and the log says once which file it did not wait for.
"""

from __future__ import annotations

import errno
import fnmatch
import logging
import os
import stat as stat_module
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

from watchdog.events import FileSystemEvent, FileSystemEventHandler
from watchdog.observers import Observer
from watchdog.observers.api import BaseObserver
from watchdog.observers.polling import PollingObserver

from monitor.names import is_export_name

log = logging.getLogger("lotwarden.watcher")

# inotify refuses a new watch with these when its per-user limits are reached (inotify(7)): poll instead
WATCH_LIMIT_ERRNOS = (errno.ENOSPC, errno.EMFILE, errno.ENFILE)

StatFn = Callable[[str], os.stat_result]
ClockFn = Callable[[], float]
HintFn = Callable[[Path, bool], None]


@dataclass(frozen=True)
class NameFilter:
    """Which file names in the drop folder are exports, matched with fnmatch on the name alone.

    ``include`` patterns a name must match (any), ``ignore`` patterns it must not match; what
    :func:`monitor.names.is_export_name` refuses (hidden, temporary, marker and reason files) never is.
    """

    include: tuple[str, ...] = ("*",)
    ignore: tuple[str, ...] = ()
    marker_suffixes: tuple[str, ...] = ()

    def accepts(self, name: str) -> bool:
        """True if ``name`` (a bare file name) is an export the daemon should take."""
        if not is_export_name(name, self.marker_suffixes):
            return False
        low = name.lower()
        if any(fnmatch.fnmatch(low, p.lower()) for p in self.ignore):
            return False
        return any(fnmatch.fnmatch(low, p.lower()) for p in self.include)

    def export_for(self, path: Path) -> Path | None:
        """The export a hint about ``path`` concerns: itself, the data file of a marker, or None."""
        name = path.name
        for suffix in self.marker_suffixes:
            if suffix and name.lower().endswith(suffix.lower()) and len(name) > len(suffix):
                data = path.with_name(name[: -len(suffix)])
                return data if self.accepts(data.name) else None
        return path if self.accepts(name) else None


def entry_kind(mode: int) -> str:
    """What a non-regular directory entry is, in words ("symbolic link", "FIFO", ...)."""
    for test, word in ((stat_module.S_ISLNK, "symbolic link"), (stat_module.S_ISFIFO, "FIFO"),
                       (stat_module.S_ISCHR, "character device"), (stat_module.S_ISBLK, "block device"),
                       (stat_module.S_ISSOCK, "socket"), (stat_module.S_ISDIR, "folder")):
        if test(mode):
            return word
    return "not a regular file"


def scan(folder: Path, names: NameFilter) -> list[Path]:
    """Every regular file directly in ``folder`` whose name passes ``names``, oldest mtime first."""
    found: list[tuple[float, str, Path]] = []
    try:
        with os.scandir(folder) as it:
            for entry in it:
                try:
                    if entry.is_file(follow_symlinks=False) and names.accepts(entry.name):
                        found.append((entry.stat(follow_symlinks=False).st_mtime, entry.name, Path(entry.path)))
                except OSError:  # vanished between listing and stat: the next scan or event sees it
                    continue
    except FileNotFoundError:
        log.error("drop folder %s does not exist", folder)
        return []
    found.sort()
    return [p for _, _, p in found]


@dataclass
class _Candidate:
    signature: tuple[int, int, int] | None = None   # (size, mtime_ns, inode)
    stable_since: float = 0.0
    looks: int = 0
    moved: bool = False
    held_since: float | None = None   # finished, but waiting for a file with a smaller name (export order)
    stuck: bool = False               # held a later file past the bound: no longer waited for


def hold_limit(settle_seconds: float) -> float:
    """How long a finished file waits at most for a file with a smaller name still being written."""
    return max(60.0, 10.0 * float(settle_seconds))


def _order(path: Path) -> tuple[str, str]:
    """Export order: by file name (exporters stamp their names sortably), then by full path."""
    return (path.name, str(path))


class SettleTracker:
    """Candidate paths → finished paths. Pure apart from the ``stat`` and ``clock`` it is given.

    A candidate is finished when its (size, mtime, inode) is unchanged across at least two looks that
    span ``settle_seconds``; one stable look is enough after a rename into the folder (``moved=True``);
    when ``marker_for(path)`` names a suffix, the marker file's existence is the only signal.
    With ``trust_mtime`` (a local disk, whose mtimes come from this machine's clock) the file's own mtime
    counts as the start of the unchanged span, so a file whose event arrived late (watchdog's inotify
    buffer holds events 0.5 s) is not made to wait a full settle time again; two looks are still needed.
    Finished files come out in name order (export order); one waits while a candidate with a smaller name
    is still settling, at most ``hold_seconds`` (default :func:`hold_limit`), after which that candidate is
    no longer waited for (logged once).
    Thread-safe: hints come from the observer thread, looks from the main loop.
    """

    def __init__(self, settle_seconds: float, *, stat: StatFn = os.lstat, clock: ClockFn = time.monotonic,
                 marker_for: Callable[[Path], str | None] | None = None, trust_mtime: bool = False,
                 wall_clock: ClockFn = time.time, hold_seconds: float | None = None) -> None:
        self.settle_seconds = float(settle_seconds)
        self.hold_seconds = hold_limit(settle_seconds) if hold_seconds is None else float(hold_seconds)
        self.trust_mtime = trust_mtime
        self._stat = stat
        self._clock = clock
        self._wall = wall_clock
        self._marker_for = marker_for or (lambda p: None)
        self._candidates: dict[Path, _Candidate] = {}
        self._ignored: set[tuple[str, int, int]] = set()
        self._lock = threading.Lock()

    def hint(self, path: Path, moved: bool = False) -> None:
        """Put ``path`` on the candidate list (again); ``moved`` says it was renamed into the folder."""
        with self._lock:
            cand = self._candidates.setdefault(Path(path), _Candidate())
            cand.moved = cand.moved or moved

    def hint_many(self, paths: Iterable[Path]) -> None:
        for p in paths:
            self.hint(p)

    def forget(self, path: Path) -> None:
        """Drop ``path`` from the candidates (it was taken, or moved away)."""
        with self._lock:
            self._candidates.pop(Path(path), None)

    def pending(self) -> list[Path]:
        with self._lock:
            return list(self._candidates)

    def __len__(self) -> int:
        with self._lock:
            return len(self._candidates)

    def look(self) -> list[Path]:
        """Stat every candidate once; return (and forget) those now finished and not waiting for a file with
        a smaller name, in name order (export order)."""
        now = self._clock()
        with self._lock:
            items = list(self._candidates.items())
        finished: list[tuple[Path, _Candidate]] = []
        settling: list[tuple[Path, _Candidate]] = []
        gone: list[Path] = []
        for path, cand in items:
            state = self._look_one(path, cand, now)
            if state == "finished":
                finished.append((path, cand))
            elif state == "gone":
                gone.append(path)
            else:
                cand.held_since = None
                settling.append((path, cand))
        released = self._release(sorted(finished, key=lambda pc: _order(pc[0])), settling, now)
        with self._lock:
            for p in released + gone:
                self._candidates.pop(p, None)
        return released

    def _release(self, finished: list[tuple[Path, _Candidate]], settling: list[tuple[Path, _Candidate]],
                 now: float) -> list[Path]:
        """The finished files (in name order) that no settling file with a smaller name holds back."""
        out: list[Path] = []
        for path, cand in finished:
            key = _order(path)
            before = [(p, c) for p, c in settling if not c.stuck and _order(p) < key]
            if not before:
                cand.held_since = None
                out.append(path)
                continue
            if cand.held_since is None:
                cand.held_since = now
            if now - cand.held_since < self.hold_seconds:
                continue
            for p, c in before:   # waited long enough: go on without it, and say so once
                c.stuck = True
                log.warning("%s is still being written after %gs; taking %s without waiting for it, so files"
                            " are not taken in name (export) order past it", p, self.hold_seconds, path.name)
            cand.held_since = None
            out.append(path)
        return out

    def _look_one(self, path: Path, cand: _Candidate, now: float) -> str:
        try:
            st = self._stat(str(path))
        except FileNotFoundError:
            return "gone"  # renamed or removed by the writer: a later event or scan brings the new name
        except OSError as exc:
            log.warning("cannot stat %s: %s; will look again", path, exc)
            return "waiting"
        mode = getattr(st, "st_mode", None)
        if mode is not None and not stat_module.S_ISREG(mode):
            key = (str(path), int(st.st_ino), mode)
            if key not in self._ignored:      # said once per entry, however often its events come
                self._ignored.add(key)
                log.warning("ignored %s: not a regular file (%s); only regular files are taken", path,
                            entry_kind(mode))
            return "gone"
        suffix = self._marker_for(path)
        if suffix:
            try:
                self._stat(str(path) + suffix)
            except OSError:
                return "waiting"
            return "finished"
        sig = (int(st.st_size), int(st.st_mtime_ns), int(st.st_ino))
        if sig != cand.signature:
            first = cand.signature is None
            cand.signature, cand.stable_since, cand.looks = sig, now, 1
            if self.trust_mtime:
                age = self._wall() - st.st_mtime_ns / 1e9
                if age > 0:   # never for an mtime in the future (clock trouble): then the looks decide
                    cand.stable_since = now - min(age, self.settle_seconds)
            if first and cand.moved:
                return "finished"
            if not first:
                cand.moved = False  # changed after the rename: settle like any other file
            return "waiting"
        cand.looks += 1
        if cand.moved or (cand.looks >= 2 and now - cand.stable_since >= self.settle_seconds):
            return "finished"
        return "waiting"


class _HintHandler(FileSystemEventHandler):
    """Turns created / modified / moved-to / closed events into hints; never lets an exception out."""

    def __init__(self, on_hint: HintFn) -> None:
        super().__init__()
        self._on_hint = on_hint

    def on_any_event(self, event: FileSystemEvent) -> None:
        try:
            if event.is_directory:
                return
            kind = event.event_type
            if kind == "moved":
                self._on_hint(Path(os.fsdecode(event.dest_path)), True)
            elif kind in ("created", "modified", "closed"):
                self._on_hint(Path(os.fsdecode(event.src_path)), False)
        except Exception:  # an exception in a handler kills the observer thread
            log.exception("event handler failed on %r; the next rescan will catch the file", event)


class FolderWatcher:
    """One watchdog observer (native, or polling for shares) on one folder, restartable."""

    def __init__(self, folder: Path, polling: bool, poll_interval: float, on_hint: HintFn) -> None:
        self.folder = Path(folder)
        self.polling = bool(polling)
        self.poll_interval = float(poll_interval)
        self._handler = _HintHandler(on_hint)
        self._observer: BaseObserver | None = None
        self._lock = threading.Lock()

    @property
    def kind(self) -> str:
        return "polling" if self.polling else "native"

    def _make(self, polling: bool) -> BaseObserver:
        obs = PollingObserver(timeout=self.poll_interval) if polling else Observer()
        obs.daemon = True
        obs.schedule(self._handler, str(self.folder), recursive=False)
        return obs

    def start(self) -> None:
        """Start observing; if the native watch cannot start (e.g. inotify limit), fall back to polling."""
        with self._lock:
            if self._observer is not None:
                return
            try:
                obs = self._start_one(self.polling)
            except OSError as exc:
                if self.polling or exc.errno not in WATCH_LIMIT_ERRNOS:
                    raise
                log.error("native watch on %s failed (%s); falling back to polling every %gs",
                          self.folder, exc, self.poll_interval)
                self.polling = True
                obs = self._start_one(True)
            self._observer = obs

    def _start_one(self, polling: bool) -> BaseObserver:
        obs = self._make(polling)
        try:
            obs.start()
        except BaseException:
            obs.stop()          # a half-started observer leaves its reader thread behind otherwise
            for e in list(obs.emitters):
                e.stop()
                e.join(2)
            raise
        return obs

    def stop(self, timeout: float = 5.0) -> None:
        """Stop the observer and wait for its thread (up to ``timeout`` seconds)."""
        with self._lock:
            obs, self._observer = self._observer, None
        if obs is None:
            return
        try:
            obs.stop()
            obs.join(timeout)
        except Exception:  # a dead observer may fail to stop cleanly; it is replaced anyway
            log.exception("stopping the observer failed")

    def is_alive(self) -> bool:
        """True while the observer thread *and* its emitter run (the inotify emitter stops by itself when
        the watched folder is removed, leaving a live observer that sees nothing)."""
        with self._lock:
            obs = self._observer
        if obs is None or not obs.is_alive():
            return False
        emitters = list(obs.emitters)
        return bool(emitters) and all(e.is_alive() for e in emitters)

    def restart(self) -> None:
        """Replace the observer with a fresh one (after it died)."""
        self.stop(timeout=2.0)
        self.start()
