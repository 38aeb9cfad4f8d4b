"""The real daemon and a writer that pauses longer than settle_seconds: the rows written after the file was
taken are not lost silently — the change of the archived file is recorded once and said in the log."""

from __future__ import annotations

import json
import time
from pathlib import Path

import plant
from plant import HEADER
from test_run_daemon import Proc, done_files, query

from monitor.polling import wait_until

SETTLE = 2.0
PAUSE = 5.0


def test_rows_written_after_a_long_pause_are_reported_not_lost_silently(tmp_path: Path) -> None:
    """10 rows, a 5 s pause after row 5, settle 2 s: the daemon takes the first 5 rows and archives the file;
    the writer's last 5 rows land in the archived file (same inode). One `file-changed-after-take` audit record
    names the archive path with the bytes added and the first bytes unchanged; the database holds exactly the
    5 values taken; the archived file holds exactly what the writer wrote (lotwarden never wrote to it)."""
    cfg = plant.make_plant(tmp_path, settle=SETTLE, rescan=1.0, idle_minutes=600)
    db = tmp_path / "state" / "lotwarden.db"
    values = [500.2, 499.7, 500.4, 500.1, 499.9, 500.3, 500.0, 499.6, 500.5, 500.2]
    rows = plant.csv_rows("L1", "A", values).splitlines(keepends=True)
    first, rest = HEADER + "".join(rows[:5]), "".join(rows[5:])
    proc = Proc(cfg, tmp_path / "daemon.log")
    try:
        proc.wait_started()
        with open(tmp_path / "drop" / "L1-0001.csv", "w", encoding="utf-8") as fh:
            fh.write(first)
            fh.flush()
            assert wait_until(lambda: done_files(db) == 1, 30), proc.text()
            time.sleep(max(0.0, PAUSE - SETTLE))    # the writer's pause (it does not know the file was taken)
            fh.write(rest)
            fh.flush()
        assert wait_until(lambda: query(db, "SELECT count(*) FROM audit WHERE event = 'file-changed-after-take'")
                          == [(1,)], 30), proc.text()
        alert_log = tmp_path / "alerts.jsonl"   # the alert that names the file reaches the people told
        assert wait_until(lambda: alert_log.exists() and '"file-changed-after-take"' in alert_log.read_text(
            encoding="utf-8"), 30), proc.text()
        rc, _ = proc.terminate()
    finally:
        proc.ensure_dead()
    assert rc == 0
    ((archived_path,),) = query(db, "SELECT archived_path FROM files WHERE state = 'done'")
    ((detail,),) = query(db, "SELECT detail FROM audit WHERE event = 'file-changed-after-take'")
    d = json.loads(detail)
    assert d["archived_path"] == archived_path
    assert d["size_before"] == len(first.encode()) and d["bytes_added"] == len(rest.encode())
    assert d["first_bytes_unchanged"] is True and d["lines_added"] == 5
    assert query(db, "SELECT count(*) FROM lot_values") == [(5,)]
    assert Path(archived_path).read_text(encoding="utf-8") == first + rest
    assert f"file changed after it was taken: {archived_path}" in proc.text()
    told = [json.loads(ln) for ln in alert_log.read_text(encoding="utf-8").splitlines()
            if '"file-changed-after-take"' in ln]
    assert len(told) == 1 and archived_path in json.dumps(told[0])
