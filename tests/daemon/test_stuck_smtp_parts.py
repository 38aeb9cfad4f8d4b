"""The parts behind issue 9 §3, in process: the SMTP exchange deadline, one delivery thread per channel, and
the scheduler's "skipped" warning said once per job per hour (real sockets, SQLite and APScheduler)."""

from __future__ import annotations

import json
import logging
import sqlite3
import threading
import time
from pathlib import Path

import pytest
from faulty_smtp import FaultyServer

from monitor.alerts import kinds
from monitor.alerts.delivery import RetryLater
from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.email_channel import EmailChannel, exchange_deadline
from monitor.alerts.settings import AlertSettings, EmailSettings, LogSettings
from monitor.daemon.schedlog import SCHEDULER_LOGGER, SkippedOncePerHour
from monitor.polling import wait_until as wait_for
from monitor.state.database import Database
from monitor.state.outbox import enqueue


def email_settings(port: int, timeout: float) -> EmailSettings:
    return EmailSettings(host="127.0.0.1", port=port, security="none", sender="lotwarden@brackenfield.example",
                         recipients=("qa@brackenfield.example",), timeout=timeout, deadline_seconds=3 * timeout)


def test_a_dribbled_banner_is_cut_at_the_exchange_deadline():
    """A banner arriving a byte every 0.3 s never trips a 1 s per-read timeout; the exchange's overall
    deadline ends the attempt anyway, as a retry naming the deadline."""
    with FaultyServer("dribble", byte_every=0.3) as bad:
        settings = email_settings(bad.port, timeout=1.0)
        limit = exchange_deadline(settings)
        t0 = time.monotonic()
        with pytest.raises(RetryLater, match="deadline"):
            EmailChannel(settings).connect()
        took = time.monotonic() - t0
        assert bad.bytes_sent >= 5                     # the server kept talking: no read ever timed out
    assert limit - 0.5 <= took <= limit + 1.5, (took, limit)


def test_abort_cuts_an_exchange_in_flight_and_refuses_new_ones():
    """abort() from another thread ends a connect stuck on a silent server at once, and no new one starts."""
    with FaultyServer("silent") as bad:
        channel = EmailChannel(email_settings(bad.port, timeout=30.0))
        timer = threading.Timer(0.5, channel.abort)
        timer.start()
        t0 = time.monotonic()
        with pytest.raises(RetryLater, match="shutdown"):
            channel.connect()
        assert time.monotonic() - t0 < 2.0
        with pytest.raises(RetryLater, match="shutting down"):
            channel.connect()
        timer.join()


def put(folder: Path, alert, channels) -> None:
    """Store ``alert`` the daemon's way (``Database.open`` creates the schema)."""
    db = Database.open(folder)
    try:
        with db.write() as conn:
            enqueue(conn, alert, channels)
    finally:
        db.close()


def test_log_channel_delivers_while_email_hangs_and_stop_leaves_mail_queued(tmp_path):
    """With the mail server silent, alerts reach the log at once on its own thread; stop() returns within
    its time plus the abort grace, and the e-mail rows are still pending for the next start."""
    folder, log_path = tmp_path / "state", tmp_path / "alerts.jsonl"
    first = Database.open(folder)
    first.close()
    db = first.path
    with FaultyServer("silent") as bad:
        settings = AlertSettings(log=LogSettings(path=log_path), email=email_settings(bad.port, timeout=30.0),
                                 group_window_seconds=0, drain_seconds=0.2)
        d = Dispatcher(db, settings)
        try:
            d.start()
            for i in range(3):
                put(folder, kinds.daemon_started(started_at=f"2026-12-02T06:0{i}:00+00:00", config="c.toml",
                                             rules=["oat-500"]), ("log", "email"))
                d.kick()
            assert bad.wait_connected(5)
            assert wait_for(lambda: log_path.exists() and len(log_path.read_text().splitlines()) == 3, 2.0)
            t0 = time.monotonic()
            assert d.stop(0.5)
            assert time.monotonic() - t0 < 2.5
        finally:
            d.close()
    conn = sqlite3.connect(db)
    states = dict(conn.execute("SELECT channel, group_concat(DISTINCT state) FROM deliveries GROUP BY channel"))
    conn.close()
    assert states == {"log": "sent", "email": "pending"}
    assert [json.loads(x)["kind"] for x in log_path.read_text().splitlines()] == ["daemon-started"] * 3


def test_skipped_warning_is_logged_once_per_job_per_hour():
    """A job that blocks makes APScheduler skip it at every run time; the warning is logged once while the
    skips (counted from the scheduler's own events) go on."""
    from apscheduler.events import EVENT_JOB_MAX_INSTANCES
    from apscheduler.schedulers.background import BackgroundScheduler

    records: list[logging.LogRecord] = []

    class Keep(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            records.append(record)

    handler = Keep(level=logging.WARNING)
    logger = logging.getLogger(SCHEDULER_LOGGER)
    logger.addHandler(handler)
    filt = SkippedOncePerHour().install()
    release, skips = threading.Event(), []
    sched = BackgroundScheduler(timezone="UTC")
    sched.add_listener(lambda e: skips.append(e.job_id), EVENT_JOB_MAX_INSTANCES)
    sched.add_job(release.wait, "interval", seconds=0.2, id="stuck", max_instances=1, coalesce=True)
    sched.start()
    try:
        assert wait_for(lambda: len(skips) >= 6, 10.0)
    finally:
        release.set()
        sched.shutdown(wait=True)
        filt.remove()
        logger.removeHandler(handler)
    said = [r for r in records if "skipped" in r.getMessage()]
    assert len(said) == 1, [r.getMessage() for r in said]
