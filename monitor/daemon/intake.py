"""Takes one finished export into the state store exactly once: hash, dedup, read, lots, verdicts, archive.

One file, three short transactions (each ``BEGIN IMMEDIATE``):

1. *mark* — the file is known by the SHA-256 of its bytes; a content already done is a duplicate (marked
   and alerted right here); otherwise a ``processing`` row is written (a crash after this is retried by
   ``recover``).
2. *done* — values, lot openings/closings, verdicts, audit records and every alert they raise (outbox),
   together with the file's done mark and its planned archive path. All of it, or none of it.
3. *archived* — after the file has been moved, the move is recorded.

A crash between 2 and 3 leaves a done file in the drop folder: it is moved, never counted again.
Bad data never raises: a file the reader rejects goes to quarantine with ``<name>.reason.txt`` and a
``file-rejected`` alert.

Test hook: the environment variable ``LOTWARDEN_CRASH_AT=<point>[:<n>]`` makes the process SIGKILL
itself at ``<point>`` of its ``n``-th call of ``process`` (default 1). Points: ``after-mark``,
``mid-values``, ``after-commit`` (= ``before-archive``), ``after-archive``. Used by the crash tests only.
"""

from __future__ import annotations

import hashlib
import logging
import os
import signal
import sqlite3
import threading
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np
import pandas as pd

from monitor.alerts import outbox
from monitor.alerts.alert import Alert
from monitor.daemon import archive, judge, lots
from monitor.daemon.config import Config
from monitor.daemon.store import Store, utc_iso
from monitor.errors import ExportError
from monitor.lot import LotKey, Verdict
from monitor.rulebook import RULE_KEYS, Rule, match_rule

log = logging.getLogger("lotwarden.intake")

CRASH_ENV = "LOTWARDEN_CRASH_AT"
CRASH_POINTS = ("after-mark", "mid-values", "after-commit", "before-archive", "after-archive")
Clock = Callable[[], datetime]


@dataclass(frozen=True)
class FileOutcome:
    """What happened to one file. ``status``: taken | revision | duplicate | rejected | archived (a move
    left by a crash was finished) | vanished | unreadable."""

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

    def describe(self) -> str:
        """One log line."""
        name = Path(self.path).name
        text = f"{self.status} {name}"
        if self.status in ("taken", "revision"):
            text += f": {self.n_values} values"
        if self.lots_closed:
            text += f"; lots closed: {', '.join(self.lots_closed)}"
        if self.verdicts:
            text += "; " + ", ".join(f"{v.verdict} {_lot_name(v.key)}" for v in self.verdicts)
        if self.reason:
            text += f" — {self.reason}"
        if self.moved_to:
            text += f" -> {self.moved_to}"
        return text


def _lot_name(key: LotKey) -> str:
    return "/".join(x or "-" for x in (key.line, key.product, key.lot))


def _now() -> datetime:
    return datetime.now(timezone.utc)


class Intake:
    """Turns finished files into stored values, verdicts and alerts. Thread-safe (one lock per intake)."""

    def __init__(self, config: Config, rules: Sequence[Rule], store: Store, *, clock: Clock = _now,
                 reader: Callable[..., Any] | None = None, profile_for: Callable[..., Any] | None = None,
                 evaluate: judge.Evaluator | None = None) -> None:
        self.config = config
        self.rules = list(rules)
        self.store = store
        self.clock = clock
        if reader is None or profile_for is None:
            from monitor.ingest import read_export_bytes
            from monitor.ingest.profile import profile_for as _profile_for
            reader = reader or read_export_bytes
            profile_for = profile_for or _profile_for
        self._read = reader
        self._profile_for = profile_for
        self._evaluate = evaluate
        self._lock = threading.RLock()
        self._calls = 0
        self._crash = _parse_crash(os.environ.get(CRASH_ENV, ""))

    # -- reloads -------------------------------------------------------------------------------
    def set_rules(self, rules: Sequence[Rule]) -> None:
        """Use a new rule set from now on (lots already judged keep their verdicts)."""
        with self._lock:
            self.rules = list(rules)

    def set_config(self, config: Config) -> None:
        """Use a new config (profiles, alert channels, folders) from now on."""
        with self._lock:
            self.config = config

    # -- one file ------------------------------------------------------------------------------
    def process(self, path: str | Path) -> FileOutcome:
        """Take one finished file. Never raises for bad data; returns what happened."""
        with self._lock:
            self._calls += 1
            return self._process(Path(os.path.abspath(path)))

    def _process(self, p: Path) -> FileOutcome:
        try:
            with open(p, "rb") as fh:
                st = os.fstat(fh.fileno())
                data = fh.read()
        except FileNotFoundError:
            return FileOutcome(str(p), "vanished", reason="the file is no longer in the drop folder")
        except OSError as exc:
            return FileOutcome(str(p), "unreadable", reason=f"cannot read: {exc.strerror or exc}; will retry")
        sha = hashlib.sha256(data).hexdigest()
        now = self.clock()
        at = utc_iso(now)
        with self.store.write() as conn:
            left = conn.execute(
                "SELECT id, state, archived_path FROM files WHERE sha256 = ? AND path = ?"
                " AND archived_at IS NULL ORDER BY id DESC LIMIT 1", (sha, str(p))).fetchone()
            file_id = left[0] if left else None
            outcome: FileOutcome | None = None
            if left is None or left[1] == "processing":
                outcome = self._mark(conn, p, sha, st, at, now, file_id)
                if outcome is None and file_id is None:
                    file_id = self._insert_processing(conn, p, sha, st, at)
        if left is not None and left[1] != "processing":  # a crash left this handled file behind
            moved = self._finish_move(left[0], p, Path(left[2]), left[1])
            return FileOutcome(str(p), "archived", file_id=left[0], sha256=sha, moved_to=moved,
                               reason=f"already {left[1]}; finished its move")
        if outcome is not None:  # duplicate: marked and alerted; now move it
            moved = self._finish_move(int(outcome.file_id or 0), p, Path(str(outcome.moved_to)), "duplicate")
            return replace(outcome, moved_to=moved)
        assert file_id is not None
        self._maybe_crash("after-mark")
        profile = self._profile_for(p.name, self.config.profiles)
        try:
            export = self._read(data, name=str(p), profile=profile)
        except ExportError as exc:
            return self._reject(file_id, p, sha, now, str(exc), exc)
        except Exception as exc:  # a reader bug: keep the file safe and tell people
            log.exception("reader failed on %s", p)
            return self._reject(file_id, p, sha, now, f"the reader failed ({type(exc).__name__}: {exc})", None)
        return self._take(file_id, p, sha, now, export, profile)

    def _mark(self, conn: sqlite3.Connection, p: Path, sha: str, st: os.stat_result, at: str, now: datetime,
              file_id: int | None) -> FileOutcome | None:
        """Inside txn 1: a duplicate is marked and alerted here (returned); else None."""
        first = conn.execute("SELECT id, path, processed_at FROM files WHERE sha256 = ? AND state = 'done'"
                             " ORDER BY id LIMIT 1", (sha,)).fetchone()
        if first is None:
            return None
        if file_id is None:
            file_id = self._insert_processing(conn, p, sha, st, at)
        target = self._plan_target(conn, self.config.state.archive, p.name, now)
        reason = f"same content as file {first[0]} ({Path(first[1]).name}, processed {first[2]}); not counted again"
        conn.execute("UPDATE files SET state='duplicate', processed_at=?, archived_path=?, reason=?, duplicate_of=?"
                     " WHERE id=?", (at, str(target), reason, first[0], file_id))
        Store.audit(conn, at, "file-duplicate", file_id=file_id, detail={"path": str(p), "sha256": sha,
                                                                        "duplicate_of": first[0]})
        alert = Alert(kind="file-duplicate", dedup_key=f"file-duplicate|{file_id}", created_at=at,
                      data={"file": p.name, "path": str(p), "sha256": sha, "reason": reason,
                            "duplicate_of": {"id": first[0], "path": first[1], "processed_at": first[2]}})
        new = outbox.enqueue(conn, alert, self.config.alerts.channels)
        return FileOutcome(str(p), "duplicate", file_id=file_id, sha256=sha, moved_to=str(target), reason=reason,
                           alerts=(alert.dedup_key,) if new else ())

    @staticmethod
    def _insert_processing(conn: sqlite3.Connection, p: Path, sha: str, st: os.stat_result, at: str) -> int:
        cur = conn.execute("INSERT INTO files(sha256, path, size, mtime, first_seen_at, state)"
                           " VALUES (?,?,?,?,?,'processing')", (sha, str(p), st.st_size, st.st_mtime, at))
        return int(cur.lastrowid)

    def _plan_target(self, conn: sqlite3.Connection, root: Path, name: str, now: datetime) -> Path:
        def planned(c: Path) -> bool:
            return conn.execute("SELECT 1 FROM files WHERE archived_path = ? LIMIT 1", (str(c),)).fetchone() is not None
        return archive.free_name(archive.dated_folder(root, now), name, planned)

    # -- the done transaction ------------------------------------------------------------------
    def _take(self, file_id: int, p: Path, sha: str, now: datetime, export: Any, profile: Any) -> FileOutcome:
        at = utc_iso(now)
        channels = self.config.alerts.channels
        new_alerts: list[str] = []
        verdicts: list[Verdict] = []
        closed: list[str] = []
        with self.store.write() as conn:
            state = conn.execute("SELECT state FROM files WHERE id = ?", (file_id,)).fetchone()
            if state is None or state[0] != "processing":  # another thread finished it meanwhile
                return FileOutcome(str(p), "archived", file_id=file_id, sha256=sha, reason="already handled")
            prev = conn.execute("SELECT id, sha256, processed_at FROM files WHERE path = ? AND state = 'done'"
                                " AND sha256 != ? ORDER BY id DESC LIMIT 1", (str(p), sha)).fetchone()
            status = "taken"
            if prev is not None:
                status = "revision"
                conn.execute("UPDATE files SET revision_of = ? WHERE id = ?", (prev[0], file_id))
                Store.audit(conn, at, "file-revised", file_id=file_id, detail={"path": str(p), "sha256": sha,
                                                                              "previous": prev[0]})
                alert = Alert(kind="file-revised", dedup_key=f"file-revised|{file_id}", created_at=at,
                              data={"file": p.name, "path": str(p), "sha256": sha,
                                    "reason": "a file at a known path arrived with different content;"
                                              " its rows are counted as new rows",
                                    "previous": {"id": prev[0], "sha256": prev[1], "processed_at": prev[2]}})
                if outbox.enqueue(conn, alert, channels):
                    new_alerts.append(alert.dedup_key)
            kind = str(getattr(export, "kind", "values"))
            density = _density(export, profile)
            if kind == "summary":
                n_values = self._take_summaries(conn, file_id, p, export, density, at, verdicts, new_alerts)
            else:
                n_values = self._take_values(conn, file_id, p, export, density, now, verdicts, new_alerts, closed)
            target = self._plan_target(conn, self.config.state.archive, p.name, now)
            n_bad = _count(getattr(export, "bad_rows", None))
            conn.execute("UPDATE files SET state='done', processed_at=?, archived_path=?, kind=?, n_values=?,"
                         " n_bad_rows=? WHERE id=?", (at, str(target), kind, n_values, n_bad, file_id))
            Store.audit(conn, at, "file-taken", file_id=file_id,
                        detail={"path": str(p), "sha256": sha, "kind": kind, "values": n_values, "bad_rows": n_bad,
                                "profile": getattr(profile, "name", None), "archived_path": str(target)})
        self._maybe_crash("after-commit")
        self._maybe_crash("before-archive")
        moved = self._finish_move(file_id, p, target, "done")
        return FileOutcome(str(p), status, file_id=file_id, sha256=sha, n_values=n_values, lots_closed=tuple(closed),
                           verdicts=tuple(verdicts), alerts=tuple(new_alerts), moved_to=moved)

    def _take_values(self, conn: sqlite3.Connection, file_id: int, p: Path, export: Any, density: float | None,
                     now: datetime, verdicts: list[Verdict], new_alerts: list[str], closed: list[str]) -> int:
        rows: pd.DataFrame = export.rows
        n = len(rows)
        if n == 0 and not _markers(export):
            return 0
        at, ts = utc_iso(now), now.timestamp()
        line_c = _texts(rows, "line", n)
        prod_c = _texts(rows, "product", n)
        lot_c = _texts(rows, "lot", n)
        keys = [LotKey(a, b, c) for a, b, c in zip(line_c, prod_c, lot_c)]
        src = rows["source_line"].to_numpy(dtype=np.int64).tolist() if "source_line" in rows else list(range(1, n + 1))
        vals = rows["value"].to_numpy(dtype=np.float64)
        value_c = [float(v) if np.isfinite(v) else None for v in vals.tolist()]
        unit_c = _texts(rows, "unit", n, default=getattr(export, "unit", "") or "g")
        head_c = _texts(rows, "head", n)
        time_c = _times(rows, n)
        open_rows = conn.execute("SELECT id, line, product, lot FROM lots WHERE state = 'open' ORDER BY id").fetchall()
        open_by_line = {r[1]: LotKey(r[1], r[2], r[3]) for r in open_rows}
        plan = lots.plan_file(open_by_line, lots.find_runs(keys), src, _markers(export))
        crashed_check = False
        for step in plan.steps:
            if isinstance(step, lots.Segment):
                lot_id, seq0 = self._open_lot(conn, step.key, at, ts, step.stop - step.start, file_id)
                k = step.key
                conn.executemany(
                    "INSERT INTO lot_values(lot_id, line, product, lot, seq, value, unit, density, head, timestamp,"
                    " file_id, source_line) VALUES (?,?,?,?,?,?,?,?,?,?,?,?)",
                    [(lot_id, k.line, k.product, k.lot, seq0 + j, value_c[i], unit_c[i], density, head_c[i],
                      time_c[i], file_id, src[i]) for j, i in enumerate(range(step.start, step.stop))])
                if not crashed_check:
                    crashed_check = True
                    self._maybe_crash("mid-values")
            else:
                v = self._close_lot(conn, step.key, step.reason, at, file_id, new_alerts)
                if v is not None:
                    verdicts.append(v)
                    closed.append(_lot_name(step.key))
        return n

    def _open_lot(self, conn: sqlite3.Connection, key: LotKey, at: str, ts: float, count: int,
                  file_id: int) -> tuple[int, int]:
        """Make ``key`` the open lot (creating or reopening it), add ``count`` to it; return (id, first seq)."""
        row = conn.execute("SELECT id, state, n FROM lots WHERE line=? AND product=? AND lot=?",
                           (key.line, key.product, key.lot)).fetchone()
        if row is None:
            cur = conn.execute("INSERT INTO lots(line, product, lot, state, opened_at, last_value_at, last_value_ts, n)"
                               " VALUES (?,?,?,'open',?,?,?,?)", (key.line, key.product, key.lot, at, at, ts, count))
            Store.audit(conn, at, "lot-opened", file_id=file_id, line=key.line, product=key.product, lot=key.lot)
            return int(cur.lastrowid), 1
        lot_id, state, n = row
        if state == "closed":
            conn.execute("UPDATE lots SET state='open', closed_at=NULL, close_reason=NULL, late_values=late_values+?"
                         " WHERE id=?", (count, lot_id))
            Store.audit(conn, at, "lot-reopened", file_id=file_id, line=key.line, product=key.product, lot=key.lot,
                        detail={"late_values": count, "values_before": n,
                                "policy": "late values reopen the lot; it is judged again over all its values"})
        conn.execute("UPDATE lots SET n = n + ?, last_value_at = ?, last_value_ts = ? WHERE id = ?",
                     (count, at, ts, lot_id))
        return int(lot_id), int(n) + 1

    def _close_lot(self, conn: sqlite3.Connection, key: LotKey, reason: str, at: str, file_id: int | None,
                   new_alerts: list[str]) -> Verdict | None:
        row = conn.execute("SELECT id FROM lots WHERE line=? AND product=? AND lot=? AND state='open'",
                           (key.line, key.product, key.lot)).fetchone()
        if row is None:
            return None
        lot_id = int(row[0])
        conn.execute("UPDATE lots SET state='closed', closed_at=?, close_reason=?, times_closed=times_closed+1"
                     " WHERE id=?", (at, reason, lot_id))
        Store.audit(conn, at, "lot-closed", file_id=file_id, line=key.line, product=key.product, lot=key.lot,
                    detail={"reason": reason})
        rule = match_rule(self.rules, key.product)
        data, problem = judge.load_lot_values(conn, lot_id, key, rule)
        verdict = judge.judge(data, rule, problem, self._engine())
        alert = judge.record_verdict(conn, verdict, rule, data, at=at, channels=self.config.alerts.channels,
                                     lot_id=lot_id, close_reason=reason, file_id=file_id)
        if alert is not None:
            new_alerts.append(alert.dedup_key)
        return verdict

    def _take_summaries(self, conn: sqlite3.Connection, file_id: int, p: Path, export: Any, density: float | None,
                        at: str, verdicts: list[Verdict], new_alerts: list[str]) -> int:
        s: pd.DataFrame = export.summaries
        n = len(s)
        line_c, prod_c, lot_c = _texts(s, "line", n), _texts(s, "product", n), _texts(s, "lot", n)
        unit_c = _texts(s, "unit", n, default=getattr(export, "unit", "") or "g")
        time_c = _times(s, n)
        src = s["source_line"].to_numpy(dtype=np.int64).tolist() if "source_line" in s else list(range(1, n + 1))
        ns = s["n"].to_numpy(dtype=np.int64).tolist()
        means = s["mean"].to_numpy(dtype=np.float64).tolist()
        sds = s["sd"].to_numpy(dtype=np.float64).tolist()
        for i in range(n):
            key = LotKey(line_c[i], prod_c[i], lot_c[i])
            cur = conn.execute("INSERT INTO lot_summaries(file_id, source_line, line, product, lot, n, mean, sd, unit,"
                               " density, timestamp) VALUES (?,?,?,?,?,?,?,?,?,?,?)",
                               (file_id, src[i], key.line, key.product, key.lot, ns[i], means[i], sds[i], unit_c[i],
                                density, time_c[i]))
            rule = match_rule(self.rules, key.product)
            data, problem = judge.summary_lot(key, ns[i], means[i], sds[i], unit_c[i], density, rule, str(p))
            verdict = judge.judge(data, rule, problem, self._engine())
            alert = judge.record_verdict(conn, verdict, rule, data, at=at, channels=self.config.alerts.channels,
                                         summary_id=int(cur.lastrowid), close_reason="summary", file_id=file_id)
            verdicts.append(verdict)
            if alert is not None:
                new_alerts.append(alert.dedup_key)
        return n

    # -- rejected files, moves -----------------------------------------------------------------
    def _reject(self, file_id: int, p: Path, sha: str, now: datetime, reason: str,
                exc: ExportError | None) -> FileOutcome:
        at = utc_iso(now)
        with self.store.write() as conn:
            target = self._plan_target(conn, self.config.state.quarantine, p.name, now)
            conn.execute("UPDATE files SET state='rejected', processed_at=?, archived_path=?, reason=? WHERE id=?",
                         (at, str(target), reason, file_id))
            Store.audit(conn, at, "file-rejected", file_id=file_id, detail={"path": str(p), "sha256": sha,
                                                                           "reason": reason})
            data = {"file": p.name, "path": str(p), "sha256": sha, "reason": reason,
                    "quarantined_to": str(target)}
            if exc is not None:
                data.update({"line": exc.line, "key": exc.key})
            alert = Alert(kind="file-rejected", dedup_key=f"file-rejected|{file_id}", created_at=at, data=data)
            new = outbox.enqueue(conn, alert, self.config.alerts.channels)
        moved = self._finish_move(file_id, p, target, "rejected")
        return FileOutcome(str(p), "rejected", file_id=file_id, sha256=sha, reason=reason, moved_to=moved,
                           alerts=(alert.dedup_key,) if new else ())

    def _finish_move(self, file_id: int, src: Path, target: Path, state: str) -> str | None:
        """Move ``src`` to its planned ``target`` (another free name if taken) and record it."""
        if state == "rejected":
            with self.store.read() as conn:
                reason = conn.execute("SELECT reason, sha256, processed_at FROM files WHERE id=?",
                                      (file_id,)).fetchone()
        final = target
        try:
            if src.exists():
                if target.exists():  # never overwrite: the file goes beside it under a free name
                    final = archive.free_name(target.parent, target.name)
                archive.move_file(src, final)
            elif not target.exists():
                log.warning("file %s (id %s) is neither in the drop folder nor at %s", src, file_id, target)
                return None
            if state == "rejected":
                archive.write_reason(final, _reason_text(src, final, *reason))
        except OSError as exc:
            log.error("cannot move %s to %s: %s; will retry", src, final, exc)
            return None
        self._maybe_crash("after-archive")
        with self.store.write() as conn:
            conn.execute("UPDATE files SET archived_at=?, archived_path=? WHERE id=?",
                         (utc_iso(self.clock()), str(final), file_id))
        return str(final)

    # -- periodic and start-up work ------------------------------------------------------------
    def close_idle(self, now: datetime | None = None, *, idle_seconds_override: float | None = None) -> list[Verdict]:
        """Close and judge every open lot idle for its rule's ``idle_minutes`` (or the override) at ``now``."""
        with self._lock:
            moment = now or self.clock()
            at, ts = utc_iso(moment), moment.timestamp()
            default_idle = float(RULE_KEYS["idle_minutes"][0]) * 60.0

            def idle_for(key: LotKey) -> float:
                if idle_seconds_override is not None:
                    return idle_seconds_override
                rule = match_rule(self.rules, key.product)
                return rule.idle_minutes * 60.0 if rule else default_idle

            out: list[Verdict] = []
            with self.store.write() as conn:
                rows = conn.execute("SELECT line, product, lot, last_value_ts FROM lots WHERE state='open'"
                                    " ORDER BY id").fetchall()
                for key in lots.idle_lots([(LotKey(r[0], r[1], r[2]), r[3]) for r in rows], ts, idle_for):
                    v = self._close_lot(conn, key, lots.IDLE, at, None, [])
                    if v is not None:
                        out.append(v)
            return out

    def recover(self) -> list[FileOutcome]:
        """Start-up: finish moves of handled files left in place; retry files left 'processing'."""
        with self._lock:
            out: list[FileOutcome] = []
            with self.store.read() as conn:
                rows = conn.execute("SELECT id, path, archived_path, state, sha256 FROM files"
                                    " WHERE archived_at IS NULL ORDER BY id").fetchall()
            for file_id, path, target, state, sha in rows:
                if state == "processing":
                    outcome = self.process(path)
                    out.append(outcome)
                    if outcome.file_id != file_id:
                        self._abandon(file_id, path, sha, outcome)
                    continue
                src = Path(path)
                if src.exists() and _sha_of(src) != sha:
                    self._skip_move(file_id, path, "the drop folder now holds different content under this"
                                                   " name; the scan takes it as a new file")
                    continue
                moved = self._finish_move(file_id, src, Path(target), state)
                out.append(FileOutcome(path, "archived", file_id=file_id, sha256=sha, moved_to=moved,
                                       reason=f"already {state}; finished its move"))
            return out

    def _skip_move(self, file_id: int, path: str, why: str) -> None:
        at = utc_iso(self.clock())
        with self.store.write() as conn:
            conn.execute("UPDATE files SET archived_at=? WHERE id=?", (at, file_id))
            Store.audit(conn, at, "file-move-skipped", file_id=file_id, detail={"path": path, "why": why})

    def _abandon(self, file_id: int, path: str, sha: str, outcome: FileOutcome) -> None:
        """A 'processing' row whose file vanished or changed before it could be taken."""
        at = utc_iso(self.clock())
        if outcome.status == "vanished":
            reason = "the file disappeared from the drop folder before it was processed; its values are not stored"
        else:
            reason = f"the file changed before it was processed; the new content is file {outcome.file_id}"
        with self.store.write() as conn:
            conn.execute("UPDATE files SET state='rejected', processed_at=?, archived_at=?, reason=? WHERE id=?",
                         (at, at, reason, file_id))
            Store.audit(conn, at, "file-rejected", file_id=file_id, detail={"path": path, "reason": reason})
            if outcome.status == "vanished":
                alert = Alert(kind="file-rejected", dedup_key=f"file-rejected|{file_id}", created_at=at,
                              data={"file": Path(path).name, "path": path, "sha256": sha, "reason": reason})
                outbox.enqueue(conn, alert, self.config.alerts.channels)

    # -- helpers -------------------------------------------------------------------------------
    def _engine(self) -> judge.Evaluator:
        if self._evaluate is not None:
            return self._evaluate
        from monitor import engine
        return engine.evaluate

    def _maybe_crash(self, point: str) -> None:
        if self._crash is not None and self._crash == (point, self._calls):
            os.kill(os.getpid(), signal.SIGKILL)


def _parse_crash(text: str) -> tuple[str, int] | None:
    text = text.strip()
    if not text:
        return None
    point, _, n = text.partition(":")
    if point not in CRASH_POINTS:
        raise ValueError(f"{CRASH_ENV}={text!r}: point must be one of {', '.join(CRASH_POINTS)}")
    return point, int(n) if n else 1


def _sha_of(path: Path) -> str | None:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return None


def _texts(df: pd.DataFrame, col: str, n: int, default: str = "") -> list[str]:
    if col not in df:
        return [default] * n
    s = df[col]
    return [default if (x is None or (isinstance(x, float) and x != x) or x is pd.NA) else str(x)
            for x in s.tolist()]


def _times(df: pd.DataFrame, n: int) -> list[str | None]:
    if "timestamp" not in df:
        return [None] * n
    out: list[str | None] = []
    for x in df["timestamp"].tolist():
        if x is None or x is pd.NaT or (isinstance(x, float) and x != x) or x is pd.NA:
            out.append(None)
        elif hasattr(x, "isoformat"):
            out.append(x.isoformat())
        else:
            out.append(str(x))
    return out


def _markers(export: Any) -> list[lots.Marker]:
    """End-of-lot markers of an export, whatever container the reader uses (frame, ints, records)."""
    m = getattr(export, "end_of_lot", None)
    if m is None:
        return []
    if isinstance(m, pd.DataFrame):
        sl = m["source_line"].tolist() if "source_line" in m else []
        lc = m["lot"].tolist() if "lot" in m else [None] * len(sl)
        return [lots.Marker(int(a), lot=None if b is None or (isinstance(b, float) and b != b) else str(b))
                for a, b in zip(sl, lc)]
    out: list[lots.Marker] = []
    for item in m:
        if isinstance(item, (int, np.integer)):
            out.append(lots.Marker(int(item)))
        elif hasattr(item, "source_line"):
            line = getattr(item, "line", None)
            lot = getattr(item, "lot", None)
            out.append(lots.Marker(int(item.source_line), lot=None if lot is None else str(lot),
                                   line=None if line is None else str(line)))
        elif isinstance(item, (tuple, list)) and item:
            # the reader's form: (source line, lot code the marker ends)
            out.append(lots.Marker(int(item[0]), lot=None if len(item) < 2 or item[1] is None else str(item[1])))
    return out


def _density(export: Any, profile: Any) -> float | None:
    d = getattr(export, "density", None)
    if d is None:
        d = getattr(profile, "density", None)
    return None if d is None else float(d)


def _count(x: Any) -> int:
    if x is None:
        return 0
    if isinstance(x, (int, np.integer)):
        return int(x)
    try:
        return len(x)
    except TypeError:
        return 0


def _reason_text(src: Path, target: Path, reason: str | None, sha: str | None, at: str | None) -> str:
    return (f"file: {src.name}\nfrom: {src}\nquarantined as: {target.name}\nat: {at}\nsha256: {sha}\n"
            f"reason: {reason}\n")
