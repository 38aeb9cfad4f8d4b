"""The e-mail channel: plans batches (grouping, cap, reminders), sends them over SMTP, reports each batch."""

from __future__ import annotations

import logging
import sqlite3
from collections.abc import Callable, Generator, Sequence
from functools import partial
from pathlib import Path

from monitor.alerts.alert import Alert
from monitor.alerts.channel import Due, Report
from monitor.alerts.compose import build_message
from monitor.alerts.delivery import GiveUp, RetryLater
from monitor.alerts.email_channel import EmailChannel, SmtpSession
from monitor.alerts.grouping import HOUR, Batch, Pacing, PendingRow, plan_batches
from monitor.alerts.settings import AlertSettings
from monitor.alerts.templates import TemplateSet
from monitor.state import outbox as repo

log = logging.getLogger("monitor.alerts")

TemplatesFn = Callable[[], tuple[TemplateSet, TemplateSet]]


def previous_verdict(alert: Alert) -> str | None:
    """The replaced verdict ("hold", "review") of a verdict-changed alert; None for other kinds."""
    if alert.kind != "verdict-changed":
        return None
    prev = alert.data.get("previous")
    verdict = prev.get("verdict") if isinstance(prev, dict) else None
    return verdict if isinstance(verdict, str) and verdict else None


class EmailDelivery:
    """The e-mail channel behind the common interface; grouping and pacing are its own business.

    It reads its pacing state (messages per recipient, lots already told) through its own connection to
    the state database; what it books about a sent message travels with the report.
    """

    name = "email"

    def __init__(self, settings: AlertSettings, db_path: Path, templates: TemplatesFn) -> None:
        assert settings.email is not None
        self.email = settings.email
        self.retry_first_seconds = self.email.retry_first_seconds
        self.retry_max_seconds = self.email.retry_max_seconds
        self.smtp = EmailChannel(settings.email)
        self.pacing = Pacing(window=settings.group_window_seconds, group_max=settings.group_max,
                             hourly_cap=settings.hourly_cap, reminder=settings.reminder_minutes * 60.0)
        self._templates = templates
        self._db_path = Path(db_path)
        self._conn: sqlite3.Connection | None = None
        self.sent_messages = 0

    def recipients_for(self, alert: Alert) -> tuple[str, ...]:
        """The alert's recipients (a verdict-changed alert also by the kind of the verdict it replaces)."""
        return self.email.recipients_for(alert.kind, alert.line, alert.product, previous_verdict(alert))

    def abort(self) -> None:
        self.smtp.abort()

    def close(self) -> None:
        if self._conn is not None:
            self._conn.close()
            self._conn = None

    def _reader(self) -> sqlite3.Connection:
        if self._conn is None:
            self._conn = repo.connect(self._db_path)
        return self._conn

    def deliver(self, due: Sequence[Due], now: float, *, flush: bool) -> Generator[Report, None, None]:
        conn = self._reader()
        rows = [PendingRow(d.alert_id, d.alert, d.attempts) for d in due]
        plan = plan_batches(rows, now=now, pacing=self.pacing, recipients_for=self.recipients_for,
                            sends=repo.recipient_sends(conn, now - 3 * HOUR),
                            last_notified=repo.last_lot_notices(conn, now - self.pacing.reminder), flush=flush)
        for rid, reason in plan.suppressed:
            yield Report((rid,), "suppressed", reason)
        if not plan.batches:
            return
        try:
            session = self.smtp.connect()
        except RetryLater as exc:
            yield Report(_ids(plan.batches[0]), "retry", str(exc))
            return
        except GiveUp as exc:
            for batch in plan.batches:
                yield Report(_ids(batch), "failed", str(exc))
            return
        try:
            for batch in plan.batches:
                report = self._send(session, batch, now)
                yield report
                if report.status == "retry":
                    return                                  # server unavailable: stop, keep the order
        finally:
            session.close()

    def _send(self, session: SmtpSession, batch: Batch, now: float) -> Report:
        templates, shipped = self._templates()
        try:
            msg = build_message(list(batch.alerts), sender=self.email.sender, recipients=batch.recipients,
                                now=now, folded=batch.folded, templates=templates, shipped=shipped)
        except Exception as exc:      # never let one unbuildable alert block the channel: failed + reported
            log.exception("e-mail for %d alert(s) could not be built", len(batch.rows))
            return Report(_ids(batch), "failed", f"message could not be built: {exc!r}"[:300])
        try:
            refused = session.send(msg, batch.recipients)
        except RetryLater as exc:
            return Report(_ids(batch), "retry", str(exc))
        except GiveUp as exc:
            return Report(_ids(batch), "failed", str(exc))
        self.sent_messages += 1
        mid = str(msg["Message-ID"])
        note = ""
        if refused:
            note = f"refused by server for: {', '.join(sorted(refused))}"
            log.warning("message %s: some recipients refused: %s", mid, sorted(refused))
        held = [(r.alert.line, r.alert.product, r.alert.lot) for r in batch.rows if r.alert.kind == "hold"]
        booking = partial(repo.record_email, message_id=mid, sent_at=now, recipients=tuple(batch.recipients),
                          alert_ids=[r.alert_id for r in batch.rows], folded=bool(batch.folded), held_lots=held)
        return Report(_ids(batch), "delivered", note, booking=booking)


def _ids(batch: Batch) -> tuple[int, ...]:
    return tuple(r.alert_id for r in batch.rows)
