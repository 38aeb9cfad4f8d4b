"""The log channel and the Dispatcher's per-alert delivery: JSON lines, order, once, retry, dead-letter."""

from __future__ import annotations

import json
import sys
from pathlib import Path

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, CommandSettings, LogSettings


def read_lines(path: Path) -> list[dict]:
    return [json.loads(x) for x in path.read_text(encoding="utf-8").splitlines()]


def test_log_gets_each_alert_once_as_alert_json(db_path, tmp_path, put, alert_factory, states):
    """Every alert lands in the log exactly once, as Alert.to_json(), in creation order."""
    log_path = tmp_path / "logs" / "alerts.jsonl"
    alerts = [alert_factory(lot=f"A{i}") for i in range(5)]
    for a in alerts:
        assert put(a, ["log"])
    assert not put(alerts[0], ["log"])          # same dedup key: stored once
    d = Dispatcher(db_path, AlertSettings(log=LogSettings(path=log_path)))
    try:
        assert d.drain() == 5
        assert d.drain() == 0
    finally:
        d.close()
    got = read_lines(log_path)
    assert got == [a.to_json() for a in alerts]
    assert set(states().values()) == {"sent"}


def test_unwritable_log_retries_then_delivers_in_order(db_path, tmp_path, put, alert_factory):
    """While the log cannot be written the alerts stay pending; afterwards all arrive once, in order."""
    blocker = tmp_path / "blocked"
    blocker.write_text("a file where the log folder should be")
    settings = AlertSettings(log=LogSettings(path=blocker / "alerts.jsonl", retry_max_seconds=5))
    for i in range(3):
        put(alert_factory(lot=f"B{i}"), ["log"])
    d = Dispatcher(db_path, settings, seed=1)
    try:
        assert d.drain(now=1000.0) == 0
        assert d.drain(now=1000.1) == 0            # inside the backoff: not even tried
        blocker.unlink()
        put(alert_factory(lot="B3"), ["log"])
        assert d.drain(now=1000.2) == 0            # head of line still backing off keeps the order
        assert d.drain(now=1100.0) == 4
    finally:
        d.close()
    assert [x["lot"] for x in read_lines(blocker / "alerts.jsonl")] == ["B0", "B1", "B2", "B3"]


def test_command_receives_alert_json_on_stdin(db_path, tmp_path, put, alert_factory):
    """The command hook gets the alert JSON on stdin, one run per alert, no shell."""
    out = tmp_path / "received.jsonl"
    script = tmp_path / "hook.py"
    script.write_text("import sys\nopen(sys.argv[1], 'a').write(sys.stdin.read())\n")
    settings = AlertSettings(command=CommandSettings(argv=(sys.executable, str(script), str(out)), timeout=20))
    a1, a2 = alert_factory(lot="C1"), alert_factory(lot="C2; rm -rf /")
    put(a1, ["command"])
    put(a2, ["command"])
    d = Dispatcher(db_path, settings)
    try:
        assert d.drain() == 2
    finally:
        d.close()
    assert read_lines(out) == [a1.to_json(), a2.to_json()]


def test_failing_command_is_dead_and_reported_on_log(db_path, tmp_path, put, alert_factory, states):
    """A command exiting non-zero (not 75) marks the delivery dead and a delivery-failing alert reaches the log."""
    script = tmp_path / "fail.py"
    script.write_text("import sys\nsys.stdin.read()\nsys.stderr.write('pager refused')\nsys.exit(3)\n")
    log_path = tmp_path / "alerts.jsonl"
    settings = AlertSettings(log=LogSettings(path=log_path),
                             command=CommandSettings(argv=(sys.executable, str(script)), timeout=20))
    a = alert_factory(lot="D1")
    put(a, ["log", "command"])
    d = Dispatcher(db_path, settings)
    try:
        d.drain()
        d.drain()
    finally:
        d.close()
    kinds = [(x["kind"], x["lot"]) for x in read_lines(log_path)]
    assert kinds == [("hold", "D1"), ("delivery-failing", "D1")]
    failing = read_lines(log_path)[1]
    assert failing["data"]["channel"] == "command" and "pager refused" in failing["data"]["error"]
    st = states()
    assert st[(a.dedup_key, "command")] == "dead"
    assert ("delivery-failing|command|" + a.dedup_key, "command") not in st   # not sent back to the failing one


def test_command_exit_75_and_timeout_are_retried(db_path, tmp_path, put, alert_factory, states):
    """Exit code 75 (temporary failure) leaves the alert pending for a retry instead of dead."""
    script = tmp_path / "tempfail.py"
    script.write_text("import sys\nsys.stdin.read()\nsys.exit(75)\n")
    settings = AlertSettings(command=CommandSettings(argv=(sys.executable, str(script)), timeout=20))
    a = alert_factory(lot="E1")
    put(a, ["command"])
    d = Dispatcher(db_path, settings)
    try:
        assert d.drain(now=50.0) == 0
    finally:
        d.close()
    assert states()[(a.dedup_key, "command")] == "pending"


def test_hold_line_carries_the_lot_numbers_at_top_level() -> None:
    """A hold alert's log object has the check --format json keys at top level, values only under data."""
    from monitor.alerts.alert import Alert

    data = {"line": "L1", "product": "OAT-500", "lot": "A1", "n": 30, "mean": 501.2, "p_value": 0.001,
            "verdict": "hold", "values": [501.0, 501.4]}
    obj = Alert("hold", "hold|L1|OAT-500|A1|v1", "2026-11-30T06:00:00+00:00", data, "L1", "OAT-500", "A1").to_json()
    assert (obj["n"], obj["mean"], obj["p_value"], obj["verdict"]) == (30, 501.2, 0.001, "hold")
    assert "values" not in obj and obj["data"]["values"] == [501.0, 501.4]
    assert Alert.from_json(obj).data == data


def test_command_hook_runs_without_the_daemons_secrets(db_path, tmp_path, put, alert_factory, monkeypatch):
    """The hook inherits a minimal environment: PATH is there, the SMTP password variable is not."""
    monkeypatch.setenv("LOTWARDEN_SMTP_PASSWORD", "brackenfield-secret-7")
    out = tmp_path / "env.txt"
    script = tmp_path / "hook.py"
    script.write_text("import os, sys\nsys.stdin.read()\nopen(sys.argv[1], 'w').write(repr(dict(os.environ)))\n")
    settings = AlertSettings(command=CommandSettings(argv=(sys.executable, str(script), str(out)), timeout=20))
    put(alert_factory(lot="E1"), ["command"])
    d = Dispatcher(db_path, settings)
    try:
        assert d.drain() == 1
    finally:
        d.close()
    seen = out.read_text()
    assert "brackenfield-secret-7" not in seen and "LOTWARDEN_SMTP_PASSWORD" not in seen and "'PATH'" in seen
