"""Issue 7 §3: the archive path a verdict names is chosen in the file's transaction, and after a SIGKILL between
that commit and the move the next start moves the file to exactly that path (real processes, SQLite, folders)."""

from __future__ import annotations

import json
import signal
import sqlite3
from datetime import UTC, datetime, timedelta
from pathlib import Path

from test_crash_intake import DRIVER, _export, run_driver

OTHER = b"a file someone else put in the archive\n"


def test_a_move_left_by_a_crash_goes_to_the_recorded_path(tmp_path: Path, make_setup) -> None:
    """02's archive name is taken (so it is planned as 02-L1-b-1.csv), the process is killed after the commit
    and before the move; the restart moves 02 to exactly the recorded path, the other file stays untouched,
    and the verdict naming 02 names that path."""
    cfg = make_setup(tmp_path)
    drop = tmp_path / "drop"
    (drop / "01-L1-a.csv").write_text(_export([("L1", "OAT-500", "OAT-A", v) for v in (502.6, 501.4, 500.2)]))
    (drop / "02-L1-b.csv").write_text(_export([("L1", "OAT-500", "OAT-A", v) for v in (503.2, 499.8, 501.1)]
                                              + [("L1", "OAT-500", "OAT-B", 500.0)]))
    today = datetime.now(UTC)
    taken = []
    for day in (today, today + timedelta(days=1)):   # the driver's clock may pass midnight
        p = tmp_path / "state" / "archive" / day.strftime("%Y-%m-%d") / "02-L1-b.csv"
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(OTHER)
        taken.append(p)
    script = tmp_path / "driver.py"
    script.write_text(DRIVER)
    assert run_driver(script, cfg, "after-commit:2") == -signal.SIGKILL
    db = sqlite3.connect(str(tmp_path / "state" / "lotwarden.db"))
    try:
        planned, archived_at = db.execute("SELECT archived_path, archived_at FROM files WHERE path LIKE"
                                          " '%02-L1-b.csv'").fetchone()
        (payload,) = db.execute("SELECT payload FROM verdicts WHERE lot = 'OAT-A'").fetchone()
    finally:
        db.close()
    assert Path(planned).name == "02-L1-b-1.csv" and archived_at is None       # name-clash suffix rule
    assert (drop / "02-L1-b.csv").exists() and not Path(planned).exists()      # killed before the move
    files = json.loads(payload)["files"]
    assert files[1] == planned and Path(files[0]).exists()                     # 01 was moved before the kill

    assert run_driver(script, cfg, None) == 0                                  # the next start
    assert Path(planned).exists() and not (drop / "02-L1-b.csv").exists()
    assert Path(planned).read_text() == (_export([("L1", "OAT-500", "OAT-A", v) for v in (503.2, 499.8, 501.1)]
                                                 + [("L1", "OAT-500", "OAT-B", 500.0)]))
    assert all(p.read_bytes() == OTHER for p in taken)                         # nothing overwritten
    db = sqlite3.connect(str(tmp_path / "state" / "lotwarden.db"))
    try:
        assert db.execute("SELECT archived_path FROM files WHERE path LIKE '%02-L1-b.csv'").fetchone() == (planned,)
        assert db.execute("SELECT count(*) FROM files WHERE archived_at IS NULL").fetchone() == (0,)
    finally:
        db.close()
    assert all(Path(f).exists() for f in files)
