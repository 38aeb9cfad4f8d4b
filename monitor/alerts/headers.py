"""Header-safe text: data values from exports are cleaned before they reach Subject, From or To.

This Python (3.11.7) still turns an RFC 2047 encoded newline into a real header line when it folds a
header (CVE-2024-6923), so besides CR, LF, NUL and other control characters we remove every encoded-word
marker (``=?`` and ``?=``) and every Unicode line or paragraph separator.
"""

from __future__ import annotations

import hashlib
import re
import unicodedata

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
