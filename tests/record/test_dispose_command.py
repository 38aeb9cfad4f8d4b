"""`lotwarden dispose` against the state of a real daemon run: refusals, the one transaction (disposition,
audit record, outbox alert), repeat dispositions, and delivery by a running daemon (alert log and e-mail)."""

from __future__ import annotations

import email
import email.policy
import json
import socket
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import Any

import pytest
from record_run import Daemon, RecordRun, drop_exports, run_plant, write_plant

from monitor.polling import wait_until


class Inbox:
    """A real SMTP server (aiosmtpd) on loopback that keeps every message (as in tests/alerts/conftest.py)."""

    def __init__(self) -> None:
        from aiosmtpd.controller import Controller

        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            s.bind(("127.0.0.1", 0))
            self.port = s.getsockname()[1]
        self.received: list[tuple[list[str], str]] = []      # (recipients, subject + plain text)
        self.controller = Controller(self, hostname="127.0.0.1", port=self.port)
        self.controller.start()

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        msg = email.message_from_bytes(envelope.original_content or envelope.content, policy=email.policy.default)
        body = msg.get_body(("plain",))
        text = str(msg["Subject"]) + "\n" + (body.get_content() if body is not None else "")
        self.received.append((list(envelope.rcpt_tos), text))
        return "250 OK"

    def to(self, rcpt: str, *words: str) -> list[str]:
        return [t for r, t in list(self.received) if rcpt in r and all(w in t for w in words)]

    def stop(self) -> None:
        self.controller.stop()


def dispose(run: RecordRun, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "monitor", "dispose", *args, "--config", str(run.config)],
                          capture_output=True, text=True, timeout=60)


def rows(run: RecordRun, sql: str, *params: Any) -> list[tuple[Any, ...]]:
    conn = sqlite3.connect(f"file:{run.db}?mode=ro", uri=True, timeout=10)
    try:
        return list(conn.execute(sql, params))
    finally:
        conn.close()


def log_kinds(root: Path, kind: str) -> list[dict[str, Any]]:
    path = root / "alerts.jsonl"
    if not path.exists():
        return []
    out = []
    for text in path.read_text(encoding="utf-8").splitlines():
        try:
            rec = json.loads(text)
        except ValueError:
            continue            # a line being written
        if rec.get("kind") == kind:
            out.append(rec)
    return out


@pytest.mark.parametrize(("lot", "latest"), [("L1/OAT-500/A1", "pass"), ("L2/OAT-500/B1", "pass"),
                                             ("L1/OAT-500/NOPE", "none"), ("L1/OAT-500/Z1", "none")])
def test_only_a_hold_or_review_can_be_disposed_of(record_run: RecordRun, lot: str, latest: str) -> None:
    before = rows(record_run, "SELECT count(*) FROM dispositions")
    p = dispose(record_run, lot, "release", "--by", "Ann Weller", "--note", "re-weighed")
    assert p.returncode == 2, p
    lines = p.stderr.strip().splitlines()
    assert len(lines) == 1 and lot in lines[0] and latest in lines[0], p.stderr
    assert "Traceback" not in p.stderr
    assert rows(record_run, "SELECT count(*) FROM dispositions") == before


@pytest.mark.parametrize("flags", [("--by", "", "--note", "x"), ("--by", "   ", "--note", "x"),
                                   ("--by", "Ann", "--note", ""), ("--by", "Ann", "--note", " \t")])
def test_by_and_note_must_not_be_blank(record_run: RecordRun, flags: tuple[str, ...]) -> None:
    p = dispose(record_run, "L1/OAT-500/A2", "release", *flags)
    blank = "--by" if not flags[1].strip() else "--note"
    assert p.returncode == 2 and blank in p.stderr and len(p.stderr.strip().splitlines()) == 1, p.stderr
    assert rows(record_run, "SELECT count(*) FROM dispositions") == [(0,)]


def test_action_and_flags_are_checked_by_argparse(record_run: RecordRun) -> None:
    p = dispose(record_run, "L1/OAT-500/A2", "destroy", "--by", "Ann", "--note", "x")
    assert p.returncode == 2 and "release" in p.stderr and "scrap" in p.stderr, p.stderr
    p = dispose(record_run, "L1/OAT-500/A2", "release", "--note", "x")
    assert p.returncode == 2 and "--by" in p.stderr, p.stderr


def test_a_disposition_is_stored_audited_and_enqueued_in_one_go(fresh_run: RecordRun) -> None:
    run = fresh_run
    [(hold_id, decided_at)] = rows(run, "SELECT id, decided_at FROM verdicts WHERE lot = 'A2'")
    p = dispose(run, "L1/OAT-500/A2", "rework", "--by", "Ann Weller", "--note", "  re-weighed 40 packs ")
    assert p.returncode == 0, p.stderr
    out = p.stdout.strip().splitlines()
    assert len(out) == 1 and "L1/OAT-500/A2" in out[0] and "rework" in out[0] and "Ann Weller" in out[0]
    [(d_id, at, verdict_id, action, by, note)] = rows(
        run, "SELECT id, at, verdict_id, action, by_name, note FROM dispositions")
    assert (verdict_id, action, by, note) == (hold_id, "rework", "Ann Weller", "re-weighed 40 packs")
    assert at in out[0]
    [(detail,)] = rows(run, "SELECT detail FROM audit WHERE event = 'disposition' AND lot = 'A2'")
    assert json.loads(detail) == {"disposition_id": d_id, "action": "rework", "by": "Ann Weller",
                                  "note": "re-weighed 40 packs", "verdict_id": hold_id, "verdict": "hold"}
    [(kind, payload)] = rows(run, "SELECT kind, payload FROM alerts WHERE dedup_key = ?", f"disposition|{d_id}")
    data = json.loads(payload)["data"]
    assert kind == "disposition" and data["disposition"]["action"] == "rework"
    v = data["verdict"]
    assert (v["verdict_id"], v["verdict"], v["decided_at"], v["n"]) == (hold_id, "hold", decided_at,
                                                                       len(run.values[("L1", "A2")]))
    assert set(v) == {"verdict_id", "verdict", "decided_at", "rule", "rule_version", "n", "mean", "target", "unit",
                      "p_value", "reason"}
    assert rows(run, "SELECT channel FROM deliveries d JOIN alerts a ON a.id = d.alert_id"
                     " WHERE a.kind = 'disposition'") == [("log",)]

    # a second disposition adds a row (the first is kept) while the latest verdict is still the hold
    p = dispose(run, "L1/OAT-500/A2", "scrap", "--by", "Bo Linde", "--note", "rework failed")
    assert p.returncode == 0, p.stderr
    assert rows(run, "SELECT action, by_name FROM dispositions ORDER BY id") == [("rework", "Ann Weller"),
                                                                                ("scrap", "Bo Linde")]
    assert rows(run, "SELECT count(*) FROM alerts WHERE kind = 'disposition'") == [(2,)]
    # a review can be disposed of too
    assert dispose(run, "L1/OAT-500/A3", "release", "--by", "Ann", "--note", "n too small, re-sampled"
                   ).returncode == 0


def test_the_running_daemon_delivers_the_disposition_once(tmp_path: Path) -> None:
    run, daemon = run_plant(tmp_path, keep_running=True)
    assert daemon is not None
    try:
        p = dispose(run, "L2/OAT-500/B2", "release", "--by", "Ann Weller", "--note", "H3 re-set, lot re-weighed")
        assert p.returncode == 0, p.stderr
        assert wait_until(lambda: len(log_kinds(tmp_path, "disposition")) >= 1, 30), daemon.text()
    finally:
        assert daemon.stop() == 0, daemon.text()
    got = log_kinds(tmp_path, "disposition")
    assert len(got) == 1, got
    assert got[0]["lot"] == "B2" and got[0]["data"]["disposition"]["by"] == "Ann Weller"


def test_a_hold_route_gets_the_hold_and_its_disposition_by_email(tmp_path: Path) -> None:
    inbox = Inbox()
    lead, qa = "line1-lead@brackenfield.example", "qa@brackenfield.example"
    try:
        extra = textwrap.dedent(f"""\
            [alerts.email]
            host = "127.0.0.1"
            port = {inbox.port}
            sender = "lotwarden@brackenfield.example"
            recipients = ["{qa}"]
            timeout = 10
            retry_first_seconds = 0.2
            retry_max_seconds = 1

            [[alerts.email.route]]
            lines = ["L1"]
            kinds = ["hold"]
            recipients = ["{lead}"]
            """)
        cfg = write_plant(tmp_path, extra=extra)
        # no grouping wait (default 60 s): each alert goes out in its own message at the next drain
        cfg.write_text(cfg.read_text().replace("drain_seconds = 0.2", "drain_seconds = 0.2\ngroup_window_seconds = 0"))
        run = RecordRun(root=tmp_path, config=cfg, db=tmp_path / "state" / "lotwarden.db")
        daemon = Daemon(cfg)
        try:
            daemon.wait_started()
            drop_exports(tmp_path)
            assert wait_until(lambda: bool(inbox.to(lead, "A2")), 60), daemon.text()
            p = dispose(run, "L1/OAT-500/A2", "scrap", "--by", "Ann Weller", "--note", "seal fault on H2")
            assert p.returncode == 0, p.stderr
            assert wait_until(lambda: bool(inbox.to(lead, "seal fault on H2")), 60), daemon.text()
        finally:
            assert daemon.stop() == 0, daemon.text()
        [mail] = inbox.to(lead, "seal fault on H2")
        # the shipped disposition subject names the action and the lot (config/templates/disposition.subject.txt)
        assert "scrap" in mail.splitlines()[0] and "A2" in mail.splitlines()[0]
        assert inbox.to(qa, "seal fault on H2"), "the default recipients get it too (route adds, not replaces)"
        # the L2 hold is not the route's: its lead never gets B2
        assert not inbox.to(lead, "B2")
    finally:
        inbox.stop()
