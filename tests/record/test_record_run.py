"""The record tests' daemon run itself: every closed lot got one verdict, the open ones none."""

from __future__ import annotations

import sqlite3
import statistics

from record_run import CLOSED, TARGET


def test_the_daemon_judged_every_closed_lot_once(record_run):
    conn = sqlite3.connect(str(record_run.db))
    try:
        rows = conn.execute("SELECT line, lot, verdict, n, mean FROM verdicts ORDER BY id").fetchall()
    finally:
        conn.close()
    assert sorted((r[0], r[1]) for r in rows) == sorted(CLOSED)
    for line, lot, verdict, n, mean in rows:
        values = record_run.values[(line, lot)]
        assert n == len(values)
        assert abs(mean - statistics.fmean(values)) <= 1e-9 * abs(mean)     # Python's statistics.fmean
    # A3 holds 3 packs, below the rule's min_n = 5: no test may judge it (common practice, no source)
    assert {r[1]: r[2] for r in rows}["A3"] == "review"
    # A2's mean lies well below the target (scipy would agree; the engine's own tests check the p-value)
    assert statistics.fmean(record_run.values[("L1", "A2")]) < TARGET - 1
