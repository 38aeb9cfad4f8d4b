"""The Dispatcher: drains the outbox to every configured channel, with retries, dead-lettering and schedules.

The daemon builds one ``Dispatcher(db_path, settings)``, calls ``schedule(scheduler)`` on its APScheduler 3
BackgroundScheduler and ``close()`` on the way out. ``drain()`` never raises for a delivery problem: a
transient failure leaves the row pending with a backoff, a permanent one marks it dead and raises a
``delivery-failing`` alert on the other channels. Rows are marked sent right after each send, so a crash
repeats at most the one message in flight.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import random
import sqlite3
import threading
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterator, Protocol

from monitor.alerts import outbox
from monitor.alerts.alert import Alert
from monitor.alerts.command_channel import CommandChannel
from monitor.alerts.delivery import GiveUp, RetryLater, backoff_seconds
from monitor.alerts.email_dispatch import EmailDispatch
from monitor.alerts.log_channel import LogChannel
from monitor.alerts.settings import AlertSettings
from monitor.alerts.templates import TemplateSet
from monitor.errors import TemplateError

log = logging.getLogger("monitor.alerts")


class PayloadChannel(Protocol):
    """A channel that delivers one alert at a time from its JSON text."""

    name: str

    def send(self, payload: str) -> None: ...


def open_db(db_path: str | Path) -> sqlite3.Connection:
    """Autocommit connection in WAL mode with synchronous=FULL and a busy timeout (see DEVELOPERS.md)."""
    conn = sqlite3.connect(str(db_path), isolation_level=None, timeout=30.0, check_same_thread=False)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=FULL")
    conn.execute("PRAGMA busy_timeout=30000")
    return conn


@contextlib.contextmanager
def write_tx(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """One write transaction: BEGIN IMMEDIATE (takes the write lock first, so no mid-way 'locked'), COMMIT."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")


def iso_utc(ts: float) -> str:
    """Unix seconds → ISO 8601 UTC with offset, e.g. '2026-12-01T22:05:00+00:00'."""
    return datetime.fromtimestamp(ts, timezone.utc).isoformat(timespec="seconds")


def failing_alert(channel: str, alert: Alert, error: str, now: float) -> Alert:
    """The ``delivery-failing`` alert raised when ``channel`` gives up on ``alert``."""
    return Alert(kind="delivery-failing", dedup_key=f"delivery-failing|{channel}|{alert.dedup_key}",
                 created_at=iso_utc(now), line=alert.line, product=alert.product, lot=alert.lot,
                 data={"channel": channel, "error": error,
                       "alert": {"kind": alert.kind, "dedup_key": alert.dedup_key, "created_at": alert.created_at,
                                 "line": alert.line, "product": alert.product, "lot": alert.lot}})


class Dispatcher:
    """Delivers what the outbox in ``db_path`` holds, on the channels ``settings`` configures."""

    def __init__(self, db_path: str | Path, settings: AlertSettings, *,
                 clock: Callable[[], float] = time.time, seed: int | None = None) -> None:
        self.db_path = Path(db_path)
        self.settings = settings
        self._clock = clock
        self._rng = random.Random(seed)
        self._lock = threading.RLock()
        self._closed = False
        self._conn = open_db(self.db_path)
        with write_tx(self._conn):
            outbox.ensure_sender_schema(self._conn)
        self._payload_channels: dict[str, PayloadChannel] = {}
        if settings.log is not None:
            self._payload_channels["log"] = LogChannel(settings.log.path)
        if settings.command is not None:
            self._payload_channels["command"] = CommandChannel(settings.command)
        self._shipped_templates: TemplateSet | None = None
        self._templates: TemplateSet | None = None
        self._email: Any = None
        self.template_error: TemplateError | None = None
        self.skipped_digests: set[str] = set()    # due times (UTC ISO) of digests logged as too late to send
        if settings.email is not None:
            self._shipped_templates = TemplateSet.load(None)
            self._templates = self._shipped_templates
            if settings.templates is not None:
                try:
                    self._templates = TemplateSet.load(settings.templates)
                except TemplateError as exc:   # deliver with the shipped set and tell people why
                    self.template_error = exc
                    self._report_template_error(exc)
        self._init_email()

    def _init_email(self) -> None:
        if self.settings.email is not None:
            self._email = EmailDispatch(self)

    # --- public API ----------------------------------------------------------------------------------
    def drain(self, now: float | None = None, *, flush: bool = False) -> int:
        """Deliver everything due on every channel; return how many deliveries were completed.

        ``flush=True`` sends e-mail groups without waiting for the grouping window (used on shutdown).
        Never raises for delivery problems; database trouble is logged and retried on the next drain.
        """
        with self._lock:
            if self._closed:
                return 0
            t = self._clock() if now is None else now
            done = 0
            for name in self.settings.channels:
                try:
                    if name == "email":
                        if self._email is not None:
                            done += self._email.drain(t, flush=flush)
                    else:
                        done += self._drain_payload(name, self._payload_channels[name], t)
                except sqlite3.Error as exc:
                    log.warning("outbox drain of %s postponed: %s", name, exc)
                except Exception:                             # never let one channel stop the others
                    log.exception("outbox drain of %s failed unexpectedly", name)
            return done

    def tick(self) -> None:
        """The periodic job: raise a due (or missed) digest, then drain. Never raises."""
        if self.settings.digest is not None:
            try:
                self.run_digest()
            except Exception:
                log.exception("digest check failed")
        self.drain()

    def enqueue(self, alert: Alert, channels: tuple[str, ...] | None = None) -> bool:
        """Store ``alert`` in its own transaction (for alerts the dispatcher itself raises)."""
        with self._lock, write_tx(self._conn):
            return outbox.enqueue(self._conn, alert, self.settings.channels if channels is None else channels)

    def schedule(self, scheduler: Any) -> None:
        """Add the periodic drain (which also flushes due e-mail groups) and the daily digest to ``scheduler``."""
        scheduler.add_job(self.tick, "interval", seconds=self.settings.drain_seconds, id="lotwarden-alerts-drain",
                          replace_existing=True, coalesce=True, max_instances=1,
                          misfire_grace_time=max(1, int(self.settings.drain_seconds * 4)))
        if self.settings.digest is not None:
            from monitor.alerts.digest import schedule_digest

            schedule_digest(self, scheduler)

    def reload_templates(self, operator_dir: Path | None) -> None:
        """Load and check a new template set; on TemplateError the current set stays in force (and it raises)."""
        new = TemplateSet.load(operator_dir) if operator_dir is not None else TemplateSet.load(None)
        with self._lock:
            self._templates = new

    def _report_template_error(self, exc: TemplateError) -> None:
        log.error("operator templates refused, shipped templates in use: %s", exc)
        digest = hashlib.sha256(str(exc).encode("utf-8")).hexdigest()[:16]
        self.enqueue(Alert(kind="config-rejected", dedup_key=f"config-rejected|templates|{digest}",
                           created_at=iso_utc(self._clock()),
                           data={"path": exc.path or "", "line": exc.line, "error": str(exc),
                                 "in_force": "shipped templates"}))

    def templates(self) -> tuple[TemplateSet, TemplateSet]:
        """(the set in force, the shipped set used as fallback when an operator template fails to render)."""
        if self._shipped_templates is None:
            self._shipped_templates = TemplateSet.load(None)
        return (self._templates or self._shipped_templates), self._shipped_templates

    def write(self) -> contextlib.AbstractContextManager[sqlite3.Connection]:
        """A write transaction on the dispatcher's connection."""
        return write_tx(self._conn)

    def close(self) -> None:
        """Close the database connection (the daemon drains with ``flush=True`` first if it wants to)."""
        with self._lock:
            if not self._closed:
                self._closed = True
                self._conn.close()

    # --- shared by the channel drivers ---------------------------------------------------------------
    @property
    def conn(self) -> sqlite3.Connection:
        return self._conn

    @property
    def lock(self) -> threading.RLock:
        return self._lock

    def clock(self) -> float:
        return self._clock()

    def run_digest(self, now: float | None = None) -> bool:
        """Raise the digest for the latest scheduled time unless already raised (see ``monitor.alerts.digest``)."""
        from monitor.alerts.digest import run_digest

        return run_digest(self, now)

    @property
    def rng(self) -> random.Random:
        return self._rng

    def give_up(self, alert_id: int, alert: Alert, channel: str, error: str, now: float) -> None:
        """Mark the delivery dead and raise ``delivery-failing`` on the other channels (same transaction)."""
        with write_tx(self._conn):
            outbox.mark_dead(self._conn, alert_id, channel, error)
            others = tuple(c for c in self.settings.channels if c != channel)
            if alert.kind != "delivery-failing" and others:
                outbox.enqueue(self._conn, failing_alert(channel, alert, error, now), others)
        log.error("alert %r dead on %s: %s", alert.dedup_key, channel, error)

    def _drain_payload(self, name: str, channel: PayloadChannel, now: float) -> int:
        rows = outbox.due_rows(self._conn, name)
        if not rows or max(r[3] for r in rows) > now:   # head of line waits: keeps the order on recovery
            return 0
        retry_first, retry_cap = self._retry_policy(name)
        done = 0
        for alert_id, alert, attempts, _ in rows:
            try:
                channel.send(alert.dumps())
            except RetryLater as exc:
                delay = backoff_seconds(attempts, retry_first, retry_cap, self._rng)
                with write_tx(self._conn):
                    outbox.mark_retry(self._conn, alert_id, name, now + delay, str(exc))
                log.warning("alert %r on %s: %s; retry in %.1f s", alert.dedup_key, name, exc, delay)
                break
            except GiveUp as exc:
                self.give_up(alert_id, alert, name, str(exc), now)
                continue
            with write_tx(self._conn):
                outbox.mark_sent(self._conn, alert_id, name, iso_utc(self._clock()))
            done += 1
        return done

    def _retry_policy(self, name: str) -> tuple[float, float]:
        if name == "log" and self.settings.log is not None:
            return 1.0, self.settings.log.retry_max_seconds
        if name == "command" and self.settings.command is not None:
            return self.settings.command.retry_first_seconds, self.settings.command.retry_max_seconds
        if name == "email" and self.settings.email is not None:
            return self.settings.email.retry_first_seconds, self.settings.email.retry_max_seconds
        return 2.0, 60.0
