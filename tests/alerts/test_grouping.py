"""Not flooding people: grouping window, per-recipient hourly cap with a folded summary, reminder interval."""

from __future__ import annotations

import dataclasses
import re
from datetime import UTC

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.grouping import Pacing, PendingRow, plan_batches
from monitor.alerts.settings import AlertSettings, EmailSettings

T0 = 1_796_162_400.0          # 2026-12-01T22:00:00+00:00


def iso(t: float) -> str:
    from datetime import datetime
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="seconds")


def mail_settings(port: int, **over) -> AlertSettings:
    em = EmailSettings(host="127.0.0.1", port=port, security="none", sender="lotwarden@brackenfield.example",
                       recipients=("qa@brackenfield.example",), timeout=10, retry_first_seconds=1,
                       retry_max_seconds=4)
    return dataclasses.replace(AlertSettings(email=em), **over)


def lots_in(received):
    return [lot for r in received
            for lot in re.findall(r"/ lot (\w+): HOLD", r.message.get_body(("plain",)).get_content())]


def test_alerts_within_window_go_in_one_message_with_each_chart(db_path, put, alert_factory, smtp_factory):
    """Holds within the window become one message listing every lot, with one chart per held lot."""
    srv = smtp_factory()
    d = Dispatcher(db_path, mail_settings(srv.port, group_window_seconds=60))
    try:
        for i in range(4):
            put(alert_factory(lot=f"G{i}", created_at=iso(T0 + i * 5)), ["email"])
        put(alert_factory("file-rejected", lot="bad-export", created_at=iso(T0 + 20)), ["email"])
        assert d.drain(now=T0 + 30) == 0                  # the window is still open
        assert d.drain(now=T0 + 61) == 5
    finally:
        d.close()
    assert len(srv.received) == 1
    m = srv.received[0].message
    assert lots_in(srv.received) == ["G0", "G1", "G2", "G3"]
    assert "5 alerts" in m["Subject"] and "4 lots to hold" in m["Subject"]
    assert "file-rejected" in m.get_body(("plain",)).get_content()
    assert len([p for p in m.walk() if p.get_content_type() == "image/png"]) == 4


def test_hourly_cap_folds_overflow_into_one_summary(db_path, put, alert_factory, smtp_factory):
    """With a cap of 3 per hour the 4th..9th alerts wait and then arrive as one 'N more' message."""
    srv = smtp_factory()
    d = Dispatcher(db_path, mail_settings(srv.port, group_window_seconds=0, hourly_cap=3))
    try:
        t = T0
        for i in range(9):
            t = T0 + i * 120                               # one hold every two minutes
            put(alert_factory(lot=f"C{i}", created_at=iso(t)), ["email"])
            d.drain(now=t + 1)
        assert len(srv.received) == 3
        d.drain(now=T0 + 3600 + 2)                         # the first message's hour is over: one slot free
    finally:
        d.close()
    assert len(srv.received) == 4
    summary = srv.received[3].message
    assert "6 more alerts" in summary["Subject"]
    assert "hourly message limit" in summary.get_body(("plain",)).get_content()
    assert lots_in(srv.received) == [f"C{i}" for i in range(9)]


def test_repeat_hold_for_same_lot_waits_for_reminder_interval(db_path, put, alert_factory, smtp_factory, states):
    """A second hold for a lot already notified is suppressed inside the reminder interval, sent after it."""
    srv = smtp_factory()
    d = Dispatcher(db_path, mail_settings(srv.port, group_window_seconds=0, reminder_minutes=30))
    try:
        put(alert_factory(lot="R1", key="hold|R1|v1", created_at=iso(T0)), ["email"])
        d.drain(now=T0 + 1)
        put(alert_factory(lot="R1", key="hold|R1|v2", created_at=iso(T0 + 600)), ["email"])
        d.drain(now=T0 + 601)
        put(alert_factory(lot="R1", key="hold|R1|v3", created_at=iso(T0 + 1900)), ["email"])
        d.drain(now=T0 + 1901)
    finally:
        d.close()
    assert len(srv.received) == 2
    st = states()
    assert st[("hold|R1|v2", "email")] == "suppressed" and st[("hold|R1|v3", "email")] == "sent"


def test_plan_keeps_recipient_sets_apart_and_never_holds_back_a_digest():
    """Pure planning: different recipient sets give different batches; a digest is sent alone at once."""
    from monitor.alerts.alert import Alert

    def alert(kind, line, lot):
        return Alert(kind=kind, dedup_key=f"{kind}|{line}|{lot}", created_at=iso(T0), line=line, lot=lot)

    rows = [PendingRow(1, alert("hold", "L1", "a")), PendingRow(2, alert("hold", "L2", "b")),
            PendingRow(3, alert("digest", "", "")), PendingRow(4, alert("review", "L1", "c"))]
    route = {"L1": ("l1@x.example",), "L2": ("l2@x.example",), "": ("all@x.example",)}
    plan = plan_batches(rows, now=T0 + 10, pacing=Pacing(window=60, hourly_cap=1),
                        recipients_for=lambda a: route[a.line], sends={"all@x.example": [T0]}, last_notified={})
    assert [(b.recipients, [r.alert_id for r in b.rows]) for b in plan.batches] == [(("all@x.example",), [3])]
    assert plan.waiting == 3
    plan = plan_batches(rows, now=T0 + 61, pacing=Pacing(window=60, hourly_cap=1),
                        recipients_for=lambda a: route[a.line], sends={}, last_notified={})
    assert [[r.alert_id for r in b.rows] for b in plan.batches] == [[1, 4], [2], [3]]
