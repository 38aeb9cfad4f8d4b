"""Persistent faults (a full disk, a read-only archive, a locked database): back off, log once per step, alert.

A fault is keyed by *where* it happens and *what* it is (``"moving files to /srv/archive"``,
``"ENOSPC"``), not by the file that met it, so ten files failing on one full disk are one fault.
The tracker is pure: the caller passes the clock's reading and acts on what it is told.

* Retries back off: 1 s, 2 s, 4 s … up to ``max_retry_seconds`` (5 min by default).
* The log says the fault once per backoff step (``FaultStep.log``), not once per failed attempt.
* A fault that lasts ``alert_after_seconds`` (3 min by default) raises one alert (``FaultStep.alert``);
  when it clears, one more (``Cleared.alerted`` tells the caller that the first one was sent).

``LOTWARDEN_FAULT_ALERT_AFTER`` (seconds, a test and operations knob) overrides ``alert_after_seconds`` where
the daemon builds its tracker (:func:`policy_from_env`).
"""

from __future__ import annotations

import errno
import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass, field

log = logging.getLogger("lotwarden.faults")

ALERT_AFTER_ENV = "LOTWARDEN_FAULT_ALERT_AFTER"


@dataclass(frozen=True)
class FaultPolicy:
    """How the daemon retries and when it tells people (seconds)."""

    first_retry_seconds: float = 1.0
    max_retry_seconds: float = 300.0
    alert_after_seconds: float = 180.0


@dataclass(frozen=True)
class FaultStep:
    """What to do after one failed attempt."""

    key: str
    message: str
    attempts: int            # failed attempts so far, this one included
    lasting_seconds: float   # since the first failure of this fault
    retry_in: float          # wait this long before the next attempt
    log: bool                # True on the first failure and at each new backoff step
    alert: bool              # True once, when the fault has lasted alert_after_seconds
    first_at: float = 0.0    # the clock's reading at the first failure (names this occurrence of the fault)


@dataclass(frozen=True)
class Cleared:
    """A fault that has gone: how long it lasted, how many attempts failed, whether it was alerted."""

    key: str
    message: str
    attempts: int
    lasted_seconds: float
    alerted: bool
    first_at: float = 0.0    # as FaultStep.first_at: a clear and its persisting alert share it


@dataclass
class _Open:
    first_at: float
    attempts: int = 0
    step: int = -1
    next_at: float = 0.0
    alerted: bool = False
    message: str = ""


@dataclass
class FaultTracker:
    """Open faults by key; ``failed`` / ``succeeded`` / ``ready`` drive the backoff."""

    policy: FaultPolicy = field(default_factory=FaultPolicy)
    _open: dict[str, _Open] = field(default_factory=dict)

    def failed(self, key: str, message: str, now: float) -> FaultStep:
        """Record one failed attempt of ``key`` at ``now``; say whether to log or alert and when to retry."""
        f = self._open.get(key)
        if f is None:
            f = self._open[key] = _Open(first_at=now)
        f.attempts += 1
        f.message = message
        step = max(0, f.attempts - 1)
        wait = min(self.policy.max_retry_seconds, self.policy.first_retry_seconds * 2.0 ** min(step, 30))
        # A new log line when the wait grows (1, 2, 4, ... s) and then once per max_retry period.
        log = step > f.step
        f.step = step
        f.next_at = now + wait
        lasting = now - f.first_at
        alert = not f.alerted and lasting >= self.policy.alert_after_seconds
        if alert:
            f.alerted = True
        return FaultStep(key=key, message=message, attempts=f.attempts, lasting_seconds=lasting,
                         retry_in=wait, log=log, alert=alert, first_at=f.first_at)

    def succeeded(self, key: str, now: float) -> Cleared | None:
        """``key`` worked at ``now``: the fault (if any) has cleared."""
        f = self._open.pop(key, None)
        if f is None:
            return None
        return Cleared(key=key, message=f.message, attempts=f.attempts, lasted_seconds=now - f.first_at,
                       alerted=f.alerted, first_at=f.first_at)

    def ready(self, key: str, now: float) -> bool:
        """May ``key`` be tried again at ``now``? (Always, when no fault is open for it.)"""
        f = self._open.get(key)
        return f is None or now >= f.next_at

    def ready_where(self, where: str, now: float) -> bool:
        """May anything at ``where`` be tried at ``now``? False while a fault there (any kind) waits out its
        backoff, so one attempt per step is made however many files are waiting."""
        return all(self.ready(k, now) for k in self._open if _where_of(k) == where)

    def succeeded_where(self, where: str, now: float) -> list[Cleared]:
        """Something at ``where`` worked at ``now``: every fault open there has cleared."""
        out = [self.succeeded(k, now) for k in [k for k in self._open if _where_of(k) == where]]
        return [c for c in out if c is not None]

    def open_keys(self) -> tuple[str, ...]:
        """Keys of the faults still open, oldest first."""
        return tuple(sorted(self._open, key=lambda k: self._open[k].first_at))


def fault_key(where: str, exc: BaseException) -> str:
    """The key of a fault: where it happened and the error's kind (errno name for OS errors, SQLite's error
    name such as ``SQLITE_FULL`` for database errors)."""
    code = getattr(exc, "errno", None)
    sqlite_name = getattr(exc, "sqlite_errorname", None)
    if isinstance(code, int):
        kind = errno.errorcode.get(code, type(exc).__name__)
    elif isinstance(sqlite_name, str) and sqlite_name:
        kind = sqlite_name
    else:
        kind = type(exc).__name__
    return f"{where}: {kind}"


def _where_of(key: str) -> str:
    return key.rpartition(": ")[0]


def policy_from_env(environ: Mapping[str, str]) -> FaultPolicy:
    """The daemon's policy: the default, with ``alert_after_seconds`` from ``LOTWARDEN_FAULT_ALERT_AFTER`` if set
    (a bad value is logged and the default kept)."""
    text = environ.get(ALERT_AFTER_ENV, "").strip()
    if not text:
        return FaultPolicy()
    try:
        seconds = float(text)
        if not math.isfinite(seconds) or seconds < 0:
            raise ValueError(text)
    except ValueError:
        log.warning("%s=%r is not a number of seconds >= 0; alerting after %gs", ALERT_AFTER_ENV, text[:40],
                    FaultPolicy().alert_after_seconds)
        return FaultPolicy()
    return FaultPolicy(alert_after_seconds=seconds)
