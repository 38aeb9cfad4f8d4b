"""`alerts.email.deadline_seconds`: the overall deadline of one SMTP exchange, read from the config and the
time after which a server that dribbles its banner is cut off (a real socket on loopback)."""

from __future__ import annotations

import socket
import threading
import time
import tomllib
from collections.abc import Iterator
from pathlib import Path

import pytest

from monitor.alerts import settings as S
from monitor.alerts.delivery import RetryLater
from monitor.alerts.email_channel import EmailChannel
from monitor.errors import ConfigError

BASE = """
[alerts.email]
host = "127.0.0.1"
port = 2525
sender = "lotwarden@brackenfield.example"
recipients = ["qa@brackenfield.example"]
"""


def parse(text: str) -> S.AlertSettings:
    return S.parse_alerts(tomllib.loads(text)["alerts"], source="lotwarden.toml", base_dir=Path("/srv/lw"))


def test_the_deadline_defaults_to_a_minute_and_is_read_from_the_config() -> None:
    """Not given: 60 s (the default the issue sets); given: the configured seconds, whatever the timeout."""
    s = parse(BASE)
    assert s.email is not None and s.email.deadline_seconds == 60.0
    s = parse(BASE + "timeout = 5\ndeadline_seconds = 12.5\n")
    assert s.email is not None and (s.email.timeout, s.email.deadline_seconds) == (5.0, 12.5)


@pytest.mark.parametrize("value", ["0", "-3", '"60"', "true"])
def test_a_bad_deadline_names_the_file_and_the_key(value: str) -> None:
    """Zero, negative or not a number: a ConfigError naming the file and alerts.email.deadline_seconds."""
    with pytest.raises(ConfigError) as err:
        parse(BASE + f"deadline_seconds = {value}\n")
    assert err.value.key == "alerts.email.deadline_seconds" and err.value.path == "lotwarden.toml"


@pytest.fixture
def dribbler() -> Iterator[socket.socket]:
    """A listener on loopback that, once connected, sends a 220 banner one byte every 0.3 s."""
    lst = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    lst.bind(("127.0.0.1", 0))
    lst.listen(1)
    lst.settimeout(0.1)
    stop = threading.Event()

    def serve() -> None:
        conn = None
        while not stop.is_set() and conn is None:
            try:
                conn, _ = lst.accept()
            except TimeoutError:
                continue
        if conn is None:
            return
        with conn:
            for byte in b"220 slow.example ESMTP" * 10:
                if stop.wait(0.3):
                    break
                try:
                    conn.send(bytes([byte]))
                except OSError:
                    break

    t = threading.Thread(target=serve, name="dribbler", daemon=True)
    t.start()
    try:
        yield lst
    finally:
        stop.set()
        t.join(5)
        lst.close()


def test_the_configured_deadline_cuts_a_dribbled_banner(dribbler: socket.socket) -> None:
    """timeout 1 s never trips (a byte every 0.3 s); deadline_seconds = 2 ends the exchange after about 2 s,
    as a retry naming that deadline (not 3 x timeout)."""
    port = dribbler.getsockname()[1]
    s = parse(BASE.replace("2525", str(port)) + "timeout = 1\ndeadline_seconds = 2\n")
    assert s.email is not None
    t0 = time.monotonic()
    with pytest.raises(RetryLater, match="2 s deadline"):
        EmailChannel(s.email).connect()
    took = time.monotonic() - t0
    assert 1.8 <= took <= 3.0, took
