"""`lotwarden show LINE/PRODUCT/LOT` run as a real subprocess over the state a real daemon wrote: the whole
record of one lot, checked against what was exported (files, hashes, packs, heads) and computed here."""

from __future__ import annotations

import hashlib
import json
import os
import sqlite3
import statistics
import subprocess
import sys
from pathlib import Path

import pytest
from record_run import HEADER, NOMINAL, RULE, TARGET, count_verdicts, export_text, run_plant
from scipy import stats

from monitor.polling import wait_until
from monitor.state import dispositions, rule_texts
from monitor.state.database import Database

TOP_KEYS = {"line", "product", "lot", "latest", "verdicts", "dispositions", "files", "audit", "heads"}
VERDICT_KEYS = {"id", "decided_at", "verdict", "n", "mean", "target", "unit", "p_value", "reason", "rule",
                "rule_version", "rule_hash", "close_reason", "rule_text", "result"}
HEAD_KEYS = {"head", "n", "mean", "sd", "offset", "p_value", "p_holm"}


def lotwarden(*args: str | Path, timeout: float = 60) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "monitor", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, env={**os.environ, "PYTHONIOENCODING": "utf-8"})


def show_json(config: Path, name: str) -> dict:
    p = lotwarden("show", name, "--config", config, "--format", "json")
    assert p.returncode == 0, p.stderr
    return json.loads(p.stdout)


def verdict_ids(db: Path, line: str, lot: str) -> list[int]:
    """The lot's verdict ids, read with sqlite3 directly (not through lotwarden)."""
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return [r[0] for r in conn.execute("SELECT id FROM verdicts WHERE line = ? AND lot = ? ORDER BY id",
                                           (line, lot))]
    finally:
        conn.close()


def test_json_of_a_held_lot_has_every_section(record_run):
    rec = show_json(record_run.config, "L2/OAT-500/B2")
    assert set(rec) == TOP_KEYS
    assert (rec["line"], rec["product"], rec["lot"]) == ("L2", "OAT-500", "B2")
    values = record_run.values[("L2", "B2")]
    mean = statistics.fmean(values)                                       # Python's statistics.fmean
    p = float(stats.ttest_1samp(values, TARGET).pvalue)                   # scipy.stats.ttest_1samp, two-sided
    latest = rec["latest"]
    assert latest["verdict"] == "hold" and p < 0.05
    assert latest["n"] == len(values) and latest["mean"] == pytest.approx(mean, rel=1e-12)
    assert latest["p_value"] == pytest.approx(p, rel=1e-6)
    assert latest["giveaway"]["per_pack"] == pytest.approx(mean - NOMINAL, abs=1e-9)
    assert latest["disposition"] is None

    [v] = rec["verdicts"]
    assert set(v) == VERDICT_KEYS
    assert v["id"] == verdict_ids(record_run.db, "L2", "B2")[0]
    assert v["verdict"] == "hold" and v["n"] == len(values) and v["close_reason"] == "next-lot"
    # the rule version is the sha256 of the rule file's bytes (hashlib), its first 12 hex digits the version
    rule_hash = hashlib.sha256(RULE.encode("utf-8")).hexdigest()
    assert v["rule_hash"] == rule_hash and v["rule_version"] == rule_hash[:12]
    assert v["rule_text"] in (None, RULE)                                  # stored by the daemon or not at all
    assert v["result"]["p_value"] == pytest.approx(p, rel=1e-6)
    assert v["result"]["n"] == len(values) and v["result"]["verdict"] == "hold"
    assert rec["dispositions"] == []


def test_heads_are_the_latest_verdicts_per_head_figures(record_run):
    rec = show_json(record_run.config, "L2/OAT-500/B2")
    pairs = list(zip(record_run.heads[("L2", "B2")], record_run.values[("L2", "B2")], strict=True))
    assert [h["head"] for h in rec["heads"]] == sorted({h for h, _ in pairs})
    for h in rec["heads"]:
        assert set(h) == HEAD_KEYS
        xs = [v for head, v in pairs if head == h["head"]]
        assert h["n"] == len(xs)
        assert h["mean"] == pytest.approx(statistics.fmean(xs), abs=1e-9)            # statistics.fmean
        assert h["sd"] == pytest.approx(statistics.stdev(xs), rel=1e-9)              # statistics.stdev (n − 1)
        assert h["offset"] == pytest.approx(statistics.fmean(xs) - TARGET, abs=1e-9)
        assert h["p_value"] == pytest.approx(float(stats.ttest_1samp(xs, TARGET).pvalue), rel=1e-6)  # scipy
    # H3 was exported 0.6 g higher than the others: it lies furthest above the target
    assert max(rec["heads"], key=lambda h: h["offset"])["head"] == "H3"


def test_files_and_audit_name_the_export_the_lot_came_from(record_run):
    rec = show_json(record_run.config, "L1/OAT-500/A2")
    [f] = rec["files"]
    assert set(f) == {"path", "archived_path", "sha256", "processed_at", "rows"}
    assert Path(f["path"]).resolve() == (record_run.root / "drop" / "L1-2026-11-30.csv").resolve()
    assert f["sha256"] == hashlib.sha256(export_text("L1").encode("utf-8")).hexdigest()       # hashlib
    assert f["rows"] == len(record_run.values[("L1", "A2")])
    assert hashlib.sha256(Path(f["archived_path"]).read_bytes()).hexdigest() == f["sha256"]
    events = [a["event"] for a in rec["audit"]]
    assert "verdict" in events and "file-taken" in events
    for a in rec["audit"]:
        assert set(a) == {"at", "event", "file_id", "detail"}
        assert isinstance(a["detail"], dict)                               # parsed, not JSON text
    verdict_audit = next(a for a in rec["audit"] if a["event"] == "verdict")
    assert verdict_audit["detail"]["verdict"] == "hold"


def test_table_shows_the_same_record_in_sections(record_run):
    p = lotwarden("show", "L2/OAT-500/B2", "--config", record_run.config)
    assert p.returncode == 0, p.stderr
    out = p.stdout
    for section in ("verdicts", "dispositions", "heads", "files", "audit"):
        assert any(line.startswith(section) for line in out.splitlines()), section
    assert "L2/OAT-500/B2" in out and "hold" in out
    assert f"{statistics.fmean(record_run.values[('L2', 'B2')]):.2f} g" in out
    assert "L2-2026-11-30.csv" in out
    h3 = [v for h, v in zip(record_run.heads[("L2", "B2")], record_run.values[("L2", "B2")], strict=True) if h == "H3"]
    assert any(line.split()[:1] == ["H3"] and f"{statistics.fmean(h3):.2f}" in line for line in out.splitlines())
    assert "competent authority" in out


@pytest.mark.parametrize("name", ["L1A2", "L1/A2", ""])
def test_a_bad_lot_name_exits_2(record_run, name):
    p = lotwarden("show", name, "--config", record_run.config)
    assert p.returncode == 2 and p.stdout == ""
    assert "LINE/PRODUCT/LOT" in p.stderr and repr(name) in p.stderr and "Traceback" not in p.stderr


def test_an_unknown_lot_and_an_open_lot_exit_2_saying_which(record_run):
    p = lotwarden("show", "L1/OAT-500/NOPE", "--config", record_run.config)
    assert p.returncode == 2 and p.stdout == ""
    assert "L1/OAT-500/NOPE" in p.stderr and "not open" in p.stderr
    p = lotwarden("show", "L1/OAT-500/Z1", "--config", record_run.config, "--format", "json")
    assert p.returncode == 2 and p.stdout == ""
    assert "L1/OAT-500/Z1" in p.stderr and "still open" in p.stderr
    assert f"{len(record_run.values[('L1', 'Z1')])} rows" in p.stderr


def test_a_lot_judged_twice_lists_its_verdicts_oldest_first_with_rule_text_and_dispositions(tmp_path):
    run, daemon = run_plant(tmp_path, keep_running=True)
    assert daemon is not None
    late = [501.2, 500.7, 501.5, 500.9, 501.3, 501.0, 500.8]
    try:
        first = show_json(run.config, "L1/OAT-500/A1")                 # beside the running daemon
        text = HEADER + "".join(f"2026-11-30T07:00:{i:02d},L1,OAT-500,A1,H2,{v!r},g\n" for i, v in enumerate(late))
        text += "".join(f"2026-11-30T07:01:{i:02d},L1,OAT-500,C1,H1,502.0,g\n" for i in range(2))
        tmp = tmp_path / ".late.tmp"
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, tmp_path / "drop" / "L1-late.csv")
        assert wait_until(lambda: len(verdict_ids(run.db, "L1", "A1")) == 2, 60), daemon.text()
        assert wait_until(lambda: count_verdicts(run.db) >= 7, 30), daemon.text()
    finally:
        daemon.stop()
    ids = verdict_ids(run.db, "L1", "A1")
    db = Database.open(run.db.parent)
    try:
        with db.write() as conn:
            rule_hash = hashlib.sha256(RULE.encode("utf-8")).hexdigest()
            rule_texts.remember(conn, rule_texts.RuleText(rule_hash, "oat-500", rule_hash[:12], "rules/oat-500.toml",
                                                          RULE, "{}", "2026-12-02T08:00:00+00:00"))
            for at, action, by in (("2026-12-02T09:00:00+00:00", "rework", "Ivo Brandt"),
                                   ("2026-12-02T10:00:00+00:00", "release", "Mara Quist")):
                dispositions.insert(conn, at=at, line="L1", product="OAT-500", lot="A1", verdict_id=ids[-1],
                                    action=action, by=by, note="")
    finally:
        db.close()
    assert len(first["verdicts"]) == 1
    rec = show_json(run.config, "L1/OAT-500/A1")
    assert [v["id"] for v in rec["verdicts"]] == ids                    # oldest first
    old, new = rec["verdicts"]
    values = run.values[("L1", "A1")]
    assert old["n"] == len(values) and new["n"] == len(values) + len(late)
    assert new["mean"] == pytest.approx(statistics.fmean(values + late), rel=1e-12)          # statistics.fmean
    assert new["p_value"] == pytest.approx(float(stats.ttest_1samp(values + late, TARGET).pvalue), rel=1e-6)  # scipy
    assert old["decided_at"] <= new["decided_at"]
    assert all(v["rule_text"] == RULE for v in rec["verdicts"])
    assert rec["latest"]["n"] == new["n"] and rec["latest"]["decided_at"] == new["decided_at"]
    assert rec["latest"]["disposition"]["action"] == "release"          # the latest disposition of the latest verdict
    assert [(d["action"], d["by"], d["verdict_id"]) for d in rec["dispositions"]] == [
        ("rework", "Ivo Brandt", ids[-1]), ("release", "Mara Quist", ids[-1])]
    assert {Path(f["path"]).name for f in rec["files"]} == {"L1-2026-11-30.csv", "L1-late.csv"}
    late_file = next(f for f in rec["files"] if Path(f["path"]).name == "L1-late.csv")
    assert late_file["rows"] == len(late)
    h2 = [v for h, v in zip(run.heads[("L1", "A1")], values, strict=True) if h == "H2"] + late
    head2 = next(h for h in rec["heads"] if h["head"] == "H2")
    assert head2["n"] == len(h2) and head2["mean"] == pytest.approx(statistics.fmean(h2), abs=1e-9)
    table = lotwarden("show", "L1/OAT-500/A1", "--config", run.config).stdout
    assert "release by Mara Quist" in table and "nominal = 500.0" in table   # the rule text is shown
