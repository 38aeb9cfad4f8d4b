"""Files that change after they were taken (real folders, real SQLite): found by looking at the archived copy
again, recorded once in the audit trail, never written to, and not looked at after the watch window."""

from __future__ import annotations

import json
import os
from pathlib import Path

from plant import HEADER, csv_rows

from monitor.daemon.config import load_rule_set
from monitor.daemon.intake import Intake
from monitor.state import audit

FIRST = HEADER + csv_rows("L1", "A", [500.1, 499.9, 500.3])
MORE = csv_rows("L1", "A", [500.2, 499.8], start=3)


def _take(intake: Intake, drop: Path, name: str = "L1-0001.csv") -> Path:
    src = Path(drop) / name
    src.write_text(FIRST, encoding="utf-8")
    out = intake.process(src)
    assert out.status == "taken" and out.moved_to
    intake.flush()                                    # records the move (archived_at)
    return Path(out.moved_to)


def test_rows_appended_to_the_archived_file_are_reported_once(intake_env, clock) -> None:
    """Two rows appended to the archived copy: one ChangedFile naming the archive path, bytes and lines added
    and first bytes unchanged; one audit record; the stored values stay the three taken; the file keeps exactly
    the writer's bytes; a second check and a new Intake on the same database report nothing more."""
    cfg, store, intake, drop = intake_env
    archived = _take(intake, drop)
    assert intake.check_taken() == []                 # unchanged: nothing
    with open(archived, "a", encoding="utf-8") as fh:
        fh.write(MORE)
    clock.advance(60)
    (change,) = intake.check_taken()
    assert change.archived_path == str(archived)
    assert change.size_before == len(FIRST.encode()) and change.bytes_added == len(MORE.encode())
    assert change.first_bytes_unchanged and change.appended and change.lines_added == 2
    assert "not" in change.message() and "new export" in change.message()
    assert intake.check_taken() == []
    again = Intake(cfg, load_rule_set(cfg), store, clock=clock)
    clock.advance(10)
    assert again.check_taken() == []                  # recorded once, whoever looks
    with store.read() as conn:
        (rec,) = audit.records(conn, "file-changed-after-take")
    detail = json.loads(rec.detail)
    assert detail["bytes_added"] == len(MORE.encode()) and detail["rows_appended"] is True
    assert detail["new_rows_judged"] is False and detail["archived_path"] == str(archived)
    assert store.conn.execute("SELECT count(*) FROM lot_values").fetchone() == (3,)
    assert archived.read_text(encoding="utf-8") == FIRST + MORE


def test_a_touched_file_is_no_change_and_the_window_ends(intake_env, clock) -> None:
    """A new mtime over the same bytes is not reported; a change made after the watch window is not looked for."""
    _cfg, _store, intake, drop = intake_env
    archived = _take(intake, drop)
    st = archived.stat()
    os.utime(archived, ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))
    clock.advance(30)
    assert intake.check_taken() == []
    clock.advance(16 * 60)
    with open(archived, "a", encoding="utf-8") as fh:
        fh.write(MORE)
    assert intake.check_taken() == []


def test_a_rewritten_file_says_its_first_bytes_changed(intake_env, clock) -> None:
    """Content rewritten in place (same length, other bytes): reported with first_bytes_unchanged False."""
    _cfg, _store, intake, drop = intake_env
    archived = _take(intake, drop)
    archived.write_text(FIRST.replace("500.1", "501.1"), encoding="utf-8")
    clock.advance(5)
    (change,) = intake.check_taken()
    assert not change.first_bytes_unchanged and not change.appended and change.bytes_added == 0
