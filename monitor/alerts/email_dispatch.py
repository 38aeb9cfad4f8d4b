"""E-mail delivery from the outbox: plans batches (grouping, cap, reminders), sends them, books the result."""

from __future__ import annotations

import json
import logging
from typing import TYPE_CHECKING

from monitor.alerts import outbox
from monitor.alerts.alert import Alert
from monitor.alerts.compose import build_message
from monitor.alerts.delivery import GiveUp, RetryLater, backoff_seconds
from monitor.alerts.email_channel import EmailChannel, SmtpSession
from monitor.alerts.grouping import HOUR, Batch, Pacing, PendingRow, plan_batches

if TYPE_CHECKING:
    from monitor.alerts.dispatch import Dispatcher

log = logging.getLogger("monitor.alerts")


def previous_verdict(alert: Alert) -> str | None:
    """The replaced verdict ("hold", "review") of a verdict-changed alert; None for other kinds."""
    if alert.kind != "verdict-changed":
        return None
    prev = alert.data.get("previous")
    verdict = prev.get("verdict") if isinstance(prev, dict) else None
    return verdict if isinstance(verdict, str) and verdict else None


class EmailDispatch:
    """The e-mail side of a Dispatcher."""

    def __init__(self, dispatcher: "Dispatcher") -> None:
        self.d = dispatcher
        settings = dispatcher.settings
        assert settings.email is not None
        self.email = settings.email
        self.channel = EmailChannel(settings.email)
        self.pacing = Pacing(window=settings.group_window_seconds, group_max=settings.group_max,
                             hourly_cap=settings.hourly_cap, reminder=settings.reminder_minutes * 60.0)
        self.sent_messages = 0

    def recipients_for(self, alert: Alert) -> tuple[str, ...]:
        """The alert's recipients (a verdict-changed alert also by the kind of the verdict it replaces)."""
        return self.email.recipients_for(alert.kind, alert.line, alert.product, previous_verdict(alert))

    def drain(self, now: float, *, flush: bool = False) -> int:
        conn = self.d.conn
        rows = outbox.due_rows(conn, "email", limit=5000)
        if not rows or max(r[3] for r in rows) > now:      # a retry is backing off: everything behind it waits
            return 0
        pending = [PendingRow(rid, alert, attempts) for rid, alert, attempts, _ in rows]
        plan = plan_batches(pending, now=now, pacing=self.pacing, recipients_for=self.recipients_for,
                            sends=self._sends(now), last_notified=self._last_notified(now), flush=flush)
        if plan.suppressed:
            with self.d.write():
                for rid, reason in plan.suppressed:
                    outbox.mark_suppressed(conn, rid, "email", reason)
        if not plan.batches:
            return 0
        try:
            session = self.channel.connect()
        except RetryLater as exc:
            self._postpone(plan.batches[0], now, exc)
            return 0
        except GiveUp as exc:
            for batch in plan.batches:
                for r in batch.rows:
                    self.d.give_up(r.alert_id, r.alert, "email", str(exc), now)
            return 0
        done = 0
        try:
            for batch in plan.batches:
                outcome = self._send(session, batch, now)
                if outcome is None:
                    break                                    # server unavailable: stop, keep the order
                done += outcome
        finally:
            session.close()
        return done

    def _postpone(self, batch: Batch, now: float, exc: Exception) -> None:
        delay = backoff_seconds(max(r.attempts for r in batch.rows), self.email.retry_first_seconds,
                                self.email.retry_max_seconds, self.d.rng)
        with self.d.write():
            for r in batch.rows:
                outbox.mark_retry(self.d.conn, r.alert_id, "email", now + delay, str(exc))
        log.warning("e-mail of %d alert(s) postponed %.1f s: %s", len(batch.rows), delay, exc)

    def _send(self, session: SmtpSession, batch: Batch, now: float) -> int | None:
        templates, shipped = self.d.templates()
        try:
            msg = build_message(list(batch.alerts), sender=self.email.sender, recipients=batch.recipients,
                                now=now, folded=batch.folded, templates=templates, shipped=shipped)
        except Exception as exc:      # never let one unbuildable alert block the channel: dead + reported
            log.exception("e-mail for %d alert(s) could not be built", len(batch.rows))
            for r in batch.rows:
                self.d.give_up(r.alert_id, r.alert, "email", f"message could not be built: {exc!r}"[:300], now)
            return 0
        try:
            refused = session.send(msg, batch.recipients)
        except RetryLater as exc:
            self._postpone(batch, now, exc)
            return None
        except GiveUp as exc:
            for r in batch.rows:
                self.d.give_up(r.alert_id, r.alert, "email", str(exc), now)
            return 0
        self._book(batch, msg["Message-ID"], now, refused)
        self.sent_messages += 1
        return len(batch.rows)

    def _book(self, batch: Batch, mid: str, now: float, refused: dict) -> None:
        """Mark the batch sent right after the send (a crash in between repeats only this message)."""
        from monitor.alerts.dispatch import iso_utc

        conn = self.d.conn
        with self.d.write():
            for r in batch.rows:
                outbox.mark_sent(conn, r.alert_id, "email", iso_utc(now))
                if r.alert.kind == "hold":
                    conn.execute("INSERT INTO email_lot_notices(line, product, lot, notified_at) VALUES (?,?,?,?)",
                                 (r.alert.line, r.alert.product, r.alert.lot, now))
            conn.execute("INSERT INTO email_messages(message_id, sent_at, recipients, alert_ids, folded)"
                         " VALUES (?,?,?,?,?)", (mid, now, json.dumps(list(batch.recipients)),
                                                 json.dumps([r.alert_id for r in batch.rows]), int(batch.folded)))
            conn.executemany("INSERT INTO email_recipient_sends(recipient, sent_at) VALUES (?,?)",
                             [(rc, now) for rc in batch.recipients])
            if refused:
                note = f"refused by server for: {', '.join(sorted(refused))}"
                for r in batch.rows:
                    conn.execute("UPDATE deliveries SET last_error=? WHERE alert_id=? AND channel='email'",
                                 (note[:500], r.alert_id))
        if refused:
            log.warning("message %s: some recipients refused: %s", mid, sorted(refused))

    def _sends(self, now: float) -> dict[str, list[float]]:
        out: dict[str, list[float]] = {}
        for rc, t in self.d.conn.execute("SELECT recipient, sent_at FROM email_recipient_sends WHERE sent_at > ?",
                                         (now - 3 * HOUR,)):
            out.setdefault(rc, []).append(t)
        return out

    def _last_notified(self, now: float) -> dict[tuple[str, str, str], float]:
        rows = self.d.conn.execute(
            "SELECT line, product, lot, MAX(notified_at) FROM email_lot_notices WHERE notified_at > ?"
            " GROUP BY line, product, lot", (now - self.pacing.reminder,))
        return {(ln, p, lot): t for ln, p, lot, t in rows}
