"""The real daemon quarantines a 50 MB one-line file with a plain reason, no traceback, and goes on."""

from __future__ import annotations

from pathlib import Path

import plant
from plant import HEADER
from soak_feed import Daemon, query

from monitor.ingest.text import MAX_LINE_BYTES
from monitor.polling import wait_until

MB = 1_000_000


def peak_rss_mb(pid: int) -> float:
    """The process's peak resident set (VmHWM in /proc/<pid>/status), in MB."""
    for ln in Path(f"/proc/{pid}/status").read_text().splitlines():
        if ln.startswith("VmHWM:"):
            return int(ln.split()[1]) * 1024 / MB
    return 0.0


def test_a_50_mb_one_line_file_is_quarantined_with_a_plain_reason(tmp_path: Path) -> None:
    """`lotwarden run` takes a 50 MB file without a line end: quarantined with "line 1 is longer than ...",
    no traceback in the log; a good file dropped after it is taken; SIGTERM exits 0."""
    cfg = plant.make_plant(tmp_path, settle=0.1, rescan=1.0, idle_minutes=600)
    db = tmp_path / "state" / "lotwarden.db"
    d = Daemon(cfg, tmp_path / "daemon.log")
    try:
        assert wait_until(lambda: " started:" in d.text() or d.p.poll() is not None, 30), d.text()
        base_mb = peak_rss_mb(d.p.pid)
        big = tmp_path / "staging" / "dump.csv"
        big.write_bytes(b"7" * (50 * MB))
        big.rename(tmp_path / "drop" / "dump.csv")
        good = tmp_path / "staging" / "L1-after.csv"
        good.write_text(HEADER + plant.csv_rows("L1", "A1", [500.1, 499.9, 500.2]))
        good.rename(tmp_path / "drop" / "L1-after.csv")
        assert wait_until(lambda: sorted(query(db, "SELECT state FROM files")) == [("done",), ("rejected",)],
                          60), d.text()
        grown_mb = peak_rss_mb(d.p.pid) - base_mb
        assert d.terminate() == 0, d.text()
    finally:
        d.ensure_dead()
    reasons = list((tmp_path / "state" / "quarantine").rglob("dump.csv.reason.txt"))
    assert len(reasons) == 1
    reason = reasons[0].read_text(encoding="utf-8")
    assert f"line 1 is longer than {MAX_LINE_BYTES:,} bytes; an export line is at most {MAX_LINE_BYTES:,}" \
        in reason, reason
    assert "dump.csv" in reason and "reader failed" not in reason and "Traceback" not in reason
    text = d.text()
    assert "Traceback" not in text and "reader failed" not in text
    assert "dump.csv" in text
    (stored,) = query(db, "SELECT reason FROM files WHERE state = 'rejected'")
    assert "longer than" in stored[0]
    assert [(lot, n) for lot, n in query(db, "SELECT lot, count(*) FROM lot_values GROUP BY lot")] == [("A1", 3)]
    # the file's bytes are held a small number of times, never copied per line or decoded to a str
    print(f"\nlong line: daemon peak RSS grew {grown_mb:.0f} MB for a 50 MB file")
    assert grown_mb < 200, grown_mb
