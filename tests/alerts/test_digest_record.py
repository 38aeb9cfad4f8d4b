"""The digest's lot record, over the state of a real daemon run: holds still open (any age, oldest first),
the period's lots by code with their dispositions, and giveaway per local day — and the shipped templates
showing them. Expected figures come from the numbers written into the exports (record_run.values)."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path
from statistics import fmean
from typing import Any
from zoneinfo import ZoneInfo

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "record"))
from record_run import COST, CURRENCY, NOMINAL, run_plant

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, DigestSettings, LogSettings
from monitor.alerts.templates import SAMPLE_DIGEST, TemplateSet, message_context, sample_context
from monitor.state.database import read_only

BERLIN = ZoneInfo("Europe/Berlin")


def next_six_local(t: datetime) -> datetime:
    """The first 06:00 Europe/Berlin after ``t`` (the digest's cron "0 6 * * *" in that zone)."""
    local = t.astimezone(BERLIN)
    six = local.replace(hour=6, minute=0, second=0, microsecond=0)
    if six <= local:
        six = (local + timedelta(days=1)).replace(hour=6, minute=0, second=0, microsecond=0)
    return six.astimezone(UTC)


def test_the_digest_carries_open_holds_lots_by_code_and_giveaway(tmp_path: Path) -> None:
    run, _ = run_plant(tmp_path)
    p = subprocess.run([sys.executable, "-m", "monitor", "dispose", "L1/OAT-500/A2", "release", "--by",
                        "Ann Weller", "--note", "re-weighed 40 packs", "--config", str(run.config)],
                       capture_output=True, text=True, timeout=60)
    assert p.returncode == 0, p.stderr
    with read_only(run.db) as conn:
        decided = {(line, lot): datetime.fromisoformat(at)
                   for line, lot, at in conn.execute("SELECT line, lot, decided_at FROM verdicts")}
    due = next_six_local(max(decided.values()))
    assert min(decided.values()) >= due - timedelta(days=1)          # every lot lies in the digest's period
    log = tmp_path / "digest-log.jsonl"
    d = Dispatcher(run.db, AlertSettings(log=LogSettings(path=log),
                                         digest=DigestSettings(cron="0 6 * * *", timezone="Europe/Berlin")))
    try:
        assert d.run_digest(now=(due + timedelta(seconds=30)).timestamp())
        d.drain(now=(due + timedelta(seconds=31)).timestamp())
    finally:
        d.close()
    [dg] = [x for x in map(json.loads, log.read_text().splitlines()) if x["kind"] == "digest"]
    lines = {ln["line"]: ln for ln in dg["data"]["lines"]}
    assert set(lines) == {"L1", "L2"}

    # open holds: A2 is disposed of; the review A3 and the hold B2 are open, aged at the due time
    for line, lots in (("L1", ["A3"]), ("L2", ["B2"])):
        got = lines[line]["open_holds"]
        assert [h["lot"] for h in got] == lots
        for h in got:
            age = (due - decided[(line, h["lot"])]).total_seconds() / 3600.0
            assert abs(h["age_hours"] - age) <= 0.005 + 1e-9, (h, age)     # rounded to 0.01 h
            assert h["product"] == "OAT-500" and h["verdict"] in ("hold", "review")

    # lots by code, with the figures from the exported values
    for line, codes in (("L1", ["A1", "A2", "A3"]), ("L2", ["B1", "B2"])):
        got = lines[line]["lots_by_code"]
        assert [x["lot"] for x in got] == codes
        for x in got:
            vals = run.values[(line, x["lot"])]
            assert x["n"] == len(vals)
            assert math.isclose(x["mean"], fmean(vals), rel_tol=0, abs_tol=1e-9)
            assert math.isclose(x["giveaway_per_pack"], fmean(vals) - NOMINAL, rel_tol=0, abs_tol=1e-9)
            assert x["disposition"] == ("release" if x["lot"] == "A2" else None)
    assert {x["lot"]: x["verdict"] for x in lines["L1"]["lots_by_code"]} == {"A1": "pass", "A2": "hold",
                                                                              "A3": "review"}

    # giveaway per line and local day: fsum of (mean - nominal) x n over the lots; cost at 0.004 EUR per g
    for line in ("L1", "L2"):
        codes = [lot for (ln, lot) in run.values if ln == line and not lot.startswith("Z")]
        [g] = lines[line]["giveaway"]
        expect = math.fsum((fmean(run.values[(line, c)]) - NOMINAL) * len(run.values[(line, c)]) for c in codes)
        assert g["day"] == decided[(line, codes[0])].astimezone(BERLIN).date().isoformat()
        assert (g["product"], g["unit"], g["lots"]) == ("OAT-500", "g", len(codes))
        assert g["packs"] == sum(len(run.values[(line, c)]) for c in codes)
        assert math.isclose(g["total"], expect, rel_tol=0, abs_tol=1e-6)
        assert math.isclose(g["cost"], expect * COST, rel_tol=0, abs_tol=1e-8) and g["currency"] == CURRENCY

    # the shipped templates show it (text and HTML)
    ctx = message_context([{"kind": "digest", "dedup_key": dg["dedup_key"], "created_at": dg["created_at"],
                            "line": "", "product": "", "lot": "", "data": dg["data"], "chart_cid": None}],
                          folded=False, generated_at=dg["created_at"])
    m = TemplateSet.load().render("digest", ctx)
    assert "2 still open" in m.subject
    for body in (m.text, m.html):
        assert "Still open" in body and "Lots by code" in body and "Giveaway" in body
        assert "release" in body and "competent authority" in body
    b2_age = f"{(due - decided[('L2', 'B2')]).total_seconds() / 3600.0:.1f}"
    assert f"B2 (OAT-500): hold since {decided[('L2', 'B2')].isoformat()}, {b2_age} h" in m.text


def test_the_digest_templates_render_the_old_sample_without_the_new_keys() -> None:
    ts = TemplateSet.load()
    old: dict[str, Any] = json.loads(json.dumps(SAMPLE_DIGEST))
    for key in ("open_holds", "lots_by_code", "giveaway"):
        old["lines"][0].pop(key, None)
    m = ts.render("digest", message_context([dict(sample_context("digest")["alert"], data=old)], folded=False,
                                            generated_at="2026-12-01T05:00:00+00:00"))
    assert "Still open" not in m.text and "competent authority" in m.text
    data: dict[str, Any] = json.loads(json.dumps(old))
    data["lines"][0].update(open_holds=[{"product": "JAM-340", "lot": "J<7>", "verdict": "hold",
                                         "decided_at": "2026-11-29T09:00:00+00:00", "age_hours": 44.0}])
    digest = dict(sample_context("digest")["alert"], data=data)
    m = ts.render("digest", message_context([digest], folded=False, generated_at="2026-12-01T05:00:00+00:00"))
    assert "J&lt;7&gt;" in m.html and "44.0" in m.text
