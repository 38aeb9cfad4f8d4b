"""Reminders of open holds: the pure numbering (k = whole intervals open, latest k only), the check interval,
the e-mail pacing leaving reminders alone, and a real daemon that reminds until `lotwarden dispose`."""

from __future__ import annotations

import json
import math
import sqlite3
import subprocess
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from record_run import Daemon, RecordRun, drop_exports, write_plant

from monitor.alerts.grouping import Pacing, PendingRow, plan_batches
from monitor.daemon import reminders
from monitor.polling import wait_until
from monitor.record import entry
from monitor.state.dispositions import DispositionRow
from monitor.state.verdicts import VerdictRow

T0 = datetime(2026, 11, 30, 5, 12, 0, tzinfo=UTC)


def verdict_row(vid: int, verdict: str = "hold", lot: str = "J17", decided: datetime = T0) -> VerdictRow:
    payload = json.dumps({"reason": "mean below target", "p_value": 0.004, "giveaway": None})
    return VerdictRow(vid, decided.isoformat(), "L3", "JAM-340", lot, "jam-340", "a1b2c3d4e5f6", "a1b2c3d4e5f6" * 5,
                      verdict, 20, 338.9, 341.0, "g", payload, 1, None, "next-lot", 20)


@pytest.mark.parametrize(("after_s", "minutes", "k"), [
    (0, 30, 0), (1799, 30, 0), (1800, 30, 1), (5399, 30, 2), (5400, 30, 3), (3 * 3600 + 7, 0.05, 3602),
    (86400, 0, 0), (-60, 30, 0)])
def test_the_reminder_number_is_whole_intervals_open(after_s: int, minutes: float, k: int) -> None:
    # k = floor(seconds open / interval seconds), worked out by hand beside each case
    assert reminders.reminder_number(T0, T0 + timedelta(seconds=after_s), minutes) == k


def test_only_the_latest_reminder_of_each_open_hold_is_due() -> None:
    held, review, passed, disposed = (verdict_row(11), verdict_row(12, "review", "J18"),
                                      verdict_row(13, "pass", "J19"), verdict_row(14, "hold", "J20"))
    disp = DispositionRow(3, (T0 + timedelta(minutes=5)).isoformat(), "L3", "JAM-340", "J20", 14, "release",
                          "Ann Weller", "re-weighed")
    items = [entry(held), entry(review), entry(passed), entry(disposed, disp)]
    now = T0 + timedelta(hours=50, minutes=20)          # a long downtime: 100 whole half-hours have passed
    due = reminders.due_reminders(items, now, 30)
    assert [(a.kind, a.lot, a.data["number"]) for a in due] == [("reminder", "J17", 100), ("reminder", "J18", 100)]
    assert [a.dedup_key for a in due] == ["reminder|11|100", "reminder|12|100"]
    assert due[0].data["open_minutes"] == 50 * 60 + 20
    assert due[0].data["verdict"]["verdict"] == "hold" and due[0].data["verdict"]["verdict_id"] == 11
    assert reminders.due_reminders(items, now, 0) == []
    assert reminders.due_reminders(items, T0 + timedelta(minutes=29), 30) == []


def test_the_check_interval(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv(reminders.CHECK_ENV, raising=False)
    assert reminders.check_seconds(240) == 60.0
    assert reminders.check_seconds(0.05) == pytest.approx(0.75)
    monkeypatch.setenv(reminders.CHECK_ENV, "2.5")
    assert reminders.check_seconds(240) == 2.5
    monkeypatch.setattr(reminders, "CHECK_SECONDS", 0.4)
    assert reminders.check_seconds(240) == 0.4


def test_the_repeat_hold_suppression_does_not_swallow_reminders() -> None:
    held = entry(verdict_row(21))
    now = T0 + timedelta(minutes=90)
    [rem] = reminders.due_reminders([held], now, 30)
    rows = [PendingRow(1, rem)]
    # the lot was told a moment ago: a repeat *hold* would be suppressed inside the reminder interval
    plan = plan_batches(rows, now=now.timestamp(), pacing=Pacing(window=0, reminder=1800),
                        recipients_for=lambda a: ("qa@brackenfield.example",), sends={},
                        last_notified={("L3", "JAM-340", "J17"): now.timestamp() - 10})
    assert plan.suppressed == ()
    assert [a.dedup_key for b in plan.batches for a in b.alerts] == ["reminder|21|3"]


def _log(root: Path) -> list[dict[str, Any]]:
    path = root / "alerts.jsonl"
    out = []
    for text in (path.read_text(encoding="utf-8").splitlines() if path.exists() else []):
        try:
            out.append(json.loads(text))
        except ValueError:
            continue            # a line being written
    return out


def _numbers(root: Path, lot: str) -> list[int]:
    return [int(r["data"]["number"]) for r in _log(root) if r.get("kind") == "reminder" and r.get("lot") == lot]


def test_a_running_daemon_reminds_until_the_lot_is_disposed_of(tmp_path: Path) -> None:
    interval = 3.0                       # reminder_minutes = 0.05
    cfg = write_plant(tmp_path)
    cfg.write_text(cfg.read_text().replace("drain_seconds = 0.2", "drain_seconds = 0.2\nreminder_minutes = 0.05"))
    run = RecordRun(root=tmp_path, config=cfg, db=tmp_path / "state" / "lotwarden.db")
    daemon = Daemon(cfg, env={reminders.CHECK_ENV: "0.5"})
    try:
        daemon.wait_started()
        drop_exports(tmp_path)
        assert wait_until(lambda: len(set(_numbers(tmp_path, "A2"))) >= 2, 60), daemon.text()
        p = subprocess.run([sys.executable, "-m", "monitor", "dispose", "L1/OAT-500/A2", "release", "--by",
                            "Ann Weller", "--note", "re-weighed, within limits", "--config", str(cfg)],
                           capture_output=True, text=True, timeout=60)
        assert p.returncode == 0, p.stderr
        # the log channel delivers in outbox order, so every A2 reminder stored before the disposition is in
        # the log once the disposition is
        assert wait_until(lambda: any(r.get("kind") == "disposition" for r in _log(tmp_path)), 30), daemon.text()
        told = _numbers(tmp_path, "A2")
        b2_then = max(_numbers(tmp_path, "B2"), default=0)
        # B2 is still open: three more of its reminders span at least three intervals (9 s) in which the job ran
        assert wait_until(lambda: max(_numbers(tmp_path, "B2"), default=0) >= b2_then + 3, 60), daemon.text()
    finally:
        assert daemon.stop() == 0, daemon.text()
    assert _numbers(tmp_path, "A2") == told, "no reminder after the disposition"
    conn = sqlite3.connect(f"file:{run.db}?mode=ro", uri=True)
    try:
        decided = {lot: datetime.fromisoformat(at) for lot, at in conn.execute(
            "SELECT lot, decided_at FROM verdicts WHERE verdict IN ('hold', 'review')")}
        stored_a2 = [k for (k,) in conn.execute(
            "SELECT dedup_key FROM alerts WHERE kind = 'reminder' AND lot = 'A2' ORDER BY id")]
    finally:
        conn.close()
    assert [int(k.rsplit("|", 1)[1]) for k in stored_a2] == told     # the outbox holds exactly what was told
    for lot in ("A2", "A3", "B2"):      # the review A3 is reminded as well
        recs = [r for r in _log(tmp_path) if r.get("kind") == "reminder" and r.get("lot") == lot]
        nums = [int(r["data"]["number"]) for r in recs]
        assert nums and nums == sorted(set(nums)), (lot, nums)        # each number told once, in order
        for r in recs:
            # the number from the alert's own time and the verdict's decided_at: floor(open s / 3 s)
            opened = (datetime.fromisoformat(r["created_at"]) - decided[lot]).total_seconds()
            assert int(r["data"]["number"]) == math.floor(opened / interval + 1e-9), (lot, r)


def test_the_job_stores_each_number_once_and_stops_at_a_disposition(tmp_path: Path) -> None:
    """ReminderJob on a real SQLite state file: k = 1 stored once (also by a restarted job), nothing for a
    lot disposed of, and a hold decided again after its disposition is reminded afresh."""
    from monitor.state import dispositions as disp_repo
    from monitor.state import verdicts as verdict_repo
    from monitor.state.database import Database

    db = Database.open(tmp_path / "state")
    try:
        def hold(lot: str, at: datetime) -> int:
            with db.write() as conn:
                return verdict_repo.insert(conn, verdict_repo.NewVerdict(
                    at.isoformat(), "L3", "JAM-340", lot, "jam-340", "v1", "h1", "hold", 20, 338.9, 341.0, "g",
                    json.dumps({"reason": "mean below target", "giveaway": None})))

        def stored() -> list[str]:
            with db.read() as conn:
                return [k for (k,) in conn.execute("SELECT dedup_key FROM alerts ORDER BY id")]

        j17, j18 = hold("J17", T0), hold("J18", T0 + timedelta(minutes=10))
        clock = [T0 + timedelta(minutes=35)]            # J17 open 35 min (k = 1), J18 25 min (k = 0)
        job = reminders.ReminderJob(db, 30, ("log",), clock=lambda: clock[0])
        assert job.run() == 1 and job.run() == 0
        assert reminders.ReminderJob(db, 30, ("log",), clock=lambda: clock[0]).run() == 0     # a restart
        assert stored() == [f"reminder|{j17}|1"]
        with db.write() as conn:
            disp_repo.insert(conn, at=(T0 + timedelta(minutes=40)).isoformat(), line="L3", product="JAM-340",
                             lot="J17", verdict_id=j17, action="rework", by="Ann Weller", note="re-filled")
        clock[0] = T0 + timedelta(minutes=75)           # J17 would be k = 2, J18 is k = 2 (65 min open)
        assert job.run() == 1
        assert stored() == [f"reminder|{j17}|1", f"reminder|{j18}|2"]
        j17b = hold("J17", T0 + timedelta(minutes=80))  # judged again: a new hold, not disposed of
        clock[0] = T0 + timedelta(minutes=111)          # J17 anew: 31 min (k = 1); J18: 101 min (k = 3)
        assert job.run() == 2
        assert stored()[2:] == [f"reminder|{j18}|3", f"reminder|{j17b}|1"]
    finally:
        db.close()
