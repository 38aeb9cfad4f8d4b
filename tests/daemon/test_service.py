"""The run loop in-process: real watchdog observer, real SQLite state, real intake, real alert log."""

from __future__ import annotations

import io
import json
import os
import sqlite3
import threading
import time
from pathlib import Path

import pytest

from monitor.daemon.service import Daemon
from monitor.polling import wait_until as wait_for
from plant import HEADER, OAT_RULE as RULE_OAT, csv_rows, make_plant  # noqa: F401  (also used by test_service_verdicts)

@pytest.fixture(autouse=True)
def _no_leaked_threads():
    before = set(threading.enumerate())
    yield
    deadline = time.monotonic() + 8
    extra: list[threading.Thread] = []
    while time.monotonic() < deadline:
        extra = [t for t in threading.enumerate() if t not in before and t.is_alive()]
        if not extra:
            return
        time.sleep(0.05)
    pytest.fail(f"threads left running: {extra}")


def write_atomically(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


class Running:
    """A Daemon running in a thread for the length of a ``with`` block."""

    def __init__(self, cfg: Path, **tweaks):
        self.log = io.StringIO()
        self.events: list[tuple[str, dict]] = []
        self.daemon = Daemon(cfg, on_event=lambda k, d: self.events.append((k, d)), log_stream=self.log)
        for k, v in tweaks.items():
            setattr(self.daemon, k, v)
        self.rc: list[int] = []
        self.thread = threading.Thread(target=lambda: self.rc.append(self.daemon.run()))

    def __enter__(self) -> "Running":
        self.thread.start()
        assert wait_for(lambda: self.daemon.ready.is_set() or not self.thread.is_alive(), 15)
        assert self.thread.is_alive(), self.log.getvalue()
        return self

    def __exit__(self, *exc) -> None:
        self.daemon.stop()
        self.thread.join(15)
        assert not self.thread.is_alive()




def passes_later(daemon: Daemon, n: int, *, seconds: float = 0.0, timeout: float = 20.0) -> bool:
    """Wait until the run loop has completed ``n`` more passes (each looks at every pending file) and, when
    ``seconds`` is given, at least that long has gone by: the positive signal that the daemon had its chances
    to do what a test says it must not do."""
    start, t0 = daemon.passes, time.monotonic()
    return wait_for(lambda: daemon.passes >= start + n and time.monotonic() - t0 >= seconds, timeout)


def query(db: Path, sql: str, *args):
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10)
    try:
        return conn.execute(sql, args).fetchall()
    finally:
        conn.close()


def count(db: Path, sql: str, *args) -> int:
    return int(query(db, sql, *args)[0][0])


# ------------------------------------------------------------------------------------------------
def test_bad_config_at_start_exits_2(tmp_path):
    """A config with an unknown key does not start: run() returns 2 and says file and key."""
    cfg = make_plant(tmp_path, extra="[watch2]\nx = 1\n")
    log = io.StringIO()
    assert Daemon(cfg, log_stream=log).run() == 2
    assert "watch2" in log.getvalue() and str(cfg) in log.getvalue()


def test_pause_hook_stops_taking_files_after_n(tmp_path, monkeypatch):
    """LOTWARDEN_PAUSE_AFTER_FILES=2 (crash-test hook): two files are taken, the rest wait in the drop folder."""
    monkeypatch.setenv("LOTWARDEN_PAUSE_AFTER_FILES", "2")
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    for i in range(5):
        (tmp_path / "drop" / f"p-{i}.csv").write_text(HEADER + csv_rows("L1", "P1", [500.0 + i], start=i))
    with Running(cfg, idle_check_seconds=0.05) as r:     # the idle job wakes the paused loop every 0.05 s
        assert wait_for(lambda: r.daemon.files_done >= 2)
        assert passes_later(r.daemon, 10)                     # ten more passes, each free to take a file
        assert r.daemon.files_done == 2
    assert count(db, "SELECT count(*) FROM files") == 2
    assert len(list((tmp_path / "drop").glob("p-*.csv"))) == 3


def test_unusable_state_folder_at_start_exits_1_without_leaving_threads(tmp_path):
    """A state folder that cannot be created (a file is in the way): run() logs why and returns 1."""
    cfg = make_plant(tmp_path)
    (tmp_path / "state").write_text("not a folder")
    log = io.StringIO()
    assert Daemon(cfg, log_stream=log).run() == 1
    assert "cannot start" in log.getvalue() and "state" in log.getvalue()


def test_slow_writer_taken_once_after_last_chunk(tmp_path):
    """A file written in chunks over longer than settle_seconds is taken once, complete."""
    cfg = make_plant(tmp_path, settle=0.4)
    db = tmp_path / "state" / "lotwarden.db"
    values = [500.0 + (i % 5) * 0.3 for i in range(40)]
    with Running(cfg, idle_check_seconds=0.05) as r:
        target = tmp_path / "drop" / "slow.csv"
        with open(target, "w", encoding="utf-8") as fh:
            fh.write(HEADER)
            for i in range(0, 40, 5):
                fh.write(csv_rows("L1", "S1", values[i:i + 5], start=i))
                fh.flush()
                time.sleep(0.15)
        assert wait_for(lambda: count(db, "SELECT count(*) FROM files") >= 1)
        scans = r.daemon.scans
        r.daemon.call_soon(lambda d: d._rescan()).result(10)   # the folder is looked at again ...
        assert r.daemon.scans > scans
        assert passes_later(r.daemon, 10, seconds=0.6)       # ... and given more than a settle time to take it
    assert count(db, "SELECT count(*) FROM files") == 1
    assert count(db, "SELECT count(*) FROM lot_values") == 40


@pytest.mark.parametrize("polling", [False, True], ids=["native", "polling"])
def test_burst_of_small_files_each_processed_once(tmp_path, polling):
    """Hundreds of files dropped at once: every one done exactly once, every value stored once."""
    n_files = 1000 if not polling else 200
    cfg = make_plant(tmp_path, settle=0.1, polling=polling)
    db = tmp_path / "state" / "lotwarden.db"
    with Running(cfg):
        for i in range(n_files):
            write_atomically(tmp_path / "drop" / f"burst-{i:04d}.csv",
                             HEADER + csv_rows("L1", "B1", [500.0 + (i % 7) * 0.1, 500.1], start=2 * i))
        assert wait_for(lambda: count(db, "SELECT count(*) FROM files WHERE state = 'done'") >= n_files, 120)
    assert count(db, "SELECT count(*) FROM files") == n_files
    assert count(db, "SELECT count(DISTINCT path) FROM files") == n_files
    assert count(db, "SELECT count(*) FROM lot_values") == 2 * n_files
    assert not list((tmp_path / "drop").glob("burst-*.csv"))


def test_files_already_there_at_start_are_taken(tmp_path):
    """Files dropped while the daemon was down are found by the start-up scan."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    for i in range(3):
        (tmp_path / "drop" / f"early-{i}.csv").write_text(HEADER + csv_rows("L1", "E1", [500.0, 500.2]))
    with Running(cfg):
        assert wait_for(lambda: db.exists() and count(db, "SELECT count(*) FROM files") >= 3)


def test_corrupt_file_quarantined_and_next_file_processed(tmp_path):
    """A corrupt export goes to quarantine with a reason file and an alert; the next good file goes on."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    with Running(cfg):
        write_atomically(tmp_path / "drop" / "broken.csv", "\x00\x01garbage;;;\nnot,an,export\n\xff\xfe")
        write_atomically(tmp_path / "drop" / "good.csv", HEADER + csv_rows("L1", "G1", [500.0, 500.4, 499.8]))
        assert wait_for(lambda: db.exists() and count(db, "SELECT count(*) FROM files") >= 2)
        assert wait_for(lambda: (tmp_path / "alerts.jsonl").exists()
                        and "file-rejected" in (tmp_path / "alerts.jsonl").read_text())
    states = dict(query(db, "SELECT path, state FROM files"))
    assert states[str(tmp_path / "drop" / "broken.csv")] == "rejected"
    assert states[str(tmp_path / "drop" / "good.csv")] == "done"
    quarantined = list((tmp_path / "state" / "quarantine").rglob("broken.csv*"))
    names = {p.name for p in quarantined}
    assert "broken.csv" in names and "broken.csv.reason.txt" in names
    reason = next(p for p in quarantined if p.name.endswith(".reason.txt")).read_text()
    assert "broken.csv" in reason


def test_bad_rule_edit_keeps_running_and_alerts_once(tmp_path):
    """alpha = 1.5 in a rule: the daemon keeps the last good rules, logs file + key, alerts once."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    rule = tmp_path / "rules" / "oat-500.toml"
    with Running(cfg, reload_check_seconds=0.2) as r:
        rule.write_text(RULE_OAT.replace("alpha = 0.05", "alpha = 1.5"))
        assert wait_for(lambda: count(db, "SELECT count(*) FROM alerts WHERE kind = 'config-rejected'") == 1)
        assert "oat-500.toml" in r.log.getvalue() and "alpha" in r.log.getvalue()
        checks = r.daemon.reload_checks
        assert wait_for(lambda: r.daemon.reload_checks >= checks + 5)  # the same bad content checked 5 more times
        assert count(db, "SELECT count(*) FROM alerts WHERE kind = 'config-rejected'") == 1
        write_atomically(tmp_path / "drop" / "after.csv", HEADER + csv_rows("L1", "K1", [500.0, 500.2]))
        assert wait_for(lambda: count(db, "SELECT count(*) FROM files WHERE state = 'done'") == 1)
        rule.write_text(RULE_OAT.replace("alpha = 0.05", "alpha = 0.01"))
        assert wait_for(lambda: "reloaded" in r.log.getvalue())
        assert r.daemon.components.rules[0].alpha == 0.01
        rule.write_text("name = [unclosed\n")                                  # TOML syntax error
        assert wait_for(lambda: count(db, "SELECT count(*) FROM alerts WHERE kind = 'config-rejected'") == 2)
        assert r.daemon.components.rules[0].alpha == 0.01                               # last good version in force
    rejected = query(db, "SELECT payload FROM alerts WHERE kind = 'config-rejected' ORDER BY id")
    assert "alpha" in json.loads(rejected[0][0])["data"]["message"]


def test_config_edits_unknown_key_rejected_and_rule_removal_kept(tmp_path):
    """An unknown config key and a rule file deleted mid-edit both keep the last good version."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    good = cfg.read_text()
    with Running(cfg, reload_check_seconds=0.2) as r:
        cfg.write_text(good + "\nsurprise = true\n")
        assert wait_for(lambda: count(db, "SELECT count(*) FROM alerts WHERE kind = 'config-rejected'") == 1)
        assert "surprise" in r.log.getvalue()
        cfg.write_text(good)
        (tmp_path / "rules" / "oat-500.toml").unlink()
        assert wait_for(lambda: count(db, "SELECT count(*) FROM alerts WHERE kind = 'config-rejected'") == 2)
        assert [x.name for x in r.daemon.components.rules] == ["oat-500"]
        assert r.thread.is_alive()
    audit = [e for (e,) in query(db, "SELECT event FROM audit")]
    assert audit.count("config-rejected") == 2


def test_bad_operator_template_edit_is_rejected_and_a_fix_reloads(tmp_path):
    """A template edit with a syntax error raises config-rejected naming the file; fixing it reloads it."""
    tpl = tmp_path / "tpl"
    tpl.mkdir()
    (tpl / "hold.subject.txt").write_text("HOLD {{ alert.lot }}\n")
    cfg = make_plant(tmp_path)
    cfg.write_text(cfg.read_text().replace("[alerts]\n", '[alerts]\ntemplates = "tpl"\n', 1))
    db = tmp_path / "state" / "lotwarden.db"
    with Running(cfg, reload_check_seconds=0.2) as r:
        (tpl / "hold.subject.txt").write_text("HOLD {{ alert.lot \n")
        assert wait_for(lambda: count(db, "SELECT count(*) FROM alerts WHERE kind = 'config-rejected'") == 1)
        payload = json.loads(query(db, "SELECT payload FROM alerts WHERE kind = 'config-rejected'")[0][0])
        assert "hold.subject.txt" in payload["data"]["file"]
        (tpl / "hold.subject.txt").write_text("HOLD {{ alert.line }} {{ alert.lot }}\n")
        assert wait_for(lambda: "reloaded operator templates" in r.log.getvalue()), r.log.getvalue()
        assert r.thread.is_alive()


def test_marker_profile_waits_for_the_marker_and_archives_it(tmp_path):
    """With marker_suffix, a settled file waits for '<name>.done'; the marker then moves beside the export."""
    cfg = make_plant(tmp_path, extra="""
        [profiles.marked]
        match = ["m-*.csv"]
        marker_suffix = ".done"
        """)
    db = tmp_path / "state" / "lotwarden.db"
    with Running(cfg, idle_check_seconds=0.05) as r:
        (tmp_path / "drop" / "m-1.csv").write_text(HEADER + csv_rows("L1", "M1", [500.0, 500.2]))
        assert wait_for(lambda: (tmp_path / "drop" / "m-1.csv") in r.daemon.components.watching.tracker.pending())
        assert passes_later(r.daemon, 20, seconds=1.0)    # 20 looks over five settle times: still waiting
        assert count(db, "SELECT count(*) FROM files") == 0
        (tmp_path / "drop" / "m-1.csv.done").write_text("")
        assert wait_for(lambda: count(db, "SELECT count(*) FROM files WHERE state = 'done'") == 1)
        assert wait_for(lambda: not (tmp_path / "drop" / "m-1.csv.done").exists())
    archived = Path(query(db, "SELECT archived_path FROM files")[0][0])
    assert (archived.parent / "m-1.csv.done").exists()
    assert not list((tmp_path / "drop").iterdir())


def test_idle_lot_is_closed_by_the_periodic_job(tmp_path):
    """A lot with no new values for the rule's idle_minutes is closed and judged by the idle job."""
    cfg = make_plant(tmp_path)
    (tmp_path / "rules" / "oat-500.toml").write_text(RULE_OAT.replace("idle_minutes = 30", "idle_minutes = 0.01"))
    db = tmp_path / "state" / "lotwarden.db"
    with Running(cfg, idle_check_seconds=0.2):
        write_atomically(tmp_path / "drop" / "idle.csv", HEADER + csv_rows("L1", "I1", [500.0, 500.3, 499.9]))
        assert wait_for(lambda: count(db, "SELECT count(*) FROM verdicts WHERE lot = 'I1'") == 1)
    assert query(db, "SELECT state, close_reason FROM lots WHERE lot = 'I1'") == [("closed", "idle")]


def test_dead_observer_is_restarted_by_the_supervisor(tmp_path):
    """When the observer thread dies, the supervisor job restarts it and rescans."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    with Running(cfg, supervise_seconds=0.2) as r:
        obs = r.daemon.components.watching.watcher._observer
        obs.stop()
        obs.join(5)
        assert wait_for(lambda: r.daemon.components.watching.watcher.is_alive() and r.daemon.components.watching.watcher._observer is not obs)
        write_atomically(tmp_path / "drop" / "after-restart.csv", HEADER + csv_rows("L1", "R1", [500.0, 500.1]))
        assert wait_for(lambda: count(db, "SELECT count(*) FROM files WHERE state = 'done'") == 1)
        assert "died" in r.log.getvalue()


def test_stop_finishes_and_writes_started_and_stopped_alerts(tmp_path):
    """stop() returns run() with 0; daemon-started and daemon-stopped alerts are in the outbox."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    with Running(cfg) as r:
        pass
    assert r.rc == [0]
    kinds = [k for (k,) in query(db, "SELECT kind FROM alerts ORDER BY id")]
    assert kinds[0] == "daemon-started" and kinds[-1] == "daemon-stopped"
    for line in r.log.getvalue().splitlines():           # one line per event: ISO UTC time, level
        assert line[:4].isdigit() and line[10] == "T" and line[19] == "Z", line
