"""Drift across lots on the real `lotwarden run` daemon: each closed lot's t against target feeds a tabular
CUSUM per line and product and per filler head; the chart is kept across a restart, starts again when the
rule's version changes, and each signal is one `drift` alert — while every lot itself passes.

Expected signals are computed here from the exported values alone: each lot's and head's t with
scipy.stats.ttest_1samp, then the tabular CUSUM of the NIST/SEMATECH e-Handbook of Statistical Methods
§6.3.2.3 (S+ = max(0, S+ + z - k), S- = max(0, S- - z - k), a signal when either exceeds h, both back to 0),
written out below. The plant and its numbers are test data of our own.
"""

from __future__ import annotations

import json
import os
from datetime import UTC, datetime, timedelta
from pathlib import Path
from statistics import NormalDist

import plant
import pytest
import scipy.stats
from test_rule_texts import Proc, logged, rows

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, DigestSettings, LogSettings
from monitor.alerts.templates import TemplateSet, message_context
from monitor.polling import wait_until

HEADS = ("H1", "H2", "H3", "H4")
TARGET, K, H_FIRST, H_SECOND = 500.0, 0.5, 4.0, 3.9
DRIFT = f"""
[drift]
method = "cusum"
k = {K}
h = {H_FIRST}
heads = true
"""


def lot_values(n: int = 24) -> list[tuple[str, float]]:
    """(head, value) pairs: 0.15 g above target on the whole, head H2 a further 0.8 g up (normal quantiles in
    a fixed order, no randomness). Each lot alone passes (t about 1.5 at n = 24)."""
    q = [NormalDist().inv_cdf((i + 0.5) / n) for i in range(n)]
    return [(HEADS[i % 4], round(TARGET + 0.15 + q[(i * 7) % n] + (0.8 if i % 4 == 1 else 0.0), 2))
            for i in range(n)]


VALUES = lot_values()


def export(name: str, lots: list[str], root: Path, start: int) -> None:
    rows_ = [plant.HEADER]
    i = start
    for lot in lots:
        for head, v in VALUES:
            rows_.append(f"2026-11-30T{6 + i // 3600:02d}:{i // 60 % 60:02d}:{i % 60:02d},L1,OAT-500,{lot},{head},"
                         f"{v!r},g\n")
            i += 1
    tmp = root / f".{name}.tmp"
    tmp.write_text("".join(rows_), encoding="utf-8")
    os.replace(tmp, root / "drop" / name)


def expected_signals(segments: list[tuple[list[str], float]]) -> set[tuple[str, str, str]]:
    """(series, lot, direction) of every signal: each segment is a run of lots under one rule version (its h);
    the chart starts at 0 at each segment (the rule version changed)."""
    series = {"": VALUES, **{h: [(h, v) for hh, v in VALUES if hh == h] for h in HEADS}}
    z = {s: float(scipy.stats.ttest_1samp([v for _, v in vals], TARGET).statistic) for s, vals in series.items()}
    out = set()
    for s in series:
        for lots, h in segments:
            hi = lo = 0.0
            for lot in lots:
                hi, lo = max(0.0, hi + z[s] - K), max(0.0, lo - z[s] - K)
                if hi > h or lo > h:
                    out.add((s, lot, "up" if hi > h else "down"))
                    hi = lo = 0.0
    return out


def stored_signals(db: Path) -> set[tuple[str, str, str]]:
    return {(h, lot, d) for h, lot, d in rows(db, "SELECT head, lot, direction FROM drift_signals")}


def test_cusum_across_lots_survives_a_restart_and_restarts_with_a_new_rule_version(tmp_path: Path) -> None:
    """Lots D01–D03 judged by a first daemon, D04–D05 by a second (the chart goes on: the whole-lot signal
    falls on D04), then the rule's h is edited and reloaded: D06–D09 start a new chart (its signal falls on D09,
    not on D08 where the old chart would have signalled). Every signal is stored once and told once as a
    `drift` alert with method, direction, statistic, limit and the lots since the last restart."""
    cfg = plant.make_plant(tmp_path, rescan=1.0, idle_minutes=600)
    rule_file = tmp_path / "rules" / "oat-500.toml"
    rule_file.write_text(rule_file.read_text(encoding="utf-8") + DRIFT, encoding="utf-8")
    db = tmp_path / "state" / "lotwarden.db"
    log = tmp_path / "daemon.log"

    def judged() -> int:
        return int(rows(db, "SELECT count(DISTINCT lot) FROM verdicts")[0][0]) if db.exists() else 0

    first = Proc(cfg, log)
    try:
        first.wait_started()
        export("a.csv", ["D01", "D02", "D03", "D04"], tmp_path, 0)      # D04 stays open
        assert wait_until(lambda: judged() == 3, 60), first.text()
    finally:
        first.stop()
    second = Proc(cfg, log)
    try:
        second.wait_started()
        export("b.csv", ["D05", "D06"], tmp_path, 1000)                  # closes D04, D05; D06 open
        assert wait_until(lambda: judged() == 5, 60), second.text()
        rule_file.write_text(rule_file.read_text(encoding="utf-8").replace(f"h = {H_FIRST}", f"h = {H_SECOND}"),
                             encoding="utf-8")
        second.reload()
        export("c.csv", ["D07", "D08", "D09", "D10"], tmp_path, 2000)    # closes D06–D09 under the new version
        assert wait_until(lambda: judged() == 9, 60), second.text()
        want = expected_signals([(["D01", "D02", "D03", "D04", "D05"], H_FIRST),
                                 (["D06", "D07", "D08", "D09"], H_SECOND)])
        assert ("", "D04", "up") in want and ("", "D09", "up") in want and ("", "D08", "up") not in want
        assert wait_until(lambda: len(logged(tmp_path, "drift")) >= len(want), 30), second.text()
    finally:
        second.stop()

    assert stored_signals(db) == want
    verdicts = rows(db, "SELECT verdict FROM verdicts")
    assert {v for (v,) in verdicts} == {"pass"} and len(verdicts) == 9    # drift is independent of verdicts
    alerts = logged(tmp_path, "drift")
    assert len(alerts) == len(want)                                        # each signal told once
    whole = [a["data"]["drift"] for a in alerts if a["data"]["drift"]["head"] is None]
    assert [d["lots"] for d in whole] == [["D01", "D02", "D03", "D04"], ["D06", "D07", "D08", "D09"]]
    z = float(scipy.stats.ttest_1samp([v for _, v in VALUES], TARGET).statistic)
    assert [d["statistic"] for d in whole] == [
        pytest.approx(4 * (z - K), rel=1e-9)] * 2          # S+ after four equal lots
    assert [(d["method"], d["direction"], d["limit"]) for d in whole] == [("cusum", "up", H_FIRST),
                                                                           ("cusum", "up", H_SECOND)]
    audit = rows(db, "SELECT lot, detail FROM audit WHERE event = 'drift' ORDER BY id")
    assert sorted((json.loads(d)["head"] or "", lot) for lot, d in audit) == sorted((s, lot) for s, lot, _ in want)
    _the_digest_lists_the_signals(tmp_path, db, want)
    _the_report_lists_the_signals(tmp_path, cfg, want)


def _the_report_lists_the_signals(root: Path, cfg: Path, want: set[tuple[str, str, str]]) -> None:
    """`lotwarden report` over this state has one drift row per signal, each naming its series and lot."""
    import re
    import subprocess
    import sys

    today = datetime.now(UTC).date()
    out = root / "report.html"
    p = subprocess.run([sys.executable, "-m", "monitor", "report", "--config", str(cfg), "--since",
                        str(today - timedelta(days=1)), "--until", str(today + timedelta(days=1)), "--out", str(out)],
                       capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    page = out.read_text(encoding="utf-8")
    found = set()
    for row in re.findall(r'<tr class="drift (up|down)">(.*?)</tr>', page, re.S):
        cells = [re.sub(r"<[^>]+>", "", c).strip() for c in re.findall(r"<td>(.*?)</td>", row[1], re.S)]
        found.add(("" if cells[1] == "whole lots" else cells[1].removeprefix("head "), cells[4], row[0]))
    assert found == want


def _the_digest_lists_the_signals(root: Path, db: Path, want: set[tuple[str, str, str]]) -> None:
    """The daily digest over this state lists every signal of its period under the line, and its text names
    each one's lot."""
    stamps = [datetime.fromisoformat(at) for (at,) in rows(db, "SELECT at FROM drift_signals")]
    due = max(stamps).replace(microsecond=0) + timedelta(hours=1)
    log = root / "digest.jsonl"
    d = Dispatcher(db, AlertSettings(log=LogSettings(path=log),
                                     digest=DigestSettings(cron=f"{due.minute} {due.hour} * * *", timezone="UTC")))
    try:
        assert d.run_digest(now=(due + timedelta(seconds=5)).timestamp())
        d.drain(now=(due + timedelta(seconds=6)).timestamp())
    finally:
        d.close()
    [dg] = [x for x in map(json.loads, log.read_text(encoding="utf-8").splitlines()) if x["kind"] == "digest"]
    [line] = [ln for ln in dg["data"]["lines"] if ln["line"] == "L1"]
    assert {(x["head"] or "", x["lot"], x["direction"]) for x in line["drift"]} == want
    ctx = message_context([{"kind": "digest", "dedup_key": dg["dedup_key"], "created_at": dg["created_at"],
                            "line": "", "product": "", "lot": "", "data": dg["data"], "chart_cid": None}], folded=False,
                          generated_at=dg["created_at"])
    text = TemplateSet.load().render("digest", ctx).text
    assert "Drift across lots" in text and "cusum up at lot D04" in text and "head H2" in text
