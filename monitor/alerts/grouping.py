"""Pure e-mail pacing: which pending alerts go out now, together, to whom — grouping, hourly cap, reminders.

``plan_batches`` takes the pending rows and what was sent before and returns the batches to send now and
the repeat holds to suppress; everything else waits for a later drain. No I/O here.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime

from monitor.alerts.alert import Alert

HOUR = 3600.0


@dataclass(frozen=True)
class PendingRow:
    """One pending e-mail delivery."""

    alert_id: int
    alert: Alert
    attempts: int = 0


@dataclass(frozen=True)
class Batch:
    """One message to send: its recipients, its alerts (in creation order) and whether it folds a capped hour."""

    recipients: tuple[str, ...]
    rows: tuple[PendingRow, ...]
    folded: bool = False

    @property
    def alerts(self) -> tuple[Alert, ...]:
        return tuple(r.alert for r in self.rows)


@dataclass(frozen=True)
class Pacing:
    """The pacing knobs (from AlertSettings)."""

    window: float = 60.0
    group_max: int = 50
    hourly_cap: int = 12
    reminder: float = 4 * HOUR


@dataclass(frozen=True)
class Plan:
    """What to do now: batches to send, (alert_id, reason) to suppress; the rest waits."""

    batches: tuple[Batch, ...] = ()
    suppressed: tuple[tuple[int, str], ...] = ()
    waiting: int = 0
    notes: tuple[str, ...] = field(default=())


def epoch(iso: str) -> float:
    """ISO 8601 timestamp → unix seconds (naive = UTC); unreadable → 0 (treated as long due)."""
    try:
        dt = datetime.fromisoformat(iso.replace("Z", "+00:00"))
    except (ValueError, AttributeError):
        return 0.0
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt.timestamp()


def plan_batches(rows: Sequence[PendingRow], *, now: float, pacing: Pacing,
                 recipients_for: Callable[[Alert], tuple[str, ...]],
                 sends: Mapping[str, Sequence[float]], last_notified: Mapping[tuple[str, str, str], float],
                 flush: bool = False) -> Plan:
    """Decide the batches to send at ``now``.

    - A hold for a lot already notified within ``pacing.reminder`` seconds is suppressed (also a second
      hold for the same lot in this plan).
    - Alerts for the same recipients are grouped; a group waits until its oldest alert is ``window``
      seconds old (unless ``flush``), then goes out in chunks of ``group_max``.
    - ``sends`` maps recipient → unix times of earlier messages; no recipient gets more than
      ``hourly_cap`` messages in any rolling hour: a group waits for a free slot, and is then marked
      ``folded`` (its message says the hour's limit was reached). Digests are never grouped or held back.
    """
    suppressed: list[tuple[int, str]] = []
    seen_lots: dict[tuple[str, str, str], float] = dict(last_notified)
    groups: dict[tuple[str, ...], list[PendingRow]] = {}
    singles: list[Batch] = []
    for row in rows:
        a = row.alert
        if a.kind == "hold":
            key = (a.line, a.product, a.lot)
            last = seen_lots.get(key)
            if last is not None and now - last < pacing.reminder:
                suppressed.append((row.alert_id, f"lot already notified as held {now - last:.0f} s ago; "
                                                 f"reminder interval {pacing.reminder:.0f} s"))
                continue
            seen_lots[key] = now
        rcpt = recipients_for(a)
        if a.kind == "digest":
            singles.append(Batch(rcpt, (row,)))
        else:
            groups.setdefault(rcpt, []).append(row)

    history: dict[str, list[float]] = {r: sorted(ts) for r, ts in sends.items()}
    batches: list[Batch] = []
    waiting = 0

    def used(rcpt: tuple[str, ...], since: float, until: float) -> int:
        return max((sum(1 for t in history.get(r, ()) if since < t <= until) for r in rcpt), default=0)

    for batch in singles:
        batches.append(batch)
        for r in batch.recipients:
            history.setdefault(r, []).append(now)
    for rcpt, members in groups.items():
        oldest = min(epoch(m.alert.created_at) for m in members)
        ready_at = oldest + pacing.window
        if not flush and now < ready_at and max(m.attempts for m in members) == 0:
            waiting += len(members)
            continue
        # folded: at the moment this group would have gone out, the hour's messages were used up
        folded = used(rcpt, ready_at - HOUR, ready_at) >= pacing.hourly_cap
        rest = list(members)
        while rest:
            if used(rcpt, now - HOUR, now) >= pacing.hourly_cap:
                waiting += len(rest)
                break
            chunk, rest = rest[: pacing.group_max], rest[pacing.group_max:]
            batches.append(Batch(rcpt, tuple(chunk), folded=folded))
            for r in rcpt:
                history.setdefault(r, []).append(now)
    batches.sort(key=lambda b: b.rows[0].alert_id)
    return Plan(batches=tuple(batches), suppressed=tuple(suppressed), waiting=waiting)
