"""One constructor per alert kind: each owns its kind's dedup key and the one shape of its payload."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from monitor.alerts.alert import Alert


def iso_utc(ts: float) -> str:
    """Unix seconds → ISO 8601 UTC with offset, e.g. '2026-12-01T22:05:00+00:00'."""
    return datetime.fromtimestamp(ts, UTC).isoformat(timespec="seconds")


# --- lots --------------------------------------------------------------------------------------------------
def verdict_alert(verdict: str, *, line: str, product: str, lot: str, rule_version: str,
                  payload: Mapping[str, Any], values: Sequence[float | None], at: str,
                  after_verdict_id: int | None = None) -> Alert:
    """A ``hold`` or ``review`` alert: ``payload`` is ``Verdict.to_json()``, ``values`` the lot's values.

    ``after_verdict_id``: the lot was told a different verdict before (held again after a pass): told again,
    once per change.
    """
    if verdict not in ("hold", "review"):
        raise ValueError(f"verdict alert for {verdict!r}: only hold and review are told")
    dedup = f"{verdict}|{line}|{product}|{lot}|{rule_version}"
    if after_verdict_id is not None:
        dedup += f"|after-{after_verdict_id}"
    return Alert(kind=verdict, dedup_key=dedup, created_at=at, data={**payload, "values": list(values)},
                 line=line, product=product, lot=lot)


def verdict_changed(*, line: str, product: str, lot: str, previous_verdict_id: int, payload: Mapping[str, Any],
                    previous: Mapping[str, Any], why: str, values: Sequence[float | None] | None,
                    at: str) -> Alert:
    """A lot judged again got a verdict other than its told hold / review. ``previous``: the replaced
    verdict (verdict, decided_at, reason, rule, rule_version, n, mean, p_value); ``why``: what reopened it."""
    data: dict[str, Any] = {**payload, "previous": dict(previous), "why": why}
    if values is not None:
        data["values"] = list(values)
    return Alert(kind="verdict-changed", dedup_key=f"verdict-changed|{line}|{product}|{lot}|{previous_verdict_id}",
                 created_at=at, data=data, line=line, product=product, lot=lot)


def disposition(*, line: str, product: str, lot: str, disposition_id: int, action: str, by: str, note: str,
                at: str, verdict: Mapping[str, Any]) -> Alert:
    """A person decided about a held lot (``action``: release / rework / scrap). ``verdict``: the disposed
    hold / review (verdict_id, verdict, decided_at, rule, rule_version, n, mean, target, unit, p_value, reason);
    routed like that verdict, so it reaches the people who got the hold."""
    return Alert(kind="disposition", dedup_key=f"disposition|{disposition_id}", created_at=at,
                 line=line, product=product, lot=lot,
                 data={"disposition": {"id": disposition_id, "action": action, "by": by, "note": note, "at": at},
                       "verdict": dict(verdict)})


def reminder(*, line: str, product: str, lot: str, verdict_id: int, number: int, verdict: Mapping[str, Any],
             open_minutes: float, at: str) -> Alert:
    """The ``number``-th reminder of a hold / review with no disposition, open ``open_minutes`` since it was
    decided. ``verdict`` as for ``disposition``; routed like that verdict."""
    return Alert(kind="reminder", dedup_key=f"reminder|{verdict_id}|{number}", created_at=at,
                 line=line, product=product, lot=lot,
                 data={"verdict": dict(verdict), "number": number, "open_minutes": round(open_minutes, 1)})


def drift(*, line: str, product: str, lot: str, signal_id: int, signal: Mapping[str, Any], at: str) -> Alert:
    """A drift chart crossed its limit at lot ``lot``; ``signal``: ``DriftSignal.to_json()`` (method, direction,
    statistic, limit, lots, head, points, settings, rule, rule_version). Told once per stored signal."""
    return Alert(kind="drift", dedup_key=f"drift|{line}|{product}|{signal.get('head') or ''}|{lot}|{signal_id}",
                 created_at=at, line=line, product=product, lot=lot, data={"drift": dict(signal)})


def rule_changed(*, rule: str, file: str, old_version: str, new_version: str,
                 changes: Sequence[Mapping[str, Any]], at: str) -> Alert:
    """A reloaded rule's values changed; ``changes``: one {key, old, new} per changed key, in key order. The
    same change made again later (back, then forth again) is told again: ``at`` is part of the key."""
    return Alert(kind="rule-changed", dedup_key=f"rule-changed|{rule}|{old_version}|{new_version}|{at}", created_at=at,
                 data={"rule": rule, "file": file, "old_version": old_version, "new_version": new_version,
                       "changes": [dict(c) for c in changes]})


# --- files -------------------------------------------------------------------------------------------------
def file_rejected(*, file_id: int, path: str, sha256: str, reason: str, at: str,
                  quarantined_to: str | None = None, line: int | None = None, key: str | None = None) -> Alert:
    """An export could not be used (quarantined to ``quarantined_to``, or vanished before it was taken)."""
    data: dict[str, Any] = {"file": Path(path).name, "path": path, "sha256": sha256, "reason": reason}
    if quarantined_to is not None:
        data["quarantined_to"] = quarantined_to
    if line is not None or key is not None:
        data.update({"line": line, "key": key})
    return Alert(kind="file-rejected", dedup_key=f"file-rejected|{file_id}", created_at=at, data=data)


def file_duplicate(*, file_id: int, path: str, sha256: str, reason: str, archived_to: str,
                   duplicate_of: Mapping[str, Any], at: str) -> Alert:
    """The same content arrived again; ``duplicate_of``: id, path, processed_at, archived_path of the first."""
    return Alert(kind="file-duplicate", dedup_key=f"file-duplicate|{file_id}", created_at=at,
                 data={"file": Path(path).name, "path": path, "sha256": sha256, "reason": reason,
                       "archived_to": archived_to, "duplicate_of": dict(duplicate_of)})


FILE_REVISED_REASON = "a file at a known path arrived with different content; its rows are counted as new rows"


def file_revised(*, file_id: int, path: str, sha256: str, archived_to: str, previous: Mapping[str, Any],
                 at: str) -> Alert:
    """A known path arrived with different content; ``previous``: id, sha256, processed_at of the earlier."""
    return Alert(kind="file-revised", dedup_key=f"file-revised|{file_id}", created_at=at,
                 data={"file": Path(path).name, "path": path, "sha256": sha256, "reason": FILE_REVISED_REASON,
                       "archived_to": archived_to, "previous": dict(previous)})


# --- configuration -----------------------------------------------------------------------------------------
def config_rejected(*, file: str, message: str, content_sha256: str, in_force_since: str, at: str,
                    key: str | None = None, line: int | None = None,
                    in_force: str = "the last good version") -> Alert:
    """A config / rule / template edit was bad; ``in_force`` says what stays in force instead.

    The key holds the bad content's hash and when the version in force became good, so the same bad edit
    made again after a good version is a new alert.
    """
    return Alert(kind="config-rejected",
                 dedup_key=f"config-rejected|{file}|{content_sha256[:16]}|{in_force_since}", created_at=at,
                 data={"file": file, "key": key, "line": line, "message": message,
                       "content_sha256": content_sha256, "in_force": in_force})


# --- delivery and the daemon -------------------------------------------------------------------------------
def delivery_failing(*, channel: str, alert: Alert, error: str, at: str) -> Alert:
    """``channel`` gave up on ``alert`` (told on the other channels)."""
    return Alert(kind="delivery-failing", dedup_key=f"delivery-failing|{channel}|{alert.dedup_key}",
                 created_at=at, line=alert.line, product=alert.product, lot=alert.lot,
                 data={"channel": channel, "error": error,
                       "alert": {"kind": alert.kind, "dedup_key": alert.dedup_key, "created_at": alert.created_at,
                                 "line": alert.line, "product": alert.product, "lot": alert.lot}})


def daemon_started(*, started_at: str, config: str, rules: Sequence[str]) -> Alert:
    return Alert(kind="daemon-started", dedup_key=f"daemon-started|{started_at}", created_at=started_at,
                 data={"config": config, "rules": list(rules), "started_at": started_at})


def daemon_stopped(*, started_at: str, stopped_at: str, files: int) -> Alert:
    return Alert(kind="daemon-stopped", dedup_key=f"daemon-stopped|{started_at}", created_at=stopped_at,
                 data={"started_at": started_at, "stopped_at": stopped_at, "files": files})


def digest(*, due_at: str, data: Mapping[str, Any], at: str) -> Alert:
    """The summary for the scheduled time ``due_at`` (ISO UTC)."""
    return Alert(kind="digest", dedup_key=f"digest|{due_at}", created_at=at, data=dict(data))


# --- faults ------------------------------------------------------------------------------------------------
def file_changed_after_take(*, file_id: int, detail: Mapping[str, Any], at: str) -> Alert:
    """An archived export changed after it was taken (``detail``: sizes, bytes and lines added, message)."""
    return Alert(kind="file-changed-after-take", dedup_key=f"file-changed-after-take|{file_id}", created_at=at,
                 data=dict(detail))


def fault_persisting(*, key: str, message: str, attempts: int, lasting_seconds: float, first_at: float,
                     at: str) -> Alert:
    """A fault of the daemon's surroundings has lasted long enough to tell people (once per occurrence)."""
    return Alert(kind="fault-persisting", dedup_key=f"fault-persisting|{key}|{int(first_at)}", created_at=at,
                 data={"key": key, "message": message, "attempts": attempts,
                       "lasting_seconds": round(lasting_seconds, 1), "since": iso_utc(first_at)})


def fault_cleared(*, key: str, message: str, attempts: int, lasted_seconds: float, first_at: float,
                  at: str) -> Alert:
    """A fault that was told (``fault-persisting``) has gone."""
    return Alert(kind="fault-cleared", dedup_key=f"fault-cleared|{key}|{int(first_at)}", created_at=at,
                 data={"key": key, "message": message, "attempts": attempts,
                       "lasted_seconds": round(lasted_seconds, 1), "since": iso_utc(first_at)})
