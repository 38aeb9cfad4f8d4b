"""A full disk under the real daemon (RLIMIT_FSIZE on the subprocess, SIGXFSZ ignored, so writes past the limit
fail as they do on a full disk): the state database cannot grow, the failed transactions are retried with
backoff and said once per backoff step without a traceback, nothing is lost, and once writes work again every
file is taken exactly once."""

from __future__ import annotations

import os
import resource
import signal
import subprocess
import sys
from pathlib import Path

import plant
from plant import HEADER
from test_run_daemon import done_files, query

from monitor.polling import wait_until

N_FILES = 10
ROWS = 2000
LIMIT = 1_500_000     # bytes any file of the daemon may reach: the WAL fills it after a few files


def _export(i: int) -> str:
    return HEADER + plant.csv_rows(f"L{i:02d}", f"K{i:02d}", [500.0 + (k % 7) * 0.1 for k in range(ROWS)])


def _limit_file_size() -> None:   # runs in the child before exec
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    resource.setrlimit(resource.RLIMIT_FSIZE, (LIMIT, resource.RLIM_INFINITY))


def test_disk_full_is_retried_with_backoff_and_nothing_is_lost(tmp_path: Path) -> None:
    """10 files of 2000 rows, the daemon's files limited to 1.5 MB: some files are stored, the rest wait in the
    drop folder; over ~15 s the log has a handful of ERROR lines (one per backoff step) and no traceback; after
    the limit is lifted every file is taken once and every value stored once."""
    cfg = plant.make_plant(tmp_path, settle=0.1, rescan=1.0, idle_minutes=600)
    db = tmp_path / "state" / "lotwarden.db"
    drop, staging = tmp_path / "drop", tmp_path / "staging"
    log_path = tmp_path / "daemon.log"
    with open(log_path, "wb") as log:
        proc = subprocess.Popen([sys.executable, "-m", "monitor", "run", "--config", str(cfg)],
                                stdout=subprocess.DEVNULL, stderr=log, preexec_fn=_limit_file_size)

    def text() -> str:
        return log_path.read_text(encoding="utf-8", errors="replace")

    try:
        assert wait_until(lambda: " started:" in text() or proc.poll() is not None, 30), text()
        for i in range(N_FILES):
            (staging / f"f{i:02d}.csv").write_text(_export(i), encoding="utf-8")
            os.replace(staging / f"f{i:02d}.csv", drop / f"f{i:02d}.csv")
        # attempts at about 0, 1, 3, 7 and 15 s after the first failure: wait for the fifth, then count
        assert wait_until(lambda: "(attempt 5," in text(), 60), text()
        during = text()
        stored = done_files(db)
        assert stored < N_FILES
        assert len(list(drop.iterdir())) == N_FILES - stored          # the rest wait in the drop folder
        resource.prlimit(proc.pid, resource.RLIMIT_FSIZE, (resource.RLIM_INFINITY, resource.RLIM_INFINITY))
        assert wait_until(lambda: done_files(db) == N_FILES and not list(drop.iterdir()), 60), text()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(20) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    errors = [ln for ln in during.splitlines() if " ERROR " in ln]
    assert 4 <= len(errors) <= 8, errors
    assert all("state database" in ln for ln in errors), errors
    assert "Traceback" not in text()
    assert "fault cleared: writing the state database" in text()
    assert query(db, "SELECT count(*), count(DISTINCT file_id) FROM lot_values") == [(N_FILES * ROWS, N_FILES)]
    assert query(db, "SELECT state, count(*) FROM files GROUP BY state") == [("done", N_FILES)]
    assert len(list((tmp_path / "state" / "archive").rglob("*.csv"))) == N_FILES
