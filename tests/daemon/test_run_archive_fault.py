"""A persistent fault on the real daemon: an archive path that cannot be used is retried with backoff and said
once per backoff step (no flood, no traceback), nothing is lost, and every file is archived once it clears."""

from __future__ import annotations

import json
import os
import re
from pathlib import Path

import plant
from plant import HEADER
from test_run_daemon import Proc, done_files, make_plant, query

from monitor.polling import wait_until

N_FILES = 10
ROWS = 3


def _export(i: int) -> str:
    # each file its own line and lot, so no lot closes during the test
    return HEADER + plant.csv_rows(f"L{i:02d}", f"K{i:02d}", [500.0 + 0.1 * k for k in range(ROWS)])


def test_unusable_archive_is_retried_with_backoff_then_every_file_is_archived(tmp_path: Path) -> None:
    """`archive` is made a regular file (so its dated folder cannot be created, whoever runs the test, root
    included) and 10 files are dropped: their values are stored once, the files stay in the drop folder, the
    log has a handful of ERROR lines (one per backoff step: 1, 2, 4, 8 s …) and no traceback in ~15 s, then one
    'fault persisting' line (alert delay set to 4 s); once the path is usable again every file is archived
    with its bytes, once, and the log says the fault cleared."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    drop, staging = tmp_path / "drop", tmp_path / "staging"
    archive = tmp_path / "state" / "archive"
    proc = Proc(cfg, tmp_path / "daemon.log", env={"LOTWARDEN_FAULT_ALERT_AFTER": "4"})
    try:
        proc.wait_started()
        archive.rmdir()                                   # empty: the daemon made it at start-up
        archive.write_text("not a folder\n", encoding="utf-8")
        for i in range(N_FILES):
            (staging / f"f{i:02d}.csv").write_text(_export(i), encoding="utf-8")
            os.replace(staging / f"f{i:02d}.csv", drop / f"f{i:02d}.csv")
        assert wait_until(lambda: done_files(db) == N_FILES, 30), proc.text()
        # attempts at about 0, 1, 3, 7 and 15 s: wait for the fifth (a positive signal), then count
        assert wait_until(lambda: "(attempt 5," in proc.text(), 40), proc.text()
        during = proc.text()
        assert sorted(p.name for p in drop.iterdir()) == [f"f{i:02d}.csv" for i in range(N_FILES)]
        os.replace(archive, tmp_path / "archive-blocker")    # the path is usable again
        assert wait_until(lambda: not list(drop.iterdir()), 40), proc.text()
        assert wait_until(lambda: not query(db, "SELECT 1 FROM files WHERE archived_at IS NULL"), 30), proc.text()
        # one alert when the fault had lasted, one when it cleared, on the channel that still works (the log)
        assert wait_until(lambda: "fault-cleared" in _alert_kinds(tmp_path / "alerts.jsonl"), 30), proc.text()
        rc, _ = proc.terminate()
    finally:
        proc.ensure_dead()
    assert rc == 0
    errors = [ln for ln in during.splitlines() if " ERROR " in ln]
    assert 4 <= len(errors) <= 8, errors          # one per backoff step (+ the persisting line), not one per file
    assert "Traceback" not in proc.text()
    assert len(re.findall(r"fault persisting: moving files to \S*archive", during)) == 1
    kinds = _alert_kinds(tmp_path / "alerts.jsonl")
    assert kinds.count("fault-persisting") == 1 and kinds.count("fault-cleared") == 1, kinds
    assert len(re.findall(r"fault cleared: moving files to \S*archive", proc.text())) == 1
    # nothing lost, nothing doubled: every value once, every file archived once with its own bytes
    assert query(db, "SELECT count(*), count(DISTINCT file_id) FROM lot_values") == [(N_FILES * ROWS, N_FILES)]
    assert query(db, "SELECT state, count(*) FROM files GROUP BY state") == [("done", N_FILES)]
    archived = sorted(archive.rglob("*.csv"))
    assert [p.name for p in archived] == [f"f{i:02d}.csv" for i in range(N_FILES)]
    assert all(p.read_text(encoding="utf-8") == _export(int(p.stem[1:])) for p in archived)


def _alert_kinds(path: Path) -> list[str]:
    """The kinds of the alerts in the alert log, in order (an unfinished last line is left out)."""
    if not path.exists():
        return []
    out = []
    for ln in path.read_text(encoding="utf-8").splitlines():
        try:
            out.append(json.loads(ln)["kind"])
        except (ValueError, KeyError):
            continue
    return out
