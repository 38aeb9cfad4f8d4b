"""The daily digest: each line's lots since the last digest (passed, held, reviewed, mean offset from
target, the lots by code, giveaway per day), its holds still open, and the export files used or rejected,
raised once per scheduled time even across restarts.

The digest is a scheduled producer: it enqueues a digest alert like any other and knows nothing of the
channels. The scheduled time a digest covers is stored in ``digest_runs`` in the same transaction that
enqueues the alert, so a restart around the cron time neither loses nor repeats it.
"""

from __future__ import annotations

import logging
import math
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from apscheduler.triggers.cron import CronTrigger

from monitor.alerts import kinds
from monitor.alerts.settings import DigestSettings
from monitor.giveaway import total_giveaway
from monitor.record import LotEntry, entries
from monitor.state import drift as drift_store
from monitor.state import openholds
from monitor.state import outbox as repo
from monitor.state.database import write_tx
from monitor.state.files import processed_since
from monitor.state.verdicts import VerdictRow, decided_between

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
    return dt.astimezone(UTC).isoformat(timespec="seconds")


def _parse(iso: str) -> datetime | None:
    try:
        dt = datetime.fromisoformat(str(iso).replace("Z", "+00:00"))
    except ValueError:
        return None
    return dt if dt.tzinfo else dt.replace(tzinfo=UTC)


def _open_hold(e: LotEntry, end: datetime) -> dict[str, Any]:
    return {"product": e.product, "lot": e.lot, "verdict": e.verdict, "decided_at": e.decided_at,
            "age_hours": round((end - e.decided).total_seconds() / 3600.0, 2)}


def _lot_by_code(e: LotEntry) -> dict[str, Any]:
    return {"product": e.product, "lot": e.lot, "verdict": e.verdict, "n": e.n, "mean": e.mean,
            "giveaway_per_pack": None if e.giveaway is None else e.giveaway.per_pack,
            "disposition": None if e.disposition is None else e.disposition.action}


def _giveaway_days(items: list[LotEntry], zone: ZoneInfo) -> list[dict[str, Any]]:
    """The lots' giveaway summed per local day, product and unit (``math.fsum`` in ``total_giveaway``)."""
    groups: dict[tuple[str, str, str], list[LotEntry]] = {}
    for e in items:
        groups.setdefault((e.decided.astimezone(zone).date().isoformat(), e.product, e.unit), []).append(e)
    out = []
    for (day, product, unit), lots in sorted(groups.items()):
        total, unknown = total_giveaway((e.giveaway, e.n) for e in lots)
        out.append({"day": day, "product": product, "unit": unit, "lots": len(lots),
                    "packs": sum(e.n for e in lots if e.giveaway is not None),
                    "per_pack": None if total is None else total.per_pack,
                    "total": None if total is None else total.total,
                    "cost": None if total is None else total.cost,
                    "currency": None if total is None else total.currency,
                    "lots_without_giveaway": unknown})
    return out


def record_sections(conn: sqlite3.Connection, start: datetime, end: datetime, zone: ZoneInfo
                    ) -> dict[str, dict[str, list[dict[str, Any]]]]:
    """Per line: ``open_holds`` (every hold / review decided before ``end`` with no disposition, any age,
    oldest first; ``age_hours`` at ``end``), ``lots_by_code`` (the period's lots, latest verdict each, by lot
    code), ``giveaway`` (the period's lots per local day and product) and ``drift`` (the period's drift
    signals, oldest first)."""
    out: dict[str, dict[str, list[dict[str, Any]]]] = {}

    def line_of(name: str) -> dict[str, list[dict[str, Any]]]:
        return out.setdefault(name, {"open_holds": [], "lots_by_code": [], "giveaway": [], "drift": []})

    for sig in drift_store.signals(conn, since=_utc(start), until=_utc(end)):
        line_of(sig.line)["drift"].append({"product": sig.product, "head": sig.head or None, "lot": sig.lot,
                                           "at": sig.at, "method": sig.method, "direction": sig.direction,
                                           "statistic": sig.statistic, "limit": sig.limit,
                                           "lots": len(sig.data.get("lots") or ())})

    for e in entries(openholds.open_hold_rows(conn), {}):
        if e.decided < end:
            line_of(e.line)["open_holds"].append(_open_hold(e, end))
    latest: dict[tuple[str, str, str], tuple[datetime, VerdictRow]] = {}
    for row in openholds.verdicts_between(conn, _utc(start - timedelta(days=1)), _utc(end + timedelta(days=1))):
        t = _parse(row.decided_at)
        if t is None or not start <= t < end:
            continue
        key = (row.line or "", row.product or "", row.lot or "")
        if key not in latest or latest[key][0] <= t:
            latest[key] = (t, row)
    rows = [row for _t, row in latest.values()]
    period = entries(rows, openholds.dispositions_of(conn, [r.id for r in rows]))
    by_line: dict[str, list[LotEntry]] = {}
    for e in period:
        by_line.setdefault(e.line or "", []).append(e)
    for name, items in by_line.items():
        sec = line_of(name)
        sec["lots_by_code"] = [_lot_by_code(e) for e in sorted(items, key=lambda e: (e.lot, e.product))]
        sec["giveaway"] = _giveaway_days(items, zone)
    return out


def summarise(conn: sqlite3.Connection, start: datetime, end: datetime, zone: ZoneInfo) -> dict[str, Any]:
    """The digest's data for decisions in [start, end): per line and product, the latest verdict per lot."""
    latest: dict[tuple[str, str, str], tuple[datetime, str, float | None, float | None, str, str | None]] = {}
    notes: list[str] = []
    lo = _utc(start - timedelta(days=1))                 # loose string bound; exact filter below
    try:
        rows = decided_between(conn, lo, _utc(end + timedelta(days=1)))
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
    out_lines: list[dict[str, Any]] = []
    for line in sorted(lines):
        products = []
        for (_product, _unit), p in sorted(lines[line].items()):
            offs = p.pop("_offsets")
            p["mean_offset"] = sum(offs) / len(offs) if offs else None
            products.append(p)
        out_lines.append({"line": line, "products": products})
    try:
        sections = record_sections(conn, start, end, zone)
    except sqlite3.Error as exc:
        sections = {}
        notes.append(f"lot record not readable: {exc}")
    known = {ln["line"] for ln in out_lines}
    out_lines.extend({"line": line, "products": []} for line in sorted(sections) if line not in known)
    out_lines.sort(key=lambda ln: ln["line"])
    for ln in out_lines:
        sec = sections.get(ln["line"])
        ln.update(sec if sec is not None else {"open_holds": [], "lots_by_code": [], "giveaway": [], "drift": []})
    files = {"done": 0, "rejected": 0, "duplicate": 0}
    rejected: list[dict[str, str]] = []
    try:
        frows = processed_since(conn, lo)
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


class DigestProducer:
    """Raises the digest alert for each scheduled time, once, on ``channels``; its own connection."""

    def __init__(self, db_path: str | Path, settings: DigestSettings, channels: tuple[str, ...], *,
                 clock: Callable[[], float] = time.time, on_raised: Callable[[], None] | None = None) -> None:
        self.settings = settings
        self.channels = channels
        self._clock = clock
        self._on_raised = on_raised
        self._db_path = Path(db_path)
        self._conn: sqlite3.Connection | None = None
        self._lock = threading.Lock()
        self.skipped: set[str] = set()    # due times (UTC ISO) of digests logged as too late to send

    def run(self, now: float | None = None) -> bool:
        """Raise the digest for the latest scheduled time if not yet stored and not too late; True if raised."""
        with self._lock:
            if self._conn is None:
                self._conn = repo.connect(self._db_path)
            raised = run_digest(self._conn, self.settings, self.channels,
                                self._clock() if now is None else now, self.skipped)
        if raised and self._on_raised is not None:
            self._on_raised()
        return raised

    def job(self) -> None:
        """The scheduled job: never raises (job errors would only reach apscheduler's logger)."""
        try:
            self.run()
        except Exception:
            log.exception("digest job failed")

    def schedule(self, scheduler: Any) -> None:
        """The cron job, plus a check soon after start and every minute for a digest missed while down."""
        scheduler.add_job(self.job, trigger_for(self.settings), id="lotwarden-alerts-digest", replace_existing=True,
                          coalesce=True, max_instances=1,
                          misfire_grace_time=int(self.settings.catch_up_hours * 3600) or 1)
        scheduler.add_job(self.job, "interval", seconds=60, id="lotwarden-alerts-digest-catch-up",
                          replace_existing=True, coalesce=True, max_instances=1, misfire_grace_time=60,
                          next_run_time=datetime.now(UTC))

    def close(self) -> None:
        with self._lock:
            if self._conn is not None:
                self._conn.close()
                self._conn = None


def run_digest(conn: sqlite3.Connection, settings: DigestSettings, channels: tuple[str, ...], now: float,
               skipped: set[str]) -> bool:
    """Raise the digest for the latest scheduled time if it is not yet stored and not too late; True if raised.

    ``skipped`` remembers the due times already logged as too late (said once per digest).
    """
    zone = ZoneInfo(settings.timezone)
    now_dt = datetime.fromtimestamp(now, UTC)
    due, previous = last_two_fire_times(trigger_for(settings), now_dt)
    if due is None:
        return False
    due_key = _utc(due)
    if now_dt - due > timedelta(hours=settings.catch_up_hours):
        if due_key not in skipped:              # asked every minute: say it once per digest
            skipped.add(due_key)
            log.info("digest for %s skipped: more than %g h late", due_key, settings.catch_up_hours)
        return False
    if repo.digest_run_exists(conn, due_key):    # a read first: no write lock taken when nothing is due
        return False
    with write_tx(conn):
        if repo.digest_run_exists(conn, due_key):
            return False
        last = repo.last_digest_end(conn)
        start = _parse(last) if last else None
        if start is None or start >= due:
            start = previous if previous is not None else due - timedelta(days=1)
        data = summarise(conn, start, due, zone)
        alert = kinds.digest(due_at=due_key, data=data, at=_utc(now_dt))
        repo.record_digest_run(conn, due_at=due_key, period_start=_utc(start), period_end=due_key,
                               created_at=_utc(now_dt), dedup_key=alert.dedup_key)
        repo.enqueue(conn, alert, channels)
    log.info("digest for %s raised", due_key)
    return True
