"""Kill -9 while a message is in flight: nothing is lost and only that one message can repeat."""

from __future__ import annotations

import asyncio
import os
import signal
import subprocess
import sys
import threading
import time

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, EmailSettings

SENDER_SCRIPT = """
import sys, time
from pathlib import Path
from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, EmailSettings
em = EmailSettings(host="127.0.0.1", port=int(sys.argv[2]), security="none",
                   sender="lotwarden@brackenfield.example", recipients=("qa@brackenfield.example",), timeout=30)
d = Dispatcher(Path(sys.argv[1]), AlertSettings(email=em, group_window_seconds=0, group_max=1))
while True:
    d.drain()
    time.sleep(0.05)
"""


class StallingHandler:
    """Keeps each message, but stalls before answering the 3rd DATA (the sender is killed meanwhile)."""

    def __init__(self) -> None:
        self.received: list[tuple[str, str]] = []
        self.stalled = threading.Event()

    async def handle_DATA(self, server, session, envelope) -> str:
        import email
        msg = email.message_from_bytes(envelope.original_content or envelope.content)
        self.received.append((msg["Message-ID"].strip(), msg["Subject"]))
        if len(self.received) == 3 and not self.stalled.is_set():
            self.stalled.set()
            await asyncio.sleep(2)
        return "250 OK"


def test_sigkill_during_send_repeats_at_most_the_message_in_flight(db_path, tmp_path, put, alert_factory,
                                                                   free_port_factory):
    """SIGKILL while the server holds message 3: after restart all 5 arrive; only message 3 twice, same id."""
    from aiosmtpd.controller import Controller

    port = free_port_factory()
    handler = StallingHandler()
    ctl = Controller(handler, hostname="127.0.0.1", port=port)
    ctl.start()
    proc = None
    try:
        for i in range(5):
            put(alert_factory(lot=f"K{i}", created_at="2020-01-01T00:00:00+00:00"), ["email"])
        script = tmp_path / "sender.py"
        script.write_text(SENDER_SCRIPT)
        proc = subprocess.Popen([sys.executable, str(script), str(db_path), str(port)],
                                stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        deadline = time.monotonic() + 60
        while not handler.stalled.wait(0.1):
            assert proc.poll() is None, f"sender died: {proc.stderr.read().decode(errors='replace')[-800:]}"
            assert time.monotonic() < deadline, "sender never reached the 3rd message"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(30)
        assert proc.returncode == -signal.SIGKILL
        em = EmailSettings(host="127.0.0.1", port=port, security="none", sender="lotwarden@brackenfield.example",
                           recipients=("qa@brackenfield.example",), timeout=30)
        d = Dispatcher(db_path, AlertSettings(email=em, group_window_seconds=0, group_max=1))
        try:
            deadline = time.monotonic() + 30
            while len(handler.received) < 6 and time.monotonic() < deadline:
                d.drain()
                time.sleep(0.05)
        finally:
            d.close()
    finally:
        if proc is not None and proc.poll() is None:
            proc.kill()
            proc.wait()
        if proc is not None and proc.stderr is not None:
            proc.stderr.close()
        ctl.stop()
    subjects = [s for _, s in handler.received]
    lots = [next(f"K{i}" for i in range(5) if f"lot K{i}:" in s) for s in subjects]
    assert sorted(set(lots)) == [f"K{i}" for i in range(5)]          # nothing lost
    assert lots == ["K0", "K1", "K2", "K2", "K3", "K4"]               # only the one in flight repeats, in order
    ids = [mid for mid, s in handler.received if "lot K2:" in s]
    assert ids[0] == ids[1]                                           # recognisable by its Message-ID
