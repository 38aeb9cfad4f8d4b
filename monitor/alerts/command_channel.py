"""The command channel: runs the configured program once per alert with the alert JSON on stdin (no shell).

Exit code 0 means delivered; 75 (EX_TEMPFAIL) or a timeout means try again later; any other exit code,
or a program that cannot be started, means give up (the delivery is marked dead and reported elsewhere).
"""

from __future__ import annotations

import os
import subprocess
import threading

from monitor.alerts.channel import OneAtATime
from monitor.alerts.delivery import GiveUp, RetryLater
from monitor.alerts.settings import CommandSettings

EX_TEMPFAIL = 75
# The only variables the hook inherits: enough to find programs and decode text, never the daemon's secrets
# (the SMTP password variable, whatever its name, is not among them).
PASSED_ENV = ("PATH", "HOME", "LANG", "LC_ALL", "LC_CTYPE", "TZ", "TMPDIR", "USER", "LOGNAME")


def hook_environment() -> dict[str, str]:
    """The minimal environment the command hook runs in."""
    return {k: os.environ[k] for k in PASSED_ENV if k in os.environ}


class CommandChannel(OneAtATime):
    """Runs ``settings.argv`` for each alert."""

    name = "command"

    def __init__(self, settings: CommandSettings) -> None:
        self.settings = settings
        self.retry_first_seconds = settings.retry_first_seconds
        self.retry_max_seconds = settings.retry_max_seconds
        self._lock = threading.Lock()
        self._running: subprocess.Popen[bytes] | None = None
        self._aborted = False

    def send(self, payload: str) -> None:
        """Run the command with ``payload`` + newline on stdin; raise RetryLater / GiveUp on failure."""
        with self._lock:
            if self._aborted:
                raise RetryLater("shutting down; the alert stays in the outbox")
            try:
                proc = subprocess.Popen(list(self.settings.argv), stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                        stderr=subprocess.PIPE, shell=False, env=hook_environment())
            except OSError as exc:
                raise GiveUp(f"command {self.settings.argv[0]!r} cannot be started: "
                             f"{exc.strerror or type(exc).__name__}") from None
            self._running = proc
        try:
            try:
                _out, err = proc.communicate((payload + "\n").encode("utf-8"), timeout=self.settings.timeout)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.communicate()
                raise RetryLater(f"command timed out after {self.settings.timeout:g} s and was killed") from None
        finally:
            with self._lock:
                self._running = None
        if self._aborted and proc.returncode != 0:
            raise RetryLater("command stopped by shutdown; the alert stays in the outbox")
        if proc.returncode == 0:
            return
        tail = err.decode("utf-8", "replace").strip()[-300:]
        message = f"command exited with {proc.returncode}" + (f": {tail}" if tail else "")
        if proc.returncode == EX_TEMPFAIL:
            raise RetryLater(message)
        raise GiveUp(message)

    def abort(self) -> None:
        """Kill a hook still running and start no more (shutdown)."""
        with self._lock:
            self._aborted = True
            if self._running is not None and self._running.poll() is None:
                self._running.kill()
