"""A message that may not have reached the server is repeated exactly as it was recorded (same Message-ID,
alerts and envelope recipients), before anything new is planned; its record is finished with its alerts
(real aiosmtpd on loopback, real SQLite)."""

from __future__ import annotations

import dataclasses
import email
import email.policy
import re
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, EmailSettings, LogSettings
from monitor.state import outbox
from monitor.state.database import Database

T0 = 1_796_162_400.0          # 2026-12-01T22:00:00+00:00, the fixtures' created_at
QA = ("qa@brackenfield.example",)


@dataclass
class Attempt:
    """One DATA the server saw: envelope recipients, Message-ID, the lots listed, and the reply given."""

    rcpt_tos: list[str]
    message_id: str
    lots: list[str]
    reply: str


@dataclass
class ScriptedHandler:
    """aiosmtpd handler answering each DATA with the next reply of ``replies`` (then 250), keeping every
    attempt, accepted or not."""

    replies: list[str] = field(default_factory=list)
    attempts: list[Attempt] = field(default_factory=list)

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        reply = self.replies.pop(0) if self.replies else "250 OK"
        msg = email.message_from_bytes(envelope.original_content or envelope.content, policy=email.policy.default)
        body = msg.get_body(("plain",))
        text = body.get_content() if body is not None else ""
        lots = re.findall(r"/ lot (R[A-Z]\d): HOLD", text)      # the shipped hold / group body
        self.attempts.append(Attempt(list(envelope.rcpt_tos), str(msg["Message-ID"]).strip(), lots, reply))
        return reply

    def accepted(self) -> list[Attempt]:
        return [a for a in self.attempts if a.reply.startswith("250")]


def settings(port: int, tmp_path: Path, recipients: tuple[str, ...] = QA) -> AlertSettings:
    mail = EmailSettings(host="127.0.0.1", port=port, security="none", sender="lotwarden@brackenfield.example",
                         recipients=recipients, timeout=10, retry_first_seconds=1.0, retry_max_seconds=2.0)
    return AlertSettings(log=LogSettings(path=tmp_path / "alerts.jsonl"), email=mail, group_window_seconds=0.0,
                         group_max=50, hourly_cap=100)


def drain(db_path: Path, s: AlertSettings, now: float) -> int:
    d = Dispatcher(db_path, s, seed=7)
    try:
        return d.drain(now=now)
    finally:
        d.close()


def batch_rows(db_path: Path) -> list[tuple[str, str, str]]:
    conn = sqlite3.connect(db_path)
    try:
        return [(str(m), str(st), str(ids)) for m, st, ids in
                conn.execute("SELECT message_id, state, alert_ids FROM email_batches ORDER BY id")]
    finally:
        conn.close()


def scripted(smtp_factory: Any, replies: list[str]) -> tuple[Any, ScriptedHandler]:
    srv = smtp_factory(start=False)
    srv.handler = ScriptedHandler(replies=list(replies))
    srv.start()
    return srv, srv.handler


def test_a_message_refused_for_now_is_repeated_alone_under_its_message_id(db_path, tmp_path, put, alert_factory,
                                                                          smtp_factory, states):
    """Hold A's message gets a 451; hold B is raised meanwhile; the next pass repeats A's message as it was
    (A alone, same Message-ID, same recipients), then sends B in a message of its own."""
    srv, handler = scripted(smtp_factory, ["451 4.3.0 try again later"])
    s = settings(srv.port, tmp_path)
    put(alert_factory(lot="RA1"), ["email"])
    assert drain(db_path, s, T0 + 1) == 0
    put(alert_factory(lot="RB2"), ["email"])
    assert drain(db_path, s, T0 + 30) == 2
    first, again, b = handler.attempts
    assert first.reply.startswith("451") and first.lots == ["RA1"]
    assert (again.message_id, again.lots, again.rcpt_tos) == (first.message_id, ["RA1"], list(QA))
    assert b.lots == ["RB2"] and b.message_id != first.message_id
    assert set(states().values()) == {"sent"}
    assert [st for _, st, _ in batch_rows(db_path)] == ["sent", "sent"]


def test_a_repeated_message_keeps_its_recipients_after_a_config_change(db_path, tmp_path, put, alert_factory,
                                                                       smtp_factory):
    """A message recorded for qa@ is repeated to qa@ even after the recipients were changed; an alert raised
    after the change goes to the new list."""
    srv, handler = scripted(smtp_factory, ["452 4.3.1 mailbox full for now"])
    put(alert_factory(lot="RC1"), ["email"])
    drain(db_path, settings(srv.port, tmp_path), T0 + 1)
    other = ("shift@brackenfield.example",)
    put(alert_factory(lot="RC2"), ["email"])
    drain(db_path, settings(srv.port, tmp_path, recipients=other), T0 + 30)
    _, again, new = handler.attempts
    assert (again.lots, again.rcpt_tos) == (["RC1"], list(QA))
    assert (new.lots, new.rcpt_tos) == (["RC2"], list(other))


def test_a_refused_message_finishes_its_record_and_blocks_nothing(db_path, tmp_path, put, alert_factory,
                                                                  smtp_factory, states):
    """A 5xx on a message: its alert is dead, its record 'failed' (not repeated); the next alert goes out."""
    srv, handler = scripted(smtp_factory, ["554 5.7.1 refused by policy"])
    s = settings(srv.port, tmp_path)
    a = alert_factory(lot="RD1")
    put(a, ["email"])
    drain(db_path, s, T0 + 1)
    b = alert_factory(lot="RD2")
    put(b, ["email"])
    assert drain(db_path, s, T0 + 30) == 2          # B by e-mail, the delivery-failing alert on the log
    assert [x.lots for x in handler.attempts] == [["RD1"], ["RD2"]]
    assert states()[(a.dedup_key, "email")] == "dead" and states()[(b.dedup_key, "email")] == "sent"
    assert [st for _, st, _ in batch_rows(db_path)] == ["failed", "sent"]


def test_a_record_whose_alerts_are_settled_is_dropped_not_sent(db_path, tmp_path, put, alert_factory, smtp_factory,
                                                               states):
    """A record left 'sending' whose alert is no longer pending (settled meanwhile) sends nothing and is
    closed as 'dropped'; the pending alert beside it goes out."""
    srv, handler = scripted(smtp_factory, [])
    a, b = alert_factory(lot="RE1"), alert_factory(lot="RE2")
    put(a, ["email"])
    put(b, ["email"])
    with Database.open(db_path.parent) as store, store.write() as conn:
        (aid,) = conn.execute("SELECT id FROM alerts WHERE dedup_key = ?", (a.dedup_key,)).fetchone()
        outbox.mark_sent(conn, aid, "email", "2026-12-01T22:00:05+00:00")
        outbox.record_batch(conn, message_id="<lotwarden.left@brackenfield.example>", planned_at=T0,
                            recipients=QA, alert_ids=[aid], folded=False)
    assert drain(db_path, settings(srv.port, tmp_path), T0 + 30) == 1
    assert [x.lots for x in handler.attempts] == [["RE2"]]
    assert [st for _, st, _ in batch_rows(db_path)] == ["dropped", "sent"]


def test_a_repeat_is_planned_before_the_grouping_of_new_alerts(db_path, tmp_path, put, alert_factory, smtp_factory):
    """With a cap of one alert per message left to grouping, a repeated two-alert message stays two alerts:
    the repeat is not re-planned."""
    srv, handler = scripted(smtp_factory, ["421 4.7.0 busy"])
    put(alert_factory(lot="RF1"), ["email"])
    put(alert_factory(lot="RF2"), ["email"])
    drain(db_path, settings(srv.port, tmp_path), T0 + 1)
    s = dataclasses.replace(settings(srv.port, tmp_path), group_max=1)
    drain(db_path, s, T0 + 30)
    first, again = handler.attempts
    assert first.lots == again.lots == ["RF1", "RF2"] and again.message_id == first.message_id
