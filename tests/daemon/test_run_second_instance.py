"""A second `lotwarden run` on a state folder in use refuses to start; the first goes on untouched."""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import plant
from plant import HEADER
from test_run_daemon import Proc, done_files, make_plant
from monitor.polling import wait_until


def test_second_daemon_on_the_same_state_folder_exits_2_naming_the_first(tmp_path: Path) -> None:
    """The second exits 2 within seconds, naming the running process's pid; it writes no alert and the
    first still takes the next file (one daemon-started alert in all)."""
    cfg = make_plant(tmp_path)
    first = Proc(cfg, tmp_path / "first.log")
    try:
        first.wait_started()
        t0 = time.monotonic()
        second = subprocess.run([sys.executable, "-m", "monitor", "run", "--config", str(cfg)],
                                capture_output=True, text=True, timeout=60, check=False)
        took = time.monotonic() - t0
        assert second.returncode == 2, second.stderr
        assert f"pid {first.p.pid}" in second.stderr and "in use by another lotwarden" in second.stderr
        assert took < 15
        assert first.p.poll() is None
        (tmp_path / "staging" / "a.csv").write_text(HEADER + plant.csv_rows("L1", "A1", [500.1, 499.8, 500.3])
                                                    + plant.csv_rows("L1", "A2", [500.0], start=3),
                                                    encoding="utf-8")
        (tmp_path / "staging" / "a.csv").rename(tmp_path / "drop" / "a.csv")
        db = tmp_path / "state" / "lotwarden.db"
        assert wait_until(lambda: done_files(db) == 1, 30), first.text()
    finally:
        rc, _ = first.terminate()
    assert rc == 0
    kinds = [json.loads(x)["kind"] for x in (tmp_path / "alerts.jsonl").read_text().splitlines()]
    assert kinds.count("daemon-started") == 1 and kinds.count("daemon-stopped") == 1


def test_the_lock_goes_with_a_killed_daemon(tmp_path: Path) -> None:
    """A daemon killed with SIGKILL leaves no stale lock: the next start runs (the kernel drops the flock)."""
    cfg = make_plant(tmp_path)
    first = Proc(cfg, tmp_path / "first.log")
    first.wait_started()
    first.kill()
    again = Proc(cfg, tmp_path / "again.log")
    try:
        again.wait_started()
    finally:
        rc, _ = again.terminate()
    assert rc == 0
