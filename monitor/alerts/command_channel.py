"""The command channel: runs the configured program once per alert with the alert JSON on stdin (no shell).

Exit code 0 means delivered; 75 (EX_TEMPFAIL) or a timeout means try again later; any other exit code,
or a program that cannot be started, means give up (the delivery is marked dead and reported elsewhere).
"""

from __future__ import annotations

import os
import subprocess

from monitor.alerts.delivery import GiveUp, RetryLater
from monitor.alerts.settings import CommandSettings

EX_TEMPFAIL = 75
# The only variables the hook inherits: enough to find programs and decode text, never the daemon's secrets
# (the SMTP password variable, whatever its name, is not among them).
PASSED_ENV = ("PATH", "HOME", "LANG", "LC_ALL", "LC_CTYPE", "TZ", "TMPDIR", "USER", "LOGNAME")


def hook_environment() -> dict[str, str]:
    """The minimal environment the command hook runs in."""
    return {k: os.environ[k] for k in PASSED_ENV if k in os.environ}


class CommandChannel:
    """Runs ``settings.argv`` for each alert."""

    name = "command"

    def __init__(self, settings: CommandSettings) -> None:
        self.settings = settings

    def send(self, payload: str) -> None:
        """Run the command with ``payload`` + newline on stdin; raise RetryLater / GiveUp on failure."""
        try:
            done = subprocess.run(list(self.settings.argv), input=(payload + "\n").encode("utf-8"),
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                  timeout=self.settings.timeout, shell=False, check=False,
                                  env=hook_environment())
        except subprocess.TimeoutExpired:
            raise RetryLater(f"command timed out after {self.settings.timeout:g} s and was killed") from None
        except OSError as exc:
            raise GiveUp(f"command {self.settings.argv[0]!r} cannot be started: "
                         f"{exc.strerror or type(exc).__name__}") from None
        if done.returncode == 0:
            return
        tail = done.stderr.decode("utf-8", "replace").strip()[-300:]
        message = f"command exited with {done.returncode}" + (f": {tail}" if tail else "")
        if done.returncode == EX_TEMPFAIL:
            raise RetryLater(message)
        raise GiveUp(message)
