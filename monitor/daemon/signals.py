"""The daemon's signal handling: SIGTERM/SIGINT stop it, SIGHUP reloads; handlers only set flags."""

from __future__ import annotations

import logging
import signal
import threading
from collections.abc import Callable
from types import FrameType

log = logging.getLogger("lotwarden.daemon")

Handler = Callable[[int, FrameType | None], object] | int | signal.Handlers | None


class SignalHandling:
    """Installs and restores the handlers; the loop thread logs what arrived (``log_arrived``).

    ``stop`` is called for SIGTERM/SIGINT and ``reload`` for SIGHUP, from the signal handler: both must
    only set flags.
    """

    def __init__(self, stop: Callable[[], None], reload: Callable[[], None]) -> None:
        self._stop = stop
        self._reload = reload
        self.arrived: list[str] = []

    def install(self) -> dict[int, Handler]:
        """Install the handlers (main thread only; elsewhere nothing is installed); return the old ones."""
        if threading.current_thread() is not threading.main_thread():
            return {}
        old: dict[int, Handler] = {}
        for sig, fn in ((signal.SIGTERM, self._on_stop_signal), (signal.SIGINT, self._on_stop_signal),
                        (signal.SIGHUP, self._on_hup)):
            old[sig] = signal.signal(sig, fn)
        return old

    @staticmethod
    def restore(old: dict[int, Handler]) -> None:
        for sig, fn in old.items():
            signal.signal(sig, fn)

    # Handlers only set flags (no logging inside a signal handler); the loop logs what arrived.
    def _on_stop_signal(self, signum: int, frame: FrameType | None) -> None:
        self.arrived.append(signal.Signals(signum).name)
        self._stop()

    def _on_hup(self, signum: int, frame: FrameType | None) -> None:
        self.arrived.append("SIGHUP")
        self._reload()

    def log_arrived(self) -> None:
        while self.arrived:
            name = self.arrived.pop(0)
            if name == "SIGHUP":
                log.info("SIGHUP: reloading config and rules")
            else:
                log.info("%s: finishing the file in hand, then stopping", name)
