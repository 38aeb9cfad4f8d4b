"""Adds a read export to the lots in the state store and judges the lots that close, on an open transaction.

Called by the intake inside its write transaction: values are appended per (line, product, lot) in arrival
order, lots are opened, reopened and closed by the policy in ``monitor.lotmodel``, and each closed lot is
judged (``monitor.daemon.judge``) with its verdict, audit record and alert written on the same connection.
Per-row Python objects stay bounded by one window: rows are grouped from the frame's arrays and stored in
windows of ``CHUNK_ROWS``; a lot is read back in chunks (or taken from ``judge.RecentValues`` when just stored).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from itertools import repeat
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from monitor import lotmodel as lots
from monitor.daemon import judge, rejudge
from monitor.ingest.profile import FeedProfile
from monitor.ingest.reader import Export
from monitor.lot import LotKey, Verdict
from monitor.rulebook import Rule, match_rule
from monitor.state import audit
from monitor.state import lots as lot_store
from monitor.state.database import Connection, utc_iso


@dataclass(frozen=True)
class Judging:
    """What judging needs: the rule set, the engine and the alert channels in force."""

    rules: Sequence[Rule]
    evaluate: judge.Evaluator
    channels: tuple[str, ...]
    recent: judge.RecentValues | None = None   # lots just stored, so closing them needs no read-back


@dataclass
class Tally:
    """What one file (or one idle sweep) produced, collected while its transaction runs."""

    verdicts: list[Verdict] = field(default_factory=list)
    alerts: list[str] = field(default_factory=list)
    closed: list[str] = field(default_factory=list)
    opened: list[str] = field(default_factory=list)


def lot_name(key: LotKey) -> str:
    """``L1/OAT-500/OAT-24A101`` ("-" for an empty part)."""
    return "/".join(x or "-" for x in (key.line, key.product, key.lot))


def add_values(conn: Connection, how: Judging, file_id: int, export: Export, density: float | None,
               now: datetime, tally: Tally, after_first_insert: Callable[[], None] = lambda: None, *,
               path: str = "") -> int:
    """Append an export's rows to their lots and close / judge lots as the rows and markers say; return
    the number of usable values (rows of a lot without one are stored too, in their place).

    Works from the frame's arrays: rows are grouped by (line, product, lot) codes (``lot_codes``) and
    inserted segment by segment in windows of ``CHUNK_ROWS`` rows, so no per-row Python object lives for
    the whole file at once.
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
    open_rows = lot_store.open_lot_names(conn)
    plan = lots.plan_file({r[0]: LotKey(*r) for r in open_rows}, lots.runs_of_codes(codes, keys), src, markers)
    del codes
    last_segment = max((i for i, step in enumerate(plan.steps) if isinstance(step, lots.Segment)), default=-1)
    first = True
    for i, step in enumerate(plan.steps):
        if i == last_segment + 1:
            cols.release()  # every row is stored: let the last window's lists go before judging
        if isinstance(step, lots.Segment):
            lot_id, seq0 = open_lot(conn, step.key, at, ts, step.stop - step.start, file_id)
            if seq0 == 1:
                tally.opened.append(lot_name(step.key))
            insert_values(conn, lot_id, step.key, seq0, cols, step.start, step.stop, density, file_id,
                          how.recent if path else None, path)
            if first:
                first = False
                after_first_insert()
        else:
            close_lot(conn, how, step.key, step.reason, at, file_id, tally)
    return n - cols.n_excluded   # usable values; the rows without one are stored too, counted per lot


CHUNK_ROWS = 50_000


class RowColumns:
    """The frame's per-row columns as Python lists, one window of ``CHUNK_ROWS`` rows at a time.

    Windows are aligned to multiples of ``CHUNK_ROWS``, so each row becomes Python objects once and at
    most one window's worth of them is alive (a small file is one window, shared by all its segments).
    Text columns are kept as Arrow arrays (missing -> default) and sliced without copying.
    """

    def __init__(self, rows: pd.DataFrame, source_lines: np.ndarray, n: int) -> None:
        self.n = n
        self.source_lines = source_lines
        self.values = (rows["value"].to_numpy(dtype=np.float64) if "value" in rows.columns
                       else np.full(n, np.nan))
        self.unit = arrow_text(rows, "unit", n, DEFAULT_UNIT)
        self.head = arrow_text(rows, "head", n, "")
        # the reader's reason for a row of a lot without a usable value ("" = usable; no column = none)
        self.excluded = arrow_text(rows, "excluded", n, "")
        self.n_excluded = 0
        if "excluded" in rows.columns and n:
            flags = pc.not_equal(self.excluded, "")
            flags = flags.combine_chunks() if isinstance(flags, pa.ChunkedArray) else flags
            mask = np.asarray(flags.to_numpy(zero_copy_only=False), dtype=bool)
            self.n_excluded = int(mask.sum())
            if self.n_excluded:  # an excluded row has no value, whatever the frame holds there
                self.values = np.where(mask, np.nan, self.values)
        self.stamp: pa.Array | pa.ChunkedArray | pd.Series | None = None
        if "timestamp" in rows.columns:
            ser = rows["timestamp"]
            self.stamp = arrow_text(rows, "timestamp", n, None) if _is_text(ser) else ser
        self.window = -1
        self.lists: tuple[list[Any], ...] = ()

    def window_of(self, row: int) -> tuple[int, int, tuple[list[Any], ...]]:
        """(first row, end row, lists of value, unit, head, timestamp, source line, exclusion reason) of
        ``row``'s window."""
        w = row // CHUNK_ROWS
        a, b = w * CHUNK_ROWS, min((w + 1) * CHUNK_ROWS, self.n)
        if w != self.window:
            self.lists = ()  # let the previous window go before building the next
            if self.stamp is None:
                stamps: list[str | None] = [None] * (b - a)
            elif isinstance(self.stamp, pd.Series):
                stamps = time_list(self.stamp.iloc[a:b].tolist())
            else:
                stamps = self.stamp.slice(a, b - a).to_pylist()
            self.lists = (finite_list(self.values[a:b]), self.unit.slice(a, b - a).to_pylist(),
                          self.head.slice(a, b - a).to_pylist(), stamps, self.source_lines[a:b].tolist(),
                          self.excluded.slice(a, b - a).to_pylist())
            self.window = w
        return a, b, self.lists


    def release(self) -> None:
        """Drop the current window's lists (they are rebuilt if asked for again)."""
        self.lists, self.window = (), -1


def _is_text(ser: pd.Series) -> bool:
    return ser.dtype == object or isinstance(ser.dtype, pd.StringDtype)


def arrow_text(df: pd.DataFrame, col: str, n: int, default: str | None) -> pa.Array | pa.ChunkedArray:
    """A text column as an Arrow string array without copying where pandas keeps it in Arrow already;
    a missing column or value is ``default``."""
    if col not in df.columns:
        return pa.repeat(pa.scalar(default, type=pa.large_string()), n)
    ser = df[col]
    arr: pa.Array | pa.ChunkedArray | None
    try:
        arr = pa.array(ser.array)
    except (pa.ArrowException, TypeError, ValueError):
        arr = None
    if arr is None or not (pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type)):
        # not text in Arrow already (objects, numbers, datetimes): clean through Python, as before
        cleaned = text_list(ser.tolist(), default) if default is not None else time_list(ser.tolist())
        arr = pa.array(cleaned, type=pa.large_string())
    if default is not None and arr.null_count:
        arr = pc.fill_null(arr, default)
    return arr


def insert_values(conn: Connection, lot_id: int, key: LotKey, seq0: int, cols: RowColumns, start: int,
                  stop: int, density: float | None, file_id: int, recent: judge.RecentValues | None = None,
                  path: str = "") -> None:
    """Insert rows ``start:stop`` (one lot) with seq from ``seq0``: one batch insert per window they touch;
    ``recent`` (if given) keeps them for judging the lot without reading it back."""
    a = start
    while a < stop:
        w0, w1, (values, units, heads, stamps, src, excluded) = cols.window_of(a)
        b = min(stop, w1)
        i, j = a - w0, b - w0
        seq = seq0 + (a - start)
        lot_store.insert_values(conn, zip(
            repeat(lot_id), repeat(key.line), repeat(key.product), repeat(key.lot), range(seq, seq + (b - a)),
            values[i:j], units[i:j], repeat(density), heads[i:j], stamps[i:j], repeat(file_id), src[i:j],
            excluded[i:j]))
        if recent is not None:
            recent.add(lot_id, seq, cols.values[a:b], heads[i:j], units[i:j], density, file_id, path,
                       excluded[i:j])
        a = b


def lot_codes(rows: pd.DataFrame, n: int) -> tuple[np.ndarray, list[LotKey]]:
    """A lot code per row (equal codes, same lot) and the ``LotKey`` of each code.

    Each of line / product / lot is factorized; the three codes are combined pairwise (so numbers stay
    below n * n) with ``numpy.unique``. A column with one text is a zero code, at no cost.
    """
    if n == 0:
        return np.empty(0, dtype=np.int64), []
    parts = [text_codes(rows, col, n) for col in ("line", "product", "lot")]
    combined: np.ndarray | None = None
    for codes, names in parts:
        if codes is None:
            continue
        if combined is None:
            combined = codes
        else:
            combined = np.unique(combined * len(names) + codes, return_inverse=True)[1].reshape(-1)
    if combined is None:
        return np.zeros(n, dtype=np.int64), [LotKey(*(names[0] for _c, names in parts))]
    _, first = np.unique(combined, return_index=True)
    keys = [LotKey(*(names[0] if codes is None else names[codes[i]] for codes, names in parts))
            for i in first.tolist()]
    return combined.astype(np.int64, copy=False), keys


def text_codes(df: pd.DataFrame, col: str, n: int) -> tuple[np.ndarray | None, list[str]]:
    """A text column as (code per row, distinct texts); (None, [text]) when every row has one text.
    A missing column or value is ""."""
    if col not in df.columns:
        return None, [""]
    arr = arrow_text(df, col, n, "")
    distinct = pc.unique(arr)
    if len(distinct) == 1:  # the usual export: one line / product / lot per file
        return None, [str(distinct[0].as_py())]
    codes = pc.index_in(arr, value_set=distinct)
    codes = codes.combine_chunks() if isinstance(codes, pa.ChunkedArray) else codes
    return codes.to_numpy(zero_copy_only=False).astype(np.int64), [str(x) for x in distinct.to_pylist()]


def open_lot(conn: Connection, key: LotKey, at: str, ts: float, count: int, file_id: int) -> tuple[int, int]:
    """Make ``key`` an open lot (creating or reopening it) and add ``count`` values; return (id, first seq)."""
    row = lot_store.find(conn, key.line, key.product, key.lot)
    if row is None:
        # the file-taken audit record names the lots it opened
        return lot_store.insert_open(conn, key.line, key.product, key.lot, at=at, ts=ts, n=count), 1
    lot_id, state, n = row
    if state == "closed":
        lot_store.reopen(conn, lot_id, count)
        audit.append(conn, at, "lot-reopened", file_id=file_id, line=key.line, product=key.product, lot=key.lot,
                    detail={"late_values": count, "values_before": n,
                            "policy": "late values reopen the lot; it is judged again over all its values"})
    lot_store.add_rows(conn, lot_id, count, at=at, ts=ts)
    return int(lot_id), int(n) + 1


def close_lot(conn: Connection, how: Judging, key: LotKey, reason: str, at: str, file_id: int | None,
              tally: Tally) -> Verdict | None:
    """Close an open lot and judge it: verdict row, audit and alert on ``conn``. None if it was not open."""
    row = lot_store.find_open(conn, key.line, key.product, key.lot)
    if row is None:
        return None
    lot_id, n = row.id, row.n
    lot_store.close(conn, lot_id, at=at, reason=reason)
    # the verdict's audit record (close_reason, file) is the closing's record
    rule = match_rule(list(how.rules), key.product)
    recent = how.recent.take(lot_id, n) if how.recent is not None else None
    data, problem = (recent.lot_data(key, rule) if recent is not None
                     else judge.load_lot_values(conn, lot_id, key, rule))
    closed = lot_store.get(conn, lot_id)
    if closed is not None:   # each run of the lot's rows ended in one closing: runs = times closed
        data = dataclasses.replace(data, runs=closed.times_closed)
    verdict = judge.judge(data, rule, problem, how.evaluate)
    previous = rejudge.previous_verdict(conn, lot_id, key)   # judged before: late values reopened the lot
    why = rejudge.why_reopened(conn, lot_id, previous.lot_rows) if previous is not None else ""
    alerts = judge.record_verdict(conn, verdict, rule, data, at=at, channels=how.channels, lot_id=lot_id,
                                  close_reason=reason, file_id=file_id, lot_rows=n, previous=previous, why=why)
    tally.verdicts.append(verdict)
    tally.closed.append(lot_name(key))
    tally.alerts.extend(a.dedup_key for a in alerts)
    return verdict


def add_summaries(conn: Connection, how: Judging, file_id: int, path: str, export: Export,
                  density: float | None, at: str, tally: Tally) -> int:
    """Each summary row is a lot of its own, judged at once from n / mean / sd; a record the reader found
    unusable (its ``problem`` column says why; no column = none) is a `review` naming the problem."""
    s: pd.DataFrame = export.summaries
    n = len(s)
    line_c, prod_c, lot_c = texts(s, "line", n), texts(s, "product", n), texts(s, "lot", n)
    unit_c, time_c = texts(s, "unit", n, default=DEFAULT_UNIT), times(s, n)
    problem_c = texts(s, "problem", n)
    src = s["source_line"].to_numpy(dtype=np.int64).tolist() if "source_line" in s else list(range(1, n + 1))
    ns = np.nan_to_num(s["n"].to_numpy(dtype=np.float64), nan=0.0).astype(np.int64).tolist()  # unusable n: 0
    means = s["mean"].to_numpy(dtype=np.float64).tolist()
    sds = s["sd"].to_numpy(dtype=np.float64).tolist()
    for i in range(n):
        key = LotKey(line_c[i], prod_c[i], lot_c[i])
        summary_id = lot_store.insert_summary(conn, file_id=file_id, source_line=src[i], line=key.line,
                                             product=key.product, lot=key.lot, n=ns[i], mean=means[i], sd=sds[i],
                                             unit=unit_c[i], density=density, timestamp=time_c[i],
                                             problem=problem_c[i])
        rule = match_rule(list(how.rules), key.product)
        data, problem = judge.summary_lot(key, ns[i], means[i], sds[i], unit_c[i], density, rule, path)
        verdict = (judge.with_lot_facts(judge.unusable_summary(data, rule, problem_c[i]), data) if problem_c[i]
                   else judge.judge(data, rule, problem, how.evaluate))
        alerts = judge.record_verdict(conn, verdict, rule, data, at=at, channels=how.channels,
                                      summary_id=summary_id, close_reason="summary", file_id=file_id)
        tally.verdicts.append(verdict)
        tally.alerts.extend(a.dedup_key for a in alerts)
    return n


def close_idle_lots(conn: Connection, how: Judging, now: datetime,
                    idle_seconds_for: Callable[[LotKey], float]) -> list[Verdict]:
    """Close and judge every open lot idle at ``now``."""
    at, ts = utc_iso(now), now.timestamp()
    rows = lot_store.open_lots(conn)
    tally = Tally()
    for key in lots.idle_lots([(LotKey(r[0], r[1], r[2]), r[3]) for r in rows], ts, idle_seconds_for):
        close_lot(conn, how, key, lots.IDLE, at, None, tally)
    return tally.verdicts


# -- reading the reader's frames ----------------------------------------------------------------
DEFAULT_UNIT = ""   # no unit column: the values carry no unit and are taken to be in the rule's unit


def texts(df: pd.DataFrame, col: str, n: int, default: str = "") -> list[str]:
    """A text column as Python strings (missing column or value -> ``default``)."""
    if col not in df.columns:
        return [default] * n
    return text_list(df[col].tolist(), default)


def text_list(out: list[Any], default: str = "") -> list[str]:
    """Python strings from a column's ``tolist()`` (missing value -> ``default``; the list is reused)."""
    for x in out:
        if not isinstance(x, str):  # rare: something missing or not text; clean the whole column
            return [default if (x is None or x is pd.NA or (isinstance(x, float) and x != x)) else str(x)
                    for x in out]
    return out


def times(df: pd.DataFrame, n: int) -> list[str | None]:
    """The timestamp column as ISO text (None where missing)."""
    if "timestamp" not in df.columns:
        return [None] * n
    return time_list(df["timestamp"].tolist())


def time_list(out: list[Any]) -> list[str | None]:
    """ISO text (None where missing) from a timestamp column's ``tolist()``."""
    if all(isinstance(x, str) for x in out):
        return out
    return [None if (x is None or x is pd.NaT or x is pd.NA or (isinstance(x, float) and x != x))
            else (x.isoformat() if hasattr(x, "isoformat") else str(x)) for x in out]


def finite_list(values: np.ndarray) -> list[float | None]:
    """Floats as a list; None for a non-finite value (stored as NULL)."""
    finite = np.isfinite(values)
    if finite.all():
        return values.tolist()
    out = values.astype(object)
    out[~finite] = None
    return out.tolist()


def end_markers(export: Export) -> list[lots.Marker]:
    """End-of-lot markers of an export: the reader gives (source line, lot code the marker ends) pairs."""
    return lots.markers_of(export.end_of_lot)


def density_of(export: Export, profile: FeedProfile | None) -> float | None:
    """g/mL for mass <-> volume: the export's own, else the feed profile's."""
    d = export.density if export.density is not None else (profile.density if profile is not None else None)
    return None if d is None else float(d)
