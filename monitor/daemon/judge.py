"""Judging a closed lot inside the intake's write transaction: stored values -> LotData -> Verdict -> rows.

The verdict row, its audit record, the hold/review alert and a ``verdict-changed`` alert (outbox) are
written on the caller's open connection, so they commit together with whatever closed the lot (a file's
done mark, the idle job).
"""

from __future__ import annotations

import json
import logging
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.daemon import drifting, rejudge
from monitor.lot import LotData, LotKey, LotSummary, Verdict, excluded_counts, no_rule_reason, unjudged
from monitor.rulebook import Rule
from monitor.state import audit, outbox, verdicts
from monitor.state import lots as lot_store
from monitor.state.database import Connection
from monitor.units import to_rule_unit

log = logging.getLogger("lotwarden.intake")

Evaluator = Callable[[LotData, Rule], Verdict]
MAX_ALERT_VALUES = 10_000


FETCH_ROWS = 50_000
RECENT_VALUES_MAX = 200_000   # values kept in memory over all recent lots (a few MB)
RECENT_LOT_MAX = 10_000       # a lot longer than this is read back from the store when it closes


def load_lot_values(conn: Connection, lot_id: int, key: LotKey, rule: Rule | None
                    ) -> tuple[LotData, str | None]:
    """The stored values of a lot in arrival order, converted to the rule's unit, as LotData.

    Returns ``(lot, problem)``; ``problem`` names why the lot cannot be judged (unconvertible units).
    Values are read ``FETCH_ROWS`` rows at a time into one float64 array; heads share one string per
    distinct head, so a lot of a million values costs a few tens of MB, not hundreds. A row stored without
    a usable value (``excluded`` names why) is a NaN in its place and counts in ``excluded_by``; its unit
    plays no part in the conversion. Files are named where they lie (their archive path).
    """
    groups = lot_store.value_groups(conn, lot_id)
    pairs = [(u, d) for u, d, why, _first, _n in groups if not why]
    excluded_by: dict[str, int] = {}
    for _u, _d, why, _first, count in groups:
        if why:
            excluded_by[why] = excluded_by.get(why, 0) + int(count)
    files = lot_store.file_paths(conn, lot_id)
    factor, problem, _assumed = unit_factors(pairs, rule)
    per_row = problem is None and len(pairs) > 1 and any(f != 1.0 for f in factor.values())
    chunks: list[np.ndarray] = []
    heads: list[str] = []
    shared: dict[str, str] = {}
    for rows in lot_store.value_chunks(conn, lot_id, with_units=per_row, chunk=FETCH_ROWS):
        chunk = np.array([r[0] for r in rows], dtype=np.float64)  # NULL (non-finite, excluded) -> nan
        if per_row:  # an excluded row's unit has no factor: its value is NaN whatever it is multiplied by
            chunk *= np.array([factor.get((r[-2], r[-1]), 1.0) for r in rows], dtype=np.float64)
        chunks.append(chunk)
        heads.extend(shared.setdefault(r[1], r[1]) for r in rows)
        del rows
    values = np.concatenate(chunks) if chunks else np.empty(0, dtype=np.float64)
    del chunks
    return lot_data(key, values, heads if any(shared) else None, pairs, files, rule, converted=per_row,
                    excluded_by=excluded_by)


def unit_factors(pairs: Sequence[tuple[str, float | None]], rule: Rule | None
                 ) -> tuple[dict[tuple[str, float | None], float], str | None, bool]:
    """Factor from each (unit, density) to the rule's unit, the first conversion problem (or None), and
    whether some values carried no unit (unit "") and were taken to be in the rule's unit.

    ``monitor.units.to_rule_unit`` decides each pair; with no rule, or a rule without a unit, every
    factor is 1."""
    factor: dict[tuple[str, float | None], float] = {}
    problem = None
    assumed = False
    rule_unit = rule.unit if rule is not None else ""
    for u, d in pairs:
        c = to_rule_unit(u, rule_unit, d)
        factor[(u, d)] = c.factor
        problem = problem or c.problem
        assumed = assumed or c.assumed
    return factor, problem, assumed


def lot_data(key: LotKey, values: np.ndarray, heads: Sequence[str] | None,
             pairs: Sequence[tuple[str, float | None]], files: tuple[str, ...], rule: Rule | None, *,
             converted: bool = False, excluded_by: Mapping[str, int] | None = None) -> tuple[LotData, str | None]:
    """LotData in the rule's unit from stored values whose (unit, density) pairs are ``pairs`` in order of
    first use; with one pair the whole array is scaled here (``converted``: the caller did it per row).
    ``excluded_by`` counts the lot's rows without a usable value per reason."""
    factor, problem, assumed = unit_factors(pairs, rule)
    if problem is None and rule is not None and rule.unit:
        if not converted and len(pairs) == 1:
            f = factor[(pairs[0][0], pairs[0][1])]
            if f != 1.0:
                values = values * f
        unit = rule.unit
    else:
        unit = next((u for u, _d in pairs if u), rule.unit if rule is not None else "")
    return LotData(key=key, values=values, heads=tuple(heads) if heads is not None else None, files=files,
                   unit=unit, unit_assumed=assumed, excluded_by=dict(excluded_by or {})), problem


class RecentValues:
    """The values of lots this intake has just stored, so closing such a lot needs no read-back.

    An entry holds a lot's whole history (started at seq 1, every later segment appended) and is used
    only when its count equals the lot's ``n`` in the store; anything else (a rolled-back file, a lot
    longer than ``RECENT_LOT_MAX``, mixed units) falls back to ``load_lot_values``. Memory is bounded by
    ``RECENT_VALUES_MAX`` values; the oldest entries go first.
    """

    def __init__(self) -> None:
        self.lots: dict[int, _Recent] = {}
        self.size = 0

    def add(self, lot_id: int, seq0: int, values: np.ndarray, heads: list[str], units: list[str],
            density: float | None, file_id: int, path: str, excluded: Sequence[str] | None = None) -> None:
        """Rows just inserted for ``lot_id`` from ``seq0``: values as read (non-finite are stored as NULL);
        ``excluded`` gives each row's exclusion reason ("" for a usable value), as stored."""
        entry = self.lots.pop(lot_id, None)
        if entry is not None:
            self.size -= entry.n
        if seq0 == 1:
            entry = _Recent()
        if entry is None or entry.n != seq0 - 1 or entry.n + len(values) > RECENT_LOT_MAX or not units:
            return
        why = list(excluded) if excluded is not None else [""] * len(units)
        usable = [u for u, w in zip(units, why, strict=False) if not w] if any(why) else units
        if usable:
            pair = (usable[0], density)
            if usable.count(usable[0]) != len(usable) or (entry.pairs and entry.pairs[0] != pair):
                return  # mixed units: the store's per-row conversion handles those
            entry.pairs = [pair]
        for w in why:
            if w:
                entry.excluded_by[w] = entry.excluded_by.get(w, 0) + 1
        entry.values.append(np.where(np.isfinite(values), values, np.nan))
        entry.heads.extend(heads)
        if file_id not in entry.file_ids:
            entry.file_ids.append(file_id)
            entry.files.append(path)
        entry.n += len(values)
        self.lots[lot_id] = entry
        self.size += entry.n
        while self.size > RECENT_VALUES_MAX and self.lots:
            old = next(iter(self.lots))
            self.size -= self.lots.pop(old).n

    def take(self, lot_id: int, n: int) -> _Recent | None:
        """The entry of a closing lot if it holds exactly the ``n`` stored values; it leaves the cache."""
        entry = self.lots.pop(lot_id, None)
        if entry is None:
            return None
        self.size -= entry.n
        return entry if entry.n == n else None

    def clear(self) -> None:
        """Forget everything (a transaction or savepoint was rolled back)."""
        self.lots.clear()
        self.size = 0


class _Recent:
    """One lot's recent values (internal to ``RecentValues``)."""

    def __init__(self) -> None:
        self.n = 0
        self.values: list[np.ndarray] = []
        self.heads: list[str] = []
        self.pairs: list[tuple[str, float | None]] = []
        self.files: list[str] = []
        self.file_ids: list[int] = []
        self.excluded_by: dict[str, int] = {}

    def lot_data(self, key: LotKey, rule: Rule | None) -> tuple[LotData, str | None]:
        """The same LotData ``load_lot_values`` would read from the store."""
        values = np.concatenate(self.values) if self.values else np.empty(0, dtype=np.float64)
        return lot_data(key, values, self.heads if any(self.heads) else None, self.pairs, tuple(self.files), rule,
                        excluded_by=self.excluded_by)


def summary_lot(key: LotKey, n: int, mean: float, sd: float, unit: str, density: float | None,
                rule: Rule | None, file_path: str) -> tuple[LotData, str | None]:
    """A lot known only by n / mean / sd, in the rule's unit when it can be converted (a summary without a
    unit is taken to be in the rule's unit: ``unit_assumed``)."""
    rule_unit = rule.unit if rule is not None else ""
    c = to_rule_unit(unit, rule_unit, density)
    assumed, problem = c.assumed, c.problem
    if problem is None and rule_unit:
        mean, sd, unit = mean * c.factor, sd * abs(c.factor), rule_unit
    return LotData(key=key, summary=LotSummary(int(n), float(mean), float(sd)), files=(file_path,),
                   unit=unit, unit_assumed=assumed), problem


def unusable_summary(lot: LotData, rule: Rule | None, problem: str) -> Verdict:
    """The `review` verdict of a summary record whose n / mean / sd cannot be used (never left out)."""
    meta: dict[str, Any] = {}
    if rule is not None:
        meta = {"rule_name": rule.name, "rule_version": rule.version, "target": rule.target,
                "alternative": rule.alternative, "alpha": rule.alpha}
    return unjudged(lot, f"the lot summary is not usable: {problem}", **meta)


def judge(lot: LotData, rule: Rule | None, problem: str | None, evaluate: Evaluator) -> Verdict:
    """The verdict on one lot; never raises (an engine failure becomes a `review` naming it).

    ``unit_assumed`` and ``excluded_by`` always come from the lot as the store knows it."""
    return with_lot_facts(_judge(lot, rule, problem, evaluate), lot)


def with_lot_facts(verdict: Verdict, lot: LotData) -> Verdict:
    """``verdict`` with the lot's ``unit_assumed`` and its exclusion counts (all four reasons); the verdict
    itself when it says these already (the usual case: no copy, which a batch of lots cannot afford)."""
    excluded_by = excluded_counts(lot.excluded_by, verdict.excluded)
    if verdict.unit_assumed == lot.unit_assumed and verdict.runs == lot.runs \
            and dict(verdict.excluded_by) == excluded_by:
        return verdict
    return replace(verdict, unit_assumed=lot.unit_assumed, runs=lot.runs, excluded_by=excluded_by)


def _judge(lot: LotData, rule: Rule | None, problem: str | None, evaluate: Evaluator) -> Verdict:
    if rule is None:
        return unjudged(lot, no_rule_reason(lot.key.product))
    meta: dict[str, Any] = {"rule_name": rule.name, "rule_version": rule.version, "target": rule.target,
                            "alternative": rule.alternative, "alpha": rule.alpha}
    if problem is not None:
        return unjudged(lot, problem, **meta)
    try:
        return evaluate(lot, rule)
    except Exception as exc:  # an engine bug must not stop the daemon or lose the lot
        log.exception("statistics engine failed on lot %s/%s/%s", lot.key.line, lot.key.product, lot.key.lot)
        return unjudged(lot, f"the statistics engine failed on this lot ({type(exc).__name__}: {exc});"
                             " judge it by hand", **meta)


def alert_values(lot: LotData) -> list[float | None]:
    """The first 10,000 values in arrival order, JSON-safe (None for a non-finite value)."""
    if lot.values is None:
        return []
    head = lot.values[:MAX_ALERT_VALUES]
    return [float(x) if math.isfinite(x) else None for x in head.tolist()]


def record_verdict(conn: Connection, verdict: Verdict, rule: Rule | None, lot: LotData, *, at: str,
                   channels: Sequence[str], lot_id: int | None = None, summary_id: int | None = None,
                   close_reason: str | None = None, file_id: int | None = None, lot_rows: int | None = None,
                   previous: rejudge.Previous | None = None, why: str = "") -> list[Alert]:
    """Write the verdict row, its audit record, its alert (hold / review) and, when it replaces an earlier
    hold or review of the lot with a different verdict (``previous``), the ``verdict-changed`` alert;
    return the alerts that are new.

    A hold / review is told once per lot and rule version (dedup key), and once more each time it follows
    a different verdict of the lot (hold, pass, hold again: the second hold is told too)."""
    payload = verdict.to_json()
    key = verdict.key
    rule_name = rule.name if rule else ""
    version = rule.version if rule else ""
    rule_hash = rule.content_hash if rule else ""
    verdict_id = verdicts.insert(conn, verdicts.NewVerdict(
        at, key.line, key.product, key.lot, rule_name, version, rule_hash, verdict.verdict, verdict.n,
        payload["mean"], payload["target"], verdict.unit, json.dumps(payload, sort_keys=True, allow_nan=False),
        lot_id, summary_id, close_reason, lot_rows))
    detail: dict[str, Any] = {
        "verdict": verdict.verdict, "rule": rule_name, "rule_version": version, "rule_hash": rule_hash,
        "n": verdict.n, "mean": payload["mean"], "p_value": payload["p_value"], "reason": verdict.reason,
        "close_reason": close_reason, "unit_assumed": payload["unit_assumed"], "excluded": payload["excluded"],
        "excluded_by": payload["excluded_by"]}
    if previous is not None:
        detail["replaces"] = {"verdict_id": previous.verdict_id, "verdict": previous.verdict,
                              "decided_at": previous.decided_at, "why": why}
    audit.append(conn, at, "verdict", file_id=file_id, line=key.line, product=key.product, lot=key.lot,
                detail=detail)
    new: list[Alert] = []
    values: list[float | None] | None = None
    changed = rejudge.changed_alert(verdict, payload, previous, why, at) if previous is not None else None
    if changed is not None:
        values = alert_values(lot)
        changed = replace(changed, data={**changed.data, "values": values})
        if outbox.enqueue(conn, changed, channels):
            new.append(changed)
    if verdict.verdict in ("hold", "review"):
        again = previous is not None and previous.verdict != verdict.verdict  # held again after a pass
        alert = kinds.verdict_alert(verdict.verdict, line=key.line, product=key.product, lot=key.lot,
                                    rule_version=version, payload=payload,
                                    values=alert_values(lot) if values is None else values, at=at,
                                    after_verdict_id=previous.verdict_id if again and previous else None)
        if outbox.enqueue(conn, alert, channels):
            new.append(alert)
    new.extend(drifting.advance_charts(conn, verdict, rule, verdict_id=verdict_id, at=at, channels=channels))
    return new
