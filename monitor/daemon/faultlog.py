"""The intake's persistent faults: a fault tracker per place, one log line per backoff step, alert events.

Places (*where*) are the state database and the archive / quarantine roots; a fault there is keyed by where +
kind (:func:`monitor.daemon.faults.fault_key`), never by the file that met it. OS and database errors are
logged in a few words, without a traceback.
"""

from __future__ import annotations

import logging
import sqlite3
from collections.abc import Callable

from monitor.daemon.faults import Cleared, FaultPolicy, FaultStep, FaultTracker, fault_key

log = logging.getLogger("lotwarden.intake")

# What the database raises when the machine is at fault, not the file (disk full, I/O error, locked past the
# busy timeout): a persistent fault, retried with backoff; never a reason to quarantine the file in hand.
DB_FAULTS: tuple[type[BaseException], ...] = (sqlite3.OperationalError,)
FaultEvent = FaultStep | Cleared


class FaultLog:
    """A :class:`FaultTracker` with the daemon's logging and the events that want an alert."""

    def __init__(self, policy: FaultPolicy, clock: Callable[[], float]) -> None:
        self.tracker = FaultTracker(policy)
        self._clock = clock
        self._events: list[FaultEvent] = []

    def ready(self, where: str) -> bool:
        """May ``where`` be tried now (no fault there waiting out its backoff)?"""
        return self.tracker.ready_where(where, self._clock())

    def open_fault(self, where: str) -> str | None:
        """'<where>: <kind>' of a fault open at ``where``, if any."""
        keys = [k for k in self.tracker.open_keys() if k.rpartition(": ")[0] == where]
        return keys[0] if keys else None

    def failed(self, where: str, exc: BaseException, what: str, *, traceback: bool = False) -> FaultStep:
        """One failed attempt at ``where``: logged once per backoff step (a traceback only if asked, for bugs)."""
        message = f"{what}: {error_text(exc)}"
        step = self.tracker.failed(fault_key(where, exc), message, self._clock())
        if step.log:
            log.error("%s failed (%s); nothing is lost: files wait in the drop folder; retrying in %gs"
                      " (attempt %d, failing for %.0fs)", where, message, step.retry_in, step.attempts,
                      step.lasting_seconds, exc_info=exc if traceback else None)
        if step.alert:
            log.error("fault persisting: %s has failed for %.0fs (%d attempts): %s; an alert is raised",
                      where, step.lasting_seconds, step.attempts, message)
            self._events.append(step)
        return step

    def worked(self, where: str) -> None:
        """Something at ``where`` worked: its faults have cleared (said; an alerted one is an event too)."""
        for cleared in self.tracker.succeeded_where(where, self._clock()):
            (log.warning if cleared.alerted else log.info)(
                "fault cleared: %s works again after %.0fs and %d failed attempts (%s)", where,
                cleared.lasted_seconds, cleared.attempts, cleared.message)
            if cleared.alerted:
                self._events.append(cleared)

    def take_events(self) -> list[FaultEvent]:
        """The events that want an alert since the last call, each handed out once."""
        out, self._events = self._events, []
        return out


def error_text(exc: BaseException) -> str:
    """An error in a few words, without a traceback (an OS error's text and path; else the message)."""
    if isinstance(exc, OSError) and exc.strerror:
        return f"{exc.strerror} ({exc.filename})" if exc.filename else exc.strerror
    return str(exc) or type(exc).__name__


def root_db_error(exc: BaseException) -> BaseException:
    """The first database error of a chain: when SQLite has already rolled back on a full disk or an I/O error,
    the ROLLBACK that follows fails too ("no transaction is active"), hiding the cause in ``__context__``."""
    found = exc
    cur: BaseException | None = exc
    for _ in range(10):
        if cur is None:
            break
        if isinstance(cur, DB_FAULTS):
            found = cur
        cur = cur.__context__
    return found
