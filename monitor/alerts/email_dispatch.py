"""The e-mail channel: plans batches (grouping, cap, reminders), records each message, sends it over SMTP,
reports it; a recorded message not finished (a crash mid-send) is repeated as recorded."""

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
from monitor.state.database import write_tx

log = logging.getLogger("monitor.alerts")

TemplatesFn = Callable[[], tuple[TemplateSet, TemplateSet]]


def previous_verdict(alert: Alert) -> str | None:
    """The verdict ("hold", "review") an alert is about besides its own kind: the replaced one of a
    verdict-changed alert, the disposed / still open one of a disposition or reminder; None for other kinds.
    A route selecting that verdict's kind also selects the alert, so it reaches the people who got the hold."""
    if alert.kind not in ("verdict-changed", "disposition", "reminder"):
        return None
    prev = alert.data.get("previous" if alert.kind == "verdict-changed" else "verdict")
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
        """The alert's recipients (a verdict-changed, disposition or reminder alert also by the kind of the
        verdict it is about)."""
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
        """First the messages recorded earlier and not finished (a crash mid-send, a retry), each repeated
        exactly as recorded; then the rest, planned afresh (their alerts are left out of the planning)."""
        conn = self._reader()
        recorded = repo.unfinished_batches(conn)
        held_back = {rid for b in recorded for rid in b.alert_ids}
        smtp = _LazySession(self.smtp)
        try:
            for batch in recorded:
                report = self._resend(smtp, batch, now)
                if report is None:
                    continue
                yield report
                if report.status == "retry":
                    return                                  # server unavailable: stop, keep the order
            rows = [PendingRow(d.alert_id, d.alert, d.attempts) for d in due if d.alert_id not in held_back]
            # read after the repeats are settled: the lots they told about count for the reminder interval
            plan = plan_batches(rows, now=now, pacing=self.pacing, recipients_for=self.recipients_for,
                                sends=repo.recipient_sends(conn, now - 3 * HOUR),
                                last_notified=repo.last_lot_notices(conn, now - self.pacing.reminder), flush=flush)
            for rid, reason in plan.suppressed:
                yield Report((rid,), "suppressed", reason)
            for fresh in plan.batches:
                report = self._send(smtp, _ids(fresh), fresh.alerts, fresh.recipients, fresh.folded, now, None)
                yield report
                if report.status == "retry":
                    return
        finally:
            smtp.close()

    def _resend(self, smtp: _LazySession, batch: repo.EmailBatch, now: float) -> Report | None:
        """Repeat a recorded message: same Message-ID, alerts, recipients and Date. None when none of its
        alerts is still pending on e-mail (the record is closed as 'dropped')."""
        conn = self._reader()
        pending = repo.pending_among(conn, self.name, batch.alert_ids)
        stored = repo.alerts_by_id(conn, batch.alert_ids)
        alerts = tuple(stored[rid] for rid in batch.alert_ids if rid in stored)
        ids = tuple(rid for rid in batch.alert_ids if rid in pending)
        if not ids or not alerts:
            with write_tx(conn):
                repo.finish_batch(conn, batch.id, "dropped", now, "none of its alerts is pending any more")
            return None
        log.info("repeating message %s (%d alert(s)), not known to have reached the server",
                 batch.message_id, len(alerts))
        return self._send(smtp, ids, alerts, batch.recipients, batch.folded, now, batch)

    def _send(self, smtp: _LazySession, ids: tuple[int, ...], alerts: tuple[Alert, ...],
              recipients: tuple[str, ...], folded: bool, now: float, recorded: repo.EmailBatch | None) -> Report:
        """Send one message for ``alerts`` and report it for ``ids``; the message is recorded (or its record's
        attempt counted) before it goes to the server, and the record is finished with the alerts."""
        try:
            session = smtp.get()
        except RetryLater as exc:
            return Report(ids, "retry", str(exc))
        except GiveUp as exc:
            return _failed(ids, str(exc), recorded, now)
        templates, shipped = self._templates()
        try:
            msg = build_message(list(alerts), sender=self.email.sender, recipients=recipients,
                                now=now if recorded is None else recorded.planned_at, folded=folded,
                                templates=templates, shipped=shipped,
                                mid=None if recorded is None else recorded.message_id)
        except Exception as exc:      # never let one unbuildable alert block the channel: failed + reported
            log.exception("e-mail for %d alert(s) could not be built", len(alerts))
            return _failed(ids, f"message could not be built: {exc!r}"[:300], recorded, now)
        mid = str(msg["Message-ID"])
        conn = self._reader()
        with write_tx(conn):        # recorded before the server sees it: a crash from here on repeats it as is
            if recorded is None:
                batch_id = repo.record_batch(conn, message_id=mid, planned_at=now, recipients=recipients,
                                             alert_ids=ids, folded=folded)
            else:
                batch_id = recorded.id
                repo.batch_attempted(conn, batch_id)
        try:
            refused = session.send(msg, recipients)
        except RetryLater as exc:
            return Report(ids, "retry", str(exc))      # the record stays 'sending': the retry repeats this message
        except GiveUp as exc:
            return Report(ids, "failed", str(exc), booking=partial(
                repo.finish_batch, batch_id=batch_id, state="failed", finished_at=now, note=str(exc)))
        self.sent_messages += 1
        note = ""
        if refused:
            note = f"refused by server for: {', '.join(sorted(refused))}"
            log.warning("message %s: some recipients refused: %s", mid, sorted(refused))
        held = sorted({(a.line, a.product, a.lot) for a in alerts if a.kind == "hold"})
        booking = partial(_book_sent, batch_id=batch_id, message_id=mid, sent_at=now, recipients=recipients,
                          alert_ids=list(ids), folded=folded, held_lots=held)
        return Report(ids, "delivered", note, booking=booking)


class _LazySession:
    """The pass's SMTP session, opened on first use; a give-up on connecting is remembered for the pass."""

    def __init__(self, smtp: EmailChannel) -> None:
        self._smtp = smtp
        self._session: SmtpSession | None = None
        self._gave_up: GiveUp | None = None

    def get(self) -> SmtpSession:
        if self._gave_up is not None:
            raise GiveUp(str(self._gave_up))
        if self._session is None:
            try:
                self._session = self._smtp.connect()
            except GiveUp as exc:
                self._gave_up = exc
                raise
        return self._session

    def close(self) -> None:
        if self._session is not None:
            self._session.close()
            self._session = None


def _book_sent(conn: sqlite3.Connection, *, batch_id: int, message_id: str, sent_at: float,
               recipients: tuple[str, ...], alert_ids: list[int], folded: bool,
               held_lots: list[tuple[str, str, str]]) -> None:
    """The bookkeeping of a sent message, in the transaction that marks its alerts sent."""
    repo.record_email(conn, message_id=message_id, sent_at=sent_at, recipients=recipients, alert_ids=alert_ids,
                      folded=folded, held_lots=held_lots)
    repo.finish_batch(conn, batch_id, "sent", sent_at)


def _failed(ids: tuple[int, ...], reason: str, recorded: repo.EmailBatch | None, now: float) -> Report:
    """A permanent failure; a recorded message's record is finished as 'failed' with its alerts."""
    booking = None if recorded is None else partial(repo.finish_batch, batch_id=recorded.id, state="failed",
                                                    finished_at=now, note=reason)
    return Report(ids, "failed", reason, booking=booking)


def _ids(batch: Batch) -> tuple[int, ...]:
    return tuple(r.alert_id for r in batch.rows)
