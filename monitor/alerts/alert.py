"""The Alert value: one thing people must be told, with a dedup key so it is told once."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

ALERT_KINDS = (
    "hold",              # a lot's mean is shown to have moved off target
    "review",            # a lot needs a person: too small, non-normal, no rule for the product, ...
    "verdict-changed",   # a lot judged again (late values) got a verdict other than its notified hold/review
    "file-rejected",     # an export could not be used; it was quarantined
    "config-rejected",   # a config / rule / template edit was bad; the last good version stays in force
    "file-duplicate",    # the same content arrived again; not counted twice
    "file-revised",      # a known path arrived with different content
    "delivery-failing",  # a channel gave up on an alert (5xx / dead)
    "file-changed-after-take",  # an archived export grew or changed after it was taken: new rows not judged
    "fault-persisting",  # a fault (full disk, unusable archive, ...) has lasted minutes; files wait, none lost
    "fault-cleared",     # ... and has gone
    "disposition",       # a person released, reworked or scrapped a held lot (told to those who got the hold)
    "reminder",          # a hold / review still has no disposition: told again every reminder_minutes
    "rule-changed",      # a reloaded rule's values changed (old -> new per key)
    "drift",             # a line's product (or one filler head) is creeping off target across lots
    "daemon-started",
    "daemon-stopped",
    "digest",            # the daily summary
)


VERDICT_KINDS = ("hold", "review", "verdict-changed")   # alerts whose data is a Verdict.to_json()


@dataclass(frozen=True)
class Alert:
    """One alert. ``data`` is JSON-safe; for hold/review it is ``Verdict.to_json()`` plus context; for
    verdict-changed the new verdict's ``to_json()`` plus ``values``, ``previous`` (the replaced verdict:
    verdict, decided_at, reason, rule, rule_version, n, mean, p_value) and ``why`` (what reopened the lot).

    ``dedup_key`` is stable across restarts and re-processing (e.g. ``"hold|L2|OAT-500|A1234|<rule_version>"``):
    the outbox keeps at most one alert per key and channel.
    """

    kind: str
    dedup_key: str
    created_at: str                      # ISO 8601 UTC, e.g. "2026-12-01T22:05:00+00:00"
    data: dict[str, Any] = field(default_factory=dict)
    line: str = ""
    product: str = ""
    lot: str = ""

    def __post_init__(self) -> None:
        if self.kind not in ALERT_KINDS:
            raise ValueError(f"alert kind {self.kind!r} must be one of {', '.join(ALERT_KINDS)}")

    def to_json(self) -> dict[str, Any]:
        """The alert-log object. For hold, review and verdict-changed alerts the lot's (new) numbers also
        stand at the top level, keyed as in ``lotwarden check --format json`` (``n``, ``mean``, ``p_value``,
        ``verdict``, ...); ``data`` keeps everything, the lot's values included."""
        obj: dict[str, Any] = {"kind": self.kind, "dedup_key": self.dedup_key, "created_at": self.created_at,
                               "line": self.line, "product": self.product, "lot": self.lot}
        if self.kind in VERDICT_KINDS:
            for key, value in self.data.items():
                if key not in obj and key not in ("values", "data"):
                    obj[key] = value
        obj["data"] = self.data
        return obj

    def dumps(self) -> str:
        return json.dumps(self.to_json(), sort_keys=True, ensure_ascii=False, allow_nan=False)

    @classmethod
    def from_json(cls, obj: dict[str, Any]) -> Alert:
        return cls(kind=obj["kind"], dedup_key=obj["dedup_key"], created_at=obj["created_at"],
                   data=obj.get("data", {}), line=obj.get("line", ""), product=obj.get("product", ""),
                   lot=obj.get("lot", ""))
