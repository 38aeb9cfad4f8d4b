"""`lotwarden run` as a real subprocess: SIGTERM exits 0, SIGHUP reloads, SIGKILL mid-batch loses and doubles nothing."""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path
from monitor.polling import wait_until as wait_for

import plant
from plant import HEADER


def make_plant(root: Path, settle: float = 0.1) -> Path:
    """The shared test plant with quick rescans and lots that never close by idle time during a test."""
    return plant.make_plant(root, settle=settle, rescan=1.0, idle_minutes=600)


class Proc:
    """One `lotwarden run` subprocess with its stderr in a file."""

    def __init__(self, cfg: Path, log: Path, env: dict[str, str] | None = None):
        self.log = log
        self.fh = open(log, "ab")
        self.start_offset = log.stat().st_size if log.exists() else 0
        self.p = subprocess.Popen([sys.executable, "-m", "monitor", "run", "--config", str(cfg)],
                                  stdout=subprocess.DEVNULL, stderr=self.fh,
                                  env={**os.environ, **(env or {})})

    def text(self) -> str:
        return self.log.read_bytes()[self.start_offset:].decode("utf-8", "replace")

    def wait_started(self, timeout: float = 30) -> None:
        assert wait_for(lambda: " started:" in self.text() or self.p.poll() is not None, timeout), self.text()
        assert self.p.poll() is None, self.text()

    def kill(self) -> None:
        self.p.send_signal(signal.SIGKILL)
        self.p.wait(10)
        self.fh.close()

    def terminate(self, timeout: float = 10) -> tuple[int, float]:
        t0 = time.monotonic()
        self.p.send_signal(signal.SIGTERM)
        rc = self.p.wait(timeout)
        self.fh.close()
        return rc, time.monotonic() - t0

    def ensure_dead(self) -> None:
        if self.p.poll() is None:
            self.p.kill()
            self.p.wait(10)
        if not self.fh.closed:
            self.fh.close()




def query(db: Path, sql: str, *args):
    if not db.exists():
        return []
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10)
    try:
        return conn.execute(sql, args).fetchall()
    except sqlite3.OperationalError:   # schema not created yet
        return []
    finally:
        conn.close()


def done_files(db: Path) -> int:
    rows = query(db, "SELECT count(*) FROM files WHERE state = 'done'")
    return int(rows[0][0]) if rows else 0


def drop(root: Path, name: str, text: str) -> None:
    tmp = root / "staging" / name
    tmp.write_text(text)
    os.replace(tmp, root / "drop" / name)


def test_sigterm_exits_0_within_a_few_seconds(tmp_path):
    """SIGTERM: the daemon finishes, logs one line per event and exits 0 within a few seconds."""
    cfg = make_plant(tmp_path)
    proc = Proc(cfg, tmp_path / "daemon.log")
    try:
        proc.wait_started()
        drop(tmp_path, "a.csv", HEADER + "2026-11-30T06:00:00,L1,OAT-500,T1,H1,500.1,g\n")
        assert wait_for(lambda: done_files(tmp_path / "state" / "lotwarden.db") == 1), proc.text()
        rc, took = proc.terminate()
    finally:
        proc.ensure_dead()
    assert rc == 0
    assert took < 5.0
    lines = proc.text().splitlines()
    assert any("SIGTERM" in ln for ln in lines) and lines[-1].endswith("stopped")
    for ln in lines:
        assert ln[:4].isdigit() and ln[10] == "T" and ln[19] == "Z", ln     # ISO UTC time, one line each


def test_sighup_reloads_rules(tmp_path):
    """SIGHUP reloads the rule files at once; a bad config at SIGHUP keeps the old one and the daemon runs."""
    cfg = make_plant(tmp_path)
    proc = Proc(cfg, tmp_path / "daemon.log")
    try:
        proc.wait_started()
        rule = tmp_path / "rules" / "oat-500.toml"
        rule.write_text(rule.read_text().replace("alpha = 0.05", "alpha = 0.01"))
        proc.p.send_signal(signal.SIGHUP)
        assert wait_for(lambda: "reloaded" in proc.text()), proc.text()
        cfg.write_text(cfg.read_text() + "\n[watch.nope]\n")
        proc.p.send_signal(signal.SIGHUP)
        assert wait_for(lambda: "config rejected" in proc.text()), proc.text()
        assert proc.p.poll() is None
        rc, _ = proc.terminate()
    finally:
        proc.ensure_dead()
    assert rc == 0


def test_bad_config_at_start_exits_2(tmp_path):
    """A bad config at start-up: exit 2 with the file and key on stderr."""
    cfg = make_plant(tmp_path)
    cfg.write_text(cfg.read_text().replace("settle_seconds = 0.1", "settle_seconds = -1"))
    res = subprocess.run([sys.executable, "-m", "monitor", "run", "--config", str(cfg)], capture_output=True,
                         text=True, timeout=60)
    assert res.returncode == 2
    assert "settle_seconds" in res.stderr and str(cfg) in res.stderr


def test_sigkill_mid_batch_then_restart_loses_and_doubles_nothing(tmp_path):
    """SIGKILL at several points of a batch, restart each time: every value and alert is stored exactly once."""
    n_files, per_file = 24, 4
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    log = tmp_path / "daemon.log"
    # file i holds lot K<i>; its first row closes lot K<i-1> (next-lot), which raises one review alert
    # (lots of 4 are under min_n = 5): n_files - 1 verdicts and review alerts in the end.
    for i in range(n_files):
        rows = "".join(f"2026-11-30T07:{i:02d}:{k:02d},L1,OAT-500,K{i:02d},H{k + 1},{500 + 0.1 * k:.1f},g\n"
                       for k in range(per_file))
        (tmp_path / "staging" / f"batch-{i:02d}.csv").write_text(HEADER + rows)
    kills = 0
    procs: list[Proc] = []

    def release(numbers) -> None:               # the weigher finishes files: renamed into the drop folder
        for i in numbers:
            os.replace(tmp_path / "staging" / f"batch-{i:02d}.csv", tmp_path / "drop" / f"batch-{i:02d}.csv")
            time.sleep(0.03)

    try:
        # 1: files arrive while it runs; kill from outside once some are done
        p = Proc(cfg, log)
        procs.append(p)
        p.wait_started()
        release(range(0, 6))
        assert wait_for(lambda: done_files(db) >= 2, 60), p.text()
        p.kill()
        kills += 1
        # 2: more files arrived while it was down; the intake's crash hook SIGKILLs it inside the values
        # transaction of the 3rd file it handles after the restart
        release(range(6, 12))
        p = Proc(cfg, log, env={"LOTWARDEN_CRASH_AT": "mid-values:3"})
        procs.append(p)
        assert p.p.wait(60) == -signal.SIGKILL, p.text()
        kills += 1
        # 3: crash after the commit, before the files are moved to the archive
        release(range(12, 16))
        p = Proc(cfg, log, env={"LOTWARDEN_CRASH_AT": "after-commit:2"})
        procs.append(p)
        assert p.p.wait(60) == -signal.SIGKILL, p.text()
        kills += 1
        # 4: another outside kill while files keep arriving
        p = Proc(cfg, log)
        procs.append(p)
        p.wait_started()
        before = done_files(db)
        release(range(16, 20))
        assert wait_for(lambda: done_files(db) > before, 60), p.text()
        p.kill()
        kills += 1
        # 5: the rest; run to the end and stop cleanly
        release(range(20, n_files))
        p = Proc(cfg, log)
        procs.append(p)
        assert wait_for(lambda: done_files(db) == n_files, 90), p.text()
        assert wait_for(lambda: not query(db, "SELECT 1 FROM deliveries WHERE state = 'pending'"), 30)
        rc, _ = p.terminate()
        assert rc == 0
    finally:
        for p in procs:
            p.ensure_dead()
    # files: each name done exactly once, nothing left behind, nothing rejected
    files = query(db, "SELECT path, state FROM files")
    done = Counter(Path(path).name for path, state in files if state == "done")
    assert sorted(done) == [f"batch-{i:02d}.csv" for i in range(n_files)]
    assert set(done.values()) == {1}
    assert not [s for _, s in files if s == "processing"]
    assert not list((tmp_path / "drop").iterdir())
    archived = sorted(p.name for p in (tmp_path / "state" / "archive").rglob("*.csv"))
    assert archived == [f"batch-{i:02d}.csv" for i in range(n_files)]
    # values: exactly per_file per lot, in arrival order, no doubles
    per_lot = dict(query(db, "SELECT lot, count(*) FROM lot_values GROUP BY lot"))
    assert per_lot == {f"K{i:02d}": per_file for i in range(n_files)}
    assert query(db, "SELECT count(*) FROM lot_values")[0][0] == n_files * per_file
    seqs = query(db, "SELECT lot, group_concat(seq) FROM (SELECT lot, seq FROM lot_values ORDER BY lot, seq)"
                     " GROUP BY lot")
    assert all(s == "1,2,3,4" for _, s in seqs)
    # verdicts and alerts: one per closed lot
    verdict_lots = Counter(lot for (lot,) in query(db, "SELECT lot FROM verdicts"))
    assert sorted(verdict_lots) == [f"K{i:02d}" for i in range(n_files - 1)]
    assert set(verdict_lots.values()) == {1}
    stored = query(db, "SELECT dedup_key, kind FROM alerts WHERE kind NOT LIKE 'daemon-%'")
    assert sorted(k for _, k in stored) == ["review"] * (n_files - 1)
    # the alert log holds every stored alert; a kill between a send and its sent mark may repeat the one
    # message in flight (at-least-once delivery), never more than one per kill
    logged = Counter(json.loads(x)["dedup_key"] for x in (tmp_path / "alerts.jsonl").read_text().splitlines())
    all_keys = {k for (k,) in query(db, "SELECT dedup_key FROM alerts")}
    assert set(logged) == all_keys
    assert sum(c - 1 for c in logged.values()) <= kills
