"""The daily digest: each line's lots since the last digest (passed, held, reviewed, mean offset from
target) and the export files used or rejected, raised once per scheduled time even across restarts.

The scheduled time a digest covers is stored in ``digest_runs`` in the same transaction that enqueues the
digest alert, so a restart around the cron time neither loses nor repeats it.
"""

from __future__ import annotations

import logging
import math
import sqlite3
from datetime import datetime, timedelta, timezone
from typing import TYPE_CHECKING, Any, Iterator
from zoneinfo import ZoneInfo

from apscheduler.triggers.cron import CronTrigger

from monitor.alerts import outbox
from monitor.alerts.alert import Alert
from monitor.alerts.settings import DigestSettings

if TYPE_CHECKING:
    from monitor.alerts.dispatch import Dispatcher

log = logging.getLogger("monitor.alerts")
MAX_LISTED_FILES = 50


def trigger_for(settings: DigestSettings) -> CronTrigger:
    """The APScheduler cron trigger, in the configured (explicit ZoneInfo) time zone."""
    return CronTrigger.from_crontab(settings.cron, timezone=ZoneInfo(settings.timezone))


def fire_times(trigger: CronTrigger, start: datetime, end: datetime) -> Iterator[datetime]:
    """Scheduled times in [start, end], oldest first."""
    t = trigger.get_next_fire_time(None, start)
    while t is not None and t <= end:
        yield t
        t = trigger.get_next_fire_time(t, t + timedelta(microseconds=1))


def last_two_fire_times(trigger: CronTrigger, now: datetime) -> tuple[datetime | None, datetime | None]:
    """(the latest scheduled time <= now, the one before it), searching back up to about 13 months."""
    for days in (2, 9, 33, 400):
        times = list(fire_times(trigger, now - timedelta(days=days), now))
        if len(times) >= 2:
            return times[-1], times[-2]
    return (times[-1], None) if times else (None, None)


def _utc(dt: datetime) -> str:
    return dt.astimezone(timezone.utc).isoformat(timespec="seconds")


def _parse(iso: str) -> datetime | None:
    try:
        dt = datetime.fromisoformat(str(iso).replace("Z", "+00:00"))
    except ValueError:
        return None
    return dt if dt.tzinfo else dt.replace(tzinfo=timezone.utc)


def summarise(conn: sqlite3.Connection, start: datetime, end: datetime, zone: ZoneInfo) -> dict[str, Any]:
    """The digest's data for decisions in [start, end): per line and product, the latest verdict per lot."""
    latest: dict[tuple[str, str, str], tuple[datetime, str, float | None, float | None, str, str | None]] = {}
    notes: list[str] = []
    lo = _utc(start - timedelta(days=1))                 # loose string bound; exact filter below
    try:
        # the average-quantity screen's outcome: "met" / "not met" / "undecided", NULL when the rule has none
        rows = conn.execute("SELECT decided_at, line, product, lot, verdict, mean, target, unit, CASE"
                            " WHEN json_type(payload, '$.average_quantity') IS NOT 'object' THEN NULL"
                            " WHEN json_extract(payload, '$.average_quantity.passed') = 1 THEN 'met'"
                            " WHEN json_extract(payload, '$.average_quantity.passed') = 0 THEN 'not met'"
                            " ELSE 'undecided' END FROM verdicts WHERE decided_at >= ?", (lo,)).fetchall()
    except sqlite3.Error as exc:
        rows = []
        notes.append(f"verdicts not readable: {exc}")
    for decided_at, line, product, lot, verdict, mean, target, unit, screen in rows:
        t = _parse(decided_at)
        if t is None or not start <= t < end:
            continue
        key = (line or "", product or "", lot or "")
        if key not in latest or latest[key][0] <= t:
            latest[key] = (t, verdict, mean, target, unit or "", screen)
    lines: dict[str, dict[tuple[str, str], dict[str, Any]]] = {}
    for (line, product, _lot), (_t, verdict, mean, target, unit, screen) in sorted(latest.items()):
        p = lines.setdefault(line, {}).setdefault((product, unit), {
            "product": product, "unit": unit, "lots": 0, "passed": 0, "held": 0, "reviewed": 0, "_offsets": [],
            "screen": {"met": 0, "not met": 0, "undecided": 0}})
        p["lots"] += 1
        if screen is not None:
            p["screen"][screen] += 1
        p[{"pass": "passed", "hold": "held", "review": "reviewed"}.get(verdict, "reviewed")] += 1
        if isinstance(mean, (int, float)) and isinstance(target, (int, float)) and math.isfinite(mean - target):
            p["_offsets"].append(mean - target)
    out_lines = []
    for line in sorted(lines):
        products = []
        for (_product, _unit), p in sorted(lines[line].items()):
            offs = p.pop("_offsets")
            p["mean_offset"] = sum(offs) / len(offs) if offs else None
            products.append(p)
        out_lines.append({"line": line, "products": products})
    files = {"done": 0, "rejected": 0, "duplicate": 0}
    rejected: list[dict[str, str]] = []
    try:
        frows = conn.execute("SELECT state, processed_at, path, reason FROM files WHERE processed_at >= ?"
                             " ORDER BY processed_at", (lo,)).fetchall()
    except sqlite3.Error as exc:
        frows = []
        notes.append(f"files not readable: {exc}")
    for state, processed_at, path, reason in frows:
        t = _parse(processed_at)
        if t is None or not start <= t < end or state not in files:
            continue
        files[state] += 1
        if state == "rejected" and len(rejected) < MAX_LISTED_FILES:
            rejected.append({"path": str(path), "reason": str(reason or ""), "processed_at": str(processed_at)})
    fmt = "%Y-%m-%d %H:%M"
    return {"period_start": _utc(start), "period_end": _utc(end), "timezone": zone.key,
            "period_start_local": start.astimezone(zone).strftime(fmt),
            "period_end_local": end.astimezone(zone).strftime(fmt),
            "lines": out_lines, "files": files, "rejected_files": rejected, "notes": notes}


def run_digest(dispatcher: "Dispatcher", now: float | None = None) -> bool:
    """Raise the digest for the latest scheduled time if it is not yet stored and not too late; True if raised."""
    settings = dispatcher.settings.digest
    if settings is None:
        return False
    zone = ZoneInfo(settings.timezone)
    now_dt = datetime.fromtimestamp(dispatcher.clock() if now is None else now, timezone.utc)
    due, previous = last_two_fire_times(trigger_for(settings), now_dt)
    if due is None:
        return False
    if now_dt - due > timedelta(hours=settings.catch_up_hours):
        skipped = dispatcher.skipped_digests
        if _utc(due) not in skipped:              # the drain asks every few seconds: say it once per digest
            skipped.add(_utc(due))
            log.info("digest for %s skipped: more than %g h late", _utc(due), settings.catch_up_hours)
        return False
    conn = dispatcher.conn
    due_key = _utc(due)
    with dispatcher.lock, dispatcher.write():
        if conn.execute("SELECT 1 FROM digest_runs WHERE due_at = ?", (due_key,)).fetchone():
            return False
        last = conn.execute("SELECT MAX(period_end) FROM digest_runs").fetchone()[0]
        start = _parse(last) if last else None
        if start is None or start >= due:
            start = previous if previous is not None else due - timedelta(days=1)
        data = summarise(conn, start, due, zone)
        alert = Alert(kind="digest", dedup_key=f"digest|{due_key}", created_at=_utc(now_dt), data=data)
        conn.execute("INSERT INTO digest_runs(due_at, period_start, period_end, created_at, dedup_key)"
                     " VALUES (?,?,?,?,?)", (due_key, _utc(start), due_key, _utc(now_dt), alert.dedup_key))
        outbox.enqueue(conn, alert, dispatcher.settings.channels)
    log.info("digest for %s raised", due_key)
    return True


def schedule_digest(dispatcher: "Dispatcher", scheduler: Any) -> None:
    """Add the digest cron job (the periodic drain also checks for a digest missed while the daemon was down)."""
    settings = dispatcher.settings.digest
    assert settings is not None

    def job() -> None:
        try:
            if run_digest(dispatcher):
                dispatcher.drain()
        except Exception:                                  # job errors would only reach apscheduler's logger
            log.exception("digest job failed")

    scheduler.add_job(job, trigger_for(settings), id="lotwarden-alerts-digest", replace_existing=True,
                      coalesce=True, max_instances=1, misfire_grace_time=int(settings.catch_up_hours * 3600) or 1)
