"""The real daemon takes only regular files: FIFOs and symlinks in the drop folder are ignored, not read."""

from __future__ import annotations

import os
import sqlite3
from pathlib import Path

import plant
from plant import HEADER
from test_run_daemon import Proc, done_files, make_plant
from monitor.polling import wait_until


def test_fifo_and_symlinks_are_ignored_and_good_files_still_flow(tmp_path: Path) -> None:
    """A FIFO, a link to /dev/zero and a link to /etc/passwd named *.csv neither hang the daemon nor reach
    any output; a good file dropped after them is taken; SIGTERM still exits 0 within seconds."""
    cfg = make_plant(tmp_path)
    proc = Proc(cfg, tmp_path / "daemon.log")
    drop = tmp_path / "drop"
    try:
        proc.wait_started()
        os.mkfifo(drop / "fifo.csv")
        os.symlink("/dev/zero", drop / "zero.csv")
        os.symlink("/etc/passwd", drop / "x.csv")
        good = tmp_path / "staging" / "good.csv"
        good.write_text(HEADER + plant.csv_rows("L1", "A1", [500.1, 499.8, 500.3])
                        + plant.csv_rows("L1", "A2", [500.0], start=3), encoding="utf-8")
        good.rename(drop / "good.csv")
        db = tmp_path / "state" / "lotwarden.db"
        assert wait_until(lambda: done_files(db) == 1, 30), proc.text()
        assert wait_until(lambda: all(f"{n}.csv" in proc.text() for n in ("fifo", "zero", "x")), 10), proc.text()
    finally:
        rc, took = proc.terminate(timeout=15)
    assert rc == 0 and took < 10
    log = proc.text()
    assert "not a regular file (FIFO)" in log and "not a regular file (symbolic link)" in log
    outputs = [log, (tmp_path / "alerts.jsonl").read_text(encoding="utf-8")]
    conn = sqlite3.connect(db)
    try:
        outputs += [repr(r) for r in conn.execute("SELECT * FROM audit").fetchall()]
        outputs += [repr(r) for r in conn.execute("SELECT * FROM files").fetchall()]
    finally:
        conn.close()
    assert not any("root:x:0:0" in text for text in outputs)
    assert (drop / "fifo.csv").exists() and (drop / "x.csv").is_symlink()   # nothing deleted or moved
