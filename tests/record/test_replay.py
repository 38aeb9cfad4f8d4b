"""`lotwarden replay` on real daemon states: the same rules give the daemon's own verdicts, candidate rules the
verdicts scipy gives on the stored values, drift charts the CUSUM recursion written out here, and nothing is
written. The batch reader is checked against the daemon's own per-lot reader on the same state."""

from __future__ import annotations

import json
import math
import os
import sqlite3
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from record_run import CLOSED, RULE, TARGET, Daemon, RecordRun, count_verdicts, drop_exports, write_plant
from scipy import stats

from monitor import replay as rp
from monitor.daemon import judge
from monitor.lot import LotKey
from monitor.polling import wait_until
from monitor.rulebook import Rule, load_rules
from monitor.state import replaying

DRIFT = '\n[drift]\nmethod = "cusum"\nk = 0.5\nh = 4.0\nheads = true\n'
# line L3 of the drift plant: C1 with rows in g and in kg and a blank value, C2 in g, Z3 left open
L3_ROWS = ([("C1", "H1", f"{502.0 + 0.3 * ((i % 5) - 2):.2f}", "g") for i in range(0, 20, 2)]
           + [("C1", "H2", f"{(502.0 + 0.3 * ((i % 5) - 2)) / 1000:.5f}", "kg") for i in range(1, 20, 2)]
           + [("C1", "H1", "", "g")]
           + [("C2", "H1" if i % 2 else "H2", f"{501.5 + 0.4 * ((i % 7) - 3):.2f}", "g") for i in range(20)]
           + [("Z3", "H1", "502.00", "g"), ("Z3", "H1", "502.10", "g")])


def replay(run: RecordRun, rules: Path, *extra: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "monitor", "replay", "--config", str(run.config), "--rules",
                           str(rules), *extra], capture_output=True, text=True, timeout=60)


def replay_json(run: RecordRun, rules: Path, *extra: str) -> dict[str, Any]:
    p = replay(run, rules, "--format", "json", *extra)
    assert p.returncode == 0, p.stderr
    return dict(json.loads(p.stdout))


def rules_dir(root: Path, name: str, text: str) -> Path:
    d = root / name
    d.mkdir(exist_ok=True)
    (d / "oat-500.toml").write_text(text, encoding="utf-8")
    return d


def db_rows(db: Path, sql: str, args: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Rows read straight from the daemon's database (the test's own reading, not lotwarden's)."""
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return conn.execute(sql, args).fetchall()
    finally:
        conn.close()


def stored_values(db: Path, line: str, lot: str) -> np.ndarray:
    """The lot's stored values in g (a kg row times 1000: the SI definition of the kilogram)."""
    rows = db_rows(db, "SELECT value, unit FROM lot_values WHERE line = ? AND lot = ? ORDER BY seq", (line, lot))
    return np.array([math.nan if v is None else v * (1000.0 if u == "kg" else 1.0) for v, u in rows],
                    dtype=np.float64)


@pytest.fixture(scope="module")
def drift_run(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RecordRun]:
    """The two-line plant with a [drift] table in its rule and a third line whose lot mixes g and kg."""
    root = tmp_path_factory.mktemp("replay-drift")
    cfg = write_plant(root)
    (root / "rules" / "oat-500.toml").write_text(RULE + DRIFT, encoding="utf-8")
    run = RecordRun(root=root, config=cfg, db=root / "state" / "lotwarden.db")
    daemon = Daemon(cfg)
    try:
        daemon.wait_started()
        text = "timestamp,line,product,lot,head,value,unit\n" + "".join(
            f"2026-11-30T07:00:{i:02d},L3,OAT-500,{lot},{head},{v},{u}\n"
            for i, (lot, head, v, u) in enumerate(L3_ROWS))
        (root / ".L3.tmp").write_text(text, encoding="utf-8")
        os.replace(root / ".L3.tmp", root / "drop" / "L3-2026-11-30.csv")
        drop_exports(root)
        assert wait_until(lambda: count_verdicts(run.db) >= len(CLOSED) + 2, 60), daemon.text()
    finally:
        daemon.stop()
    yield run


def test_the_same_rules_give_the_daemons_verdicts(record_run: RecordRun) -> None:
    out = replay_json(record_run, record_run.root / "rules")
    # the reference: the daemon's own latest verdict of each lot, read straight from its database
    stored = {(ln, lot): v for ln, lot, v in db_rows(
        record_run.db, "SELECT line, lot, verdict FROM verdicts WHERE id IN"
                       " (SELECT max(id) FROM verdicts GROUP BY line, product, lot)")}
    assert [(x["line"], x["lot"]) for x in out["lots"]] == CLOSED   # close order
    for x in out["lots"]:
        assert x["then"] == stored[(x["line"], x["lot"])]
        assert x["now"] == x["then"] and x["changed"] is False
    assert out["summary"]["changed"] == 0 and out["summary"]["transitions"] == {}


CANDIDATE = RULE.replace(f"target = {TARGET}", "target = 502.3").replace("alpha = 0.05", "alpha = 0.01")


def test_a_candidate_rule_gives_scipys_verdicts(record_run: RecordRun, tmp_path: Path) -> None:
    out = replay_json(record_run, rules_dir(tmp_path, "candidate", CANDIDATE))
    for x in out["lots"]:
        values = stored_values(record_run.db, x["line"], x["lot"])
        if len(values) < 5:   # the rule's min_n: not judged by a test
            assert x["now"] == "review" and x["p_value_now"] is None
            continue
        # scipy.stats.ttest_1samp: the one-sample Student's t against the candidate target, two-sided
        ref = stats.ttest_1samp(values, 502.3)
        assert x["p_value_now"] == pytest.approx(float(ref.pvalue), rel=1e-9, abs=1e-300)
        assert x["now"] == ("hold" if ref.pvalue < 0.01 else "pass")
        assert x["rule_now"] == "oat-500" and x["changed"] == (x["now"] != x["then"])
    s = out["summary"]
    # the summary counts the listed lots (counted here from the JSON rows)
    assert s["lots"] == len(out["lots"])
    assert s["changed"] == sum(x["changed"] for x in out["lots"]) > 0
    for side in ("then", "now"):
        assert s[side] == {v: sum(x[side] == v for x in out["lots"]) for v in ("hold", "review", "pass")}
    moves: dict[str, int] = {}
    for x in out["lots"]:
        if x["changed"]:
            moves[f"{x['then']}->{x['now']}"] = moves.get(f"{x['then']}->{x['now']}", 0) + 1
    assert s["transitions"] == moves


def _cusum_signals(run: RecordRun, target: float, k: float, h: float, lines: tuple[str, ...]
                   ) -> list[tuple[str, str, str, float]]:
    """The tabular CUSUM of NIST/SEMATECH e-Handbook §6.3.2.3 over each line's lots (close order), z = the
    lot's t against target from scipy.stats.ttest_1samp: S+ = max(0, S+ + z − k), S− = max(0, S− − z − k),
    a signal when one exceeds h, then both start again from 0; a lot the rule does not test (too few values,
normality rejected at the rule's default gate) adds nothing. Returns (line, lot, direction, statistic)."""
    out = []
    for line in lines:
        up = down = 0.0
        lots = [lot for (lot,) in db_rows(run.db, "SELECT lot FROM verdicts WHERE line = ? GROUP BY lot"
                                                  " ORDER BY min(id)", (line,))]
        for lot in lots:
            values = stored_values(run.db, line, lot)
            values = values[np.isfinite(values)]
            if len(values) < 5:     # below the rule's min_n: no test, no statistic for the chart
                continue
            if stats.shapiro(values).pvalue < 0.05:   # normality gate (scipy.stats.shapiro): review, no test
                continue
            z = float(stats.ttest_1samp(values, target).statistic)
            up, down = max(0.0, up + z - k), max(0.0, down - z - k)
            if up > h or down > h:
                out.append((line, lot, "up" if up > h and up >= down else "down", max(up, down)))
                up = down = 0.0
    return out


def _whole_lot(signals: list[dict[str, Any]]) -> list[tuple[str, str, str, float]]:
    return [(g["line"], g["lot"], g["direction"], g["statistic"]) for g in signals if g["head"] is None]


def test_drift_now_is_the_cusum_recursion_and_then_the_daemons_signals(drift_run: RecordRun, tmp_path: Path) -> None:
    same = replay_json(drift_run, drift_run.root / "rules")
    s = same["summary"]
    assert s["changed"] == 0 and s["drift_signals_then"] > 0
    # the same rules: the charts run again give the signals the daemon recorded
    key = ("line", "product", "head", "lot", "method", "direction")
    assert [tuple(g[c] for c in key) for g in s["drift_now"]] == [tuple(g[c] for c in key) for g in s["drift_then"]]
    for now, then in zip(s["drift_now"], s["drift_then"], strict=True):
        assert now["statistic"] == pytest.approx(then["statistic"], rel=1e-12)
    # a candidate chart (another k and h): the recursion written out above, whole-lot series
    candidate = RULE.replace(f"target = {TARGET}", "target = 502.1") + DRIFT.replace("k = 0.5", "k = 0.25").replace(
        "h = 4.0", "h = 3.0").replace("heads = true", "heads = false")
    out = replay_json(drift_run, rules_dir(tmp_path, "candidate", candidate))
    expected = _cusum_signals(drift_run, 502.1, 0.25, 3.0, ("L1", "L2", "L3"))
    got = _whole_lot(out["summary"]["drift_now"])
    assert len(got) == len(expected) > 0 and len(out["summary"]["drift_now"]) == len(got)
    for g, e in zip(got, expected, strict=True):
        assert g[:3] == e[:3] and g[3] == pytest.approx(e[3], rel=1e-9)
    assert out["summary"]["drift_signals_now"] == len(expected)
    for g in out["summary"]["drift_now"]:
        assert set(g) >= {"line", "product", "head", "lot", "method", "direction", "statistic", "limit"}
        assert g["method"] == "cusum" and g["limit"] == 3.0


def _snapshot(run: RecordRun) -> tuple[Any, ...]:
    db = run.db
    tables = [t for (t,) in db_rows(db, "SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name")]
    counts = tuple((t, db_rows(db, f"SELECT count(*) FROM {t}")[0][0]) for t in tables)
    wal = db.with_name(db.name + "-wal")
    return (db.read_bytes(), db.stat().st_mtime_ns, wal.read_bytes() if wal.exists() else b"", counts)


def test_nothing_is_written_and_nothing_sent(drift_run: RecordRun, tmp_path: Path) -> None:
    before = _snapshot(drift_run)
    alerts_log = drift_run.root / "alerts.jsonl"
    log_before = alerts_log.read_bytes() if alerts_log.exists() else b""
    for rules in (drift_run.root / "rules", rules_dir(tmp_path, "candidate", CANDIDATE + DRIFT)):
        for fmt in ("json", "table"):
            assert replay(drift_run, rules, "--format", fmt).returncode == 0
    assert _snapshot(drift_run) == before   # db bytes, mtime, WAL, and every table's row count (outbox too)
    assert (alerts_log.read_bytes() if alerts_log.exists() else b"") == log_before


def test_bad_input_exits_2_naming_what_is_wrong(record_run: RecordRun, tmp_path: Path) -> None:
    bad = rules_dir(tmp_path, "bad", RULE.replace("alpha = 0.05", 'alpha = "often"'))
    p = replay(record_run, bad)
    assert p.returncode == 2 and "oat-500.toml" in p.stderr and "alpha" in p.stderr and p.stdout == ""
    p = replay(record_run, tmp_path / "no-such-folder")
    assert p.returncode == 2 and "no-such-folder" in p.stderr
    p = replay(record_run, record_run.root / "rules", "--since", "yesterday")
    assert p.returncode == 2 and "--since" in p.stderr
    p = replay(record_run, record_run.root / "rules", "--since", "2026-12-02", "--until", "2026-12-01")
    assert p.returncode == 2 and "--until" in p.stderr


def test_filters_and_period(record_run: RecordRun) -> None:
    rules = record_run.root / "rules"
    assert [x["lot"] for x in replay_json(record_run, rules, "--line", "L2")["lots"]] == ["B1", "B2"]
    assert replay_json(record_run, rules, "--product", "NONE")["lots"] == []
    assert replay_json(record_run, rules, "--until", "2000-01-01")["summary"]["lots"] == 0
    assert replay_json(record_run, rules, "--since", "2000-01-01")["summary"]["lots"] == len(CLOSED)


def test_table_lists_each_lot_and_the_summary(record_run: RecordRun, tmp_path: Path) -> None:
    p = replay(record_run, rules_dir(tmp_path, "candidate", CANDIDATE))
    assert p.returncode == 0, p.stderr
    lines = p.stdout.splitlines()
    header = lines[0].split()
    assert header[:3] == ["line", "product", "lot"] and "then" in header and "now" in header
    for _line, lot in CLOSED:
        assert any(row.split()[2:3] == [lot] for row in lines[2:])
    out = replay_json(record_run, rules_dir(tmp_path, "candidate", CANDIDATE))
    s = out["summary"]
    assert f"lots: {s['lots']}  changed: {s['changed']}" in lines
    assert f"then: hold {s['then']['hold']}  review {s['then']['review']}  pass {s['then']['pass']}" in lines
    assert any(row.startswith("drift signals: then 0  now 0") for row in lines)
    assert "competent authority" in p.stdout       # the shared caution


@pytest.mark.parametrize("unit", ["g", "kg"])
def test_the_batch_reader_reads_what_the_daemons_reader_reads(drift_run: RecordRun, unit: str) -> None:
    """Every lot of the daemon-made state (mixed g / kg rows and a blank one on L3 included), read by the batch
    reader and by ``judge.load_lot_values`` on the same connection: the same values, heads, units, files."""
    rule = load_rules(drift_run.root / "rules")[0]
    if unit == "kg":
        rule = Rule.from_toml({"name": "oat-kg", "products": ["*"], "target": 0.502, "unit": "kg"}, source="kg")
    with replaying.open_read_only(drift_run.db) as conn:
        judged = replaying.judged_lots(conn)
        wanted = [(j.lot_id, j.lot_rows) for j in judged if j.lot_id is not None]
        batch = replaying.stored_lots(conn, wanted)
        assert len(batch) == len(CLOSED) + 2
        mixed = 0
        for j in judged:
            v = j
            key = LotKey(v.line, v.product, v.lot)
            assert v.lot_id is not None
            ref, ref_problem = judge.load_lot_values(conn, v.lot_id, key, rule)
            got, problem = rp.values_lot(key, batch[v.lot_id], rule)
            assert problem == ref_problem
            assert ref.values is not None and got.values is not None
            np.testing.assert_array_equal(got.values, ref.values)     # NaN in the same places
            assert (got.heads, got.files, got.unit, got.unit_assumed, dict(got.excluded_by)) == \
                (ref.heads, ref.files, ref.unit, ref.unit_assumed, dict(ref.excluded_by))
            mixed += batch[v.lot_id].pair_of_row is not None
    assert mixed == 1     # C1 of line L3: the lot whose rows are in g and in kg
    c1 = batch[next(j.lot_id for j in judged if j.lot == "C1") or 0]
    assert np.isnan(c1.values).sum() == 1 and c1.excluded_by == {"blank": 1}


def test_a_lot_reopened_by_late_values_is_read_as_its_latest_verdict_judged_it(drift_run: RecordRun,
                                                                                 tmp_path: Path) -> None:
    """Rows that arrived after the lot's latest verdict (the lot reopened, not closed again) are not judged:
    the replay reads the ``lot_rows`` its verdict was made on. The late rows are added here with sqlite3 on
    a copy of the state, as the daemon's intake would store them."""
    copy = RecordRun(root=tmp_path, config=tmp_path / "lotwarden.toml", db=tmp_path / "state" / "lotwarden.db")
    (tmp_path / "state").mkdir()
    copy.config.write_text(drift_run.config.read_text(encoding="utf-8"), encoding="utf-8")
    src = sqlite3.connect(f"file:{drift_run.db}?mode=ro", uri=True)
    dst = sqlite3.connect(copy.db)
    src.backup(dst)
    src.close()
    lot_id, n, file_id = dst.execute("SELECT l.id, l.n, min(v.file_id) FROM lots l JOIN lot_values v ON v.lot_id = l.id"
                                     " WHERE l.line = 'L1' AND l.lot = 'A2'").fetchone()
    dst.executemany("INSERT INTO lot_values(lot_id, line, product, lot, seq, value, unit, head, file_id)"
                    " VALUES (?, 'L1', 'OAT-500', 'A2', ?, 530.0, 'g', 'H1', ?)",
                    [(lot_id, n + i, file_id) for i in range(1, 41)])
    dst.execute("UPDATE lots SET state = 'open', n = n + 40, late_values = 40 WHERE id = ?", (lot_id,))
    dst.commit()
    dst.close()
    out = replay_json(copy, drift_run.root / "rules")
    a2 = next(x for x in out["lots"] if x["lot"] == "A2")
    # the p-value of the 24 rows judged then (scipy.stats.ttest_1samp), not of 64 rows with 40 at 530 g
    ref = stats.ttest_1samp(stored_values(drift_run.db, "L1", "A2"), TARGET)
    assert a2["p_value_now"] == pytest.approx(float(ref.pvalue), rel=1e-9) and a2["now"] == a2["then"] == "hold"
    assert out["summary"]["changed"] == 0
