"""The daemon's signal handling: SIGTERM/SIGINT stop it, SIGHUP reloads; handlers only set flags."""

from __future__ import annotations

import logging
import signal
import threading
from collections.abc import Callable
from typing import Any

log = logging.getLogger("lotwarden.daemon")


class SignalHandling:
    """Mixin for the daemon: installs and restores the handlers and logs what arrived from the loop thread.

    The host class provides ``_signals`` (a list of signal names), ``stop()`` and ``request_reload()``.
    """

    _signals: list[str]
    stop: Callable[[], None]
    request_reload: Callable[[], None]

    def _install_signals(self) -> dict[int, Any]:
        if threading.current_thread() is not threading.main_thread():
            return {}
        old: dict[int, Any] = {}
        for sig, fn in ((signal.SIGTERM, self._on_stop_signal), (signal.SIGINT, self._on_stop_signal),
                        (signal.SIGHUP, self._on_hup)):
            old[sig] = signal.signal(sig, fn)
        return old

    def _restore_signals(self, old: dict[int, Any]) -> None:
        for sig, fn in old.items():
            signal.signal(sig, fn)

    # Handlers only set flags (no logging inside a signal handler); the loop logs what arrived.
    def _on_stop_signal(self, signum: int, frame: Any) -> None:
        self._signals.append(signal.Signals(signum).name)
        self.stop()

    def _on_hup(self, signum: int, frame: Any) -> None:
        self._signals.append("SIGHUP")
        self.request_reload()

    def _log_signals(self) -> None:
        while self._signals:
            name = self._signals.pop(0)
            if name == "SIGHUP":
                log.info("SIGHUP: reloading config and rules")
            else:
                log.info("%s: finishing the file in hand, then stopping", name)
