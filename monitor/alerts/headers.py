"""Header-safe text: data values from exports are cleaned before they reach Subject, From or To; the
Subject is folded so that its first line always carries text.

This Python (3.11.7) still turns an RFC 2047 encoded newline into a real header line when it folds a
header (CVE-2024-6923), so besides CR, LF, NUL and other control characters we remove every encoded-word
marker (``=?`` and ``?=``) and every Unicode line or paragraph separator.
"""

from __future__ import annotations

import hashlib
import re
import unicodedata
from email.header import Header
from email.policy import EmailPolicy
from typing import Any

MAX_HEADER_TEXT = 200
_MARKERS = re.compile(r"=\?|\?=")
_SPACES = re.compile(r"\s+")


def clean_header_text(value: object, limit: int = MAX_HEADER_TEXT) -> str:
    """``value`` as one line fit for a header: control and format characters become spaces, encoded-word
    markers are removed (repeatedly, so ``=?=??=`` cannot reassemble one), runs of space collapse, and the
    result is cut to ``limit`` characters (with "…")."""
    text = str(value)
    text = "".join(" " if unicodedata.category(c) in ("Cc", "Cf", "Zl", "Zp", "Cs", "Co", "Cn") else c
                   for c in text)
    while True:
        stripped = _MARKERS.sub("", text)
        if stripped == text:
            break
        text = stripped
    text = _SPACES.sub(" ", text).strip()
    if len(text) > limit:
        text = text[: limit - 1].rstrip() + "…"
    return text


def message_id(dedup_keys: list[str] | tuple[str, ...], domain: str) -> str:
    """A stable Message-ID for a message carrying these alerts: the same alerts give the same id after a
    crash and restart, so a repeated message is recognisable."""
    digest = hashlib.sha256("\n".join(sorted(dedup_keys)).encode("utf-8")).hexdigest()[:32]
    safe_domain = re.sub(r"[^A-Za-z0-9.-]", "", domain) or "lotwarden.invalid"
    return f"<lotwarden.{digest}@{safe_domain}>"


def fold_text_header(name: str, text: str, *, max_line: int = 78, linesep: str = "\r\n") -> str:
    """``name: text`` folded per RFC 5322 section 2.2.3 (whitespace before each line break, lines of at most
    ``max_line`` characters where a word allows it), text on the first line; non-ASCII text as RFC 2047
    encoded words. The stdlib folder moves a value that fits on one line of its own onto a continuation line,
    leaving "Subject:" bare, and parsers then read the subject with a leading space."""
    if not text.isascii():
        encoded = Header(text, "utf-8", header_name=name, maxlinelen=max_line).encode(linesep=linesep)
        return f"{name}: {encoded}{linesep}"
    words = text.split(" ")
    lines = [f"{name}: {words[0]}"]
    for word in words[1:]:
        if len(lines[-1]) + 1 + len(word) <= max_line or not lines[-1].strip():
            lines[-1] += " " + word
        else:
            lines.append(" " + word)
    return linesep.join(lines) + linesep


class NoticePolicy(EmailPolicy):
    """The SMTP policy, with Subject folded by ``fold_text_header`` (text on the first line)."""

    def fold(self, name: str, value: Any) -> str:
        if name.lower() == "subject":
            return fold_text_header(name, str(value), max_line=self.max_line_length or 78, linesep=self.linesep)
        return super().fold(name, value)

    def fold_binary(self, name: str, value: Any) -> bytes:
        if name.lower() == "subject":
            return self.fold(name, value).encode("ascii")
        return super().fold_binary(name, value)


NOTICE_POLICY = NoticePolicy(linesep="\r\n")
