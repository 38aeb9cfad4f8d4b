"""Keeps APScheduler's "skipped: maximum number of running instances reached" warning to once per job per hour."""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable

SKIPPED_TEXT = "skipped: maximum number of running instances reached"
SCHEDULER_LOGGER = "apscheduler.scheduler"


class SkippedOncePerHour(logging.Filter):
    """Lets the first "skipped" warning of each job through, then one per ``period`` seconds, saying how
    many were held back in between (APScheduler 3 logs it at every missed run of a busy job)."""

    def __init__(self, period: float = 3600.0, clock: Callable[[], float] = time.monotonic) -> None:
        super().__init__()
        self.period = period
        self._clock = clock
        self._lock = threading.Lock()
        self._last: dict[str, float] = {}
        self._held: dict[str, int] = {}

    def filter(self, record: logging.LogRecord) -> bool:
        if SKIPPED_TEXT not in str(record.msg):
            return True
        args = record.args if isinstance(record.args, tuple) else ()
        job = args[0] if args else None
        key = str(getattr(job, "id", None) or job)
        now = self._clock()
        with self._lock:
            last = self._last.get(key)
            if last is not None and now - last < self.period:
                self._held[key] = self._held.get(key, 0) + 1
                return False
            self._last[key] = now
            held = self._held.pop(key, 0)
        if held:
            record.msg = f"{record.msg} ({held} more held back in the last {self.period / 3600:g} h)"
        return True

    def install(self) -> SkippedOncePerHour:
        logging.getLogger(SCHEDULER_LOGGER).addFilter(self)
        return self

    def remove(self) -> None:
        logging.getLogger(SCHEDULER_LOGGER).removeFilter(self)
