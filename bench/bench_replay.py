"""Benchmark: `replay` over a year of one line (35,000 lots of 100 values) vs judging the lots one by one.

Run by hand (``python bench/bench_replay.py [LOTS]``). It builds a state database of invented lots (line L1 of
the invented Brackenfield Foods plant, product OAT-500) with a bulk insert, stores each lot's verdict, then
times in the same process (a) the replay path: the batch reader, ``evaluate_many`` per rule and the drift
charts, and (b) the lot-by-lot path: ``load_lot_values`` (three queries per lot) and ``evaluate`` per lot.
It checks that both give the same verdicts and p-values, and prints both timings and their ratio. End to end,
it then times (c) the command a user runs, ``lotwarden replay --format json``, against (d) the script a user
would write for the same question (sqlite3 read, scipy ``ttest_1samp`` + ``shapiro`` per lot, a CUSUM loop,
JSON out), both as commands.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
import tempfile
import textwrap
import time
import tomllib
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from monitor import replay as rp
from monitor.commands.replay import gather
from monitor.daemon import judge
from monitor.engine import evaluate, evaluate_many
from monitor.lot import LotData, LotKey
from monitor.period import Period
from monitor.rulebook import Rule
from monitor.state import replaying
from monitor.state.database import DB_NAME, Database, utc_iso

LOTS, SIZE, TARGET = 35_000, 100, 502.0
RULE = """\
name = "oat-500"
products = ["OAT-500"]
target = 502.0
unit = "g"
alpha = 0.05
min_n = 5

[drift]
method = "cusum"
k = 0.5
h = 5.0
"""


def build(folder: Path, lots: int, rule: Rule, seed: int = 20261201) -> float:
    """The state of ``lots`` closed lots with their verdicts; returns the seconds it took."""
    t0 = time.perf_counter()
    rng = np.random.default_rng(seed)
    shift = rng.normal(0.0, 0.3, lots)
    values = np.round(rng.normal(TARGET + shift[:, None], 1.5, (lots, SIZE)), 2)
    codes = [f"B{i:05d}" for i in range(lots)]
    verdicts = evaluate_many([LotData(LotKey("L1", "OAT-500", c), values=values[i]) for i, c in enumerate(codes)],
                             rule)
    payloads = [(v.verdict, json.dumps({"p_value": v.p_value, "verdict": v.verdict})) for v in verdicts]
    db = Database.open(folder)
    try:
        with db.write() as conn:
            replaying.bulk_insert(conn, line="L1", product="OAT-500", unit="g", lots=codes, values=values,
                                  heads=("H1", "H2", "H3", "H4"), at=utc_iso(datetime.now(UTC)), verdicts=payloads)
    finally:
        db.close()
    return time.perf_counter() - t0


def replay_path(db: Path, rules: list[Rule]) -> tuple[rp.Replay, float]:
    """(a) What `lotwarden replay` does after parsing its flags: batch read, batch judge, drift charts.
    Returns the replay and the seconds the read took."""
    t0 = time.perf_counter()
    with replaying.open_read_only(db) as conn:
        items, signals, skipped = gather(conn, rules, Period(), line=None, product=None)
    read = time.perf_counter() - t0
    return rp.replay(items, signals, skipped=skipped), read


def lot_by_lot(db: Path, rule: Rule) -> list[tuple[str, float | None]]:
    """(b) The daemon's per-lot reader and the engine lot by lot."""
    out = []
    with replaying.open_read_only(db) as conn:
        for j in replaying.judged_lots(conn):
            v = j
            assert v.lot_id is not None
            data, problem = judge.load_lot_values(conn, v.lot_id, LotKey(v.line, v.product, v.lot), rule)
            verdict = judge.judge(data, rule, problem, evaluate)
            out.append((verdict.verdict, verdict.p_value))
    return out


USER_SCRIPT = textwrap.dedent("""\
    import json, sqlite3, sys
    import numpy as np
    from scipy import stats
    conn = sqlite3.connect(f"file:{sys.argv[1]}?mode=ro", uri=True)
    rows = conn.execute("SELECT lot, value FROM lot_values ORDER BY lot_id, seq").fetchall()
    lots, values = {}, {}
    for lot, v in rows:
        values.setdefault(lot, []).append(v)
    out, hi, lo, signals = [], 0.0, 0.0, 0
    for lot, vals in values.items():
        x = np.array(vals, dtype=float)
        t = stats.ttest_1samp(x, 502.0)
        sw = stats.shapiro(x)
        verdict = "review" if sw.pvalue < 0.05 else ("hold" if t.pvalue < 0.05 else "pass")
        if verdict != "review":
            hi, lo = max(0.0, hi + t.statistic - 0.5), max(0.0, lo - t.statistic - 0.5)
            if hi > 5.0 or lo > 5.0:
                signals, hi, lo = signals + 1, 0.0, 0.0
        out.append({"lot": lot, "now": verdict, "p_value": float(t.pvalue)})
    print(json.dumps({"lots": out, "drift_signals": signals}))
    """)


def end_to_end(folder: Path) -> tuple[float, float]:
    """(c) ``lotwarden replay --format json`` and (d) the user's script, each as a command; seconds each."""
    (folder / "rules").mkdir()
    (folder / "rules" / "oat-500.toml").write_text(RULE, encoding="utf-8")
    (folder / "lotwarden.toml").write_text('rules_dir = "rules"\n[watch]\nfolder = "drop"\n[state]\nfolder = "."\n',
                                           encoding="utf-8")
    (folder / "user.py").write_text(USER_SCRIPT, encoding="utf-8")
    t0 = time.perf_counter()
    ours = subprocess.run([sys.executable, "-m", "monitor", "replay", "--config", str(folder / "lotwarden.toml"),
                           "--rules", str(folder / "rules"), "--format", "json"], capture_output=True, check=True)
    t_ours = time.perf_counter() - t0
    t0 = time.perf_counter()
    theirs = subprocess.run([sys.executable, str(folder / "user.py"), str(folder / DB_NAME)], capture_output=True,
                            check=True)
    t_theirs = time.perf_counter() - t0
    assert len(json.loads(ours.stdout)["lots"]) == len(json.loads(theirs.stdout)["lots"])
    return t_ours, t_theirs


def main() -> int:
    lots = int(sys.argv[1]) if len(sys.argv) > 1 else LOTS
    rule = Rule.from_toml(tomllib.loads(RULE), source="bench")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        built = build(folder, lots, rule)
        db = folder / DB_NAME
        print(f"state of {lots:,} lots x {SIZE} values built in {built:.1f} s ({db.stat().st_size / 1e6:.0f} MB)")
        t0 = time.perf_counter()
        result, t_read = replay_path(db, [rule])
        t_replay = time.perf_counter() - t0
        t0 = time.perf_counter()
        ref = lot_by_lot(db, rule)
        t_loop = time.perf_counter() - t0
        t_cmd, t_user = end_to_end(folder)
    assert len(result.rows) == len(ref) == lots
    worst = 0.0
    for row, (verdict, p) in zip(result.rows, ref, strict=True):
        assert row.now.verdict == verdict == row.then.verdict
        if p is not None and row.now.p_value is not None and p > 0:
            worst = max(worst, abs(row.now.p_value - p) / p)
        else:
            assert row.now.p_value == p or (math.isnan(p or 0.0) and math.isnan(row.now.p_value or 0.0))
    s = result.summary
    print(f"replay (batch read + evaluate_many + drift): {t_replay:.2f} s; lots {s.lots}, changed {s.changed},"
          f" drift signals now {len(s.drift_now)}")
    print(f"  of which the batch read {t_read:.2f} s, evaluate_many and the drift charts {t_replay - t_read:.2f} s")
    print(f"lot by lot (load_lot_values + evaluate):      {t_loop:.2f} s")
    print(f"ratio: {t_loop / t_replay:.1f}x; worst relative p-value difference {worst:.1e}")
    print(f"end to end: `lotwarden replay --format json` {t_cmd:.2f} s vs the user's script (sqlite3 + scipy "
          f"ttest_1samp + shapiro per lot + CUSUM) {t_user:.2f} s: {t_cmd / t_user:.2f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
