"""The lot record as people read it: each lot's latest verdict with its disposition and giveaway (pure).

Built from stored rows (``monitor.state.history``, ``monitor.state.dispositions``); the commands ``lots``,
``show`` and ``report`` and the digest share it, so a lot reads the same everywhere.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from monitor.giveaway import Giveaway, giveaway_of
from monitor.period import Period, parse_stored
from monitor.state.dispositions import DispositionRow
from monitor.state.verdicts import VerdictRow

DISPOSABLE = ("hold", "review")     # verdicts a person must dispose of
LOT_VERDICTS = ("pass", "hold", "review")
# the JSON keys of one lot (``lotwarden lots --format json``), in order; also the CSV columns
LOT_KEYS = ("line", "product", "lot", "verdict", "n", "mean", "target", "unit", "p_value", "reason", "decided_at",
            "rule", "rule_version", "giveaway", "disposition")


@dataclass(frozen=True)
class Disposition:
    """What a person decided about a held lot."""

    id: int
    verdict_id: int
    action: str
    by: str
    note: str
    at: str                     # ISO 8601 UTC as stored

    @classmethod
    def from_row(cls, row: DispositionRow) -> Disposition:
        return cls(id=row.id, verdict_id=row.verdict_id, action=row.action, by=row.by, note=row.note, at=row.at)

    def to_json(self) -> dict[str, Any]:
        """``action``, ``by``, ``note``, ``at`` (and ``verdict_id``: the verdict it disposed of)."""
        return {"action": self.action, "by": self.by, "note": self.note, "at": self.at,
                "verdict_id": self.verdict_id}


@dataclass(frozen=True)
class LotEntry:
    """One lot with its latest verdict. ``disposition`` is the latest disposition of that verdict (a
    disposition of an earlier verdict does not dispose of a new hold); ``payload`` the verdict's stored JSON."""

    verdict_id: int
    line: str
    product: str
    lot: str
    verdict: str
    n: int
    mean: float | None
    target: float | None
    unit: str
    p_value: float | None
    reason: str
    decided_at: str
    rule: str
    rule_version: str
    rule_hash: str
    giveaway: Giveaway | None
    disposition: Disposition | None = None
    payload: Mapping[str, Any] = field(default_factory=dict, compare=False, repr=False)

    @property
    def decided(self) -> datetime:
        return parse_stored(self.decided_at)

    @property
    def is_open(self) -> bool:
        """A hold or review with no disposition yet."""
        return self.verdict in DISPOSABLE and self.disposition is None

    @property
    def name(self) -> str:
        return f"{self.line}/{self.product}/{self.lot}"

    def to_json(self) -> dict[str, Any]:
        """The documented object of ``lotwarden lots --format json`` (keys ``LOT_KEYS``)."""
        return {"line": self.line, "product": self.product, "lot": self.lot, "verdict": self.verdict, "n": self.n,
                "mean": self.mean, "target": self.target, "unit": self.unit, "p_value": self.p_value,
                "reason": self.reason, "decided_at": self.decided_at, "rule": self.rule,
                "rule_version": self.rule_version,
                "giveaway": None if self.giveaway is None else self.giveaway.to_json(),
                "disposition": None if self.disposition is None else self.disposition.to_json()}


def payload_of(row: VerdictRow) -> dict[str, Any]:
    """The verdict's stored JSON (an empty object when it cannot be read)."""
    try:
        value = json.loads(row.payload)
    except (TypeError, ValueError):
        return {}
    return value if isinstance(value, dict) else {}


def _finite(x: Any) -> float | None:
    if x is None or isinstance(x, bool):
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def stored_giveaway(payload: Mapping[str, Any], *, mean: float | None, n: int, target: float | None,
                    nominal: float | None = None) -> Giveaway | None:
    """The giveaway a verdict stored (``payload["giveaway"]``); for a verdict stored before giveaway was
    kept, computed from its mean, n and nominal (the screen's, else ``nominal``) or target, without cost."""
    g = payload.get("giveaway")
    if isinstance(g, Mapping) and _finite(g.get("per_pack")) is not None and _finite(g.get("total")) is not None:
        cost = _finite(g.get("cost"))
        currency = g.get("currency") if isinstance(g.get("currency"), str) else None
        return Giveaway(per_pack=float(g["per_pack"]), total=float(g["total"]), cost=cost,
                        currency=currency if cost is not None else None)
    if "giveaway" in payload:        # stored as null: the mean was unknown or not in the rule's unit
        return None
    aq = payload.get("average_quantity")
    ref_nominal = _finite(aq.get("nominal")) if isinstance(aq, Mapping) else None
    ref_nominal = ref_nominal if ref_nominal is not None else nominal
    ref_target = _finite(target)
    if _finite(mean) is None or (ref_nominal is None and ref_target is None):
        return None
    return giveaway_of(mean, n, nominal=ref_nominal, target=ref_target if ref_target is not None else math.nan)


def entry(row: VerdictRow, disposition: DispositionRow | None = None) -> LotEntry:
    """A lot's record from its latest verdict row and the latest disposition of that verdict (or None)."""
    payload = payload_of(row)
    mean, target = _finite(row.mean), _finite(row.target)
    return LotEntry(
        verdict_id=row.id, line=row.line, product=row.product, lot=row.lot, verdict=row.verdict, n=int(row.n),
        mean=mean, target=target, unit=row.unit, p_value=_finite(payload.get("p_value")),
        reason=str(payload.get("reason") or ""), decided_at=row.decided_at, rule=row.rule,
        rule_version=row.rule_version, rule_hash=row.rule_hash,
        giveaway=stored_giveaway(payload, mean=mean, n=int(row.n), target=target),
        disposition=Disposition.from_row(disposition) if disposition is not None else None, payload=payload)


def entries(rows: Iterable[VerdictRow], dispositions: Mapping[int, DispositionRow]) -> list[LotEntry]:
    """Entries of latest-verdict rows, ``dispositions`` by verdict id; oldest decision first."""
    out = [entry(r, dispositions.get(r.id)) for r in rows]
    out.sort(key=lambda e: (e.decided, e.verdict_id))
    return out


def select(items: Sequence[LotEntry], *, period: Period | None = None, line: str | None = None,
           product: str | None = None, verdict: str | None = None) -> list[LotEntry]:
    """The entries decided in ``period`` of that line, product and latest verdict (``"open"``: holds and
    reviews with no disposition), order kept."""
    out = []
    for e in items:
        if (line is not None and e.line != line) or (product is not None and e.product != product):
            continue
        if verdict == "open":
            if not e.is_open:
                continue
        elif verdict is not None and e.verdict != verdict:
            continue
        if period is not None and e.decided not in period:
            continue
        out.append(e)
    return out


def parse_lot_name(text: str) -> tuple[str, str, str]:
    """``LINE/PRODUCT/LOT`` split into its three parts (the lot code may itself hold "/"); ValueError when
    it has fewer than three parts. A part may be empty (an export without a line or product column)."""
    parts = text.split("/", 2)
    if len(parts) != 3:
        raise ValueError(f"{text!r} is not LINE/PRODUCT/LOT")
    return parts[0], parts[1], parts[2]
