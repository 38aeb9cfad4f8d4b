"""Adds a read export to the lots in the state store and judges the lots that close, on an open transaction.

Called by the intake inside its write transaction: values are appended per (line, product, lot) in arrival
order, lots are opened, reopened and closed by the policy in ``monitor.daemon.lots``, and each closed lot is
judged (``monitor.daemon.judge``) with its verdict, audit record and alert written on the same connection.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass, field
from datetime import datetime
from itertools import repeat
from typing import Any, Callable, Sequence

import numpy as np
import pandas as pd

from monitor.daemon import judge, lots
from monitor.daemon.store import Store, utc_iso
from monitor.lot import LotKey, Verdict
from monitor.rulebook import Rule, match_rule


@dataclass(frozen=True)
class Judging:
    """What judging needs: the rule set, the engine and the alert channels in force."""

    rules: Sequence[Rule]
    evaluate: judge.Evaluator
    channels: tuple[str, ...]


@dataclass
class Tally:
    """What one file (or one idle sweep) produced, collected while its transaction runs."""

    verdicts: list[Verdict] = field(default_factory=list)
    alerts: list[str] = field(default_factory=list)
    closed: list[str] = field(default_factory=list)


def lot_name(key: LotKey) -> str:
    """``L1/OAT-500/OAT-24A101`` ("-" for an empty part)."""
    return "/".join(x or "-" for x in (key.line, key.product, key.lot))


def add_values(conn: sqlite3.Connection, how: Judging, file_id: int, export: Any, density: float | None,
               now: datetime, tally: Tally, after_first_insert: Callable[[], None] = lambda: None) -> int:
    """Append an export's rows to their lots and close / judge lots as the rows and markers say.

    Works from the frame's arrays: rows are grouped by (line, product, lot) with ``pandas.factorize`` and
    inserted segment by segment in chunks of ``CHUNK_ROWS``, so no per-row Python object lives for the
    whole file at once.
    """
    rows: pd.DataFrame = export.rows
    n = len(rows)
    markers = end_markers(export)
    if n == 0 and not markers:
        return 0
    at, ts = utc_iso(now), now.timestamp()
    codes, keys = lot_codes(rows, n)
    src = (rows["source_line"].to_numpy(dtype=np.int64) if "source_line" in rows.columns
           else np.arange(1, n + 1, dtype=np.int64))
    cols = RowColumns(rows, src, n)
    open_rows = conn.execute("SELECT line, product, lot FROM lots WHERE state = 'open' ORDER BY id").fetchall()
    plan = lots.plan_file({r[0]: LotKey(*r) for r in open_rows}, lots.runs_of_codes(codes, keys), src, markers)
    del codes
    first = True
    for step in plan.steps:
        if isinstance(step, lots.Segment):
            lot_id, seq0 = open_lot(conn, step.key, at, ts, step.stop - step.start, file_id)
            insert_values(conn, lot_id, step.key, seq0, cols, step.start, step.stop, density, file_id)
            if first:
                first = False
                after_first_insert()
        else:
            close_lot(conn, how, step.key, step.reason, at, file_id, tally)
    return n


CHUNK_ROWS = 50_000
INSERT_VALUE = ("INSERT INTO lot_values(lot_id, line, product, lot, seq, value, unit, density, head, timestamp,"
                " file_id, source_line) VALUES (?,?,?,?,?,?,?,?,?,?,?,?)")


class RowColumns:
    """The frame's per-row columns, handed out as Python lists one slice at a time (no whole-file lists)."""

    def __init__(self, rows: pd.DataFrame, source_lines: np.ndarray, n: int) -> None:
        self.rows = rows
        self.n = n
        self.source_lines = source_lines
        self.values = (rows["value"].to_numpy(dtype=np.float64) if "value" in rows.columns
                       else np.full(n, np.nan))

    def value_list(self, a: int, b: int) -> list[float | None]:
        """Values ``a:b``; None for a non-finite value (stored as NULL)."""
        v = self.values[a:b]
        finite = np.isfinite(v)
        if finite.all():
            return v.tolist()
        out = v.astype(object)
        out[~finite] = None
        return out.tolist()

    def text_list(self, col: str, a: int, b: int, default: str = "") -> list[str]:
        return texts(self.rows.iloc[a:b], col, b - a, default) if col in self.rows.columns else [default] * (b - a)

    def time_list(self, a: int, b: int) -> list[str | None]:
        return times(self.rows.iloc[a:b], b - a)


def insert_values(conn: sqlite3.Connection, lot_id: int, key: LotKey, seq0: int, cols: RowColumns, start: int,
                  stop: int, density: float | None, file_id: int) -> None:
    """Insert rows ``start:stop`` (one lot) with seq from ``seq0``, ``CHUNK_ROWS`` rows per executemany."""
    for a in range(start, stop, CHUNK_ROWS):
        b = min(a + CHUNK_ROWS, stop)
        seq = seq0 + (a - start)
        conn.executemany(INSERT_VALUE, zip(
            repeat(lot_id), repeat(key.line), repeat(key.product), repeat(key.lot), range(seq, seq + (b - a)),
            cols.value_list(a, b), cols.text_list("unit", a, b, default="g"), repeat(density),
            cols.text_list("head", a, b), cols.time_list(a, b), repeat(file_id),
            cols.source_lines[a:b].tolist()))


def lot_codes(rows: pd.DataFrame, n: int) -> tuple[np.ndarray, list[LotKey]]:
    """A dense lot code per row (numbered by first appearance) and the ``LotKey`` of each code."""
    if n == 0:
        return np.empty(0, dtype=np.int64), []
    parts = [text_codes(rows, col, n) for col in ("line", "product", "lot")]
    combined = parts[0][0]
    for codes, names in parts[1:]:  # pairwise, so the combined number stays below n * n
        combined = pd.factorize(combined * max(len(names), 1) + codes)[0]
    _, first = np.unique(combined, return_index=True)
    keys = [LotKey(*(names[codes[i]] for codes, names in parts)) for i in first.tolist()]
    return combined.astype(np.int64, copy=False), keys


def text_codes(df: pd.DataFrame, col: str, n: int) -> tuple[np.ndarray, list[str]]:
    """A text column as (code per row, distinct cleaned texts); missing column or value -> ""."""
    if col not in df.columns:
        return np.zeros(n, dtype=np.int64), [""]
    codes, uniques = pd.factorize(df[col], use_na_sentinel=True)
    names = texts(pd.DataFrame({col: pd.Series(list(uniques) + [""], dtype=object)}), col, len(uniques) + 1)
    codes = np.where(codes < 0, len(names) - 1, codes)
    merged, distinct = pd.factorize(pd.Series(names, dtype=object))  # two raw texts may clean to the same
    return merged[codes].astype(np.int64), [str(x) for x in distinct]


def open_lot(conn: sqlite3.Connection, key: LotKey, at: str, ts: float, count: int, file_id: int) -> tuple[int, int]:
    """Make ``key`` an open lot (creating or reopening it) and add ``count`` values; return (id, first seq)."""
    row = conn.execute("SELECT id, state, n FROM lots WHERE line=? AND product=? AND lot=?",
                       (key.line, key.product, key.lot)).fetchone()
    if row is None:
        cur = conn.execute("INSERT INTO lots(line, product, lot, state, opened_at, last_value_at, last_value_ts, n)"
                           " VALUES (?,?,?,'open',?,?,?,?)", (key.line, key.product, key.lot, at, at, ts, count))
        Store.audit(conn, at, "lot-opened", file_id=file_id, line=key.line, product=key.product, lot=key.lot)
        return int(cur.lastrowid), 1
    lot_id, state, n = row
    if state == "closed":
        conn.execute("UPDATE lots SET state='open', closed_at=NULL, close_reason=NULL, late_values=late_values+?"
                     " WHERE id=?", (count, lot_id))
        Store.audit(conn, at, "lot-reopened", file_id=file_id, line=key.line, product=key.product, lot=key.lot,
                    detail={"late_values": count, "values_before": n,
                            "policy": "late values reopen the lot; it is judged again over all its values"})
    conn.execute("UPDATE lots SET n = n + ?, last_value_at = ?, last_value_ts = ? WHERE id = ?",
                 (count, at, ts, lot_id))
    return int(lot_id), int(n) + 1


def close_lot(conn: sqlite3.Connection, how: Judging, key: LotKey, reason: str, at: str, file_id: int | None,
              tally: Tally) -> Verdict | None:
    """Close an open lot and judge it: verdict row, audit and alert on ``conn``. None if it was not open."""
    row = conn.execute("SELECT id FROM lots WHERE line=? AND product=? AND lot=? AND state='open'",
                       (key.line, key.product, key.lot)).fetchone()
    if row is None:
        return None
    lot_id = int(row[0])
    conn.execute("UPDATE lots SET state='closed', closed_at=?, close_reason=?, times_closed=times_closed+1"
                 " WHERE id=?", (at, reason, lot_id))
    Store.audit(conn, at, "lot-closed", file_id=file_id, line=key.line, product=key.product, lot=key.lot,
                detail={"reason": reason})
    rule = match_rule(list(how.rules), key.product)
    data, problem = judge.load_lot_values(conn, lot_id, key, rule)
    verdict = judge.judge(data, rule, problem, how.evaluate)
    alert = judge.record_verdict(conn, verdict, rule, data, at=at, channels=how.channels, lot_id=lot_id,
                                 close_reason=reason, file_id=file_id)
    tally.verdicts.append(verdict)
    tally.closed.append(lot_name(key))
    if alert is not None:
        tally.alerts.append(alert.dedup_key)
    return verdict


def add_summaries(conn: sqlite3.Connection, how: Judging, file_id: int, path: str, export: Any,
                  density: float | None, at: str, tally: Tally) -> int:
    """Each summary row is a lot of its own, judged at once from n / mean / sd."""
    s: pd.DataFrame = export.summaries
    n = len(s)
    line_c, prod_c, lot_c = texts(s, "line", n), texts(s, "product", n), texts(s, "lot", n)
    unit_c, time_c = texts(s, "unit", n, default="g"), times(s, n)
    src = s["source_line"].to_numpy(dtype=np.int64).tolist() if "source_line" in s else list(range(1, n + 1))
    ns = s["n"].to_numpy(dtype=np.int64).tolist()
    means = s["mean"].to_numpy(dtype=np.float64).tolist()
    sds = s["sd"].to_numpy(dtype=np.float64).tolist()
    for i in range(n):
        key = LotKey(line_c[i], prod_c[i], lot_c[i])
        cur = conn.execute("INSERT INTO lot_summaries(file_id, source_line, line, product, lot, n, mean, sd, unit,"
                           " density, timestamp) VALUES (?,?,?,?,?,?,?,?,?,?,?)",
                           (file_id, src[i], key.line, key.product, key.lot, ns[i], means[i], sds[i], unit_c[i],
                            density, time_c[i]))
        rule = match_rule(list(how.rules), key.product)
        data, problem = judge.summary_lot(key, ns[i], means[i], sds[i], unit_c[i], density, rule, path)
        verdict = judge.judge(data, rule, problem, how.evaluate)
        alert = judge.record_verdict(conn, verdict, rule, data, at=at, channels=how.channels,
                                     summary_id=int(cur.lastrowid), close_reason="summary", file_id=file_id)
        tally.verdicts.append(verdict)
        if alert is not None:
            tally.alerts.append(alert.dedup_key)
    return n


def close_idle_lots(conn: sqlite3.Connection, how: Judging, now: datetime,
                    idle_seconds_for: Callable[[LotKey], float]) -> list[Verdict]:
    """Close and judge every open lot idle at ``now``."""
    at, ts = utc_iso(now), now.timestamp()
    rows = conn.execute("SELECT line, product, lot, last_value_ts FROM lots WHERE state='open' ORDER BY id").fetchall()
    tally = Tally()
    for key in lots.idle_lots([(LotKey(r[0], r[1], r[2]), r[3]) for r in rows], ts, idle_seconds_for):
        close_lot(conn, how, key, lots.IDLE, at, None, tally)
    return tally.verdicts


# -- reading the reader's frames ----------------------------------------------------------------
def texts(df: pd.DataFrame, col: str, n: int, default: str = "") -> list[str]:
    """A text column as Python strings (missing column or value -> ``default``)."""
    if col not in df.columns:
        return [default] * n
    out = df[col].tolist()
    for x in out:
        if not isinstance(x, str):  # rare: something missing or not text; clean the whole column
            return [default if (x is None or x is pd.NA or (isinstance(x, float) and x != x)) else str(x)
                    for x in out]
    return out


def times(df: pd.DataFrame, n: int) -> list[str | None]:
    """The timestamp column as ISO text (None where missing)."""
    if "timestamp" not in df.columns:
        return [None] * n
    out = df["timestamp"].tolist()
    if all(isinstance(x, str) for x in out):
        return out
    return [None if (x is None or x is pd.NaT or x is pd.NA or (isinstance(x, float) and x != x))
            else (x.isoformat() if hasattr(x, "isoformat") else str(x)) for x in out]


def end_markers(export: Any) -> list[lots.Marker]:
    """End-of-lot markers of an export: the reader gives (source line, lot code the marker ends) pairs."""
    m = getattr(export, "end_of_lot", None)
    out: list[lots.Marker] = []
    for item in m or ():
        if isinstance(item, (int, np.integer)):
            out.append(lots.Marker(int(item)))
        elif isinstance(item, (tuple, list)) and item:
            out.append(lots.Marker(int(item[0]), lot=None if len(item) < 2 or item[1] in (None, "") else str(item[1])))
    return out


def density_of(export: Any, profile: Any) -> float | None:
    """g/mL for mass <-> volume: the export's own, else the feed profile's."""
    d = getattr(export, "density", None)
    if d is None:
        d = getattr(profile, "density", None)
    return None if d is None else float(d)
