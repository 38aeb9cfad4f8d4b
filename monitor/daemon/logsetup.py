"""The daemon's logging: one line per event on stderr (or a given stream), UTC times, tracebacks folded in."""

from __future__ import annotations

import logging
import sys
import time
from typing import TextIO


class OneLineFormatter(logging.Formatter):
    """ISO-8601 UTC time, level, logger, message — and any traceback folded onto the same line."""

    def __init__(self) -> None:
        super().__init__("%(asctime)s %(levelname)s %(name)s: %(message)s", "%Y-%m-%dT%H:%M:%SZ")
        self.converter = time.gmtime

    def format(self, record: logging.LogRecord) -> str:
        text = super().format(record)
        return bound_line(escape_controls(text.replace("\r", "").replace("\n", " | ")))


MAX_LINE = 8_000        # characters of one log line; a longer one keeps its start and its end
_KEEP_TAIL = 1_500      # the end of a long line (a traceback's last frames and its error)


def escape_controls(text: str) -> str:
    """Text with every non-printable character (ESC, NEL, U+2028, tabs ...) written as a Python escape, so data
    cannot move the cursor of a terminal, colour it or split one event into several lines."""
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def bound_line(text: str, limit: int = MAX_LINE) -> str:
    """``text`` cut to at most about ``limit`` characters, saying how much was left out of the middle."""
    if len(text) <= limit:
        return text
    cut = len(text) - limit
    return f"{text[:limit - _KEEP_TAIL]} …[{cut} characters cut]… {text[-_KEEP_TAIL:]}"


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
