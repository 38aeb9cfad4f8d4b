"""Kill soak: a few hundred exports of four lines dropped while the real daemon is SIGKILLed at random moments and
restarted; in the end every value is stored once, every file archived once, every hold alerted once."""

from __future__ import annotations

import json
import os
import random
import threading
import time
from collections import Counter
from functools import partial
from pathlib import Path

import plant
import pytest
import soak_feed
from aiosmtpd.controller import Controller
from soak_feed import Daemon, Inbox, query, sha

from monitor.polling import wait_until

SEED = int(os.environ.get("LOTWARDEN_SOAK_SEED", "20261202"))   # another seed: another run of the same soak


def write_config(root: Path, port: int, group_max: int = 50) -> Path:
    """The shared plant (OAT-500, two-sided, alpha 0.05) with e-mail to a loopback server, no grouping delay,
    no hourly cap in reach, and templates that list each alert of a message."""
    cfg = plant.make_plant(root, settle=0.1, rescan=1.0, idle_minutes=600, extra=f"""
        [alerts.email]
        host = "127.0.0.1"
        port = {port}
        sender = "lotwarden@brackenfield.example"
        recipients = ["qa@brackenfield.example"]
        timeout = 10
        retry_first_seconds = 0.2
        retry_max_seconds = 1
        """)
    (root / "templates").mkdir()
    for name, text in soak_feed.TEMPLATES.items():
        (root / "templates" / name).write_text(text, encoding="utf-8")
    text = cfg.read_text().replace("drain_seconds = 0.2", 'drain_seconds = 0.2\ngroup_window_seconds = 0\n'
                                   f'group_max = {group_max}\nhourly_cap = 100000\ntemplates = "templates"')
    cfg.write_text(text)
    return cfg


def stalling_since(inbox: Inbox, stalls: int) -> bool:
    """The server holds a message unanswered, in a stall begun after ``stalls`` stalls."""
    return inbox.stalls > stalls and inbox.in_stall.is_set()


# group_max 1: one alert per message, many messages, many kills between a send and its record. group_max 5:
# grouped messages (few charts each to draw, so they go out between kills), the server holding every other
# one for a second; a grouped message cut short is repeated as recorded, under its Message-ID
@pytest.mark.parametrize("group_max, stall_every", [(1, 5), (5, 2)], ids=["one-per-message", "grouped"])
def test_random_sigkills_lose_and_double_nothing(tmp_path: Path, group_max: int, stall_every: int) -> None:
    """Hundreds of files, 8-15 SIGKILLs at random moments, restarts: values, files and holds exactly once."""
    t_start = time.monotonic()
    rng = random.Random(SEED)
    feed = soak_feed.make_feed(SEED)
    port = soak_feed.free_port()
    # some messages are answered after a second, so some kills fall between a send and its record
    inbox = Inbox(stall_every=stall_every, stall_seconds=1.0)
    ctl = Controller(inbox, hostname="127.0.0.1", port=port)
    ctl.start()
    cfg = write_config(tmp_path, port, group_max=group_max)
    db = tmp_path / "state" / "lotwarden.db"
    log = tmp_path / "daemon.log"
    n_kills = rng.randint(8, 15)
    feeder_rng = random.Random(SEED + 1)

    def feed_files() -> None:          # the weighers finish files: written aside, renamed into the drop folder
        for name, data in feed.files:
            (tmp_path / "staging" / name).write_bytes(data)
            os.replace(tmp_path / "staging" / name, tmp_path / "drop" / name)
            time.sleep(feeder_rng.uniform(0.01, 0.1))

    feeder = threading.Thread(target=feed_files, name="soak-feeder")
    procs: list[Daemon] = []
    kills = mid_send = 0
    try:
        feeder.start()
        for _ in range(n_kills):
            stalls = inbox.stalls
            d = Daemon(cfg, log)
            procs.append(d)
            if rng.random() < 0.35:      # while the server holds this daemon's message unanswered (mid-send)
                if wait_until(partial(stalling_since, inbox, stalls), rng.uniform(2.0, 5.0), step=0.01):
                    mid_send += 1
                else:
                    time.sleep(rng.uniform(0.0, 0.5))
            else:                        # a random moment: start-up, intake, judging or a send
                time.sleep(rng.uniform(0.5, 3.5))
            assert d.p.poll() is None, d.text()
            d.kill()
            kills += 1
            time.sleep(rng.uniform(0.0, 0.3))
        feeder.join(120)
        d = Daemon(cfg, log)
        procs.append(d)
        n_files = len(feed.files)
        assert wait_until(lambda: query(db, "SELECT count(*) FROM files WHERE state != 'processing'")
                          == [(n_files,)], 90), d.text()
        expected_holds = {lot.code for lot in feed.closed_lots() if lot.drifted}

        def inbox_has_all() -> bool:
            got = {key.split("|")[3] for _, items in inbox.snapshot() for kind, key in items if kind == "hold"}
            return expected_holds <= got and not query(
                db, "SELECT 1 FROM deliveries WHERE state = 'pending' LIMIT 1")

        assert wait_until(inbox_has_all, 60), d.text()
        assert d.terminate() == 0, d.text()
    finally:
        feeder.join(5)
        for p in procs:
            p.ensure_dead()
        ctl.stop()
    seconds = time.monotonic() - t_start

    # values: per lot, the stored values are the written ones, once each, in arrival order
    written = Counter((lot.line, lot.code, v) for lot in feed.lots for v in lot.values)
    stored = Counter(query(db, "SELECT line, lot, value FROM lot_values"))
    lost = sum((written - stored).values())
    doubled = sum((stored - written).values())
    orders = {(ln, lot): [v for _, _, v in rows] for ln, lot, rows in [
        (ln, lot, query(db, "SELECT line, lot, value FROM lot_values WHERE line = ? AND lot = ? ORDER BY seq",
                        ln, lot)) for ln, lot in {(lt.line, lt.code) for lt in feed.lots}]}

    # files: each taken once, archived once with the bytes written, nothing left or quarantined
    files = Counter((Path(p).name, s) for p, s in query(db, "SELECT path, state FROM files"))
    archive = Counter(sha(p.read_bytes()) for p in (tmp_path / "state" / "archive").rglob("*") if p.is_file())
    quarantine = [p.name for p in (tmp_path / "state" / "quarantine").rglob("*") if p.is_file()]

    # holds, counted per lot: a copy with the same identity (log: same dedup key and time; e-mail: same
    # Message-ID) is a resend after a crash; a second identity for one lot is a double
    log_lines = [json.loads(x) for x in (tmp_path / "alerts.jsonl").read_text().splitlines()]
    log_holds = Counter((a["lot"], a["dedup_key"], a["created_at"]) for a in log_lines if a["kind"] == "hold")
    log_ids: dict[str, set] = {}
    for lot, key, at in log_holds:
        log_ids.setdefault(lot, set()).add((key, at))
    mail_copies = Counter((key.split("|")[3], mid) for mid, items in inbox.snapshot() for kind, key in items
                          if kind == "hold")
    mail_ids: dict[str, set] = {}
    for lot, mid in mail_copies:
        mail_ids.setdefault(lot, set()).add(mid)
    resends_log = sum(c - 1 for c in log_holds.values())
    resends_mail = sum(c - 1 for c in mail_copies.values())
    resent_messages = sum(c - 1 for c in Counter(mid for mid, _ in inbox.snapshot()).values())
    doubled_alerts = sum(len(s) - 1 for s in log_ids.values()) + sum(len(s) - 1 for s in mail_ids.values())
    print(f"\nsoak: {len(feed.files)} files, {sum(written.values())} values, {len(feed.lots)} lots "
          f"({len(expected_holds)} holds expected), {kills} kills, lost {lost}, doubled {doubled}, "
          f"doubled alerts {doubled_alerts}, hold resends log {resends_log} e-mail {resends_mail}, "
          f"{len(inbox.snapshot())} messages ({resent_messages} resent, same Message-ID), {mid_send} kills while the "
          f"server held a message, {seconds:.1f} s")

    assert lost == 0 and doubled == 0
    assert all(orders[(lt.line, lt.code)] == list(lt.values) for lt in feed.lots)
    assert files == Counter({(name, "done"): 1 for name, _ in feed.files})
    assert archive == Counter(sha(data) for _, data in feed.files)
    assert not list((tmp_path / "drop").iterdir()) and not quarantine
    verdicts = {lot: v for lot, v in query(db, "SELECT lot, verdict FROM verdicts ORDER BY id")}
    assert {lot for lot, v in verdicts.items() if v == "hold"} == expected_holds
    assert set(verdicts) == {lt.code for lt in feed.closed_lots()}      # the lot left open per line: no verdict
    assert set(log_ids) == expected_holds and set(mail_ids) == expected_holds
    assert doubled_alerts == 0
    assert not [a for a in log_lines if a["kind"] in ("verdict-changed", "review", "file-rejected")]
    assert resends_log <= kills and resent_messages <= kills     # at most the one message in flight per kill


def test_a_resend_after_a_kill_mid_send_keeps_its_message_id(tmp_path: Path) -> None:
    """The server holds the first hold message unanswered; another hold is raised meanwhile; SIGKILL; restart:
    the first hold goes out again only under its first Message-ID (a resend, not a second message)."""
    port = soak_feed.free_port()
    inbox = Inbox(stall_seconds=6.0, stall_on_hold=True)
    ctl = Controller(inbox, hostname="127.0.0.1", port=port)
    ctl.start()
    cfg = write_config(tmp_path, port)
    db = tmp_path / "state" / "lotwarden.db"
    log = tmp_path / "daemon.log"
    # two drifted lots on L1 (mean 506 g, sd 1.5 g: scipy.stats.ttest_1samp p < 1e-9 for each), each closed by
    # the first row of the next lot
    a = [506.1, 505.2, 507.3, 506.8, 504.9, 506.0, 505.5, 507.1, 506.4, 505.8, 506.6, 505.1]
    b = [494.0, 493.1, 495.2, 494.6, 493.8, 494.9, 493.5, 494.2, 495.0, 493.9, 494.4, 494.7]
    for vals in (a, b):
        assert stats_p(vals) < 1e-9
    drop(tmp_path, "L1-1.csv", plant.csv_rows("L1", "A", a) + plant.csv_rows("L1", "B", b[:1], start=12))
    procs: list[Daemon] = []
    try:
        d = Daemon(cfg, log)
        procs.append(d)
        assert wait_until(inbox.stalled.is_set, 30), d.text()    # hold A is with the server, unanswered
        drop(tmp_path, "L1-2.csv", plant.csv_rows("L1", "B", b[1:], start=13)
             + plant.csv_rows("L1", "C", [500.0], start=30))
        assert wait_until(lambda: query(db, "SELECT count(*) FROM alerts WHERE kind = 'hold'") == [(2,)], 30), \
            d.text()
        d.kill()
        d = Daemon(cfg, log)
        procs.append(d)
        held = lambda: {k.split("|")[3] for _, items in inbox.snapshot() for kind, k in items  # noqa: E731
                        if kind == "hold"}
        assert wait_until(lambda: held() == {"A", "B"} and not query(
            db, "SELECT 1 FROM deliveries WHERE state = 'pending' AND channel = 'email' LIMIT 1"), 30), d.text()
        assert d.terminate() == 0, d.text()
    finally:
        for p in procs:
            p.ensure_dead()
        ctl.stop()
    ids_of_a = {mid for mid, items in inbox.snapshot() for kind, k in items if kind == "hold" and "|A|" in k}
    print(f"\nhold A arrived in {len(ids_of_a)} distinct message(s): {inbox.snapshot()}")
    assert len(ids_of_a) == 1


def stats_p(values: list[float]) -> float:
    from scipy import stats

    return float(stats.ttest_1samp(values, soak_feed.TARGET).pvalue)   # scipy.stats, the reference


def drop(root: Path, name: str, rows: str) -> None:
    (root / "staging" / name).write_text(plant.HEADER + rows)
    os.replace(root / "staging" / name, root / "drop" / name)
