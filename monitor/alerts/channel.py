"""The one interface every alert channel implements: deliver these alerts, report what happened to each."""

from __future__ import annotations

import sqlite3
from collections.abc import Callable, Generator, Sequence
from dataclasses import dataclass
from typing import Literal, Protocol

from monitor.alerts.alert import Alert
from monitor.alerts.delivery import GiveUp, RetryLater

Status = Literal["delivered", "retry", "failed", "suppressed"]


@dataclass(frozen=True)
class Due:
    """One pending delivery handed to a channel."""

    alert_id: int
    alert: Alert
    attempts: int


@dataclass(frozen=True)
class Report:
    """What happened to some of the alerts handed over.

    ``delivered``: done (``reason`` may note e.g. refused recipients); ``retry``: try again after a backoff
    (the dispatcher stops handing this channel anything until then); ``failed``: permanent, with ``reason``;
    ``suppressed``: deliberately not sent (``reason`` says why). ``booking`` is the channel's own
    bookkeeping, run in the same transaction that marks the alerts (whatever the status).
    """

    alert_ids: tuple[int, ...]
    status: Status
    reason: str = ""
    booking: Callable[[sqlite3.Connection], None] | None = None


class Channel(Protocol):
    """An alert channel. ``deliver`` yields a Report as soon as each delivery is settled (so the outbox is
    marked right after each send) and never raises for a delivery problem; ``abort`` cuts an exchange in
    flight from another thread and refuses new ones (used on shutdown)."""

    name: str
    retry_first_seconds: float
    retry_max_seconds: float

    def deliver(self, due: Sequence[Due], now: float, *, flush: bool) -> Generator[Report, None, None]: ...

    def abort(self) -> None: ...

    def close(self) -> None: ...


class OneAtATime:
    """Channel behaviour for a channel that sends each alert alone, as its JSON text (``send(payload)``).

    Order is kept: a transient failure stops the pass, so nothing overtakes the alert that waits.
    """

    name: str = ""
    retry_first_seconds: float = 1.0
    retry_max_seconds: float = 60.0

    def send(self, payload: str) -> None:
        raise NotImplementedError

    def deliver(self, due: Sequence[Due], now: float, *, flush: bool) -> Generator[Report, None, None]:
        for d in due:
            try:
                self.send(d.alert.dumps())
            except RetryLater as exc:
                yield Report((d.alert_id,), "retry", str(exc))
                return
            except GiveUp as exc:
                yield Report((d.alert_id,), "failed", str(exc))
                continue
            yield Report((d.alert_id,), "delivered")

    def abort(self) -> None:
        """Nothing in flight can be cut by default."""

    def close(self) -> None:
        """Nothing to let go of by default."""
