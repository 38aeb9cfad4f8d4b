"""Issue 7 §3 through the real daemon (run loop in a thread, watchdog observer, SQLite, alert log): a held lot
that late values turn into a pass raises one verdict-changed alert naming the hold; an unchanged verdict
raises nothing new; notices name files where they lie in the archive."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from test_service import (  # noqa: F401  (_no_leaked_threads: autouse fixture, no threads left running)
    HEADER,
    Running,
    _no_leaked_threads,
    count,
    csv_rows,
    make_plant,
    query,
    wait_for,
    write_atomically,
)

LOW = [497.1, 496.5, 497.8, 496.9, 497.4, 498.0, 496.2, 497.6, 497.0, 496.8, 497.3, 497.9]   # invented input


def alert_lines(root: Path) -> list[dict]:
    log = root / "alerts.jsonl"
    return [json.loads(x) for x in log.read_text().splitlines()] if log.exists() else []


def settle(r: Running, db: Path, root: Path, files_done: int) -> list[dict]:
    """Wait until ``files_done`` files are done, close every open lot, and wait until every stored alert has
    reached the alert log; return the log's lines."""
    assert wait_for(lambda: count(db, "SELECT count(*) FROM files WHERE state='done'") >= files_done, 30)
    r.daemon.call_soon(lambda d: d.close_all_lots()).result(30)
    assert wait_for(lambda: not query(db, "SELECT 1 FROM deliveries WHERE state='pending'")
                    and len(alert_lines(root)) == count(db, "SELECT count(*) FROM alerts"), 30)
    return alert_lines(root)


def in_archive(path: str, root: Path) -> bool:
    p = Path(path)
    day = p.parent.name
    return (p.exists() and p.parent.parent == root / "state" / "archive" and len(day) == 10
            and day[4] == day[7] == "-" and day.replace("-", "").isdigit())   # archive/YYYY-MM-DD/


def test_a_held_lot_that_late_values_pass_raises_one_verdict_changed(tmp_path: Path) -> None:
    """Lot A1 is held; 36 late values reopen it and it passes: one verdict-changed line naming the hold
    (when, why, which file); more late values that keep it passing, and a held lot that stays held, add no
    verdict-changed line and no second hold."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    rng = np.random.default_rng(20261212)
    late = [float(x) for x in np.round(rng.normal(500.8, 2.0, 36), 1)]
    more = [float(x) for x in np.round(rng.normal(500.0, 1.5, 12), 1)]
    b_low = [496.9, 496.1, 495.4, 498.0, 496.8, 494.8, 496.1, 496.6]
    b_late = [496.3, 497.2, 496.4, 497.2, 497.9, 495.8, 496.7, 496.0]
    # the inputs do what the test needs, by the reference library (scipy.stats): each lot passes the rule's
    # Shapiro–Wilk gate (alpha 0.05) and Student's t at alpha 0.05 holds A1 at first and passes it after the
    # late values; B1 stays held
    for values, held in ((LOW, True), (LOW + late, False), (LOW + late + more, False), (b_low, True),
                         (b_low + b_late, True)):
        x = np.array(values)
        assert stats.shapiro(x).pvalue > 0.05
        p_t = stats.ttest_1samp(x, 500.0).pvalue
        assert p_t < 0.05 if held else p_t > 0.05
    with Running(cfg) as r:
        write_atomically(tmp_path / "drop" / "L1-0600.csv",
                         HEADER + csv_rows("L1", "A1", LOW) + csv_rows("L2", "B1", b_low, start=20))
        first = settle(r, db, tmp_path, 1)
        holds = [a for a in first if a["kind"] == "hold"]
        assert sorted(a["lot"] for a in holds) == ["A1", "B1"]
        # issue 7 §3: notices name the file where it now lies, archive/YYYY-MM-DD/<name>
        for a in holds:
            assert len(a["data"]["files"]) == 1 and in_archive(a["data"]["files"][0], tmp_path), a["data"]["files"]
            assert a["data"]["file"] == a["data"]["files"][0]
        a1_hold = next(a for a in holds if a["lot"] == "A1")
        assert a1_hold["data"]["p_value"] == pytest.approx(stats.ttest_1samp(LOW, 500.0).pvalue, rel=1e-9)

        write_atomically(tmp_path / "drop" / "L1-0700.csv",
                         HEADER + csv_rows("L1", "A1", late, start=100) + csv_rows("L2", "B1", b_late, start=200))
        second = settle(r, db, tmp_path, 2)
        changed = [a for a in second if a["kind"] == "verdict-changed"]
        assert len(changed) == 1, [a["kind"] for a in second]
        c = changed[0]
        assert c["lot"] == "A1" and c["data"]["verdict"] == "pass" and c["data"]["n"] == len(LOW) + len(late)
        prev = c["data"]["previous"]
        hold_row = query(db, "SELECT decided_at, rule, rule_version FROM verdicts WHERE lot='A1' ORDER BY id")[0]
        assert (prev["verdict"], prev["decided_at"], prev["rule"], prev["rule_version"]) == ("hold", *hold_row)
        assert prev["n"] == len(LOW) and prev["mean"] == pytest.approx(np.mean(LOW), rel=1e-12)
        assert prev["p_value"] == pytest.approx(a1_hold["data"]["p_value"], rel=1e-12)
        assert prev["reason"] == a1_hold["data"]["reason"]
        archived_0700 = query(db, "SELECT archived_path FROM files WHERE path LIKE '%L1-0700.csv'")[0][0]
        assert c["data"]["why"] == f"{len(late)} late values from {archived_0700} reopened the lot"
        assert in_archive(archived_0700, tmp_path)
        assert [in_archive(f, tmp_path) for f in c["data"]["files"]] == [True, True]
        assert c["data"]["values"] == pytest.approx(LOW + late)             # arrival order
        # B1 stays held: no verdict-changed for it, and its hold is not told twice
        assert [a["lot"] for a in second if a["kind"] == "hold"] == ["A1", "B1"]
        assert [v for (v,) in query(db, "SELECT verdict FROM verdicts WHERE lot='B1' ORDER BY id")] == ["hold"] * 2

        write_atomically(tmp_path / "drop" / "L1-0800.csv", HEADER + csv_rows("L1", "A1", more, start=300))
        third = settle(r, db, tmp_path, 3)
        assert [v for (v,) in query(db, "SELECT verdict FROM verdicts WHERE lot='A1' ORDER BY id")] == \
            ["hold", "pass", "pass"]
        assert third[:len(second)] == second and [a["kind"] for a in third[len(second):]] == []
    assert len([a for a in alert_lines(tmp_path) if a["kind"] == "verdict-changed"]) == 1
