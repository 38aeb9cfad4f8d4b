"""A lot judged again after late values reopened it: its previous verdict, why, and the verdict-changed alert.

People were told of a hold or a review; when the lot is judged again and its verdict differs, they get one
``verdict-changed`` alert saying which verdict it replaces, when that was decided and why the lot was judged
again. The alert is written with the new verdict (same transaction); its dedup key names the verdict row it
replaces, so each change is told once, across crashes and retries.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.lot import LotKey, Verdict
from monitor.state import lots as lot_store
from monitor.state import verdicts
from monitor.state.database import Connection

TOLD = ("hold", "review")   # verdicts that raised an alert: a change of those is told


@dataclass(frozen=True)
class Previous:
    """The latest verdict stored for a lot, as the verdict-changed alert names it."""

    verdict_id: int
    verdict: str
    decided_at: str
    reason: str
    rule: str
    rule_version: str
    n: int
    mean: float | None
    p_value: float | None
    lot_rows: int          # rows of the lot (usable or not) stored when it was judged

    def to_json(self) -> dict[str, object]:
        """The alert's ``previous`` object."""
        return {"verdict": self.verdict, "decided_at": self.decided_at, "reason": self.reason, "rule": self.rule,
                "rule_version": self.rule_version, "n": self.n, "mean": self.mean, "p_value": self.p_value}


def previous_verdict(conn: Connection, lot_id: int, key: LotKey) -> Previous | None:
    """The lot's latest stored verdict, or None when it was never judged (looked up by the indexed key)."""
    row = verdicts.latest_for_lot(conn, key.line, key.product, key.lot, lot_id)
    if row is None:
        return None
    verdict_id, verdict, decided_at, rule, version, n, text, lot_rows = row
    try:
        payload = json.loads(text)
    except (TypeError, ValueError):
        payload = {}
    if not isinstance(payload, dict):
        payload = {}
    if lot_rows is None:  # a verdict stored before lot_rows was kept: the values it used and those left out
        lot_rows = int(n or 0) + int(payload.get("excluded") or 0)
    return Previous(verdict_id=int(verdict_id), verdict=str(verdict), decided_at=str(decided_at),
                    reason=str(payload.get("reason", "")), rule=str(rule), rule_version=str(version),
                    n=int(n or 0), mean=_number(payload.get("mean")), p_value=_number(payload.get("p_value")),
                    lot_rows=int(lot_rows))


def why_reopened(conn: Connection, lot_id: int, rows_before: int) -> str:
    """A sentence naming the late values (rows after ``rows_before``) and the files, where they now lie."""
    parts = lot_store.files_after(conn, lot_id, rows_before)
    total = sum(int(c) for _p, c in parts)
    if not total:
        return "the lot was judged again"
    paths = [str(p) for p, _c in parts]
    where = paths[0] if len(paths) == 1 else ", ".join(paths[:-1]) + " and " + paths[-1]
    return f"{total} late value{'s' if total != 1 else ''} from {where} reopened the lot"


def changed_alert(verdict: Verdict, payload: Mapping[str, object], previous: Previous, why: str, at: str,
                  values: Sequence[float | None] | None = None) -> Alert | None:
    """The verdict-changed alert when ``verdict`` replaces a told hold / review with another verdict; else None.

    ``payload`` is ``verdict.to_json()``; ``values`` the lot's values (left out when None)."""
    if previous.verdict not in TOLD or verdict.verdict == previous.verdict:
        return None
    key = verdict.key
    return kinds.verdict_changed(line=key.line, product=key.product, lot=key.lot,
                                 previous_verdict_id=previous.verdict_id, payload=payload,
                                 previous=previous.to_json(), why=why, values=values, at=at)


def _number(x: object) -> float | None:
    return float(x) if isinstance(x, (int, float)) and not isinstance(x, bool) else None
