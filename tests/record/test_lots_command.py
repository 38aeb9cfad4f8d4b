"""`lotwarden lots` run as a real subprocess over the state a real daemon wrote: each lot's latest verdict,
its numbers checked against values computed here from the exported packs (statistics, scipy)."""

from __future__ import annotations

import csv
import io
import json
import os
import sqlite3
import statistics
import subprocess
import sys
from datetime import datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from record_run import CLOSED, COST, CURRENCY, HEADER, NOMINAL, TARGET, count_verdicts, run_plant
from scipy import stats

from monitor.polling import wait_until
from monitor.state import dispositions
from monitor.state.database import Database

BERLIN = ZoneInfo("Europe/Berlin")
LOT_KEYS = ["line", "product", "lot", "verdict", "n", "mean", "target", "unit", "p_value", "reason", "decided_at",
            "rule", "rule_version", "giveaway", "disposition"]
CSV_KEYS = ["line", "product", "lot", "verdict", "n", "mean", "target", "unit", "p_value", "reason", "decided_at",
            "rule", "rule_version", "giveaway_per_pack", "giveaway_total", "giveaway_cost", "giveaway_currency",
            "disposition_action", "disposition_by", "disposition_note", "disposition_at"]
CAUTION_WORDS = "competent authority"


def lotwarden(*args: str | Path, timeout: float = 60) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "monitor", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, env={**os.environ, "PYTHONIOENCODING": "utf-8"})


def lots_json(config: Path, *flags: str) -> list[dict]:
    p = lotwarden("lots", "--config", config, "--format", "json", *flags)
    assert p.returncode == 0, p.stderr
    return json.loads(p.stdout)


def names(items: list[dict]) -> list[str]:
    return [f"{i['line']}/{i['lot']}" for i in items]


def stored_verdicts(db: Path) -> list[tuple[int, str, str, str]]:
    """(id, decided_at, line, lot) of every verdict, read with sqlite3 directly (not through lotwarden)."""
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return conn.execute("SELECT id, decided_at, line, lot FROM verdicts ORDER BY id").fetchall()
    finally:
        conn.close()


def decided(db: Path) -> datetime:
    """The one instant the daemon decided the record plant's lots (it judged them in one go)."""
    times = {datetime.fromisoformat(r[1]) for r in stored_verdicts(db)}
    assert len(times) == 1, times
    return times.pop()


def expected_verdict(values: list[float]) -> tuple[str, float | None]:
    """The verdict and p-value this rule must give: fewer than min_n = 5 packs -> review (common practice,
    no source); else a two-sided one-sample t-test against the target at alpha 0.05
    (scipy.stats.ttest_1samp)."""
    if len(values) < 5:
        return "review", None
    p = float(stats.ttest_1samp(values, TARGET).pvalue)
    return ("hold" if p < 0.05 else "pass"), p


# ---------------------------------------------------------------------------------------------- JSON


def test_json_is_one_object_per_judged_lot_with_numbers_from_the_export(record_run):
    items = lots_json(record_run.config)
    assert sorted(names(items)) == sorted(f"{line}/{lot}" for line, lot in CLOSED)    # Z1/Z2 are still open
    for item in items:
        assert list(item) == LOT_KEYS
        values = record_run.values[(item["line"], item["lot"])]
        n = len(values)
        mean = statistics.fmean(values)                                  # Python's statistics.fmean
        verdict, p = expected_verdict(values)
        assert item["product"] == "OAT-500"
        assert item["verdict"] == verdict, item
        assert item["n"] == n
        assert item["mean"] == pytest.approx(mean, rel=1e-12)
        assert item["target"] == TARGET and item["unit"] == "g"
        if p is None:
            assert item["p_value"] is None
        else:
            assert item["p_value"] == pytest.approx(p, rel=1e-6)         # scipy.stats.ttest_1samp
        # giveaway: (mean − nominal) per pack, × n in all, × cost per gram for the money (as the issue defines it)
        per_pack = mean - NOMINAL
        assert item["giveaway"]["per_pack"] == pytest.approx(per_pack, abs=1e-9)
        assert item["giveaway"]["total"] == pytest.approx(per_pack * n, abs=1e-7)
        assert item["giveaway"]["cost"] == pytest.approx(per_pack * n * COST, abs=1e-9)
        assert item["giveaway"]["currency"] == CURRENCY
        assert item["disposition"] is None
        assert item["rule"] == "oat-500" and len(item["rule_version"]) == 12
        assert item["reason"]


def test_lots_come_oldest_decision_first(record_run):
    items = lots_json(record_run.config)
    order = [f"{line}/{lot}" for _, _, line, lot in stored_verdicts(record_run.db)]   # same instant: by id
    assert names(items) == order
    assert {i["decided_at"] for i in items} == {decided(record_run.db).isoformat()}


@pytest.mark.parametrize(("verdict", "expected"), [
    ("hold", ["L1/A2", "L2/B2"]), ("review", ["L1/A3"]), ("pass", ["L1/A1", "L2/B1"]),
    ("open", ["L1/A2", "L1/A3", "L2/B2"]),                 # nobody has disposed of anything yet
])
def test_verdict_filter(record_run, verdict, expected):
    assert sorted(names(lots_json(record_run.config, "--verdict", verdict))) == expected


def test_line_and_product_filters_and_unknown_ones_are_empty(record_run):
    assert names(lots_json(record_run.config, "--line", "L2")) == ["L2/B1", "L2/B2"]
    assert len(lots_json(record_run.config, "--product", "OAT-500")) == len(CLOSED)
    assert lots_json(record_run.config, "--line", "L9") == []
    assert lots_json(record_run.config, "--product", "JAM-340") == []
    assert names(lots_json(record_run.config, "--line", "L1", "--verdict", "hold")) == ["L1/A2"]
    p = lotwarden("lots", "--config", record_run.config, "--line", "L9")
    assert (p.returncode, p.stdout.strip()) == (0, "no lots match")


# ------------------------------------------------------------------------------------- --since / --until


def test_a_date_is_its_whole_day_in_berlin(record_run):
    day = decided(record_run.db).astimezone(BERLIN).date()
    every = len(CLOSED)
    assert len(lots_json(record_run.config, "--since", day.isoformat(), "--until", day.isoformat())) == every
    assert len(lots_json(record_run.config, "--since", day.isoformat())) == every
    assert lots_json(record_run.config, "--until", (day - timedelta(days=1)).isoformat()) == []
    assert lots_json(record_run.config, "--since", (day + timedelta(days=1)).isoformat()) == []


def test_a_datetime_without_offset_is_berlin_time_and_one_with_an_offset_is_that_instant(record_run):
    moment = decided(record_run.db)
    local = moment.astimezone(BERLIN).replace(tzinfo=None)
    utc_wall = moment.astimezone(ZoneInfo("UTC")).replace(tzinfo=None)
    minute = timedelta(minutes=30)

    def count(*flags: str) -> int:
        return len(lots_json(record_run.config, *flags))

    # 30 minutes before the decision in Berlin wall-clock time: nothing yet; read as UTC wall-clock (an hour
    # or two behind Berlin) it would already include the lots
    assert count("--until", (local - minute).isoformat(timespec="seconds")) == 0
    assert count("--until", (utc_wall + minute).isoformat(timespec="seconds")) == 0
    assert count("--since", (local - minute).isoformat(timespec="seconds")) == len(CLOSED)
    # with an offset: that instant, whatever the plant's zone; --until includes the instant itself
    assert count("--until", moment.astimezone(ZoneInfo("Asia/Kolkata")).isoformat()) == len(CLOSED)
    assert count("--since", moment.isoformat()) == len(CLOSED)
    after = moment + timedelta(seconds=1)
    assert count("--since", after.astimezone(ZoneInfo("America/New_York")).isoformat()) == 0
    assert count("--since", after.strftime("%Y-%m-%dT%H:%M:%S.%fZ")) == 0
    before = moment - timedelta(seconds=1)
    assert count("--until", before.isoformat()) == 0


def test_a_date_follows_the_configs_time_zone_not_utc(record_run, tmp_path):
    """The same state read through a config in a zone whose date differs from the UTC date at the decision:
    Kiritimati (UTC+14) from 10:00 UTC on, Pago Pago (UTC−11) before 11:00 UTC."""
    moment = decided(record_run.db)
    zone = "Pacific/Kiritimati" if moment.astimezone(ZoneInfo("UTC")).hour >= 10 else "Pacific/Pago_Pago"
    local_day = moment.astimezone(ZoneInfo(zone)).date()
    utc_day = moment.astimezone(ZoneInfo("UTC")).date()
    assert local_day != utc_day
    root = record_run.root
    cfg = tmp_path / "elsewhere.toml"
    cfg.write_text(f'rules_dir = "{root / "rules"}"\ntimezone = "{zone}"\n\n[watch]\nfolder = "{root / "drop"}"\n\n'
                   f'[state]\nfolder = "{root / "state"}"\n', encoding="utf-8")
    assert len(lots_json(cfg, "--since", local_day.isoformat(), "--until", local_day.isoformat())) == len(CLOSED)
    assert lots_json(cfg, "--since", utc_day.isoformat(), "--until", utc_day.isoformat()) == []


def test_bad_period_flags_exit_2_naming_the_flag(record_run):
    p = lotwarden("lots", "--config", record_run.config, "--since", "yesterday")
    assert p.returncode == 2 and "--since" in p.stderr and "yesterday" in p.stderr and "Traceback" not in p.stderr
    p = lotwarden("lots", "--config", record_run.config, "--since", "2026-12-02", "--until", "2026-12-01")
    assert p.returncode == 2 and "--until" in p.stderr and "Traceback" not in p.stderr
    p = lotwarden("lots", "--config", record_run.config, "--verdict", "fail")
    assert p.returncode == 2 and "--verdict" in p.stderr
    p = lotwarden("lots", "--config", record_run.config, "--format", "xml")
    assert p.returncode == 2 and "--format" in p.stderr


def test_a_config_whose_daemon_never_ran_exits_2(tmp_path):
    (tmp_path / "rules").mkdir()
    (tmp_path / "drop").mkdir()
    cfg = tmp_path / "lotwarden.toml"
    cfg.write_text('rules_dir = "rules"\n\n[watch]\nfolder = "drop"\n\n[state]\nfolder = "state"\n',
                   encoding="utf-8")
    p = lotwarden("lots", "--config", cfg)
    assert p.returncode == 2 and "state" in p.stderr and "Traceback" not in p.stderr


# ----------------------------------------------------------------------------------------- CSV and table


def test_csv_reads_back_with_dictreader_as_the_json_says(record_run):
    p = lotwarden("lots", "--config", record_run.config, "--format", "csv")
    assert p.returncode == 0, p.stderr
    reader = csv.DictReader(io.StringIO(p.stdout))            # Python's csv module
    rows = list(reader)
    assert reader.fieldnames == CSV_KEYS
    items = lots_json(record_run.config)
    assert [f"{r['line']}/{r['lot']}" for r in rows] == names(items)
    for row, item in zip(rows, items, strict=True):
        values = record_run.values[(row["line"], row["lot"])]
        assert int(row["n"]) == len(values)
        assert float(row["mean"]) == pytest.approx(statistics.fmean(values), rel=1e-12)
        assert float(row["giveaway_per_pack"]) == pytest.approx(statistics.fmean(values) - NOMINAL, abs=1e-9)
        assert float(row["giveaway_cost"]) == pytest.approx((statistics.fmean(values) - NOMINAL) * len(values) * COST,
                                                            abs=1e-9)
        assert row["giveaway_currency"] == CURRENCY
        assert row["reason"] == item["reason"]                # commas and semicolons survive the quoting
        assert "," in row["reason"]
        assert row["p_value"] == ("" if item["p_value"] is None else row["p_value"])
        if item["p_value"] is not None:
            assert float(row["p_value"]) == item["p_value"]
        assert row["disposition_action"] == row["disposition_by"] == row["disposition_at"] == ""


def test_table_has_a_row_per_lot_in_berlin_time_and_the_counts_last(record_run):
    p = lotwarden("lots", "--config", record_run.config)
    assert p.returncode == 0, p.stderr
    lines = p.stdout.rstrip("\n").splitlines()
    header = lines[0].split()
    for column in ("line", "product", "lot", "decided", "verdict", "n", "mean", "target", "p", "giveaway/pack",
                   "disposition"):
        assert column in header
    local = decided(record_run.db).astimezone(BERLIN).strftime("%Y-%m-%d %H:%M")
    expected = {key: expected_verdict(v)[0] for key, v in record_run.values.items() if key in CLOSED}
    for (line, lot), verdict in expected.items():
        row = next(x for x in lines if x.split()[:3] == [line, "OAT-500", lot])
        assert local in row and f" {verdict} " in row
        assert f"{statistics.fmean(record_run.values[(line, lot)]):.2f} g" in row
        assert f"{statistics.fmean(record_run.values[(line, lot)]) - NOMINAL:+.2f} g" in row
        assert ("open" in row) == (verdict != "pass")
    holds = sum(v == "hold" for v in expected.values())
    reviews = sum(v == "review" for v in expected.values())
    assert lines[-1] == f"lots: {len(expected)}  holds: {holds}  reviews: {reviews}  open: {holds + reviews}"
    assert CAUTION_WORDS in p.stdout


# --------------------------------------------------------------- dispositions, later verdicts, running daemon


def test_a_disposed_lot_is_no_longer_open_and_its_disposition_shows(fresh_run):
    verdict_id = next(i for i, _, line, lot in stored_verdicts(fresh_run.db) if (line, lot) == ("L1", "A2"))
    db = Database.open(fresh_run.db.parent)
    try:
        with db.write() as conn:
            dispositions.insert(conn, at="2026-12-02T09:15:00+00:00", line="L1", product="OAT-500", lot="A2",
                                verdict_id=verdict_id, action="rework", by="Mara Quist", note="re-weigh, refill")
    finally:
        db.close()
    assert names(lots_json(fresh_run.config, "--verdict", "open")) == ["L1/A3", "L2/B2"]
    a2 = next(i for i in lots_json(fresh_run.config) if i["lot"] == "A2")
    assert a2["disposition"] == {"action": "rework", "by": "Mara Quist", "note": "re-weigh, refill",
                                 "at": "2026-12-02T09:15:00+00:00", "verdict_id": verdict_id}
    rows = list(csv.DictReader(io.StringIO(lotwarden("lots", "--config", fresh_run.config, "--format", "csv").stdout)))
    row = next(r for r in rows if r["lot"] == "A2")
    assert (row["disposition_action"], row["disposition_by"], row["disposition_note"], row["disposition_at"]) == (
        "rework", "Mara Quist", "re-weigh, refill", "2026-12-02T09:15:00+00:00")
    table = lotwarden("lots", "--config", fresh_run.config).stdout.splitlines()
    assert "rework by Mara Quist" in next(x for x in table if x.split()[:3] == ["L1", "OAT-500", "A2"])
    assert table[-1].endswith("open: 2")


def test_lots_while_the_daemon_runs_shows_a_lot_judged_again_with_its_latest_verdict(tmp_path):
    run, daemon = run_plant(tmp_path, keep_running=True)
    assert daemon is not None
    try:
        assert len(lots_json(run.config)) == len(CLOSED)          # read beside the running daemon
        # late packs of A1 reopen it (the open lot Z1 closes on them); C1 then closes A1 again
        late = [500.4, 500.9, 501.1, 500.6, 500.8, 501.0]
        text = HEADER + "".join(f"2026-11-30T07:00:{i:02d},L1,OAT-500,A1,H1,{v!r},g\n" for i, v in enumerate(late))
        text += "".join(f"2026-11-30T07:01:{i:02d},L1,OAT-500,C1,H2,502.0,g\n" for i in range(2))
        tmp = tmp_path / ".late.tmp"
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, tmp_path / "drop" / "L1-late.csv")
        assert wait_until(lambda: count_verdicts(run.db) >= len(CLOSED) + 2, 60), daemon.text()
        items = lots_json(run.config)
        assert daemon.p.poll() is None
    finally:
        daemon.stop()
    assert names(items)[-2:] == ["L1/Z1", "L1/A1"]                    # decided last, so listed last
    assert len(items) == len(CLOSED) + 1                              # A1 once, with its latest verdict
    a1 = items[-1]
    values = run.values[("L1", "A1")] + late
    verdict, p = expected_verdict(values)
    assert (a1["n"], a1["verdict"]) == (len(values), verdict)
    assert a1["mean"] == pytest.approx(statistics.fmean(values), rel=1e-12)          # statistics.fmean
    assert a1["p_value"] == pytest.approx(p, rel=1e-6)                               # scipy.stats.ttest_1samp
    assert a1["giveaway"]["total"] == pytest.approx((statistics.fmean(values) - NOMINAL) * len(values), abs=1e-7)
    z1 = items[-2]
    assert (z1["verdict"], z1["n"]) == ("review", 2)                  # 2 packs < min_n 5 (common practice)
