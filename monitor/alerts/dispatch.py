"""The Dispatcher: drains the outbox to every configured channel, each channel on its own delivery thread.

The daemon builds one ``Dispatcher(db_path, settings)``, calls ``schedule(scheduler)`` (which starts one
delivery thread per channel and adds the digest producer's jobs), ``kick()`` when new alerts are stored and
``stop(seconds)`` on the way out. A channel that hangs (a stuck mail server) holds up only its own thread;
the others go on. Delivery problems never raise: a transient failure leaves the row pending with a backoff
(and the channel waits, keeping the order), a permanent one marks it dead and raises a ``delivery-failing``
alert on the other channels. Rows are marked right after each send, so a crash repeats at most the one
message in flight. ``drain()`` runs one pass on every channel in the caller's thread (tests, tools).
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import random
import sqlite3
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.alerts.channel import Channel, Due, Report
from monitor.alerts.command_channel import CommandChannel
from monitor.alerts.delivery import backoff_seconds
from monitor.alerts.digest import DigestProducer
from monitor.alerts.email_dispatch import EmailDelivery
from monitor.alerts.log_channel import LogChannel
from monitor.alerts.settings import AlertSettings
from monitor.alerts.templates import TemplateSet
from monitor.errors import TemplateError
from monitor.state import outbox as repo
from monitor.state.database import write_tx

log = logging.getLogger("monitor.alerts")

iso_utc = kinds.iso_utc            # kept importable from here
ABORT_GRACE_SECONDS = 1.0          # after abort(), how long stop() waits for a channel thread to return


def failing_alert(channel: str, alert: Alert, error: str, now: float) -> Alert:
    """The ``delivery-failing`` alert raised when ``channel`` gives up on ``alert``."""
    return kinds.delivery_failing(channel=channel, alert=alert, error=error, at=iso_utc(now))


@dataclass
class _Lane:
    """One channel with its own connection, lock, wake-up event and delivery thread."""

    channel: Channel
    conn: sqlite3.Connection
    lock: threading.Lock = field(default_factory=threading.Lock)
    wake: threading.Event = field(default_factory=threading.Event)
    thread: threading.Thread | None = None


class Dispatcher:
    """Delivers what the outbox in ``db_path`` holds, on the channels ``settings`` configures."""

    def __init__(self, db_path: str | Path, settings: AlertSettings, *,
                 clock: Callable[[], float] = time.time, seed: int | None = None) -> None:
        self.db_path = Path(db_path)
        self.settings = settings
        self._clock = clock
        self._rng = random.Random(seed)
        self._rng_lock = threading.Lock()
        self._lock = threading.RLock()
        self._closed = False
        self._stopping = threading.Event()
        self._conn = repo.connect(self.db_path)       # the dispatcher's own alerts (template errors)
        self._shipped_templates: TemplateSet | None = None
        self._templates: TemplateSet | None = None
        self.template_error: TemplateError | None = None
        self._lanes: dict[str, _Lane] = {}
        for channel in self._build_channels():
            self._lanes[channel.name] = _Lane(channel, repo.connect(self.db_path))
        self._digest: DigestProducer | None = None
        if settings.digest is not None:
            self._digest = DigestProducer(self.db_path, settings.digest, tuple(settings.channels),
                                          clock=clock, on_raised=self.kick)

    def _build_channels(self) -> list[Channel]:
        """The configured channels, in ``settings.channels`` order (operator templates loaded for e-mail)."""
        s = self.settings
        made: dict[str, Channel] = {}
        if s.log is not None:
            made["log"] = LogChannel(s.log.path, retry_max_seconds=s.log.retry_max_seconds)
        if s.command is not None:
            made["command"] = CommandChannel(s.command)
        if s.email is not None:
            self._load_templates()
            made["email"] = EmailDelivery(s, self.db_path, self.templates)
        return [made[name] for name in s.channels if name in made]

    def _load_templates(self) -> None:
        self._shipped_templates = TemplateSet.load(None)
        self._templates = self._shipped_templates
        if self.settings.templates is not None:
            try:
                self._templates = TemplateSet.load(self.settings.templates)
            except TemplateError as exc:   # deliver with the shipped set and tell people why
                self.template_error = exc
                self._report_template_error(exc)

    # --- public API ----------------------------------------------------------------------------------
    @property
    def channel_names(self) -> tuple[str, ...]:
        return tuple(self._lanes)

    def drain(self, now: float | None = None, *, flush: bool = False) -> int:
        """One delivery pass on every channel in this thread; return how many deliveries were completed.

        ``flush=True`` lets a batching channel send without waiting for its grouping window (shutdown).
        Never raises for delivery problems; database trouble is logged and retried on the next pass.
        """
        if self._closed:
            return 0
        t = self._clock() if now is None else now
        return sum(self._safe_drain(lane, t, flush) for lane in self._lanes.values())

    def kick(self) -> None:
        """New alerts are stored: wake every delivery thread now rather than at its next tick."""
        for lane in self._lanes.values():
            lane.wake.set()

    def start(self) -> None:
        """Start one delivery thread per channel (idempotent)."""
        with self._lock:
            if self._closed or self._stopping.is_set():
                return
            for name, lane in self._lanes.items():
                if lane.thread is None:
                    lane.thread = threading.Thread(target=self._run_lane, args=(lane,), daemon=True,
                                                   name=f"lotwarden-alerts-{name}")
                    lane.thread.start()

    def schedule(self, scheduler: Any) -> None:
        """Start the delivery threads and add the digest producer's jobs to ``scheduler`` (APScheduler 3)."""
        self.start()
        if self._digest is not None:
            self._digest.schedule(scheduler)

    def stop(self, seconds: float) -> bool:
        """Let every delivery thread make a last pass (flushing groups) for at most ``seconds``, then cut
        what is still in flight. Alerts not sent stay pending in the outbox. True if every thread ended."""
        self._stopping.set()
        self.kick()
        end = time.monotonic() + max(0.0, seconds)
        lanes = [lane for lane in self._lanes.values() if lane.thread is not None]
        for lane in lanes:
            assert lane.thread is not None
            lane.thread.join(max(0.0, end - time.monotonic()))
        stuck = [lane for lane in lanes if lane.thread is not None and lane.thread.is_alive()]
        for lane in stuck:
            log.warning("alert channel %s still busy after %g s: cutting it short; its alerts stay in the "
                        "outbox for the next start", lane.channel.name, seconds)
            lane.channel.abort()
        for lane in stuck:
            assert lane.thread is not None
            lane.thread.join(ABORT_GRACE_SECONDS)
        return not any(lane.thread is not None and lane.thread.is_alive() for lane in lanes)

    def enqueue(self, alert: Alert, channels: tuple[str, ...] | None = None) -> bool:
        """Store ``alert`` in its own transaction (for alerts the dispatcher itself raises)."""
        with self._lock, write_tx(self._conn):
            new = repo.enqueue(self._conn, alert, self.settings.channels if channels is None else channels)
        self.kick()
        return new

    def run_digest(self, now: float | None = None) -> bool:
        """Raise the digest for the latest scheduled time unless already raised (see ``monitor.alerts.digest``)."""
        return self._digest.run(now) if self._digest is not None else False

    def reload_templates(self, operator_dir: Path | None) -> None:
        """Load and check a new template set; on TemplateError the current set stays in force (and it raises)."""
        new = TemplateSet.load(operator_dir) if operator_dir is not None else TemplateSet.load(None)
        with self._lock:
            self._templates = new

    def templates(self) -> tuple[TemplateSet, TemplateSet]:
        """(the set in force, the shipped set used as fallback when an operator template fails to render)."""
        with self._lock:
            if self._shipped_templates is None:
                self._shipped_templates = TemplateSet.load(None)
            return (self._templates or self._shipped_templates), self._shipped_templates

    def close(self) -> None:
        """Stop the delivery threads if running (briefly) and close the connections."""
        if self._closed:
            return
        if any(lane.thread is not None for lane in self._lanes.values()):
            self.stop(0.0 if self._stopping.is_set() else 2.0)
        with self._lock:
            self._closed = True
            for lane in self._lanes.values():
                if lane.thread is not None and lane.thread.is_alive():
                    continue                      # still cut short: its connection goes with the process
                with lane.lock:
                    lane.channel.close()
                    lane.conn.close()
            if self._digest is not None:
                self._digest.close()
            self._conn.close()

    # --- delivery ------------------------------------------------------------------------------------
    def _run_lane(self, lane: _Lane) -> None:
        while not self._stopping.is_set():
            lane.wake.wait(self.settings.drain_seconds)
            lane.wake.clear()
            if self._stopping.is_set():
                break
            self._safe_drain(lane, self._clock(), False)
        self._safe_drain(lane, self._clock(), True)      # the last pass: what can go now, goes

    def _safe_drain(self, lane: _Lane, now: float, flush: bool) -> int:
        name = lane.channel.name
        try:
            return self._drain_lane(lane, now, flush)
        except sqlite3.Error as exc:
            log.warning("outbox drain of %s postponed: %s", name, exc)
        except Exception:                             # never let one channel's bug stop its thread
            log.exception("outbox drain of %s failed unexpectedly", name)
        return 0

    def _drain_lane(self, lane: _Lane, now: float, flush: bool) -> int:
        name = lane.channel.name
        with lane.lock:
            if self._closed:
                return 0
            rows = repo.due_rows(lane.conn, name, limit=5000)
            if not rows or max(r[3] for r in rows) > now:   # head of line waits: keeps the order on recovery
                return 0
            due = {rid: Due(rid, alert, attempts) for rid, alert, attempts, _ in rows}
            done = 0
            with contextlib.closing(lane.channel.deliver(list(due.values()), now, flush=flush)) as reports:
                for report in reports:
                    done += self._settle(lane, report, due, now)
                    if report.status == "retry":
                        break
            return done

    def _settle(self, lane: _Lane, report: Report, due: dict[int, Due], now: float) -> int:
        """Mark in the outbox what ``report`` says happened; returns the deliveries completed."""
        name, conn, ids = lane.channel.name, lane.conn, report.alert_ids
        if report.status == "delivered":
            with write_tx(conn):
                for rid in ids:
                    repo.mark_sent(conn, rid, name, iso_utc(self._clock()), report.reason or None)
                if report.booking is not None:
                    report.booking(conn)
            return len(ids)
        if report.status == "suppressed":
            with write_tx(conn):
                for rid in ids:
                    repo.mark_suppressed(conn, rid, name, report.reason)
                if report.booking is not None:
                    report.booking(conn)
            return 0
        if report.status == "retry":
            attempts = max((due[rid].attempts for rid in ids if rid in due), default=0)
            with self._rng_lock:
                delay = backoff_seconds(attempts, lane.channel.retry_first_seconds,
                                        lane.channel.retry_max_seconds, self._rng)
            with write_tx(conn):
                for rid in ids:
                    repo.mark_retry(conn, rid, name, now + delay, report.reason)
                if report.booking is not None:
                    report.booking(conn)
            log.warning("%d alert(s) on %s: %s; retry in %.1f s", len(ids), name, report.reason, delay)
            return 0
        others = tuple(c for c in self.settings.channels if c != name)
        with write_tx(conn):
            for rid in ids:
                repo.mark_dead(conn, rid, name, report.reason)
                alert = due[rid].alert if rid in due else None
                if alert is not None and alert.kind != "delivery-failing" and others:
                    repo.enqueue(conn, failing_alert(name, alert, report.reason, now), others)
            if report.booking is not None:
                report.booking(conn)
        for rid in ids:
            log.error("alert %r dead on %s: %s", due[rid].alert.dedup_key if rid in due else rid, name,
                      report.reason)
        if others:
            self.kick()
        return 0

    def _report_template_error(self, exc: TemplateError) -> None:
        log.error("operator templates refused, shipped templates in use: %s", exc)
        path = exc.path or ""
        try:
            content = Path(path).read_bytes() if path else str(exc).encode("utf-8")
        except OSError:
            content = str(exc).encode("utf-8")
        self.enqueue(kinds.config_rejected(
            file=path, key=None, line=exc.line, message=str(exc),
            content_sha256=hashlib.sha256(content).hexdigest(), in_force_since="shipped-templates",
            in_force="shipped templates", at=iso_utc(self._clock())))
