"""Intake under a persistent fault (real folders, real SQLite): one attempt per backoff step, nothing lost,
and the events that want an alert (lasting fault, its clearing) handed out once each."""

from __future__ import annotations

from pathlib import Path

from plant import HEADER, csv_rows

from monitor.daemon.faults import Cleared, FaultStep


def test_archive_fault_backs_off_alerts_once_and_clears(intake_env, clock, monkeypatch) -> None:
    """With `archive` a regular file, files are stored but stay in the drop folder; tries while the backoff
    runs touch nothing; after alert_after (180 s by default) one FaultStep wants an alert, and once the path
    is usable one Cleared does; every file is then archived."""
    cfg, store, intake, drop = intake_env
    archive = Path(cfg.state.archive)
    archive.parent.mkdir(parents=True, exist_ok=True)
    archive.write_text("not a folder\n", encoding="utf-8")
    paths = []
    for i in range(3):
        p = Path(drop) / f"f{i}.csv"
        p.write_text(HEADER + csv_rows(f"L{i}", f"K{i}", [500.0, 500.1, 500.2]), encoding="utf-8")
        paths.append(p)
    outs = intake.process_batch(paths)
    assert [o.status for o in outs] == ["taken"] * 3
    assert all(o.moved_to is None and "not moved yet" in o.reason for o in outs)
    assert all(p.exists() for p in paths)
    assert len(intake.faults.open_keys()) == 1                      # one fault, not one per file
    assert intake.faults.open_keys()[0].endswith(": ENOTDIR")
    again = intake.process_batch(paths)                             # within the 1 s backoff: no attempt
    assert [o.status for o in again] == ["waiting"] * 3
    assert intake.fault_alerts() == []
    for _ in range(12):                                             # retry whenever allowed, for ~6 min
        clock.advance(30)
        intake.process_batch(paths)
    events = intake.fault_alerts()
    assert len(events) == 1 and isinstance(events[0], FaultStep) and events[0].alert
    assert events[0].lasting_seconds >= 180
    archive.rename(archive.with_name("blocker"))
    clock.advance(400)
    outs = intake.process_batch(paths)
    assert all(o.moved_to for o in outs) and not any(p.exists() for p in paths)
    (cleared,) = intake.fault_alerts()
    assert isinstance(cleared, Cleared) and cleared.alerted
    assert cleared.key == events[0].key and cleared.first_at == events[0].first_at   # one occurrence
    assert intake.fault_alerts() == []
    n = store.conn.execute("SELECT count(*), count(DISTINCT file_id) FROM lot_values").fetchone()
    assert n == (9, 3)                                              # stored once, not again on each retry


def test_unusable_quarantine_keeps_a_rejected_file_and_writes_its_reason_later(intake_env, clock) -> None:
    """A bad file while `quarantine` is a regular file: rejected once (one alert), left in the drop folder with
    no reason file anywhere; once the path works it is moved with its reason file beside it."""
    cfg, store, intake, drop = intake_env
    quarantine = Path(cfg.state.quarantine)
    quarantine.parent.mkdir(parents=True, exist_ok=True)
    quarantine.write_text("not a folder\n", encoding="utf-8")
    bad = Path(drop) / "bad.csv"
    bad.write_text("no header here\n1,2,3\n", encoding="utf-8")
    out = intake.process(bad)
    assert out.status == "rejected" and out.moved_to is None and bad.exists()
    assert intake.faults.open_keys() == (f"moving files to {quarantine}: ENOTDIR",)
    quarantine.rename(quarantine.with_name("blocker"))
    clock.advance(5)
    again = intake.process(bad)
    assert again.status == "archived" and again.moved_to and not bad.exists()
    moved = Path(again.moved_to)
    assert moved.with_name(moved.name + ".reason.txt").read_text(encoding="utf-8").startswith("file: bad.csv")
    n = store.conn.execute("SELECT count(*) FROM alerts WHERE kind = 'file-rejected'").fetchone()
    assert n == (1,)
