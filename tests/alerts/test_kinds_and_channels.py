"""Alert kinds built in one place, one payload shape for config-rejected, channels behind one interface,
no SQL and no import circle in the alert package."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

import monitor.alerts
from monitor.alerts import kinds
from monitor.alerts.alert import ALERT_KINDS
from monitor.alerts.channel import Due, OneAtATime
from monitor.alerts.delivery import GiveUp, RetryLater
from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, EmailSettings, LogSettings

CONFIG_REJECTED_KEYS = {"file", "key", "line", "message", "content_sha256", "in_force"}


def sample_alerts() -> dict[str, object]:
    at = "2026-12-02T06:00:00+00:00"
    hold = kinds.verdict_alert("hold", line="L2", product="OAT-500", lot="A1", rule_version="v1",
                               payload={"verdict": "hold", "n": 3}, values=[497.0, 498.0, 496.5], at=at)
    return {
        "hold": hold,
        "review": kinds.verdict_alert("review", line="L2", product="OAT-500", lot="A2", rule_version="v1",
                                      payload={"verdict": "review"}, values=[], at=at),
        "verdict-changed": kinds.verdict_changed(line="L2", product="OAT-500", lot="A1", previous_verdict_id=4,
                                                 payload={"verdict": "pass"}, previous={"verdict": "hold"},
                                                 why="late values", values=[1.0], at=at),
        "file-rejected": kinds.file_rejected(file_id=3, path="drop/x.csv", sha256="ab", reason="empty", at=at),
        "config-rejected": kinds.config_rejected(file="rules/oat.toml", message="bad", content_sha256="c" * 64,
                                                 in_force_since="t", at=at, key="alpha", line=7),
        "file-duplicate": kinds.file_duplicate(file_id=5, path="drop/y.csv", sha256="ab", reason="same",
                                               archived_to="a/y.csv", duplicate_of={"id": 3}, at=at),
        "file-revised": kinds.file_revised(file_id=6, path="drop/y.csv", sha256="cd", archived_to="a/y.csv",
                                           previous={"id": 5}, at=at),
        "delivery-failing": kinds.delivery_failing(channel="email", alert=hold, error="550", at=at),
        "disposition": kinds.disposition(line="L2", product="OAT-500", lot="A1", disposition_id=1, action="release",
                                         by="I. Marsh", note="re-weighed", at=at, verdict={"verdict": "hold"}),
        "reminder": kinds.reminder(line="L2", product="OAT-500", lot="A1", verdict_id=4, number=1,
                                   verdict={"verdict": "hold"}, open_minutes=240.0, at=at),
        "drift": kinds.drift(line="L2", product="OAT-500", lot="A1", signal_id=1,
                             signal={"method": "cusum", "head": None}, at=at),
        "rule-changed": kinds.rule_changed(rule="oat-500", file="rules/oat.toml", old_version="a", new_version="b",
                                           changes=[{"key": "alpha", "old": 0.05, "new": 0.01}], at=at),
        "daemon-started": kinds.daemon_started(started_at=at, config="c.toml", rules=["oat-500"]),
        "daemon-stopped": kinds.daemon_stopped(started_at=at, stopped_at=at, files=2),
        "digest": kinds.digest(due_at=at, data={"lines": []}, at=at),
        "file-changed-after-take": kinds.file_changed_after_take(file_id=7, detail={"file": "z.csv"}, at=at),
        "fault-persisting": kinds.fault_persisting(key="archive: ENOSPC", message="disk full", attempts=9,
                                                   lasting_seconds=200.0, first_at=1764655200.0, at=at),
        "fault-cleared": kinds.fault_cleared(key="archive: ENOSPC", message="disk full", attempts=9,
                                             lasted_seconds=300.0, first_at=1764655200.0, at=at),
    }


def test_every_kind_has_its_constructor_and_a_stable_key():
    """Each alert kind is built by its own constructor; the same inputs give the same dedup key."""
    made = sample_alerts()
    assert set(made) == set(ALERT_KINDS)
    for kind, alert in made.items():
        assert alert.kind == kind
        assert alert.dedup_key.startswith(kind + "|")
    assert sample_alerts()["hold"].dedup_key == made["hold"].dedup_key == "hold|L2|OAT-500|A1|v1"


def test_config_rejected_has_one_shape_for_templates_and_config(db_path, tmp_path):
    """A refused operator template raises config-rejected with the same payload keys as a refused config
    edit, naming the template file."""
    tdir = tmp_path / "tpl"
    tdir.mkdir()
    (tdir / "hold.subject.txt").write_text("HOLD {{ alert.lot \n")
    em = EmailSettings(host="127.0.0.1", port=9, security="none", sender="lotwarden@brackenfield.example",
                       recipients=("qa@brackenfield.example",), timeout=1)
    d = Dispatcher(db_path, AlertSettings(log=LogSettings(path=tmp_path / "a.jsonl"), email=em, templates=tdir))
    d.close()
    conn = sqlite3.connect(db_path)
    [(payload,)] = conn.execute("SELECT payload FROM alerts WHERE kind = 'config-rejected'").fetchall()
    conn.close()
    data = json.loads(payload)["data"]
    assert set(data) == CONFIG_REJECTED_KEYS == set(sample_alerts()["config-rejected"].data)
    assert data["file"].endswith("hold.subject.txt") and data["in_force"] == "shipped templates"


class Flaky(OneAtATime):
    """A channel written against the interface only: fails for one alert, asks to wait at another."""

    name = "log"

    def __init__(self) -> None:
        self.got: list[str] = []

    def send(self, payload: str) -> None:
        lot = json.loads(payload)["lot"]
        if lot == "bad":
            raise GiveUp("refused for good")
        if lot == "later":
            raise RetryLater("busy")
        self.got.append(lot)


def test_one_at_a_time_reports_delivered_failed_and_stops_at_retry(alert_factory):
    """The common interface reports each alert: delivered, failed with its reason, retry (and nothing after
    a retry is tried, so order is kept)."""
    ch = Flaky()
    due = [Due(i, alert_factory(lot=lot), 0) for i, lot in enumerate(["A", "bad", "B", "later", "C"])]
    got = [(r.alert_ids, r.status, r.reason) for r in ch.deliver(due, 0.0, flush=False)]
    assert got == [((0,), "delivered", ""), ((1,), "failed", "refused for good"), ((2,), "delivered", ""),
                   ((3,), "retry", "busy")]
    assert ch.got == ["A", "B"]


def test_the_alert_package_has_no_sql_and_no_import_circle():
    """No statement is executed in monitor/alerts/ (SQL lives in monitor/state/), and the digest and e-mail
    modules load without the dispatcher."""
    pkg = Path(monitor.alerts.__file__).parent
    offenders = [p.name for p in pkg.glob("*.py") if ".execute(" in p.read_text(encoding="utf-8")]
    assert offenders == []
    code = ("import sys, monitor.alerts.digest, monitor.alerts.email_dispatch; "
            "print('monitor.alerts.dispatch' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
