"""What data puts into the daemon's log is escaped and bounded: one event, one printable line."""

from __future__ import annotations

import logging
from pathlib import Path

import plant
from plant import HEADER
from test_run_daemon import Proc, done_files, make_plant
from monitor.daemon.logsetup import MAX_LINE, OneLineFormatter
from monitor.polling import wait_until

NASTY = "A\x1b[31mRED\u2028NEXT\x85LINE"     # ESC (a terminal colour), LINE SEPARATOR, NEL


def test_control_characters_and_huge_lot_codes_do_not_reach_the_log_raw(tmp_path: Path) -> None:
    """A lot code with ESC, U+2028 and NEL, and a 100 kB lot code, pass through the real daemon: its log holds
    neither raw character and no line longer than the bound; the lots are still stored."""
    cfg = make_plant(tmp_path)
    huge = "H" * 100_000
    body = (plant.csv_rows("L1", NASTY, [500.1, 499.8, 500.3]) + plant.csv_rows("L1", huge, [500.0, 500.2], start=3)
            + plant.csv_rows("L1", "END-LOT", [500.0], start=5))
    (tmp_path / "staging" / "x.csv").write_text(HEADER + body, encoding="utf-8")
    proc = Proc(cfg, tmp_path / "daemon.log")
    try:
        proc.wait_started()
        (tmp_path / "staging" / "x.csv").rename(tmp_path / "drop" / "x.csv")
        db = tmp_path / "state" / "lotwarden.db"
        assert wait_until(lambda: done_files(db) == 1, 30), proc.text()
        assert wait_until(lambda: "x.csv" in proc.text() and "RED" in proc.text(), 10), proc.text()
    finally:
        rc, _ = proc.terminate()
    assert rc == 0
    text = (tmp_path / "daemon.log").read_text(encoding="utf-8")
    for raw in ("\x1b", "\u2028", "\x85"):
        assert raw not in text
    assert "\\x1b[31mRED\\u2028NEXT\\x85LINE" in text
    assert max(len(line) for line in text.split("\n")) <= MAX_LINE + 100


def test_a_long_line_keeps_its_start_and_end() -> None:
    """A 50,000-character message is cut in the middle, saying how much, so the end (an error) stays."""
    rec = logging.LogRecord("lotwarden", logging.ERROR, __file__, 1, "start %s end", ("x" * 50_000,), None)
    line = OneLineFormatter().format(rec)
    assert len(line) <= MAX_LINE + 100 and "start" in line and line.endswith("end") and "characters cut" in line
