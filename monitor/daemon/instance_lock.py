"""One daemon per state folder: an exclusive advisory lock on ``<state>/lotwarden.lock`` held while it runs.

The lock is an ``flock`` on an open file, so the kernel releases it when the process ends in any way (a
SIGKILL included): a crashed daemon never leaves a stale lock behind. The file names the holder (pid and
host) so a second ``lotwarden run`` can say which process is using the folder. Nothing is ever deleted.
"""

from __future__ import annotations

import fcntl
import os
import socket
from pathlib import Path

from monitor.errors import ConfigError

LOCK_NAME = "lotwarden.lock"


class InstanceLock:
    """The held lock of one state folder; ``release()`` (or process exit) lets it go."""

    def __init__(self, path: Path, fd: int) -> None:
        self.path = path
        self._fd: int | None = fd

    @classmethod
    def acquire(cls, folder: str | Path) -> InstanceLock:
        """Take the folder's lock, or raise ConfigError naming the process that holds it."""
        path = Path(folder) / LOCK_NAME
        fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_holder(fd)
            os.close(fd)
            raise ConfigError(f"the state folder is in use by another lotwarden ({holder}); one daemon per "
                              "state folder", path=str(Path(folder)),
                              hint="stop the other daemon first, or give this one its own [state] folder"
                              ) from None
        except OSError:
            os.close(fd)
            raise
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"pid {os.getpid()} on {socket.gethostname()}\n".encode(), 0)
        return cls(path, fd)

    def release(self) -> None:
        if self._fd is not None:
            fd, self._fd = self._fd, None
            os.close(fd)   # closing the descriptor releases the flock


def _read_holder(fd: int) -> str:
    """What the lock file says of its holder (pid and host), printable and short."""
    try:
        text = os.pread(fd, 200, 0).decode("utf-8", "replace").strip()
    except OSError:
        text = ""
    text = "".join(c for c in text if c.isprintable())[:120]
    return text or "holder unknown"
