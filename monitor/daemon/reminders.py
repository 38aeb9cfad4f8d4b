"""Reminders of holds and reviews nobody has disposed of yet: pure planning, and the daemon's periodic job.

A hold or review with no disposition of its verdict is told again every ``[alerts] reminder_minutes``: the
k-th reminder (k = whole intervals open, k >= 1) has the dedup key ``reminder|verdict_id|k``, so each k is
told once, and after a long downtime only the latest k is sent, not every one missed.
"""

from __future__ import annotations

import logging
import math
import os
import sqlite3
from collections.abc import Callable, Iterable, Sequence
from datetime import UTC, datetime
from typing import Any

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.record import LotEntry, entries
from monitor.state import openholds, outbox
from monitor.state.database import Database, utc_iso

log = logging.getLogger("lotwarden.daemon")

JOB_ID = "lotwarden-reminders"
CHECK_ENV = "LOTWARDEN_REMINDER_CHECK_SECONDS"
MAX_CHECK_SECONDS = 60.0
MIN_CHECK_SECONDS = 0.2
CHECK_SECONDS: float | None = None      # tests may set this (or the env variable) to fix the check interval


def verdict_summary(e: LotEntry) -> dict[str, Any]:
    """The verdict a disposition or reminder is about, as its alert carries it."""
    return {"verdict_id": e.verdict_id, "verdict": e.verdict, "decided_at": e.decided_at, "rule": e.rule,
            "rule_version": e.rule_version, "n": e.n, "mean": e.mean, "target": e.target, "unit": e.unit,
            "p_value": e.p_value, "reason": e.reason}


def reminder_number(opened: datetime, now: datetime, reminder_minutes: float) -> int:
    """Whole reminder intervals a verdict decided at ``opened`` has been open at ``now`` (0: none due)."""
    if reminder_minutes <= 0:
        return 0
    seconds = (now - opened).total_seconds()
    if seconds <= 0:
        return 0
    return math.floor(seconds / (reminder_minutes * 60.0) + 1e-9)


def due_reminders(open_holds: Iterable[LotEntry], now: datetime, reminder_minutes: float) -> list[Alert]:
    """The reminder alert due at ``now`` for each open hold / review (its latest number only)."""
    out = []
    for e in open_holds:
        if not e.is_open:
            continue
        k = reminder_number(e.decided, now, reminder_minutes)
        if k < 1:
            continue
        out.append(kinds.reminder(line=e.line, product=e.product, lot=e.lot, verdict_id=e.verdict_id, number=k,
                                  verdict=verdict_summary(e),
                                  open_minutes=(now - e.decided).total_seconds() / 60.0, at=utc_iso(now)))
    return out


def open_holds_in(conn: sqlite3.Connection) -> list[LotEntry]:
    """Every lot whose latest verdict is a hold or review with no disposition of that verdict, oldest first."""
    return entries(openholds.open_hold_rows(conn), {})


def check_seconds(reminder_minutes: float) -> float:
    """How often the job looks: ``CHECK_SECONDS`` or ``$LOTWARDEN_REMINDER_CHECK_SECONDS`` if set, else a
    quarter of the reminder interval, at most a minute."""
    fixed = CHECK_SECONDS
    if fixed is None and os.environ.get(CHECK_ENV):
        try:
            fixed = float(os.environ[CHECK_ENV])
        except ValueError:
            log.warning("%s=%r is not a number of seconds; ignored", CHECK_ENV, os.environ[CHECK_ENV])
    if fixed is not None and math.isfinite(fixed) and fixed > 0:
        return max(MIN_CHECK_SECONDS, fixed)
    return max(MIN_CHECK_SECONDS, min(MAX_CHECK_SECONDS, reminder_minutes * 60.0 / 4.0))


class ReminderJob:
    """Enqueues the due reminders on ``channels`` in one write transaction per check that has new ones."""

    def __init__(self, store: Database, reminder_minutes: float, channels: Sequence[str], *,
                 clock: Callable[[], datetime] = lambda: datetime.now(UTC),
                 on_enqueued: Callable[[], None] | None = None) -> None:
        self.store = store
        self.reminder_minutes = reminder_minutes
        self.channels = tuple(channels)
        self._clock = clock
        self._on_enqueued = on_enqueued
        self._told: set[str] = set()        # dedup keys this process already stored (skips needless writes)

    def open_holds(self) -> list[LotEntry]:
        with self.store.read() as conn:
            return open_holds_in(conn)

    def run(self) -> int:
        """One check; returns how many new reminders were stored."""
        due = [a for a in due_reminders(self.open_holds(), self._clock(), self.reminder_minutes)
               if a.dedup_key not in self._told]
        if not due:
            return 0
        new = 0
        with self.store.write() as conn:
            open_now = {e.verdict_id for e in open_holds_in(conn)}     # a disposition may have come meanwhile
            for a in due:
                if a.data["verdict"]["verdict_id"] in open_now and outbox.enqueue(conn, a, self.channels):
                    new += 1
        self._told.update(a.dedup_key for a in due)
        if new:
            log.info("%d reminder(s) of open holds raised", new)
            if self._on_enqueued is not None:
                self._on_enqueued()
        return new

    def job(self) -> None:
        """The scheduled job: never raises."""
        try:
            self.run()
        except Exception:
            log.exception("reminder job failed")

    def schedule(self, scheduler: Any) -> str:
        """Add the periodic check (first run at once); returns its job id."""
        scheduler.add_job(self.job, "interval", seconds=check_seconds(self.reminder_minutes), id=JOB_ID,
                          replace_existing=True, coalesce=True, max_instances=1, misfire_grace_time=60,
                          next_run_time=datetime.now(UTC))
        return JOB_ID
