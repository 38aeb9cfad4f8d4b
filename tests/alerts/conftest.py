"""Fixtures for the alert tests: a real SQLite state file, alert factories, a thread-leak guard."""

from __future__ import annotations

import email
import email.policy
import socket
import sqlite3
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from dataclasses import field as dc_field
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats

from monitor.alerts.alert import Alert
from monitor.state import outbox
from monitor.state.database import Database


@pytest.fixture(autouse=True)
def no_leaked_threads() -> Iterable[None]:
    """Fail a test that leaves a thread running (servers, schedulers, observers must be stopped)."""
    before = set(threading.enumerate())
    yield
    deadline = time.monotonic() + 5.0
    while time.monotonic() < deadline:
        extra = [t for t in threading.enumerate() if t not in before and t.is_alive()]
        if not extra:
            return
        time.sleep(0.05)
    pytest.fail(f"threads left running: {[t.name for t in extra]}")


@pytest.fixture
def db_path(tmp_path: Path) -> Path:
    """A state database file with the full schema, opened the daemon's way (``Database.open``)."""
    db = Database.open(tmp_path / "state")
    db.close()
    return db.path


def hold_data(lot: str = "A1001", line: str = "L2", product: str = "OAT-500", **over: Any) -> dict[str, Any]:
    """A hold verdict's JSON as ``Verdict.to_json()`` shapes it, plus the lot's values (invented demo lot)."""
    values = [497.1, 498.0, 496.4, 497.7, 498.2, 496.9, 497.5, 498.4, 496.8, 497.3]
    # the numbers a verdict on these values carries, from the reference library (scipy.stats)
    ref = stats.ttest_1samp(values, 500.0)
    ci = ref.confidence_interval(0.95)
    sw = stats.shapiro(values)
    sd = float(np.std(values, ddof=1))
    data: dict[str, Any] = {
        "file": f"exports/{line}-{lot}.csv", "files": [f"exports/{line}-{lot}.csv"], "line": line,
        "product": product, "lot": lot, "rule": "oat-500", "rule_version": "3f2a9c1d", "n": len(values),
        "mean": float(np.mean(values)), "sd": sd, "target": 500.0, "unit": "g", "alternative": "two-sided",
        "alpha": 0.05, "test": "t", "statistic": float(ref.statistic), "df": 9.0, "p_value": float(ref.pvalue),
        "critical_value": float(stats.t.ppf(0.975, 9)), "se": sd / float(np.sqrt(len(values))),
        "ci_low": float(ci.low), "ci_high": float(ci.high), "effect_size": (float(np.mean(values)) - 500.0) / sd,
        "normality": {"test": "shapiro", "statistic": float(sw.statistic), "p_value": float(sw.pvalue),
                      "passed": True, "note": ""},
        "power": 0.93, "n_for_power": 8, "verdict": "hold", "reason": "mean below target", "excluded": 0,
        "heads": [], "values": values,
    }
    data.update(over)
    return data


def make_alert(kind: str = "hold", lot: str = "A1001", line: str = "L2", product: str = "OAT-500",
               created_at: str = "2026-12-01T22:00:00+00:00", data: dict[str, Any] | None = None,
               key: str | None = None) -> Alert:
    """An alert as the daemon would raise it."""
    if data is None:
        data = hold_data(lot, line, product) if kind in ("hold", "review") else {"path": f"exports/{lot}.csv"}
    return Alert(kind=kind, dedup_key=key or f"{kind}|{line}|{product}|{lot}|3f2a9c1d", created_at=created_at,
                 data=data, line=line, product=product, lot=lot)


@pytest.fixture
def put(db_path: Path) -> Callable[..., bool]:
    """Enqueue alerts the daemon's way: its own connection, BEGIN IMMEDIATE, enqueue, COMMIT."""
    def _put(alert: Alert, channels: Iterable[str]) -> bool:
        conn = sqlite3.connect(db_path, isolation_level=None, timeout=30)
        try:
            conn.execute("BEGIN IMMEDIATE")
            new = outbox.enqueue(conn, alert, tuple(channels))
            conn.execute("COMMIT")
            return new
        finally:
            conn.close()
    return _put


def delivery_states(db_path: Path) -> dict[tuple[str, str], str]:
    """{(dedup_key, channel): state} read straight from the database."""
    conn = sqlite3.connect(db_path)
    try:
        return {(k, ch): st for k, ch, st in conn.execute(
            "SELECT a.dedup_key, d.channel, d.state FROM deliveries d JOIN alerts a ON a.id = d.alert_id")}
    finally:
        conn.close()


@pytest.fixture
def alert_factory() -> Callable[..., Alert]:
    """``make_alert`` as a fixture."""
    return make_alert


@pytest.fixture
def hold_factory() -> Callable[..., dict[str, Any]]:
    """``hold_data`` as a fixture."""
    return hold_data


@pytest.fixture
def states(db_path: Path) -> Callable[[], dict[tuple[str, str], str]]:
    """Read the delivery states of the test database."""
    return lambda: delivery_states(db_path)


# --- a real SMTP server on loopback (aiosmtpd) -----------------------------------------------------------


def free_port() -> int:
    """A free TCP port on 127.0.0.1 (aiosmtpd's Controller cannot take port 0: bind, read the port, close)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class Received:
    """One message as the server got it: envelope and parsed content."""

    mail_from: str
    rcpt_tos: list[str]
    raw: bytes
    message: Any = None


@dataclass
class SinkHandler:
    """aiosmtpd handler that keeps every message; ``data_reply`` lets a test answer 4xx/5xx instead."""

    received: list[Received] = dc_field(default_factory=list)
    data_reply: str = "250 OK"

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        if not self.data_reply.startswith("250"):
            return self.data_reply
        raw = envelope.original_content or envelope.content
        self.received.append(Received(envelope.mail_from, list(envelope.rcpt_tos), raw,
                                      email.message_from_bytes(raw, policy=email.policy.default)))
        return "250 OK"


class SmtpServer:
    """Start/stop an aiosmtpd Controller on 127.0.0.1 at a fixed port (so a test can restart it)."""

    def __init__(self, port: int | None = None, **kwargs: Any) -> None:
        from aiosmtpd.controller import Controller

        self.port = port or free_port()
        self.handler = SinkHandler()
        self._kwargs = kwargs
        self._controller_cls = Controller
        self.controller: Any = None

    @property
    def received(self) -> list[Received]:
        return self.handler.received

    def start(self) -> SmtpServer:
        self.controller = self._controller_cls(self.handler, hostname="127.0.0.1", port=self.port, **self._kwargs)
        self.controller.start()
        return self

    def stop(self) -> None:
        if self.controller is not None:
            self.controller.stop()
            self.controller = None


@pytest.fixture
def smtp_factory() -> Iterable[Callable[..., SmtpServer]]:
    """Make SMTP servers on loopback; all are stopped at the end of the test."""
    made: list[SmtpServer] = []

    def _make(port: int | None = None, start: bool = True, **kwargs: Any) -> SmtpServer:
        srv = SmtpServer(port, **kwargs)
        made.append(srv)
        return srv.start() if start else srv
    yield _make
    for srv in made:
        srv.stop()


@pytest.fixture
def free_port_factory() -> Callable[[], int]:
    return free_port


@pytest.fixture
def deliver_one(db_path: Path, tmp_path: Path, put: Callable[..., bool],
                smtp_factory: Callable[..., SmtpServer]) -> Callable[..., Any]:
    """Put one alert in the outbox for e-mail and drain it through the real dispatcher to a fresh aiosmtpd
    server on loopback (no grouping wait); the one received message."""
    def _deliver(alert: Alert, *, now: float, seed: int = 5) -> Any:
        from monitor.alerts.dispatch import Dispatcher
        from monitor.alerts.settings import AlertSettings, EmailSettings, LogSettings

        srv = smtp_factory()
        put(alert, ["email"])
        s = AlertSettings(log=LogSettings(path=tmp_path / "alerts.jsonl"),
                          email=EmailSettings(host="127.0.0.1", port=srv.port, security="none",
                                              sender="lotwarden@brackenfield.example",
                                              recipients=("qa@brackenfield.example",), timeout=10),
                          group_window_seconds=0.0)
        d = Dispatcher(db_path, s, seed=seed)
        try:
            assert d.drain(now=now) == 1
        finally:
            d.close()
        assert len(srv.received) == 1
        return srv.received[0]
    return _deliver
