"""The daily digest: counts per line since the last digest, once per scheduled time across restarts."""

from __future__ import annotations

import json
import sqlite3
from datetime import datetime

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, DigestSettings, LogSettings


def ts(iso: str) -> float:
    return datetime.fromisoformat(iso).timestamp()


def seed_daemon_tables(db_path):
    """The daemon's verdicts and files tables with a day of invented Brackenfield Foods lots."""
    c = sqlite3.connect(db_path, isolation_level=None)
    rows = [
        ("2026-12-01T04:59:00+00:00", "L1", "JAM-340", "J0", "hold", 330.0, 340.0),   # before the period
        ("2026-12-01T07:00:00+00:00", "L1", "JAM-340", "J1", "pass", 341.0, 340.0),
        ("2026-12-01T08:00:00+00:00", "L1", "JAM-340", "J2", "hold", 337.0, 340.0),
        ("2026-12-01T09:00:00+00:00", "L1", "JAM-340", "J2", "pass", 339.0, 340.0),   # J2 re-judged: latest counts
        ("2026-12-01T10:00:00+00:00", "L2", "OAT-500", "A1", "review", 502.0, 500.0),
        ("2026-12-02T04:59:59+00:00", "L2", "OAT-500", "A2", "hold", 497.0, 500.0),
        ("2026-12-02T05:00:00+00:00", "L2", "OAT-500", "A3", "hold", 490.0, 500.0),   # at the due time: next one
    ]
    for at, line, product, lot, verdict, mean, target in rows:
        add_verdict(c, at, line, product, lot, verdict, 10, mean, target, "{}")
    for state, at, path, reason in [("done", "2026-12-01T07:00:00+00:00", "e/1.csv", ""),
                                    ("rejected", "2026-12-01T11:00:00+00:00", "e/bad.csv", "no lot column"),
                                    ("duplicate", "2026-12-01T12:00:00+00:00", "e/1b.csv", "same content")]:
        c.execute("INSERT INTO files(sha256, path, size, mtime, first_seen_at, state, processed_at, reason)"
                  " VALUES (?,?,?,?,?,?,?,?)", (path, path, 1, 0.0, at, state, at, reason))
    c.close()


def add_verdict(c, at, line, product, lot, verdict, n, mean, target, payload, rule="r", version="v1"):
    c.execute("INSERT INTO verdicts(decided_at, line, product, lot, rule, rule_version, rule_hash, verdict, n,"
              " mean, target, unit, payload) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
              (at, line, product, lot, rule, version, version, verdict, n, mean, target, "g", payload))


def settings(tmp_path, **over):
    dig = DigestSettings(cron="0 6 * * *", timezone="Europe/Berlin", **over)
    return AlertSettings(log=LogSettings(path=tmp_path / "alerts.jsonl"), digest=dig)


def digests(tmp_path):
    p = tmp_path / "alerts.jsonl"
    return [x for x in map(json.loads, p.read_text().splitlines()) if x["kind"] == "digest"] if p.exists() else []


def raise_digest_at_six(db_path, tmp_path) -> dict:
    """Raise and deliver the 06:00 Europe/Berlin digest of 2026-12-02; return the one digest line logged."""
    d = Dispatcher(db_path, settings(tmp_path))
    try:
        assert d.run_digest(now=ts("2026-12-02T05:00:30+00:00"))
        d.drain(now=ts("2026-12-02T05:00:31+00:00"))
    finally:
        d.close()
    [dg] = digests(tmp_path)
    return dg


def test_digest_counts_and_period(db_path, tmp_path):
    """06:00 Europe/Berlin is 05:00 UTC in December (CET = UTC+1, IANA tz database); counts follow the rows."""
    seed_daemon_tables(db_path)
    dg = raise_digest_at_six(db_path, tmp_path)
    data = dg["data"]
    assert data["period_start"] == "2026-12-01T05:00:00+00:00" and data["period_end"] == "2026-12-02T05:00:00+00:00"
    assert data["period_end_local"] == "2026-12-02 06:00"
    by_line = {ln["line"]: ln["products"] for ln in data["lines"]}
    jam = by_line["L1"][0]
    assert (jam["lots"], jam["passed"], jam["held"], jam["reviewed"]) == (2, 2, 0, 0)
    assert abs(jam["mean_offset"] - 0.0) < 1e-9               # (341-340 + 339-340) / 2
    oat = by_line["L2"][0]
    assert (oat["lots"], oat["passed"], oat["held"], oat["reviewed"]) == (2, 0, 1, 1)
    assert abs(oat["mean_offset"] - (-0.5)) < 1e-9            # (502-500 + 497-500) / 2
    assert data["files"] == {"done": 1, "rejected": 1, "duplicate": 1}
    assert data["rejected_files"][0]["path"] == "e/bad.csv"


def test_digest_once_across_restart_and_catch_up(db_path, tmp_path):
    """A restart around the cron time raises the digest once; a missed one is caught up if not too late."""
    seed_daemon_tables(db_path)
    for now in ("2026-12-02T05:00:01+00:00", "2026-12-02T05:00:02+00:00", "2026-12-02T09:00:00+00:00"):
        d = Dispatcher(db_path, settings(tmp_path))     # a fresh process each time
        try:
            d.run_digest(now=ts(now))
            d.drain(now=ts(now))
        finally:
            d.close()
    assert len(digests(tmp_path)) == 1
    # down over the next 06:00; started at 08:00 local → caught up once, covering from the last period end
    d = Dispatcher(db_path, settings(tmp_path))
    try:
        assert d.run_digest(now=ts("2026-12-03T07:00:00+00:00"))
        assert not d.run_digest(now=ts("2026-12-03T07:00:05+00:00"))
        d.drain(now=ts("2026-12-03T07:00:06+00:00"))
    finally:
        d.close()
    got = digests(tmp_path)
    assert len(got) == 2 and got[1]["data"]["period_start"] == "2026-12-02T05:00:00+00:00"
    # L1 is listed too now (its hold J0 is still open) but had no lots in this period
    by_line = {ln["line"]: ln for ln in got[1]["data"]["lines"]}
    assert by_line["L1"]["products"] == [] and [h["lot"] for h in by_line["L1"]["open_holds"]] == ["J0"]
    assert by_line["L2"]["products"][0]["held"] == 1      # A3, decided at 05:00:00 on the 2nd
    # too late: more than catch_up_hours after the due time nothing is raised
    d = Dispatcher(db_path, settings(tmp_path, catch_up_hours=1.0))
    try:
        assert not d.run_digest(now=ts("2026-12-04T08:00:00+00:00"))
    finally:
        d.close()


def test_schedule_adds_jobs_to_a_real_background_scheduler(db_path, tmp_path):
    """schedule() starts the delivery threads and adds the digest jobs; both shut down cleanly."""
    from apscheduler.schedulers.background import BackgroundScheduler

    sched = BackgroundScheduler(timezone="UTC")
    d = Dispatcher(db_path, settings(tmp_path))
    try:
        d.schedule(sched)
        ids = {j.id for j in sched.get_jobs()}
        assert {"lotwarden-alerts-digest", "lotwarden-alerts-digest-catch-up"} <= ids
        sched.start()
    finally:
        sched.shutdown(wait=True)
        d.close()


def test_digest_counts_the_average_quantity_screen(db_path, tmp_path):
    """The digest shows, per product, how many lots met, did not meet or could not decide the average-quantity
    screen, from the verdicts' stored payloads (real engine verdicts of invented Brackenfield lots); lots of a
    rule without a nominal are not counted. Full inspection: mean >= Qn, none below T2 = Qn - 2·TNE
    (Council Directive 76/211/EEC Annex I; TNE 15 g for 500 g)."""
    import numpy as np

    from monitor.engine import evaluate
    from monitor.lot import LotData, LotKey
    from monitor.rulebook import Rule

    seed_daemon_tables(db_path)
    rule = Rule.from_toml({"name": "oat", "target": 503.0, "unit": "g", "nominal": 500.0}, source="t.toml")
    plain = Rule.from_toml({"name": "oat", "target": 503.0, "unit": "g"}, source="t.toml")
    met = np.linspace(501.0, 505.0, 40)
    short = np.r_[met[:-1], 468.0]                             # one pack below T2 = 470 g
    c = sqlite3.connect(db_path, isolation_level=None)
    for lot, values, r in (("Q1", met, rule), ("Q2", short, rule), ("Q3", met, plain)):
        v = evaluate(LotData(key=LotKey("L3", "OAT-500", lot), values=values, unit="g"), r)
        add_verdict(c, "2026-12-01T12:00:00+00:00", "L3", "OAT-500", lot, v.verdict, v.n, v.mean, 503.0,
                    json.dumps(v.to_json()), rule="oat")
    c.close()
    dg = raise_digest_at_six(db_path, tmp_path)
    [oat] = {ln["line"]: ln["products"] for ln in dg["data"]["lines"]}["L3"]
    assert oat["lots"] == 3 and oat["screen"] == {"met": 1, "not met": 1, "undecided": 0}
