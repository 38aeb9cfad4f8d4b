"""E-mail delivery through a real aiosmtpd server on 127.0.0.1: content, envelope, login, TLS, outage, 5xx."""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import pytest

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, EmailSettings, LogSettings

T0 = 1_796_162_400.0          # 2026-12-01T22:00:00+00:00, the fixtures' created_at


def email_settings(port: int, **over) -> EmailSettings:
    base = EmailSettings(host="127.0.0.1", port=port, security="none", sender="lotwarden@brackenfield.example",
                         recipients=("qa@brackenfield.example", "line2@brackenfield.example"), timeout=10,
                         retry_first_seconds=1.0, retry_max_seconds=8.0)
    return dataclasses.replace(base, **over)


def settings(port: int, tmp_path: Path, *, window: float = 0.0, cap: int = 100, **email_over) -> AlertSettings:
    return AlertSettings(log=LogSettings(path=tmp_path / "alerts.jsonl"), email=email_settings(port, **email_over),
                         group_window_seconds=window, hourly_cap=cap)


def drain(db_path, s, now, times=1, flush=False):
    d = Dispatcher(db_path, s, seed=7)
    try:
        return sum(d.drain(now=now, flush=flush) for _ in range(times))
    finally:
        d.close()


def test_hold_notice_content_envelope_and_chart(db_path, tmp_path, put, alert_factory, smtp_factory):
    """A hold reaches the configured recipients only, with the facts a QA person needs, the caution and a PNG."""
    srv = smtp_factory()
    a = alert_factory(lot="A1001")
    put(a, ["log", "email"])
    assert drain(db_path, settings(srv.port, tmp_path), T0 + 1) == 2
    assert len(srv.received) == 1
    got = srv.received[0]
    assert got.mail_from == "lotwarden@brackenfield.example"
    assert sorted(got.rcpt_tos) == ["line2@brackenfield.example", "qa@brackenfield.example"]
    m = got.message
    assert "HOLD" in m["Subject"] and "A1001" in m["Subject"] and "OAT-500" in m["Subject"]
    assert m["Bcc"] is None and m["Cc"] is None
    text = m.get_body(("plain",)).get_content()
    for needle in ("L2", "OAT-500", "A1001", "n = 10", "497.43", "500.00", "496.97", "497.89",
                   "against alpha 0.05", "Student's t", "Shapiro–Wilk", "0.93", "oat-500", "3f2a9c1d",
                   "exports/L2-A1001.csv", "competent authority"):
        assert needle in text, needle
    html = m.get_body(("html",)).get_content()
    assert "competent authority" in html and "cid:" in html
    pngs = [p for p in m.walk() if p.get_content_type() == "image/png"]
    assert len(pngs) == 1
    assert pngs[0].get_content()[:8] == b"\x89PNG\r\n\x1a\n"      # PNG signature (PNG spec, section 5.2)
    cid = str(pngs[0]["Content-ID"]).strip().strip("<>")
    assert f"cid:{cid}" in html


def test_message_id_is_stable_for_the_same_alert(db_path, tmp_path, put, alert_factory, smtp_factory):
    """The Message-ID derives from the dedup key: the same alert sent again carries the same id."""
    srv = smtp_factory()
    a = alert_factory(lot="M1")
    put(a, ["email"])
    drain(db_path, settings(srv.port, tmp_path), T0 + 1)
    from monitor.state import outbox
    from monitor.state.database import Database
    second = Database.open(tmp_path / "second")
    with second.write() as c:
        outbox.enqueue(c, a, ["email"])
    second.close()
    other = second.path
    drain(other, settings(srv.port, tmp_path), T0 + 1)
    ids = [str(r.message["Message-ID"]).strip() for r in srv.received]
    assert len(ids) == 2 and ids[0] == ids[1] and ids[0].startswith("<lotwarden.")


@pytest.mark.parametrize("evil_lot, evil_product", [
    ("A1\r\nBcc: evil@example.com", "OAT-500"),
    ("A2", "OAT-500\nBcc: evil@example.com\r\nX-Evil: 1"),
    ("=?utf-8?q?x=0ABcc:_evil@example.com?=", "=?utf-8?q?y=0D=0ATo:_evil@example.com?="),
    ("A3\x00\x1b[31m\u2028Bcc: evil@example.com", "JAM-340"),
])
def test_injection_adds_no_header_and_no_recipient(db_path, tmp_path, put, alert_factory, smtp_factory,
                                                   evil_lot, evil_product):
    """CR/LF, Bcc lines and RFC 2047 encoded newlines in lot/product add no header and no recipient."""
    srv = smtp_factory()
    a = alert_factory(lot=evil_lot, product=evil_product, key="hold|evil")
    put(a, ["email"])
    drain(db_path, settings(srv.port, tmp_path), T0 + 1)
    assert len(srv.received) == 1
    got = srv.received[0]
    assert sorted(got.rcpt_tos) == ["line2@brackenfield.example", "qa@brackenfield.example"]
    m = got.message
    assert m["Bcc"] is None and m["X-Evil"] is None and m["Cc"] is None
    assert m.get_all("To") and len(m.get_all("To")) == 1 and "evil" not in m["To"]
    header_block = got.raw.split(b"\r\n\r\n", 1)[0]
    names = [ln.split(b":", 1)[0].lower() for ln in header_block.split(b"\r\n") if ln and not ln[:1].isspace()]
    assert b"bcc" not in names and b"x-evil" not in names
    assert names.count(b"to") == 1 and names.count(b"subject") == 1
    assert not any(ln.lower().startswith((b"bcc", b"cc:", b"x-evil")) for ln in header_block.split(b"\r\n"))


def test_login_with_password_from_environment(db_path, tmp_path, put, alert_factory, smtp_factory, monkeypatch):
    """With username + password_env the sender logs in; a wrong password is a permanent failure (dead)."""
    from aiosmtpd.smtp import AuthResult

    def authenticator(server, session, envelope, mechanism, auth_data):
        ok = auth_data.login == b"lotwarden" and auth_data.password == b"pw-from-env"
        return AuthResult(success=ok, handled=False)   # handled=False: the server answers 535 itself

    srv = smtp_factory(authenticator=authenticator, auth_require_tls=False)
    monkeypatch.setenv("LW_TEST_SMTP_PW", "pw-from-env")
    s = settings(srv.port, tmp_path, username="lotwarden", password_env="LW_TEST_SMTP_PW")
    put(alert_factory(lot="L1"), ["log", "email"])
    assert drain(db_path, s, T0 + 1) == 2
    assert len(srv.received) == 1
    monkeypatch.setenv("LW_TEST_SMTP_PW", "wrong-secret-xyz")
    put(alert_factory(lot="L2"), ["log", "email"])
    drain(db_path, s, T0 + 2, times=2)
    assert len(srv.received) == 1
    log_text = (tmp_path / "alerts.jsonl").read_text()
    assert "delivery-failing" in log_text and "wrong-secret-xyz" not in log_text


def test_starttls_with_self_signed_certificate(db_path, tmp_path, put, alert_factory, smtp_factory):
    """security = "starttls" upgrades the connection; the test's own CA file makes the certificate trusted."""
    import datetime as dt
    import ipaddress
    import ssl

    from cryptography import x509  # in the test extra: the STARTTLS path is always exercised
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "127.0.0.1")])
    now = dt.datetime.now(dt.UTC)
    cert = (x509.CertificateBuilder().subject_name(name).issuer_name(name).public_key(key.public_key())
            .serial_number(x509.random_serial_number()).not_valid_before(now - dt.timedelta(days=1))
            .not_valid_after(now + dt.timedelta(days=1))
            .add_extension(x509.SubjectAlternativeName([x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]),
                           critical=False)
            .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
            .sign(key, hashes.SHA256()))
    cert_file, key_file = tmp_path / "cert.pem", tmp_path / "key.pem"
    cert_file.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    key_file.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                           serialization.NoEncryption()))
    ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ctx.load_cert_chain(cert_file, key_file)
    srv = smtp_factory(tls_context=ctx, require_starttls=True)
    put(alert_factory(lot="T1"), ["email"])
    assert drain(db_path, settings(srv.port, tmp_path, security="starttls", ca_file=cert_file), T0 + 1) == 1
    assert len(srv.received) == 1
    # without the CA file the self-signed certificate is not trusted: permanent failure, reported on the log
    put(alert_factory(lot="T2"), ["log", "email"])
    drain(db_path, settings(srv.port, tmp_path, security="starttls"), T0 + 2, times=2)
    assert len(srv.received) == 1
    assert "certificate" in (tmp_path / "alerts.jsonl").read_text()


def lots_in(received, prefix="O"):
    """Lot ids in the order the plain-text bodies list them."""
    import re
    return [lot for r in received
            for lot in re.findall(rf"/ lot ({prefix}\d+): HOLD", r.message.get_body(("plain",)).get_content())]


def test_outage_then_recovery_delivers_each_once_in_order(db_path, tmp_path, put, alert_factory, smtp_factory,
                                                          states):
    """Server down while lots are held, then up on the same port: each alert arrives once, in order."""
    srv = smtp_factory(start=False)
    s = dataclasses.replace(settings(srv.port, tmp_path), group_max=4)
    d = Dispatcher(db_path, s, seed=3)
    try:
        lots = [f"O{i}" for i in range(6)]
        for lot in lots[:3]:
            put(alert_factory(lot=lot), ["email"])
        assert d.drain(now=T0 + 10) == 0            # connection refused → retry later
        for lot in lots[3:]:
            put(alert_factory(lot=lot), ["email"])
        for k in range(20):                          # an hour down, drained every few minutes
            assert d.drain(now=T0 + 20 + k * 180) == 0
        srv.start()
        t = T0 + 3700
        for _ in range(8):                           # backoff is capped at 8 s here
            d.drain(now=t)
            t += 9
    finally:
        d.close()
    assert lots_in(srv.received) == lots          # once each, in order, grouped 4 + 2 after the outage
    assert len(srv.received) == 2
    assert set(states().values()) == {"sent"}


def test_5xx_marks_dead_and_reports_on_log(db_path, tmp_path, put, alert_factory, smtp_factory, states):
    """A 5xx reply is permanent: the e-mail delivery is dead and a delivery-failing alert reaches the log."""
    srv = smtp_factory()
    srv.handler.data_reply = "554 5.7.1 message refused by policy"
    a = alert_factory(lot="X1")
    put(a, ["log", "email"])
    drain(db_path, settings(srv.port, tmp_path), T0 + 1, times=2)
    st = states()
    assert st[(a.dedup_key, "email")] == "dead" and st[(a.dedup_key, "log")] == "sent"
    lines = [json.loads(x) for x in (tmp_path / "alerts.jsonl").read_text().splitlines()]
    assert [x["kind"] for x in lines] == ["hold", "delivery-failing"]
    assert "554" in lines[1]["data"]["error"] and lines[1]["data"]["alert"]["dedup_key"] == a.dedup_key
    assert ("delivery-failing|email|" + a.dedup_key, "email") not in st


def test_4xx_is_retried_not_dead(db_path, tmp_path, put, alert_factory, smtp_factory, states):
    """A 4xx reply leaves the alert pending; once the server accepts, it arrives once."""
    srv = smtp_factory()
    srv.handler.data_reply = "451 4.3.0 try again later"
    a = alert_factory(lot="R1")
    put(a, ["email"])
    s = settings(srv.port, tmp_path)
    assert drain(db_path, s, T0 + 1) == 0
    assert states()[(a.dedup_key, "email")] == "pending"
    srv.handler.data_reply = "250 OK"
    assert drain(db_path, s, T0 + 30) == 1
    assert len(srv.received) == 1
