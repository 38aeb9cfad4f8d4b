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

Persistent faults (``monitor.daemon.faultlog``): a move that fails (archive / quarantine unusable, disk full) or
a transaction the database refuses (full disk, I/O error) is one fault per place and kind, retried with
backoff and logged once per backoff step; the file stays in the drop folder (outcome ``waiting``) and nothing
of a failed transaction is kept. ``fault_alerts()`` hands out the lasting faults and their clearing.

Files changed after they were taken (``monitor.daemon.aftertake``): ``check_taken`` (also run from ``flush``
and ``close_idle``) looks at each archived file again for 15 minutes and records a change once.

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
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from monitor.alerts.alert import Alert
from monitor.daemon import accumulate, aftertake, archive, judge
from monitor.daemon.accumulate import Judging, Tally, lot_name
from monitor.daemon.aftertake import ChangedFile
from monitor.daemon.config import Config
from monitor.daemon.faultlog import DB_FAULTS, FaultEvent, FaultLog, root_db_error
from monitor.daemon.faults import FaultTracker, policy_from_env
from monitor.daemon.watcher import entry_kind
from monitor.errors import ExportError
from monitor.ingest.profile import FeedProfile
from monitor.ingest.reader import Export
from monitor.lot import LotKey, Verdict
from monitor.rulebook import RULE_KEYS, Rule, match_rule
from monitor.state import audit, files, outbox
from monitor.state.database import Connection, Database, Savepoint, utc_iso

log = logging.getLogger("lotwarden.intake")

CRASH_ENV = "LOTWARDEN_CRASH_AT"
CRASH_POINTS = ("after-mark", "mid-values", "after-commit", "before-archive", "after-archive")
MAX_UNRECORDED_MOVES = 64
MAX_ATTEMPTS = 3  # start-ups that may find a file still 'processing' before it is quarantined
Clock = Callable[[], datetime]
ChangedAlert = Callable[[ChangedFile, str], Alert]   # (change, ISO time) -> the alert stored with its record


@dataclass(frozen=True)
class FileOutcome:
    """What happened to one file. ``status``: taken | revision | duplicate | rejected | archived (a move
    left by a crash was finished) | vanished | unreadable | ignored (not a regular file: a symlink, FIFO,
    device or socket is never opened for reading, nor moved) | waiting (a persistent fault — the state
    database or the archive cannot be written — keeps the file in the drop folder for a later try)."""

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
    export: Export | None = None
    profile: FeedProfile | None = None
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
        # persistent faults (archive unusable, disk full ...): keyed by where + kind, backoff, one log line per step
        self._faults = FaultLog(policy_from_env(os.environ), lambda: self.clock().timestamp())
        self._db_where = f"writing the state database {store.path}"
        # files changed after they were taken (see monitor.daemon.aftertake)
        self.changed_alert: ChangedAlert | None = None   # set by the service: the alert stored with each record
        self._seen_after: dict[int, tuple[int, int]] = {}  # archived files looked at: (size, mtime_ns) seen

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
            if not self._faults.ready(self._db_where):
                # the state database failed a moment ago: wait out the backoff, leave the files where they are
                return [self._db_waiting(it) for it in items]
            for it in items:
                self._read_file(it)
            now = self.clock()
            live = [it for it in items if it.outcome is None]
            try:
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
            except DB_FAULTS as exc:
                # a full disk, an I/O error, a database locked for longer than the busy timeout: nothing of
                # the failed transaction is stored and nothing moves; every file stays for the next try
                self._db_failed(exc, "storing " + ", ".join(it.path.name for it in live[:3])
                                + (" …" if len(live) > 3 else ""))
                return [it.outcome if it.outcome is not None and it.outcome.status in _READ_ONLY_OUTCOMES
                        else self._db_waiting(it) for it in items]
            if live:
                self._db_worked()
            for it in items:
                if it.move is not None:
                    moved = self._finish_move(it.file_id or 0, it.path, *it.move, call=it.call)
                    it.outcome = self._after_move(it.outcome, it.move[0], moved) if it.outcome else None
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
                except DB_FAULTS:  # the database itself failed (full disk ...): not this file's fault
                    raise
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
        assert export is not None   # only parsed files are taken
        kind = export.kind
        density = accumulate.density_of(export, it.profile)
        if kind == "summary":
            n_values = accumulate.add_summaries(conn, how, file_id, str(target), export, density, at, tally)
        else:
            n_values = accumulate.add_values(conn, how, file_id, export, density, now, tally,
                                             lambda: self._maybe_crash("mid-values", it.call), path=str(target))
        n_bad = len(export.bad_rows)
        files.mark_done(conn, file_id, at=at, archived_path=str(target), kind=kind, n_values=n_values,
                        n_bad_rows=n_bad)
        bad_rows = export.bad_rows
        notes = list(export.notes)
        audit.append(conn, at, "file-taken", file_id=file_id,
                    detail={"path": str(it.path), "sha256": it.sha, "kind": kind, "values": n_values,
                            "bad_rows": n_bad, "profile": it.profile.name if it.profile is not None else None,
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
        beside it under a free name (never overwriting), with a warning; the files table then records that.

        A failure (archive folder unusable, disk full) leaves the file in the drop folder and is a fault of
        the archive / quarantine folder, not of the file: while its backoff runs, no move there is tried
        (None), and the next look at the file (the rescan) tries again."""
        where = _move_where(target)
        if not self._faults.ready(where):
            return None
        final = target
        try:
            if src.exists():
                if target.exists():  # never overwrite: the file goes beside it under a free name
                    final = archive.free_name(target.parent, target.name)
                    log.warning("archive target %s of file %s (id %s) is taken by a file lotwarden did not put"
                                " there; moving it to %s instead", target, src, file_id, final)
                if state == "rejected":  # the reason first: if it cannot be written, the file stays put
                    self._write_reason(file_id, src, final)
                archive.move_file(src, final)
            elif not target.exists():
                log.warning("file %s (id %s) is neither in the drop folder nor at %s", src, file_id, target)
                return None
            elif state == "rejected":  # moved before a crash or a failed reason write: (re)write its reason
                self._write_reason(file_id, src, final)
        except OSError as exc:
            self._faults.failed(where, exc, f"cannot move {src.name} to {final.parent}")
            return None
        self._faults.worked(where)
        self._maybe_crash("after-archive", call)
        self._moved.append((utc_iso(self.clock()), str(final), file_id))
        if len(self._moved) >= MAX_UNRECORDED_MOVES:
            self.flush()
        return str(final)

    def _write_reason(self, file_id: int, src: Path, final: Path) -> None:
        with self.store.read() as conn:
            row = files.reject_reason(conn, file_id)
        archive.write_reason(final, _reason_text(src, final, *row))

    def _after_move(self, outcome: FileOutcome, target: Path, moved: str | None) -> FileOutcome:
        """The outcome once its move was tried: where it went, or why it is still in the drop folder."""
        if moved is not None:
            return replace(outcome, moved_to=moved)
        fault = self._faults.open_fault(_move_where(target))
        if fault is None:
            return outcome
        note = f"not moved yet: {fault}; it stays in the drop folder and is moved on a later try"
        status = "waiting" if outcome.status == "archived" else outcome.status
        return replace(outcome, status=status, reason="; ".join(x for x in (outcome.reason, note) if x))

    # -- persistent faults ---------------------------------------------------------------------
    @property
    def faults(self) -> FaultTracker:
        """The open persistent faults (state database, archive and quarantine folders), keyed by where + kind."""
        return self._faults.tracker

    def fault_alerts(self) -> list[FaultEvent]:
        """The fault events that want an alert since the last call: a ``FaultStep`` (``alert`` True) for a
        fault that has lasted ``alert_after_seconds``, a ``Cleared`` (``alerted`` True) when such a fault has
        gone. Each event is handed out once."""
        with self._lock:
            return self._faults.take_events()

    def _db_failed(self, exc: BaseException, what: str) -> None:
        self._faults.failed(self._db_where, root_db_error(exc), what)

    def _db_worked(self) -> None:
        self._faults.worked(self._db_where)

    def _db_waiting(self, it: _Item) -> FileOutcome:
        fault = self._faults.open_fault(self._db_where) or self._db_where
        return FileOutcome(str(it.path), "waiting", file_id=it.file_id, sha256=it.sha,
                           reason=f"not taken yet: {fault}; the file stays in the drop folder and is taken on a"
                                  " later try")

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
            if self._moved and self._faults.ready(self._db_where):
                try:
                    with self._write():
                        pass
                except DB_FAULTS as exc:   # the moves stay listed (and on disk) for the next try
                    self._db_failed(exc, f"recording {len(self._moved)} archive move(s)")
                    return
                self._db_worked()

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

            if not self._faults.ready(self._db_where):
                return []
            try:
                with self._write() as conn:  # also records pending archive moves
                    closed = accumulate.close_idle_lots(conn, self._judging(), moment, idle_for)
            except DB_FAULTS as exc:   # rolled back: the lots stay open and are closed on a later try
                self._db_failed(exc, "closing idle lots")
                return []
            self._db_worked()
            return closed

    def check_taken(self, now: datetime | None = None) -> list[ChangedFile]:
        """Look again at every file taken in the last ``aftertake.WATCH_SECONDS`` (from the files table, so a
        restart goes on checking): an archived copy whose size or mtime differ from what was read is compared
        with the taken bytes, and a real change is recorded once (audit ``file-changed-after-take``, with the
        alert ``changed_alert`` makes, in one transaction) and logged. Returns the changes found, each once.
        The service calls it at each supervision tick."""
        with self._lock:
            moment = now or self.clock()
            try:
                return self._check_taken(moment)
            except DB_FAULTS as exc:   # nothing recorded: found again at the next check
                self._db_failed(exc, "reading the files taken lately")
                return []

    def _check_taken(self, moment: datetime) -> list[ChangedFile]:
        if not self._faults.ready(self._db_where):
            return []
        since = utc_iso(moment - timedelta(seconds=aftertake.WATCH_SECONDS))
        stop = utc_iso(moment - timedelta(seconds=aftertake.WATCH_SECONDS + 3600.0))
        with self.store.read() as conn:
            rows = files.taken_since(conn, since, stop, aftertake.EVENT)
        changes: list[ChangedFile] = []
        for row in rows:
            sig = aftertake.signature(row.archived_path)
            if sig is None or self._seen_after.get(row.id) == (sig[0], sig[2]):
                continue
            change, seen = aftertake.look_again(row)
            if seen is not None:
                self._seen_after[row.id] = seen
            if change is not None:
                changes.append(change)
        watched = {r.id for r in rows}
        for file_id in [k for k in self._seen_after if k not in watched]:
            del self._seen_after[file_id]
        if not changes:
            return []
        at = utc_iso(moment)
        try:
            with self._write() as conn:
                for c in changes:
                    audit.append(conn, at, aftertake.EVENT, file_id=c.file_id, detail=c.detail())
                    if self.changed_alert is not None:
                        outbox.enqueue(conn, self.changed_alert(c, at), self.config.alerts.channels)
        except DB_FAULTS as exc:   # not recorded: found again at the next check
            self._db_failed(exc, "recording files changed after they were taken")
            return []
        self._db_worked()
        for c in changes:
            log.error("file changed after it was taken: %s", c.message())
        return changes

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


_READ_ONLY_OUTCOMES = ("ignored", "vanished", "unreadable")   # outcomes decided before any database write


def _move_where(target: Path) -> str:
    """The fault's *where* for moves to ``target`` (root/YYYY-MM-DD/name): the archive or quarantine root."""
    return f"moving files to {target.parent.parent}"


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
