"""Header cleaning: whatever text an export carries, the built message has only our headers and recipients."""

from __future__ import annotations

from email import message_from_bytes
from email.policy import SMTP, default

from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.alerts.alert import Alert
from monitor.alerts.compose import build_message
from monitor.alerts.headers import clean_header_text, message_id
from monitor.alerts.templates import TemplateSet

TEMPLATES = TemplateSet.load()
HEADERS = {"subject", "from", "to", "date", "message-id", "auto-submitted", "mime-version", "content-type"}
# text rich in what breaks headers: CR, LF, NUL, Unicode line separators, encoded-word pieces, colons
NASTY = st.lists(st.sampled_from([*"ab:=?_Q ", "\r", "\n", "\x00", "\x0b", "\u2028", "\u0085",
                                                     "=?utf-8?q?", "?=", "=0A", "Bcc: x@evil.example"]),
                 max_size=30).map("".join)


@settings(max_examples=150, deadline=None)
@given(st.text(max_size=300))
def test_cleaned_text_has_no_control_chars_or_encoded_word_markers(text):
    """Any input comes out as one line without control characters, '=?' or '?=', at most 200 characters."""
    out = clean_header_text(text)
    assert not any(ord(c) < 32 or ord(c) == 127 or c in "\u2028\u2029\u0085" for c in out)
    assert "=?" not in out and "?=" not in out and len(out) <= 200


def test_known_payloads():
    """Known injection payloads (CR/LF header smuggling, and the RFC 2047 encoded newline of CVE-2024-6923)
    lose their line breaks and encoded-word markers."""
    assert clean_header_text("A1\r\nBcc: evil@example.com") == "A1 Bcc: evil@example.com"
    assert "=?" not in clean_header_text("=?utf-8?q?x=0ABcc:_evil@example.com?=")
    assert clean_header_text("=?=??=x") == "x"       # removal repeats until no marker is left


@settings(max_examples=60, deadline=None)
@given(lot=NASTY, product=NASTY, line=NASTY)
def test_built_message_has_only_our_headers(lot, product, line):
    """A message built from hostile line/product/lot values parses back to exactly our header names."""
    a = Alert(kind="review", dedup_key=f"review|{line}|{product}|{lot}", created_at="2026-12-01T22:00:00+00:00",
              line=line, product=product, lot=lot, data={"reason": lot, "n": 3})
    msg = build_message([a], sender="lotwarden@brackenfield.example", recipients=("qa@brackenfield.example",),
                        now=1_796_162_400.0, folded=False, templates=TEMPLATES, shipped=TEMPLATES)
    raw = msg.as_bytes(policy=SMTP)
    head = raw.split(b"\r\n\r\n", 1)[0]
    names = {ln.split(b":", 1)[0].decode().lower() for ln in head.split(b"\r\n") if ln and not ln[:1].isspace()}
    assert names == HEADERS
    back = message_from_bytes(raw, policy=default)
    assert back["To"] == "qa@brackenfield.example" and back["Bcc"] is None and back["Cc"] is None


def test_message_id_is_stable_and_order_free():
    """Same dedup keys (in any order) give the same Message-ID; different keys a different one."""
    assert message_id(["a", "b"], "x.example") == message_id(["b", "a"], "x.example")
    assert message_id(["a"], "x.example") != message_id(["b"], "x.example")
    assert message_id(["a"], "bad domain\r\n") .endswith("@baddomain>")
