"""Every rule version's text is kept in the state database, and a rule whose values changed is told
(``rule-changed``) — by the real `lotwarden run` daemon on SIGHUP and at start-up; a comment-only edit is
stored but not told."""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
from pathlib import Path
from typing import Any

import plant
import pytest

from monitor.daemon.rulestore import remember_rules, value_changes
from monitor.polling import wait_until as wait_for
from monitor.rulebook import Rule
from monitor.state.database import Database

RULE_FILE = Path("rules") / "oat-500.toml"


class Proc:
    """One `lotwarden run` subprocess; its stderr (the daemon log) in a file."""

    def __init__(self, cfg: Path, log: Path) -> None:
        self.log = log
        self.start = log.stat().st_size if log.exists() else 0
        self.fh = open(log, "ab")  # noqa: SIM115 (open while the daemon runs; closed in stop)
        self.p = subprocess.Popen([sys.executable, "-m", "monitor", "run", "--config", str(cfg)],
                                  stdout=subprocess.DEVNULL, stderr=self.fh, env=dict(os.environ))

    def text(self) -> str:
        return self.log.read_bytes()[self.start:].decode("utf-8", "replace")

    def wait_started(self) -> None:
        assert wait_for(lambda: " started:" in self.text() or self.p.poll() is not None, 30), self.text()
        assert self.p.poll() is None, self.text()

    def reload(self) -> None:
        """SIGHUP, then wait for the daemon to say it reloaded (the texts are stored before it says so)."""
        before = self.text().count("reloaded: config version")
        self.p.send_signal(signal.SIGHUP)
        assert wait_for(lambda: self.text().count("reloaded: config version") > before, 30), self.text()

    def stop(self) -> None:
        if self.p.poll() is None:
            self.p.send_signal(signal.SIGTERM)
            try:
                self.p.wait(15)
            except subprocess.TimeoutExpired:
                self.p.kill()
                self.p.wait(10)
        self.fh.close()


def rows(db: Path, sql: str, *args: Any) -> list[tuple[Any, ...]]:
    if not db.exists():
        return []
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10)
    try:
        return conn.execute(sql, args).fetchall()
    except sqlite3.OperationalError:   # schema not made yet
        return []
    finally:
        conn.close()


def texts(db: Path) -> list[tuple[str, str, str]]:
    return [(h, t, v) for h, t, v in rows(db, "SELECT rule_hash, text, values_json FROM rule_texts "
                                              "WHERE rule = 'oat-500' ORDER BY rowid")]


def logged(root: Path, kind: str) -> list[dict[str, Any]]:
    path = root / "alerts.jsonl"
    if not path.exists():
        return []
    return [a for a in map(json.loads, path.read_text(encoding="utf-8").splitlines()) if a["kind"] == kind]


def stored_alerts(db: Path, kind: str) -> int:
    return int(rows(db, "SELECT count(*) FROM alerts WHERE kind = ?", kind)[0][0])


def edit(root: Path, old: str, new: str) -> str:
    """Replace ``old`` by ``new`` in the rule file (size changes, so any reload check sees it); its new text."""
    path = root / RULE_FILE
    text = path.read_text(encoding="utf-8")
    assert old in text
    path.write_text(text.replace(old, new, 1), encoding="utf-8")
    return path.read_bytes().decode("utf-8")


@pytest.fixture
def root(tmp_path: Path) -> Path:
    plant.make_plant(tmp_path, rescan=1.0, idle_minutes=600)
    return tmp_path


def test_sighup_stores_texts_tells_a_value_change_and_not_a_comment(root: Path) -> None:
    """SIGHUP stores the rule's text exactly as the file's bytes decode; alpha and target edited → one
    rule-changed alert in the alert log naming exactly those two keys with their old and new values; a
    comment-only edit → a second text row and no further alert."""
    db = root / "state" / "lotwarden.db"
    proc = Proc(root / "lotwarden.toml", root / "daemon.log")
    try:
        proc.wait_started()
        proc.reload()
        first = (root / RULE_FILE).read_bytes().decode("utf-8")
        assert [t for _, t, _ in texts(db)] == [first]

        second = edit(root, "alpha = 0.05", "alpha = 0.01")
        second = edit(root, "target = 500.0", "target = 502.5")
        proc.reload()
        assert [t for _, t, _ in texts(db)] == [first, second]
        assert wait_for(lambda: len(logged(root, "rule-changed")) == 1, 30), proc.text()
        alert = logged(root, "rule-changed")[0]["data"]
        # the values written into the two file versions above, in the rule's key order (target before alpha)
        assert alert["changes"] == [{"key": "target", "old": 500.0, "new": 502.5},
                                    {"key": "alpha", "old": 0.05, "new": 0.01}]
        assert alert["rule"] == "oat-500" and alert["file"].endswith("oat-500.toml")
        hashes = [h for h, _, _ in texts(db)]
        assert (alert["old_version"], alert["new_version"]) == (hashes[0][:12], hashes[1][:12])

        third = edit(root, "min_n = 5", "min_n = 5   # five packs is the smallest lot we judge")
        proc.reload()
        assert [t for _, t, _ in texts(db)] == [first, second, third]
        # the text row and any alert are written in one transaction, so the row's presence settles it
        assert stored_alerts(db, "rule-changed") == 1
    finally:
        proc.stop()
    assert len(logged(root, "rule-changed")) == 1   # the shutdown drained the outbox: still only the one


def test_start_stores_texts_and_an_edit_while_down_is_told(root: Path) -> None:
    """At start the rule's text is stored; an edit made while the daemon was down is told at the next start
    (compared with the latest stored version)."""
    db = root / "state" / "lotwarden.db"
    proc = Proc(root / "lotwarden.toml", root / "daemon.log")
    try:
        proc.wait_started()
        first = (root / RULE_FILE).read_bytes().decode("utf-8")
        assert wait_for(lambda: [t for _, t, _ in texts(db)] == [first], 10), texts(db)
    finally:
        proc.stop()
    second = edit(root, "alpha = 0.05", "alpha = 0.02")
    proc = Proc(root / "lotwarden.toml", root / "daemon.log")
    try:
        proc.wait_started()
        assert [t for _, t, _ in texts(db)] == [first, second]
        assert wait_for(lambda: len(logged(root, "rule-changed")) == 1, 30), proc.text()
        assert logged(root, "rule-changed")[0]["data"]["changes"] == [{"key": "alpha", "old": 0.05, "new": 0.02}]
    finally:
        proc.stop()


# --- remember_rules on a real SQLite file, without the daemon ------------------------------------------------
def rule(tmp: Path, body: str) -> Rule:
    path = tmp / "jam-340.toml"
    path.write_text(body, encoding="utf-8")
    return Rule.from_file(path)


JAM = """\
name = "jam-340"
products = ["JAM-340"]
target = 342.0
unit = "g"
alpha = 0.05

[normality]
alpha = 0.05
"""


def test_normality_sub_keys_are_dotted_and_a_revisit_stores_nothing_new(tmp_path: Path) -> None:
    """A [normality] alpha change is told as "normality.alpha"; the same version loaded again stores no row
    and tells nothing."""
    store = Database.open(tmp_path / "state")
    try:
        v1 = rule(tmp_path, JAM)
        v2 = rule(tmp_path, JAM.replace("[normality]\nalpha = 0.05", "[normality]\nalpha = 0.1"))
        with store.write() as conn:
            assert remember_rules(conn, [v1], "2026-12-02T06:00:00+00:00") == []
        with store.write() as conn:
            told = remember_rules(conn, [v2], "2026-12-02T07:00:00+00:00")
        with store.write() as conn:
            again = remember_rules(conn, [v2], "2026-12-02T08:00:00+00:00")
        with store.read() as conn:
            n = conn.execute("SELECT count(*) FROM rule_texts").fetchone()[0]
    finally:
        store.close()
    assert [a.kind for a in told] == ["rule-changed"]
    assert told[0].data["changes"] == [{"key": "normality.alpha", "old": 0.05, "new": 0.1}]
    assert again == [] and n == 2


def test_value_changes_in_key_order_with_keys_on_one_side_only() -> None:
    old = {"target": 500.0, "products": ["OAT-500"], "normality": {"test": "shapiro", "alpha": 0.05}, "gone": 1}
    new = {"target": 500.0, "products": ["OAT-500", "OAT-500B"], "normality": {"test": "shapiro", "alpha": 0.01}}
    assert value_changes(old, new) == [
        {"key": "products", "old": ["OAT-500"], "new": ["OAT-500", "OAT-500B"]},
        {"key": "normality.alpha", "old": 0.05, "new": 0.01},
        {"key": "gone", "old": 1, "new": None}]


def test_going_back_and_forth_is_told_each_time(tmp_path: Path) -> None:
    """v1 → v2 → v1 → v2: three changes, three alerts with distinct keys (the version loaded last is what a
    new version is compared with, not the one stored last)."""
    store = Database.open(tmp_path / "state")
    try:
        v1 = rule(tmp_path, JAM)
        v2 = rule(tmp_path, JAM.replace("[normality]\nalpha = 0.05", "[normality]\nalpha = 0.1"))
        told = []
        for i, r in enumerate([v1, v2, v1, v2]):
            with store.write() as conn:
                told += remember_rules(conn, [r], f"2026-12-02T0{6 + i}:00:00+00:00")
    finally:
        store.close()
    assert [(a.data["old_version"], a.data["new_version"]) for a in told] == [
        (v1.version, v2.version), (v2.version, v1.version), (v1.version, v2.version)]
    assert [c["new"] for a in told for c in a.data["changes"]] == [0.1, 0.05, 0.1]
    assert len({a.dedup_key for a in told}) == 3
