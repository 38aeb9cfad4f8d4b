"""E-mail routes and Subject folding, through a real aiosmtpd server on 127.0.0.1 receiving real messages."""

from __future__ import annotations

import email
import email.policy
import tomllib
from pathlib import Path

import pytest

from monitor.alerts.alert import Alert
from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, parse_alerts

T0 = 1_796_162_400.0          # 2026-12-01T22:00:00+00:00, the fixtures' created_at
QA = "qa@brackenfield.example"
LEAD = "l2-shift-lead@brackenfield.example"


def route_settings(port: int, tmp_path: Path, route_extra: str = "") -> AlertSettings:
    """The operator's config text, parsed the daemon's way: QA gets everything, a route for L2 holds."""
    text = f"""
[alerts]
group_window_seconds = 0
[alerts.log]
path = "alerts.jsonl"
[alerts.email]
host = "127.0.0.1"
port = {port}
sender = "lotwarden@brackenfield.example"
recipients = ["{QA}"]
timeout = 10
[[alerts.email.route]]
lines = ["L2"]
kinds = ["hold"]
recipients = ["{LEAD}"]
{route_extra}
"""
    return parse_alerts(tomllib.loads(text)["alerts"], source="lotwarden.toml", base_dir=tmp_path)


def drain_all(db_path: Path, s: AlertSettings, now: float) -> int:
    d = Dispatcher(db_path, s, seed=3)
    try:
        return d.drain(now=now, flush=True)
    finally:
        d.close()


def by_lot(received) -> dict[str, list]:
    """{lot code in the subject: [messages]} of what the server received."""
    out: dict[str, list] = {}
    for r in received:
        for lot in ("A2001", "A1001", "C1"):
            if f"lot {lot}" in str(r.message["Subject"]):
                out.setdefault(lot, []).append(r)
    return out


def test_route_adds_its_recipients_to_the_default_list(db_path, tmp_path, put, alert_factory, smtp_factory):
    """With a route for L2 holds, the QA default address and the shift lead both get the L2 hold; an L1
    hold (no route) reaches QA only."""
    srv = smtp_factory()
    put(alert_factory(lot="A2001", line="L2"), ["email"])
    put(alert_factory(lot="A1001", line="L1"), ["email"])
    assert drain_all(db_path, route_settings(srv.port, tmp_path), T0 + 1) == 2
    got = by_lot(srv.received)
    assert len(got["A2001"]) == 1 and len(got["A1001"]) == 1
    l2 = got["A2001"][0]
    assert sorted(l2.rcpt_tos) == sorted([QA, LEAD])
    assert sorted(a.addr_spec for a in l2.message["To"].addresses) == sorted([QA, LEAD])
    assert got["A1001"][0].rcpt_tos == [QA]


def test_replace_default_sends_to_the_route_only(db_path, tmp_path, put, alert_factory, smtp_factory):
    """With replace_default = true only the shift lead gets the L2 hold; alerts no route selects still go
    to QA."""
    srv = smtp_factory()
    put(alert_factory(lot="A2001", line="L2"), ["email"])
    put(alert_factory(lot="A1001", line="L1"), ["email"])
    s = route_settings(srv.port, tmp_path, "replace_default = true")
    assert drain_all(db_path, s, T0 + 1) == 2
    got = by_lot(srv.received)
    assert got["A2001"][0].rcpt_tos == [LEAD]
    assert [a.addr_spec for a in got["A2001"][0].message["To"].addresses] == [LEAD]
    assert got["A1001"][0].rcpt_tos == [QA]


def test_verdict_changed_reaches_the_route_of_the_verdict_it_replaces(db_path, tmp_path, put, alert_factory,
                                                                      hold_factory, smtp_factory):
    """A verdict-changed alert for a lot first held on L2 goes to the L2-hold route (and QA)."""
    srv = smtp_factory()
    data = hold_factory("C1", "L2", verdict="pass", reason="no shift shown",
                        previous={"verdict": "hold", "decided_at": "2026-12-01T21:00:00+00:00",
                                  "reason": "mean below target", "rule": "oat-500", "rule_version": "3f2a9c1d",
                                  "n": 6, "mean": 497.0, "p_value": 0.001},
                        why="14 late values from archive/2026-12-01/L2-late.csv reopened the lot")
    put(Alert(kind="verdict-changed", dedup_key="verdict-changed|L2|OAT-500|C1|1",
              created_at="2026-12-01T22:00:00+00:00", data=data, line="L2", product="OAT-500", lot="C1"), ["email"])
    assert drain_all(db_path, route_settings(srv.port, tmp_path, "replace_default = true"), T0 + 1) == 1
    assert srv.received[0].rcpt_tos == [LEAD]
    subject = str(srv.received[0].message["Subject"])
    assert "HOLD replaced by PASS" in subject and "C1" in subject


# Subjects of every length around one header line (78 characters, RFC 5322 section 2.1.1), ASCII and not.
REASONS = ["mean drifted " * k + "x" * j for k in range(9) for j in range(0, 13, 3) if k or j]
REASONS += ["Shapiro–Wilk rejects normality " + "µ" * j for j in range(0, 60, 7)]


@pytest.mark.parametrize("reason", REASONS)
def test_long_subject_folds_without_leading_space(db_path, tmp_path, put, alert_factory, hold_factory,
                                                  smtp_factory, reason):
    """The received Subject, parsed with the email package, is exactly the subject text (no leading space);
    its raw lines fold at whitespace and keep to 78 characters (RFC 5322 sections 2.1.1 and 2.2.3)."""
    reason = reason.strip()
    srv = smtp_factory()
    put(alert_factory("review", lot="R7", data=hold_factory("R7", verdict="review", reason=reason)), ["email"])
    s = route_settings(srv.port, tmp_path)
    assert drain_all(db_path, s, T0 + 1) == 1
    raw = srv.received[0].raw
    parsed = email.message_from_bytes(raw, policy=email.policy.default)
    assert str(parsed["Subject"]) == f"[lotwarden] review L2 OAT-500 lot R7: {reason}"
    head = raw.split(b"\r\n\r\n", 1)[0].split(b"\r\n")
    start = next(i for i, ln in enumerate(head) if ln.lower().startswith(b"subject:"))
    assert head[start].strip().lower() != b"subject:"                # text on the header's first line
    lines = [head[start]]
    for ln in head[start + 1:]:
        if ln[:1] not in (b" ", b"\t"):
            break
        lines.append(ln)
    assert all(len(ln) <= 78 for ln in lines), lines
