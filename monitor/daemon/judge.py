"""Judging a closed lot inside the intake's write transaction: stored values -> LotData -> Verdict -> rows.

The verdict row, its audit record and the hold/review alert (outbox) are written on the caller's open
connection, so they commit together with whatever closed the lot (a file's done mark, the idle job).
"""

from __future__ import annotations

import json
import logging
import math
import sqlite3
from typing import Callable, Sequence

import numpy as np

from monitor.alerts import outbox
from monitor.alerts.alert import Alert
from monitor.daemon.store import Store
from monitor.lot import LotData, LotKey, LotSummary, Verdict, unjudged
from monitor.rulebook import Rule
from monitor.units import conversion_factor

log = logging.getLogger("lotwarden.intake")

Evaluator = Callable[[LotData, Rule], Verdict]
MAX_ALERT_VALUES = 10_000


def no_rule_reason(product: str) -> str:
    return f"no rule matches product {product or '(none)'!r}; add a rule file naming it under `products`"


FETCH_ROWS = 50_000
RECENT_VALUES_MAX = 200_000   # values kept in memory over all recent lots (a few MB)
RECENT_LOT_MAX = 10_000       # a lot longer than this is read back from the store when it closes


def load_lot_values(conn: sqlite3.Connection, lot_id: int, key: LotKey, rule: Rule | None
                    ) -> tuple[LotData, str | None]:
    """The stored values of a lot in arrival order, converted to the rule's unit, as LotData.

    Returns ``(lot, problem)``; ``problem`` names why the lot cannot be judged (unconvertible units).
    Values are read ``FETCH_ROWS`` rows at a time into one float64 array; heads share one string per
    distinct head, so a lot of a million values costs a few tens of MB, not hundreds.
    """
    pairs = conn.execute("SELECT unit, density, min(seq) AS first FROM lot_values WHERE lot_id = ?"
                         " GROUP BY unit, density ORDER BY first", (lot_id,)).fetchall()
    files = tuple(r[0] for r in conn.execute(
        "SELECT f.path FROM lot_values v JOIN files f ON f.id = v.file_id WHERE v.lot_id = ?"
        " GROUP BY v.file_id ORDER BY min(v.seq)", (lot_id,)))
    factor, problem = unit_factors([(u, d) for u, d, _first in pairs], rule)
    per_row = problem is None and len(pairs) > 1 and bool(factor)
    cols = "value, head, unit, density" if per_row else "value, head"
    cur = conn.execute(f"SELECT {cols} FROM lot_values WHERE lot_id = ? ORDER BY seq", (lot_id,))
    chunks: list[np.ndarray] = []
    heads: list[str] = []
    shared: dict[str, str] = {}
    while True:
        rows = cur.fetchmany(FETCH_ROWS)
        if not rows:
            break
        chunk = np.array([r[0] for r in rows], dtype=np.float64)  # NULL (non-finite as exported) -> nan
        if per_row:
            chunk *= np.array([factor[(r[-2], r[-1])] for r in rows], dtype=np.float64)
        chunks.append(chunk)
        heads.extend(shared.setdefault(r[1], r[1]) for r in rows)
        del rows
    values = np.concatenate(chunks) if chunks else np.empty(0, dtype=np.float64)
    del chunks
    return lot_data(key, values, heads if any(shared) else None, [(u, d) for u, d, _f in pairs], files, rule,
                    converted=per_row)


def unit_factors(pairs: Sequence[tuple[str, float | None]], rule: Rule | None
                 ) -> tuple[dict[tuple[str, float | None], float], str | None]:
    """Factor from each (unit, density) to the rule's unit, and the first conversion problem (or None).
    No factors when the rule names no unit."""
    factor: dict[tuple[str, float | None], float] = {}
    problem = None
    if rule is not None and rule.unit:
        for u, d in pairs:
            try:
                factor[(u, d)] = conversion_factor(u, rule.unit, d)
            except ValueError as exc:
                factor[(u, d)] = math.nan
                problem = problem or f"values in {u!r} cannot be judged in {rule.unit}: {exc}"
    return factor, problem


def lot_data(key: LotKey, values: np.ndarray, heads: Sequence[str] | None,
             pairs: Sequence[tuple[str, float | None]], files: tuple[str, ...], rule: Rule | None, *,
             converted: bool = False) -> tuple[LotData, str | None]:
    """LotData in the rule's unit from stored values whose (unit, density) pairs are ``pairs`` in order of
    first use; with one pair the whole array is scaled here (``converted``: the caller did it per row)."""
    factor, problem = unit_factors(pairs, rule)
    if problem is None and factor:
        if not converted and len(pairs) == 1:
            f = factor[(pairs[0][0], pairs[0][1])]
            if f != 1.0:
                values = values * f
        unit = rule.unit if rule is not None else "g"
    else:
        unit = pairs[0][0] if pairs else (rule.unit if rule else "g")
    return LotData(key=key, values=values, heads=tuple(heads) if heads is not None else None, files=files,
                   unit=unit), problem


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
            density: float | None, file_id: int, path: str) -> None:
        """Rows just inserted for ``lot_id`` from ``seq0``: values as read (non-finite are stored as NULL)."""
        entry = self.lots.pop(lot_id, None)
        if entry is not None:
            self.size -= entry.n
        if seq0 == 1:
            entry = _Recent()
        if entry is None or entry.n != seq0 - 1 or entry.n + len(values) > RECENT_LOT_MAX or not units:
            return
        pair = (units[0], density)
        if units.count(units[0]) != len(units) or (entry.pairs and entry.pairs[0] != pair):
            return  # mixed units: the store's per-row conversion handles those
        entry.pairs = [pair]
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

    def lot_data(self, key: LotKey, rule: Rule | None) -> tuple[LotData, str | None]:
        """The same LotData ``load_lot_values`` would read from the store."""
        values = np.concatenate(self.values) if self.values else np.empty(0, dtype=np.float64)
        return lot_data(key, values, self.heads if any(self.heads) else None, self.pairs, tuple(self.files), rule)


def summary_lot(key: LotKey, n: int, mean: float, sd: float, unit: str, density: float | None,
                rule: Rule | None, file_path: str) -> tuple[LotData, str | None]:
    """A lot known only by n / mean / sd, in the rule's unit when it can be converted."""
    problem = None
    if rule is not None and rule.unit:
        try:
            f = conversion_factor(unit, rule.unit, density)
            mean, sd, unit = mean * f, sd * abs(f), rule.unit
        except ValueError as exc:
            problem = f"values in {unit!r} cannot be judged in {rule.unit}: {exc}"
    return LotData(key=key, summary=LotSummary(int(n), float(mean), float(sd)), files=(file_path,),
                   unit=unit), problem


def judge(lot: LotData, rule: Rule | None, problem: str | None, evaluate: Evaluator) -> Verdict:
    """The verdict on one lot; never raises (an engine failure becomes a `review` naming it)."""
    if rule is None:
        return unjudged(lot, no_rule_reason(lot.key.product))
    meta = dict(rule_name=rule.name, rule_version=rule.version, target=rule.target,
                alternative=rule.alternative, alpha=rule.alpha)
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


def record_verdict(conn: sqlite3.Connection, verdict: Verdict, rule: Rule | None, lot: LotData, *, at: str,
                   channels: Sequence[str], lot_id: int | None = None, summary_id: int | None = None,
                   close_reason: str | None = None, file_id: int | None = None) -> Alert | None:
    """Write the verdict row, its audit record and (hold / review) its alert; return the alert if new."""
    payload = verdict.to_json()
    key = verdict.key
    rule_name = rule.name if rule else ""
    version = rule.version if rule else ""
    rule_hash = rule.content_hash if rule else ""
    conn.execute(
        "INSERT INTO verdicts(decided_at, line, product, lot, rule, rule_version, rule_hash, verdict, n, mean,"
        " target, unit, payload, lot_id, summary_id, close_reason) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
        (at, key.line, key.product, key.lot, rule_name, version, rule_hash, verdict.verdict, verdict.n,
         payload["mean"], payload["target"], verdict.unit, json.dumps(payload, sort_keys=True, allow_nan=False),
         lot_id, summary_id, close_reason))
    Store.audit(conn, at, "verdict", file_id=file_id, line=key.line, product=key.product, lot=key.lot,
                detail={"verdict": verdict.verdict, "rule": rule_name, "rule_version": version,
                        "rule_hash": rule_hash, "n": verdict.n, "mean": payload["mean"],
                        "p_value": payload["p_value"], "reason": verdict.reason, "close_reason": close_reason})
    if verdict.verdict not in ("hold", "review"):
        return None
    alert = Alert(kind=verdict.verdict, dedup_key=f"{verdict.verdict}|{key.line}|{key.product}|{key.lot}|{version}",
                  created_at=at, data={**payload, "values": alert_values(lot)}, line=key.line,
                  product=key.product, lot=key.lot)
    return alert if outbox.enqueue(conn, alert, channels) else None
