"""The daemon's logging: one line per event on stderr (or a given stream), UTC times, tracebacks folded in."""

from __future__ import annotations

import logging
import sys
import time
from typing import TextIO


class OneLineFormatter(logging.Formatter):
    """ISO-8601 UTC time, level, logger, message — and any traceback folded onto the same line."""

    converter = time.gmtime

    def __init__(self) -> None:
        super().__init__("%(asctime)s %(levelname)s %(name)s: %(message)s", "%Y-%m-%dT%H:%M:%SZ")

    def format(self, record: logging.LogRecord) -> str:
        text = super().format(record)
        return text.replace("\r", "").replace("\n", " | ")


_LOGGERS = {"lotwarden": logging.INFO, "monitor": logging.INFO, "apscheduler": logging.WARNING,
            "watchdog": logging.WARNING}


class LogSetup:
    """The daemon's log handler on the project's (and its libraries') loggers; ``undo()`` restores them."""

    def __init__(self, stream: TextIO | None = None) -> None:
        self.handler = logging.StreamHandler(stream or sys.stderr)
        self.handler.setFormatter(OneLineFormatter())
        self.handler.addFilter(_drop_shutdown_race)
        self._levels: dict[str, int] = {}
        for name, level in _LOGGERS.items():
            lg = logging.getLogger(name)
            self._levels[name] = lg.level
            lg.setLevel(level)
            lg.addHandler(self.handler)   # records still propagate: an embedding program's handlers see them

    def undo(self) -> None:
        for name, level in self._levels.items():
            lg = logging.getLogger(name)
            lg.removeHandler(self.handler)
            lg.setLevel(level)
        self.handler.flush()


def _drop_shutdown_race(record: logging.LogRecord) -> bool:
    """watchdog 7's inotify emitter logs this error when it is stopped while reading; it is harmless."""
    return not (record.name.startswith("watchdog") and "called when the thread is inactive" in record.getMessage())
