"""The replay reads: the judged lots in close order and their stored values in one pass, read-only.

``replay`` judges the stored lots again with candidate rules; reading each lot with three queries (as
``monitor.daemon.judge.load_lot_values`` does at a lot's close) is too slow for a year of lots, so the values
of many lots are read here in a few passes ordered by lot id and seq, and grouped per lot in numpy. What a lot
gets is what ``load_lot_values`` gives: its values in arrival order (NULL -> NaN), its heads, its (unit,
density) pairs in order of first use (excluded rows left out), its exclusion counts and its files where they
lie now; a lot whose (unit, density) pairs need different factors also gets each row's pair index, so the
caller can convert row by row. A lot judged before late values reopened it is read up to the rows its latest
verdict judged (``lot_rows``). ``bulk_insert`` writes a synthetic state quickly (benchmarks only).
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

import numpy as np

from monitor.state import schema
from monitor.state.database import read_only, table_names, where_equal

CHUNK = 900                     # lot ids per IN (...) list (well under SQLite's variable limit)


class JudgedLot(NamedTuple):
    """A lot with a stored verdict: the id of its first verdict (close order) and what its latest one says
    (``p_value`` read from the stored payload, None when it has none)."""

    first_id: int
    verdict_id: int
    decided_at: str
    line: str
    product: str
    lot: str
    rule: str
    rule_version: str
    verdict: str
    lot_id: int | None
    summary_id: int | None
    lot_rows: int | None
    p_value: float | None


@dataclass(frozen=True)
class StoredLot:
    """One lot's stored rows as ``load_lot_values`` reads them (``pair_of_row``: each row's index into
    ``pairs``, -1 for an excluded row; None when the lot has one usable pair or all its rows are excluded)."""

    values: np.ndarray
    heads: list[str] | None
    pairs: list[tuple[str, float | None]]
    excluded_by: dict[str, int]
    files: tuple[str, ...]
    pair_of_row: np.ndarray | None = None


class StoredSummary(NamedTuple):
    """One stored lot summary record with the path where its file lies now."""

    id: int
    n: int
    mean: float | None
    sd: float | None
    unit: str
    density: float | None
    problem: str
    file_path: str


class LotSize(NamedTuple):
    id: int
    n: int


@contextmanager
def open_read_only(path: str | Path) -> Iterator[sqlite3.Connection]:
    """The database at ``path`` opened read-only, inside one read transaction (one consistent snapshot).
    Raises ``schema.SchemaVersionError`` for a database newer than this code; nothing is ever written."""
    with read_only(path) as conn:
        conn.execute("BEGIN")
        try:
            found = schema.stored_version(conn, path)
            if found > schema.CURRENT_VERSION:
                raise schema.SchemaVersionError(
                    f"the state database has schema version {found}, newer than this lotwarden knows"
                    f" (schema version {schema.CURRENT_VERSION})", path=path)
            yield conn
        finally:
            conn.execute("COMMIT")


def has_table(conn: sqlite3.Connection, table: str) -> bool:
    """Whether the database holds ``table`` (a state of an older schema may lack the drift tables)."""
    return table in table_names(conn)


def judged_lots(conn: sqlite3.Connection, *, line: str | None = None, product: str | None = None
                ) -> list[JudgedLot]:
    """Every lot with a stored verdict (optionally of one line / product): its latest verdict, in the order
    the lots first closed (their first verdict's id). The p-value is read with SQLite's JSON functions."""
    cond, args = where_equal(line=line, product=product)
    sql = ("SELECT g.first, v.id, v.decided_at, v.line, v.product, v.lot, v.rule, v.rule_version, v.verdict,"
           " v.lot_id, v.summary_id, v.lot_rows,"
           " CASE WHEN json_valid(v.payload) THEN json_extract(v.payload, '$.p_value') END"
           " FROM verdicts v JOIN (SELECT min(id) AS first, max(id) AS last FROM verdicts"
           f"{cond} GROUP BY line, product, lot) g ON v.id = g.last ORDER BY g.first")
    out = []
    for r in conn.execute(sql, args):
        p = r[12] if isinstance(r[12], (int, float)) and not isinstance(r[12], bool) else None
        out.append(JudgedLot(int(r[0]), int(r[1]), str(r[2]), str(r[3]), str(r[4]), str(r[5]), str(r[6]), str(r[7]),
                             str(r[8]), r[9], r[10], r[11], float(p) if p is not None else None))
    return out


def lot_ids(conn: sqlite3.Connection, keys: Sequence[tuple[str, str, str]]) -> dict[tuple[str, str, str], LotSize]:
    """The lots table's id and row count of each (line, product, lot) that has a row there."""
    out: dict[tuple[str, str, str], LotSize] = {}
    wanted = set(keys)
    for line, product, lot, lot_id, n in conn.execute("SELECT line, product, lot, id, n FROM lots"):
        if (line, product, lot) in wanted:
            out[(line, product, lot)] = LotSize(int(lot_id), int(n))
    return out


def _chunks(ids: Sequence[int]) -> Iterator[list[int]]:
    for i in range(0, len(ids), CHUNK):
        yield list(ids[i:i + CHUNK])


def stored_lots(conn: sqlite3.Connection, wanted: Sequence[tuple[int, int | None]]) -> dict[int, StoredLot]:
    """The stored rows of each wanted lot (lot id, up to seq ``limit`` or all with None), by lot id."""
    paths = {int(i): str(p) for i, p in conn.execute("SELECT id, COALESCE(archived_path, path) FROM files")}
    sizes: dict[int, int] = {}
    for ids in _chunks(sorted({i for i, _limit in wanted})):
        sizes.update((int(i), int(n)) for i, n in conn.execute(
            f"SELECT id, n FROM lots WHERE id IN ({','.join('?' * len(ids))})", ids))
    # a limit at or above the lot's rows is no limit (the usual case: the lot was not reopened since)
    whole = sorted({i for i, limit in wanted if limit is None or limit >= sizes.get(i, 0)})
    limited = sorted({(i, int(limit)) for i, limit in wanted if limit is not None and limit < sizes.get(i, 0)})
    out: dict[int, StoredLot] = {}
    for ids in _chunks(whole):
        cond, args = f"lot_id IN ({','.join('?' * len(ids))})", tuple(ids)
        out.update(_read(conn, cond, args, paths, None))
    for lot_id, limit in limited:
        out.update(_read(conn, "lot_id = ? AND seq <= ?", (lot_id, limit), paths, limit))
    return out


_AGGREGATE = ("SELECT lot_id, count(*), min(unit), max(unit), count(density), min(density), max(density),"
              " sum(excluded != ''), min(file_id), max(file_id), max(head) FROM lot_values WHERE {cond}"
              " GROUP BY lot_id ORDER BY lot_id")
_GROUPS = ("SELECT unit, density, excluded, file_id, min(seq), count(*) FROM lot_values WHERE lot_id = ?"
           " AND seq <= ? GROUP BY unit, density, excluded, file_id ORDER BY min(seq)")


def _read(conn: sqlite3.Connection, cond: str, args: tuple[int, ...], paths: dict[int, str],
          limit: int | None) -> dict[int, StoredLot]:
    """The lots matching ``cond``: one aggregate row per lot (a lot of one unit, density and file with no
    excluded row needs nothing more; any other is grouped apart), then the values (and heads) in one pass."""
    agg = conn.execute(_AGGREGATE.format(cond=cond), args).fetchall()
    if not agg:
        return {}
    with_heads = any(r[10] for r in agg)
    cols = "value, head" if with_heads else "value"
    rows = conn.execute(f"SELECT {cols} FROM lot_values WHERE {cond} ORDER BY lot_id, seq", args).fetchall()
    values = np.fromiter((np.nan if r[0] is None else r[0] for r in rows), dtype=np.float64, count=len(rows))
    heads: list[str] = []
    if with_heads:
        shared: dict[str, str] = {}
        heads = [shared.setdefault(r[1], r[1]) for r in rows]   # one string per distinct head
    del rows
    out: dict[int, StoredLot] = {}
    a = 0
    for lot_id, count, unit_lo, unit_hi, n_density, d_lo, d_hi, n_excluded, f_lo, f_hi, head_hi in agg:
        b = a + int(count)
        one_density = n_density == 0 or (n_density == count and d_lo == d_hi)
        if unit_lo == unit_hi and one_density and not n_excluded and f_lo == f_hi:
            pairs: list[tuple[str, float | None]] = [(str(unit_lo), d_lo)]
            excluded_by: dict[str, int] = {}
            files: tuple[str, ...] = (paths.get(int(f_lo), ""),)
            pair_of_row = None
        else:
            pairs, excluded_by, files = _groups(conn, int(lot_id), paths, limit)
            pair_of_row = _pair_of_row(conn, int(lot_id), pairs, limit) if len(pairs) > 1 else None
        out[int(lot_id)] = StoredLot(values=values[a:b], heads=heads[a:b] if head_hi else None, pairs=pairs,
                                     excluded_by=excluded_by, files=files, pair_of_row=pair_of_row)
        a = b
    return out


def _groups(conn: sqlite3.Connection, lot_id: int, paths: dict[int, str], limit: int | None
            ) -> tuple[list[tuple[str, float | None]], dict[str, int], tuple[str, ...]]:
    """A lot's (unit, density) pairs of usable rows, its exclusion counts and its files, each in order of
    first row."""
    pair_first: dict[tuple[str, float | None], int] = {}
    excluded_by: dict[str, int] = {}
    file_first: dict[int, int] = {}
    for unit, density, why, file_id, first, count in conn.execute(_GROUPS, (lot_id, _seq_limit(limit))):
        if why:
            excluded_by[why] = excluded_by.get(why, 0) + int(count)
        else:
            pair_first.setdefault((str(unit), density), int(first))
        file_first.setdefault(int(file_id), int(first))
    files = tuple(paths.get(f, "") for f in sorted(file_first, key=lambda f: file_first[f]))
    return list(pair_first), excluded_by, files


def _seq_limit(limit: int | None) -> int:
    return limit if limit is not None else 2 ** 62


def _pair_of_row(conn: sqlite3.Connection, lot_id: int, pairs: list[tuple[str, float | None]],
                 limit: int | None) -> np.ndarray:
    """Each row's index into ``pairs`` (-1 for an excluded row): the rare lot of mixed units, read apart."""
    index = {p: i for i, p in enumerate(pairs)}
    cur = conn.execute("SELECT unit, density, excluded FROM lot_values WHERE lot_id = ? AND seq <= ? ORDER BY seq",
                       (lot_id, _seq_limit(limit)))
    return np.array([-1 if why else index.get((str(u), d), -1) for u, d, why in cur], dtype=np.int64)


def stored_summaries(conn: sqlite3.Connection, ids: Sequence[int]) -> dict[int, StoredSummary]:
    """The stored lot summary records ``ids``, by id, with the path where each one's file lies now."""
    out: dict[int, StoredSummary] = {}
    for chunk in _chunks(sorted(set(ids))):
        marks = ",".join("?" * len(chunk))
        for r in conn.execute(
                "SELECT s.id, s.n, s.mean, s.sd, s.unit, s.density, s.problem, COALESCE(f.archived_path, f.path, '')"
                f" FROM lot_summaries s LEFT JOIN files f ON f.id = s.file_id WHERE s.id IN ({marks})", chunk):
            out[int(r[0])] = StoredSummary(int(r[0]), int(r[1]), r[2], r[3], str(r[4]), r[5], str(r[6]), str(r[7]))
    return out


# --- benchmarks only ---------------------------------------------------------------------------------------
def bulk_insert(conn: sqlite3.Connection, *, line: str, product: str, unit: str, lots: Sequence[str],
                values: np.ndarray, heads: Sequence[str], at: str, verdicts: Sequence[tuple[str, str]],
                path: str = "bench.csv") -> None:
    """Write a synthetic state quickly (inside the caller's write transaction): one file, closed lots
    ``lots`` with the rows ``values[i]`` (heads in turn from ``heads``) and one verdict row each
    (``verdicts[i]`` = (verdict, payload JSON)), decided at ``at``. For benchmarks, never for the daemon."""
    cur = conn.execute("INSERT INTO files(path, sha256, size, mtime, state, first_seen_at) VALUES (?,?,?,?,?,?)",
                       (path, "0" * 64, 0, 0.0, "done", at))
    file_id = int(cur.lastrowid or 0)
    size = values.shape[1]
    head_of = [heads[j % len(heads)] if heads else "" for j in range(size)]
    for i, lot in enumerate(lots):
        cur = conn.execute(
            "INSERT INTO lots(line, product, lot, state, opened_at, last_value_at, last_value_ts, closed_at,"
            " close_reason, n, times_closed) VALUES (?,?,?,'closed',?,?,0,?,'next-lot',?,1)",
            (line, product, lot, at, at, at, size))
        lot_id = int(cur.lastrowid or 0)
        conn.executemany(
            "INSERT INTO lot_values(lot_id, line, product, lot, seq, value, unit, head, file_id)"
            " VALUES (?,?,?,?,?,?,?,?,?)",
            [(lot_id, line, product, lot, j + 1, v, unit, head_of[j], file_id)
             for j, v in enumerate(values[i].tolist())])
        verdict, payload = verdicts[i]
        conn.execute(
            "INSERT INTO verdicts(decided_at, line, product, lot, rule, rule_version, rule_hash, verdict, n, mean,"
            " target, unit, payload, lot_id, close_reason, lot_rows) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
            (at, line, product, lot, "bench", "", "", verdict, size, float(values[i].mean()), None, unit, payload,
             lot_id, "next-lot", size))
