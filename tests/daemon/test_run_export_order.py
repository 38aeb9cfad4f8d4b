"""The real daemon takes finished files in export (name) order, even when a slow in-place writer of an earlier
file and an instant rename of a later one race: the earlier lot is not closed early on partial data."""

from __future__ import annotations

import json
import os
import threading
import time
from pathlib import Path

import plant
from plant import HEADER
from test_run_daemon import Proc, done_files, query

from monitor.polling import wait_until

SETTLE = 1.5
PAUSE = 0.4          # the slow writer's pause between rows: shorter than settle_seconds


def _slow_write(path: Path, header: str, rows: list[str], started: threading.Event) -> None:
    """Write ``path`` in place, one row at a time with pauses shorter than the settle time."""
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(header + rows[0])
        fh.flush()
        started.set()
        for row in rows[1:]:
            time.sleep(PAUSE)
            fh.write(row)
            fh.flush()


def test_slow_in_place_file_is_taken_before_a_later_renamed_one(tmp_path: Path) -> None:
    """Lot A: 4 rows in L1-0000.csv and 8 more written slowly into L1-0001.csv; L1-0002.csv (lot B) is renamed
    in while 0001 is still being written. Files are taken 0000, 0001, 0002, so lot A is closed by B's first row
    and judged once on all 12 units: no `only N units` review (the rule's min_n is 5)."""
    cfg = plant.make_plant(tmp_path, settle=SETTLE, rescan=1.0, idle_minutes=600)
    db = tmp_path / "state" / "lotwarden.db"
    drop, staging = tmp_path / "drop", tmp_path / "staging"
    a_values = [500.2, 499.7, 500.4, 500.1, 499.9, 500.3, 500.0, 499.6, 500.5, 500.2, 499.8, 500.1]
    a_rows = plant.csv_rows("L1", "A", a_values).splitlines(keepends=True)
    b_rows = plant.csv_rows("L1", "B", [500.0, 500.2, 499.9, 500.1, 500.3, 499.8], start=12)
    proc = Proc(cfg, tmp_path / "daemon.log")
    try:
        proc.wait_started()
        (staging / "L1-0000.csv").write_text(HEADER + "".join(a_rows[:4]), encoding="utf-8")
        os.replace(staging / "L1-0000.csv", drop / "L1-0000.csv")
        assert wait_until(lambda: done_files(db) == 1, 30), proc.text()
        started = threading.Event()
        writer = threading.Thread(target=_slow_write, args=(drop / "L1-0001.csv", HEADER, a_rows[4:], started))
        writer.start()
        assert started.wait(10)
        time.sleep(PAUSE)                     # 0001 exists and is growing
        (staging / "L1-0002.csv").write_text(HEADER + b_rows, encoding="utf-8")
        os.replace(staging / "L1-0002.csv", drop / "L1-0002.csv")
        writer.join(30)
        assert wait_until(lambda: done_files(db) == 3, 60), proc.text()
        assert wait_until(lambda: query(db, "SELECT count(*) FROM verdicts WHERE lot = 'A'")[0][0] >= 1, 30)
        assert wait_until(lambda: not query(db, "SELECT 1 FROM deliveries WHERE state = 'pending'"), 30)
        rc, _ = proc.terminate()
    finally:
        proc.ensure_dead()
    assert rc == 0
    taken = [Path(p).name for (p,) in query(db, "SELECT path FROM files WHERE state = 'done' ORDER BY id")]
    assert taken == ["L1-0000.csv", "L1-0001.csv", "L1-0002.csv"]
    assert query(db, "SELECT n, close_reason FROM verdicts WHERE lot = 'A'") == [(12, "next-lot")]
    assert query(db, "SELECT count(*) FROM lot_values WHERE lot = 'A'") == [(12,)]
    assert query(db, "SELECT count(*) FROM audit WHERE event = 'lot-reopened'") == [(0,)]
    alerts = [json.loads(x) for x in (tmp_path / "alerts.jsonl").read_text(encoding="utf-8").splitlines()]
    assert not [a for a in alerts if a["kind"] == "review" and "only" in json.dumps(a)], alerts
