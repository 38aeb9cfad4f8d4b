"""Drift across lots inside the intake's write transaction: each judged lot advances its charts.

Called by ``judge.record_verdict`` after the verdict row is written, on the same connection, so a chart's
step, the signal row, its audit record and the ``drift`` alert commit with the verdict or not at all. A
lot adds its statistic to a chart once (a lot judged again adds nothing twice); a chart built under
another rule version starts again.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence

from monitor import drift
from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.lot import Verdict
from monitor.rulebook import Rule
from monitor.state import audit, outbox
from monitor.state import drift as drift_store
from monitor.state.database import Connection

log = logging.getLogger("lotwarden.drift")


def advance_charts(conn: Connection, verdict: Verdict, rule: Rule | None, *, verdict_id: int, at: str,
                   channels: Sequence[str]) -> list[Alert]:
    """Advance the charts of the verdict's line and product (and heads); return the drift alerts that are new."""
    if rule is None or rule.drift is None:
        return []
    key = verdict.key
    new: list[Alert] = []
    for head, z in drift.observations(verdict, rule):
        if not drift_store.take_lot(conn, line=key.line, product=key.product, head=head, lot=key.lot,
                                    verdict_id=verdict_id, z=z, at=at):
            continue
        stored = drift_store.track(conn, key.line, key.product, head)
        try:
            before = drift.Track.from_json(stored) if stored is not None else None
        except (KeyError, TypeError, ValueError):
            log.error("drift chart of %s/%s/%s could not be read; it starts again", key.line, key.product, head)
            before = None
        after, signal = drift.advance(before, line=key.line, product=key.product, head=head, lot=key.lot, z=z,
                                      rule=rule)
        drift_store.put_track(conn, key.line, key.product, head, after.to_json(), at)
        if signal is None:
            continue
        data = signal.to_json()
        signal_id = drift_store.add_signal(conn, at=at, line=key.line, product=key.product, head=head, lot=key.lot,
                                           method=signal.method, direction=signal.direction,
                                           statistic=signal.statistic, limit=signal.limit, rule=rule.name,
                                           rule_version=rule.version, data=data)
        audit.append(conn, at, "drift", line=key.line, product=key.product, lot=key.lot,
                     detail={"signal_id": signal_id, "head": signal.head, "method": signal.method,
                             "direction": signal.direction, "statistic": signal.statistic, "limit": signal.limit,
                             "lots": list(signal.lots), "rule": rule.name, "rule_version": rule.version})
        alert = kinds.drift(line=key.line, product=key.product, lot=key.lot, signal_id=signal_id, signal=data, at=at)
        if outbox.enqueue(conn, alert, channels):
            new.append(alert)
    return new
