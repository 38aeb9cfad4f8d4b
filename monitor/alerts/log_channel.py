"""The log channel: appends each alert as one JSON line (``Alert.to_json()``) to a file, flushed and fsynced."""

from __future__ import annotations

import os
from pathlib import Path

from monitor.alerts.channel import OneAtATime
from monitor.alerts.delivery import RetryLater


class LogChannel(OneAtATime):
    """Appends alert JSON lines to ``path`` (its folder is created if missing)."""

    name = "log"

    def __init__(self, path: Path, retry_max_seconds: float = 60.0) -> None:
        self.path = Path(path)
        self.retry_first_seconds = 1.0
        self.retry_max_seconds = retry_max_seconds

    def send(self, payload: str) -> None:
        """Append ``payload`` (one ``Alert.dumps()`` string) plus a newline; durable when this returns.

        Raises RetryLater on any OS error (disk full, folder not writable), so the alert stays pending.
        """
        line = payload.replace("\n", " ").replace("\r", " ") + "\n"   # dumps() never has one; belt and braces
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o640)
            try:
                data = line.encode("utf-8")
                written = 0
                while written < len(data):
                    written += os.write(fd, data[written:])
                os.fsync(fd)
            finally:
                os.close(fd)
        except OSError as exc:
            raise RetryLater(f"cannot append to {self.path}: {exc.strerror or type(exc).__name__}") from None
