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


def load_lot_values(conn: sqlite3.Connection, lot_id: int, key: LotKey, rule: Rule | None
                    ) -> tuple[LotData, str | None]:
    """The stored values of a lot in arrival order, converted to the rule's unit, as LotData.

    Returns ``(lot, problem)``; ``problem`` names why the lot cannot be judged (unconvertible units).
    """
    rows = conn.execute("SELECT value, unit, density, head FROM lot_values WHERE lot_id = ? ORDER BY seq",
                        (lot_id,)).fetchall()
    files = tuple(r[0] for r in conn.execute(
        "SELECT f.path FROM lot_values v JOIN files f ON f.id = v.file_id WHERE v.lot_id = ?"
        " GROUP BY v.file_id ORDER BY min(v.seq)", (lot_id,)))
    values = np.array([np.nan if r[0] is None else r[0] for r in rows], dtype=np.float64)
    heads_raw = [r[3] or "" for r in rows]
    heads = tuple(heads_raw) if any(heads_raw) else None
    unit = rows[0][1] if rows else (rule.unit if rule else "g")
    problem = None
    if rule is not None and rule.unit:
        factors = np.empty(len(rows), dtype=np.float64)
        memo: dict[tuple[str, float | None], float] = {}
        for i, (_v, u, d, _h) in enumerate(rows):
            k = (u, d)
            if k not in memo:
                try:
                    memo[k] = conversion_factor(u, rule.unit, d)
                except ValueError as exc:
                    memo[k] = math.nan
                    problem = problem or f"values in {u!r} cannot be judged in {rule.unit}: {exc}"
            factors[i] = memo[k]
        if problem is None:
            values = values * factors
            unit = rule.unit
    return LotData(key=key, values=values, heads=heads, files=files, unit=unit), problem


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
