"""Takes finished exports into the state store exactly once: hash, dedup, read, lots, verdicts, archive.

A batch of files (one file for ``process``) goes through two short write transactions
(``BEGIN IMMEDIATE`` each):

1. *mark* — each file is known by the SHA-256 of its bytes; content already done is a duplicate (marked and
   alerted here); otherwise a ``processing`` row is written, which ``recover`` retries after a crash. This
   commit does not wait for the disk (a lost 'processing' mark only means the file is taken from the drop
   folder again); when it marked a duplicate, ``Database.sync`` makes it durable before the file moves.
2. *done* — for each file in order: values, lot openings and closings, verdicts, audit records and every
   alert they raise (outbox), with the file's done / rejected mark and its planned archive path. All or
   nothing: a crash rolls the whole batch back and the files, still in the drop folder, are retried.

Then the files move (archive, or quarantine with ``<name>.reason.txt``); each move is recorded with the next
write transaction (or ``flush``). A done file found in the drop folder after a crash is only moved, never
counted again. Bad data never raises.

Test hook: ``LOTWARDEN_CRASH_AT=<point>[:<n>]`` makes the process SIGKILL itself at ``<point>`` for the
``n``-th file handed to this intake (default 1). Points: ``after-mark``, ``mid-values``, ``after-commit``
(= ``before-archive``), ``after-archive``. Only the crash tests set it.
"""

from __future__ import annotations

import errno
import hashlib
import logging
import os
import signal
import stat
import threading
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from monitor.alerts import outbox
from monitor.alerts.alert import Alert
from monitor.daemon import accumulate, archive, judge
from monitor.daemon.accumulate import Judging, Tally, lot_name
from monitor.daemon.config import Config
from monitor.daemon.watcher import entry_kind
from monitor.errors import ExportError
from monitor.lot import LotKey, Verdict
from monitor.rulebook import RULE_KEYS, Rule, match_rule
from monitor.state import audit, files
from monitor.state.database import Connection, Database, Savepoint, utc_iso

log = logging.getLogger("lotwarden.intake")

CRASH_ENV = "LOTWARDEN_CRASH_AT"
CRASH_POINTS = ("after-mark", "mid-values", "after-commit", "before-archive", "after-archive")
MAX_UNRECORDED_MOVES = 64
MAX_ATTEMPTS = 3  # start-ups that may find a file still 'processing' before it is quarantined
Clock = Callable[[], datetime]


@dataclass(frozen=True)
class FileOutcome:
    """What happened to one file. ``status``: taken | revision | duplicate | rejected | archived (a move
    left by a crash was finished) | vanished | unreadable | ignored (not a regular file: a symlink, FIFO,
    device or socket is never opened for reading, nor moved)."""

    path: str
    status: str
    file_id: int | None = None
    sha256: str = ""
    n_values: int = 0
    lots_closed: tuple[str, ...] = ()
    verdicts: tuple[Verdict, ...] = ()
    alerts: tuple[str, ...] = ()          # dedup keys of alerts newly enqueued
    moved_to: str | None = None
    reason: str = ""
    kind: str = "values"                  # the export's kind: "values" or "summary" (n_values = lot rows)

    def describe(self) -> str:
        """One log line."""
        text = f"{self.status} {Path(self.path).name}"
        if self.status in ("taken", "revision"):
            text += f": {self.n_values} lot summaries" if self.kind == "summary" else f": {self.n_values} values"
        if self.lots_closed:
            text += f"; lots closed: {', '.join(self.lots_closed)}"
        if self.verdicts:
            text += "; " + ", ".join(f"{v.verdict} {lot_name(v.key)}" for v in self.verdicts)
        if self.reason:
            text += f" — {self.reason}"
        if self.moved_to:
            text += f" -> {self.moved_to}"
        return text


@dataclass
class _Item:
    """One file on its way through a batch (internal)."""

    path: Path
    call: int
    data: bytes = b""
    size: int = 0
    mtime: float = 0.0
    sha: str = ""
    file_id: int | None = None
    outcome: FileOutcome | None = None
    export: Any = None
    profile: Any = None
    error: tuple[str, ExportError | None] | None = None
    move: tuple[Path, str] | None = None       # (planned target, state) once a move is due
    extra: dict[str, Any] = field(default_factory=dict)


def _now() -> datetime:
    return datetime.now(UTC)


class Intake:
    """Turns finished files into stored values, verdicts and alerts. Thread-safe (one lock per intake)."""

    def __init__(self, config: Config, rules: Sequence[Rule], store: Database, *, clock: Clock = _now,
                 evaluate: judge.Evaluator | None = None) -> None:
        from monitor import engine  # imported here, at start-up, not when the first lot closes
        from monitor.ingest import read_export_bytes
        from monitor.ingest.profile import profile_for

        self.config = config
        self.rules = list(rules)
        self.store = store
        self.clock = clock
        self._read = read_export_bytes
        self._profile_for = profile_for
        self._evaluate = evaluate
        self._engine = engine
        self._lock = threading.RLock()
        self._calls = 0
        self._moved: list[tuple[str, str, int]] = []  # moves done, recorded with the next write transaction
        self._crash = _parse_crash(os.environ.get(CRASH_ENV, ""))
        self._recent = judge.RecentValues()

    # -- reloads -------------------------------------------------------------------------------
    def set_rules(self, rules: Sequence[Rule]) -> None:
        """Use a new rule set from now on (lots already judged keep their verdicts)."""
        with self._lock:
            self.rules = list(rules)

    def set_config(self, config: Config) -> None:
        """Use a new config (profiles, alert channels, folders) from now on."""
        with self._lock:
            self.config = config

    # -- files ---------------------------------------------------------------------------------
    def process(self, path: str | Path) -> FileOutcome:
        """Take one finished file. Never raises for bad data; returns what happened."""
        return self.process_batch([path])[0]

    def process_batch(self, paths: Sequence[str | Path]) -> list[FileOutcome]:
        """Take several finished files, in the order given, with one commit for all of them.

        Same result as ``process`` on each in turn; a backlog (start-up scan) goes faster this way because
        every commit waits for the disk (synchronous=FULL).
        """
        with self._lock:
            items: list[_Item] = []
            for p in paths:
                self._calls += 1
                items.append(_Item(Path(os.path.abspath(p)), self._calls))
            for it in items:
                self._read_file(it)
            now = self.clock()
            live = [it for it in items if it.outcome is None]
            if live:
                # marks need not wait for the disk: a mark lost to a power cut leaves the file in the drop
                # folder, taken again; a duplicate's mark that is lost is found again as a duplicate
                with self._write(durable=False) as conn:
                    for it in live:
                        self._mark(conn, it, now)
                if any(it.outcome is not None and it.outcome.status == "duplicate" for it in live):
                    self.store.sync()  # a duplicate's row and alert must outlive a power cut before it moves
            for it in live:
                if it.outcome is None:
                    self._maybe_crash("after-mark", it.call)
            todo = [it for it in live if it.outcome is None]
            for it in todo:
                self._parse(it)
            self._settle(todo, now)
            for it in items:
                if it.move is not None:
                    moved = self._finish_move(it.file_id or 0, it.path, *it.move, call=it.call)
                    it.outcome = replace(it.outcome, moved_to=moved) if it.outcome else None
            return [it.outcome or FileOutcome(str(it.path), "unreadable") for it in items]

    def _read_file(self, it: _Item) -> None:
        try:
            # Never follow a link, never wait on a FIFO: only a regular file's own bytes are read, and no more
            # of them than its size when it was opened.
            fd = os.open(it.path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC)
            with os.fdopen(fd, "rb") as fh:
                st = os.fstat(fh.fileno())
                if not stat.S_ISREG(st.st_mode):
                    it.outcome = FileOutcome(str(it.path), "ignored", reason=f"not a regular file "
                                             f"({entry_kind(st.st_mode)}); only regular files are taken")
                    return
                it.data = fh.read(st.st_size)
        except FileNotFoundError:
            it.outcome = FileOutcome(str(it.path), "vanished", reason="the file is no longer in the drop folder")
            return
        except OSError as exc:
            if exc.errno == errno.ELOOP:      # O_NOFOLLOW met a symbolic link
                it.outcome = FileOutcome(str(it.path), "ignored", reason="not a regular file (symbolic link); "
                                         "only regular files are taken")
                return
            it.outcome = FileOutcome(str(it.path), "unreadable", reason=f"cannot read: {exc.strerror or exc}; "
                                                                        "will retry")
            return
        it.size, it.mtime = st.st_size, st.st_mtime
        it.sha = hashlib.sha256(it.data).hexdigest()

    def _mark(self, conn: Connection, it: _Item, now: datetime) -> None:
        """Transaction 1 for one file: finish a crash's leftover, mark a duplicate, or mark processing."""
        at = utc_iso(now)
        left = files.left_over(conn, it.sha, str(it.path))
        if left is not None and left[1] != "processing" and left[0] not in {m[2] for m in self._moved}:
            it.file_id = left[0]
            it.outcome = FileOutcome(str(it.path), "archived", file_id=left[0], sha256=it.sha,
                                     reason=f"already {left[1]}; finished its move")
            it.move = (_planned_path(left.id, left.state, left.archived_path), left.state)
            return
        if left is not None and left[1] == "processing":
            it.file_id = left[0]
        if not self._mark_duplicate(conn, it, now, at) and it.file_id is None:
            it.file_id = files.insert(conn, sha256=it.sha, path=str(it.path), size=it.size, mtime=it.mtime,
                                      first_seen_at=at, state="processing")

    def _mark_duplicate(self, conn: Connection, it: _Item, now: datetime, at: str) -> bool:
        first = files.first_done(conn, it.sha)
        if first is None:
            return False
        if it.file_id is None:
            it.file_id = files.insert(conn, sha256=it.sha, path=str(it.path), size=it.size, mtime=it.mtime,
                                      first_seen_at=at, state="duplicate")
        target = self._plan_target(conn, self.config.state.archive, it.path.name, now)
        reason = (f"same content as file {first[0]} ({Path(first[1]).name}, processed {first[2]});"
                  " not counted again")
        files.mark_duplicate(conn, int(it.file_id), at=at, archived_path=str(target), reason=reason,
                             duplicate_of=first[0])
        audit.append(conn, at, "file-duplicate", file_id=it.file_id,
                    detail={"path": str(it.path), "sha256": it.sha, "duplicate_of": first[0]})
        alert = Alert(kind="file-duplicate", dedup_key=f"file-duplicate|{it.file_id}", created_at=at,
                      data={"file": it.path.name, "path": str(it.path), "sha256": it.sha, "reason": reason,
                            "archived_to": str(target),
                            "duplicate_of": {"id": first[0], "path": first[1], "processed_at": first[2],
                                             "archived_path": first[3]}})
        new = outbox.enqueue(conn, alert, self.config.alerts.channels)
        it.outcome = FileOutcome(str(it.path), "duplicate", file_id=it.file_id, sha256=it.sha, reason=reason,
                                 alerts=(alert.dedup_key,) if new else ())
        it.move = (target, "duplicate")
        return True

    def _parse(self, it: _Item) -> None:
        it.profile = self._profile_for(it.path.name, self.config.profiles)
        try:
            it.export = self._read(it.data, name=str(it.path), profile=it.profile)
        except ExportError as exc:
            it.error = (str(exc), exc)
        except Exception as exc:  # a reader bug: keep the file safe and tell people
            log.exception("reader failed on %s", it.path)
            it.error = (f"the reader failed ({type(exc).__name__}: {exc})", None)
        it.data = b""  # the bytes are hashed and read; do not hold them while the values are stored

    def _settle(self, todo: list[_Item], now: datetime) -> None:
        """Transaction 2: every file of the batch done, duplicate or rejected, with all it caused."""
        if not todo:
            return
        at = utc_iso(now)
        with self._write() as conn:
            for it in todo:
                one_file = Savepoint(conn, "one_file")
                one_file.begin()
                try:
                    if self._mark_duplicate(conn, it, now, at):  # same content earlier in this batch
                        pass
                    elif it.error is not None:
                        self._mark_rejected(conn, it, now, at)
                    else:
                        self._take(conn, it, now, at)
                except Exception as exc:  # a bug of ours on this file: undo its part, keep it safe, tell people
                    one_file.rollback()
                    self._recent.clear()
                    log.exception("intake failed on %s; quarantining it", it.path)
                    it.error = (f"lotwarden failed on this file ({type(exc).__name__}: {exc}); it is kept in"
                                " quarantine for a person to look at", None)
                    self._mark_rejected(conn, it, now, at)
                one_file.release()
        for it in todo:
            self._maybe_crash("after-commit", it.call)
            self._maybe_crash("before-archive", it.call)

    def _take(self, conn: Connection, it: _Item, now: datetime, at: str) -> None:
        how = self._judging()
        tally = Tally()
        # the archive path is chosen first and recorded with the file: verdicts and alerts name the file
        # where it will lie, and the move after the commit goes to exactly this path
        target = self._plan_target(conn, self.config.state.archive, it.path.name, now)
        files.set_archived_path(conn, int(it.file_id or 0), str(target))
        prev = files.earlier_version(conn, str(it.path), it.sha)
        status = "taken"
        if prev is not None:
            status = "revision"
            files.set_revision_of(conn, int(it.file_id or 0), prev[0])
            audit.append(conn, at, "file-revised", file_id=it.file_id,
                        detail={"path": str(it.path), "sha256": it.sha, "previous": prev[0]})
            alert = Alert(kind="file-revised", dedup_key=f"file-revised|{it.file_id}", created_at=at,
                          data={"file": it.path.name, "path": str(it.path), "sha256": it.sha,
                                "reason": "a file at a known path arrived with different content;"
                                          " its rows are counted as new rows", "archived_to": str(target),
                                "previous": {"id": prev[0], "sha256": prev[1], "processed_at": prev[2]}})
            if outbox.enqueue(conn, alert, how.channels):
                tally.alerts.append(alert.dedup_key)
        export, file_id = it.export, int(it.file_id or 0)
        kind = str(getattr(export, "kind", "values"))
        density = accumulate.density_of(export, it.profile)
        if kind == "summary":
            n_values = accumulate.add_summaries(conn, how, file_id, str(target), export, density, at, tally)
        else:
            n_values = accumulate.add_values(conn, how, file_id, export, density, now, tally,
                                             lambda: self._maybe_crash("mid-values", it.call), path=str(target))
        n_bad = len(getattr(export, "bad_rows", ()) or ())
        files.mark_done(conn, file_id, at=at, archived_path=str(target), kind=kind, n_values=n_values,
                        n_bad_rows=n_bad)
        bad_rows = tuple(getattr(export, "bad_rows", ()) or ())
        notes = [str(n) for n in (getattr(export, "notes", ()) or ())]
        audit.append(conn, at, "file-taken", file_id=file_id,
                    detail={"path": str(it.path), "sha256": it.sha, "kind": kind, "values": n_values,
                            "bad_rows": n_bad, "profile": getattr(it.profile, "name", None),
                            "archived_path": str(target), "lots_opened": tally.opened, "notes": notes,
                            "bad_row_details": [{"line": b.line, "column": b.column, "reason": b.reason}
                                                for b in bad_rows[:50]]})
        said = [f"{n_bad} bad row(s) left out, first line {bad_rows[0].line}: {bad_rows[0].reason}"] if bad_rows else []
        it.outcome = FileOutcome(str(it.path), status, file_id=file_id, sha256=it.sha, n_values=n_values,
                                 lots_closed=tuple(tally.closed), verdicts=tuple(tally.verdicts),
                                 alerts=tuple(tally.alerts), kind=kind, reason="; ".join(said + notes))
        it.move = (target, "done")

    def _mark_rejected(self, conn: Connection, it: _Item, now: datetime, at: str) -> None:
        reason, exc = it.error or ("rejected", None)
        target = self._plan_target(conn, self.config.state.quarantine, it.path.name, now)
        files.mark_rejected(conn, it.file_id, at=at, archived_path=str(target), reason=reason)
        audit.append(conn, at, "file-rejected", file_id=it.file_id,
                    detail={"path": str(it.path), "sha256": it.sha, "reason": reason})
        data: dict[str, Any] = {"file": it.path.name, "path": str(it.path), "sha256": it.sha, "reason": reason,
                                "quarantined_to": str(target)}
        if exc is not None:
            data.update({"line": exc.line, "key": exc.key})
        alert = Alert(kind="file-rejected", dedup_key=f"file-rejected|{it.file_id}", created_at=at, data=data)
        new = outbox.enqueue(conn, alert, self.config.alerts.channels)
        it.outcome = FileOutcome(str(it.path), "rejected", file_id=it.file_id, sha256=it.sha, reason=reason,
                                 alerts=(alert.dedup_key,) if new else ())
        it.move = (target, "rejected")

    def _plan_target(self, conn: Connection, root: Path, name: str, now: datetime) -> Path:
        def planned(c: Path) -> bool:
            return files.is_planned(conn, str(c))
        return archive.free_name(archive.dated_folder(root, now), name, planned)

    # -- moves ---------------------------------------------------------------------------------
    def _finish_move(self, file_id: int, src: Path, target: Path, state: str, *, call: int = 0) -> str | None:
        """Move ``src`` to exactly its recorded ``target``; record the move later.

        The target was chosen free (on disk and in the files table) inside the file's transaction, and the
        notices name it. Only if something outside lotwarden has put a file there since does this one go
        beside it under a free name (never overwriting), with a warning; the files table then records that."""
        final = target
        try:
            if src.exists():
                if target.exists():  # never overwrite: the file goes beside it under a free name
                    final = archive.free_name(target.parent, target.name)
                    log.warning("archive target %s of file %s (id %s) is taken by a file lotwarden did not put"
                                " there; moving it to %s instead", target, src, file_id, final)
                archive.move_file(src, final)
            elif not target.exists():
                log.warning("file %s (id %s) is neither in the drop folder nor at %s", src, file_id, target)
                return None
            if state == "rejected":
                with self.store.read() as conn:
                    row = files.reject_reason(conn, file_id)
                archive.write_reason(final, _reason_text(src, final, *row))
        except OSError as exc:
            log.error("cannot move %s to %s: %s; will retry", src, final, exc)
            return None
        self._maybe_crash("after-archive", call)
        self._moved.append((utc_iso(self.clock()), str(final), file_id))
        if len(self._moved) >= MAX_UNRECORDED_MOVES:
            self.flush()
        return str(final)

    @contextmanager
    def _write(self, *, durable: bool = True) -> Iterator[Connection]:
        """A write transaction that also records the archive moves done since the last one (a move not
        recorded is found again by ``recover``, so ``durable=False`` is safe for those too)."""
        pending = list(self._moved)
        try:
            with self.store.write(durable=durable) as conn:
                if pending:
                    files.record_moves(conn, pending)
                yield conn
        except BaseException:
            self._recent.clear()  # rolled back: what it stored is gone
            raise
        del self._moved[:len(pending)]

    def flush(self) -> None:
        """Record archive moves not recorded yet (call at stop; ``close_idle`` and ``recover`` do it too).

        Until then a move is only on disk; a crash is harmless: ``recover`` finds the file in the archive.
        """
        with self._lock:
            if self._moved:
                with self._write():
                    pass

    # -- periodic and start-up work ------------------------------------------------------------
    def close_idle(self, now: datetime | None = None, *, idle_seconds_override: float | None = None) -> list[Verdict]:
        """Close and judge every open lot idle for its rule's ``idle_minutes`` (or the override) at ``now``."""
        with self._lock:
            moment = now or self.clock()
            default_idle = float(RULE_KEYS["idle_minutes"][0]) * 60.0
            rules = list(self.rules)

            def idle_for(key: LotKey) -> float:
                if idle_seconds_override is not None:
                    return idle_seconds_override
                rule = match_rule(rules, key.product)
                return rule.idle_minutes * 60.0 if rule else default_idle

            with self._write() as conn:  # also records pending archive moves
                return accumulate.close_idle_lots(conn, self._judging(), moment, idle_for)

    def recover(self) -> list[FileOutcome]:
        """Start-up: finish moves of handled files left in place; retry files left 'processing'."""
        with self._lock:
            out: list[FileOutcome] = []
            with self.store.read() as conn:
                rows = files.unarchived(conn)
            for file_id, path, target, state, sha in rows:
                src = Path(path)
                if state == "processing":
                    out.append(self._retry(file_id, src, sha))
                    continue
                if src.exists() and _sha_of(src) != sha:
                    self._skip_move(file_id, path, "the drop folder now holds different content under this"
                                                   " name; it is taken as a new file")
                    continue
                moved = self._finish_move(file_id, src, _planned_path(file_id, state, target), state)
                out.append(FileOutcome(path, "archived", file_id=file_id, sha256=sha, moved_to=moved,
                                       reason=f"already {state}; finished its move"))
            self.flush()
            return out

    def _retry(self, file_id: int, src: Path, sha: str) -> FileOutcome:
        with self._write() as conn:
            attempts = files.count_attempt(conn, file_id)
        if attempts > MAX_ATTEMPTS and src.exists() and _sha_of(src) == sha:
            now = self.clock()
            it = _Item(src, 0, sha=sha, file_id=file_id,
                       error=(f"processing this file did not finish in {attempts - 1} attempts (the daemon stopped"
                              " each time); quarantined so it cannot stop the daemon again", None))
            with self._write() as conn:
                self._mark_rejected(conn, it, now, utc_iso(now))
            moved = self._finish_move(file_id, src, *it.move) if it.move else None
            return replace(it.outcome, moved_to=moved) if it.outcome else FileOutcome(str(src), "rejected")
        outcome = self.process(src)
        if outcome.file_id != file_id:
            self._abandon(file_id, str(src), sha, outcome)
        return outcome

    def _skip_move(self, file_id: int, path: str, why: str) -> None:
        at = utc_iso(self.clock())
        with self._write() as conn:
            files.set_archived_at(conn, file_id, at)
            audit.append(conn, at, "file-move-skipped", file_id=file_id, detail={"path": path, "why": why})

    def _abandon(self, file_id: int, path: str, sha: str, outcome: FileOutcome) -> None:
        """A 'processing' row whose file vanished or changed before it could be taken."""
        at = utc_iso(self.clock())
        if outcome.status == "vanished":
            reason = "the file disappeared from the drop folder before it was processed; its values are not stored"
        else:
            reason = f"the file changed before it was processed; the new content is file {outcome.file_id}"
        with self._write() as conn:
            files.mark_abandoned(conn, file_id, at=at, reason=reason)
            audit.append(conn, at, "file-rejected", file_id=file_id, detail={"path": path, "reason": reason})
            if outcome.status == "vanished":
                alert = Alert(kind="file-rejected", dedup_key=f"file-rejected|{file_id}", created_at=at,
                              data={"file": Path(path).name, "path": path, "sha256": sha, "reason": reason})
                outbox.enqueue(conn, alert, self.config.alerts.channels)

    # -- helpers -------------------------------------------------------------------------------
    def _judging(self) -> Judging:
        evaluate = self._evaluate if self._evaluate is not None else self._engine.evaluate
        return Judging(rules=tuple(self.rules), evaluate=evaluate, channels=tuple(self.config.alerts.channels),
                       recent=self._recent)

    def _maybe_crash(self, point: str, call: int) -> None:
        if self._crash is not None and self._crash == (point, call):
            os.kill(os.getpid(), signal.SIGKILL)


def _parse_crash(text: str) -> tuple[str, int] | None:
    text = text.strip()
    if not text:
        return None
    point, _, n = text.partition(":")
    if point not in CRASH_POINTS:
        raise ValueError(f"{CRASH_ENV}={text!r}: point must be one of {', '.join(CRASH_POINTS)}")
    return point, int(n) if n else 1


def _planned_path(file_id: int, state: str, archived_path: str | None) -> Path:
    """The archive / quarantine path a settled file's row names (every settled row names one)."""
    if archived_path is None:
        raise RuntimeError(f"file {file_id} is {state} but its row names no archive path")
    return Path(archived_path)


def _sha_of(path: Path) -> str | None:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return None


def _reason_text(src: Path, target: Path, reason: str | None, sha: str | None, at: str | None) -> str:
    return (f"file: {src.name}\nfrom: {src}\nquarantined as: {target.name}\nat: {at}\nsha256: {sha}\n"
            f"reason: {reason}\n")
