"""Times people type (``--since`` / ``--until``): an ISO date means its whole day in the plant's time zone,
an ISO date-time without an offset is a time there, one with an offset is that instant."""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from zoneinfo import ZoneInfo

from monitor.errors import LotwardenError

_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


class PeriodError(LotwardenError):
    """A --since / --until value that is not an ISO date or date-time, or a period that ends before it starts."""


@dataclass(frozen=True)
class Period:
    """Instants ``start <= t < end`` (either end None: open). Both ends are aware datetimes."""

    start: datetime | None = None
    end: datetime | None = None

    def __contains__(self, moment: datetime) -> bool:
        return (self.start is None or moment >= self.start) and (self.end is None or moment < self.end)


def parse_moment(text: str, zone: str, *, flag: str, end: bool) -> datetime:
    """The instant ``text`` names in time zone ``zone``: for a date, its first instant (``end``: the first
    instant of the next day, so the whole day is in); for a date-time, that time (``end``: the period ends
    just after it, one microsecond on, so the instant itself is in). Raises PeriodError naming ``flag``."""
    tz = ZoneInfo(zone)
    value = text.strip()
    if _DATE.match(value):
        try:
            day = date.fromisoformat(value)
        except ValueError as exc:
            raise PeriodError(f"{flag} {text!r}: {exc}", hint="give a date as YYYY-MM-DD") from None
        if end:
            day += timedelta(days=1)
        return datetime.combine(day, time(0), tzinfo=tz)
    try:
        moment = datetime.fromisoformat(value.replace("Z", "+00:00") if value.endswith("Z") else value)
    except ValueError:
        raise PeriodError(f"{flag} {text!r} is not an ISO date or date-time",
                          hint="e.g. 2026-12-01 (that whole day) or 2026-12-01T06:00 or 2026-12-01T06:00+01:00"
                          ) from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=tz)
    return moment + timedelta(microseconds=1) if end else moment


def parse_period(since: str | None, until: str | None, zone: str) -> Period:
    """The period of ``--since`` and ``--until`` (either may be None) in time zone ``zone``."""
    start = parse_moment(since, zone, flag="--since", end=False) if since else None
    stop = parse_moment(until, zone, flag="--until", end=True) if until else None
    if start is not None and stop is not None and stop <= start:
        raise PeriodError(f"--until {until!r} is before --since {since!r}", hint="swap them")
    return Period(start, stop)


def parse_stored(text: str) -> datetime:
    """A time the state database stored (ISO 8601 with offset) as an aware datetime."""
    moment = datetime.fromisoformat(text)
    if moment.tzinfo is None:
        raise ValueError(f"stored time {text!r} has no offset")
    return moment
