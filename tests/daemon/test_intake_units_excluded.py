"""Issue 7 §1-2 in the daemon: values without a unit are taken in the rule's unit and say so; rows of a lot
without a usable value are stored in their place and counted per reason; an unusable lot summary becomes a
`review`; a database of the first schema still opens (real SQLite files, real folders, real reader)."""

from __future__ import annotations

import json
import sqlite3
import statistics
from pathlib import Path

import pytest
import scipy.stats

PROFILES = """
    [profiles.l9-drops]
    match = ["L9-*.csv"]
    drop_values = ["-9999"]

    [profiles.l8-summaries]
    match = ["L8-*.csv"]
    max_bad_rows = 5
    """
FOUR = ("blank", "not_a_number", "not_finite", "dropped_value")


@pytest.fixture
def env(tmp_path: Path, clock, make_setup):
    """(config, store, intake) with the OAT-500 (g) and JUICE-1L (mL) rules and the two profiles above."""
    from monitor.daemon.config import load_config, load_rule_set
    from monitor.daemon.intake import Intake
    from monitor.state.database import Database as Store

    cfg = load_config(make_setup(tmp_path, extra=PROFILES))
    store = Store.open(cfg.state.folder)
    try:
        yield cfg, store, Intake(cfg, load_rule_set(cfg), store, clock=clock)
    finally:
        store.close()


def payloads(store, lot: str) -> list[dict]:
    return [json.loads(r[0]) for r in store.conn.execute("SELECT payload FROM verdicts WHERE lot=? ORDER BY id",
                                                         (lot,))]


def verdict_audit(store, lot: str) -> dict:
    row = store.conn.execute("SELECT detail FROM audit WHERE event='verdict' AND lot=? ORDER BY id DESC LIMIT 1",
                             (lot,)).fetchone()
    return json.loads(row[0])


JUICE = [1001.2, 999.8, 1000.6, 1000.9, 1001.4, 1000.1, 999.9, 1000.7]   # invented input


@pytest.mark.parametrize("unit_column", [False, True], ids=["no-unit", "unit-mL"])
def test_values_without_a_unit_are_judged_in_the_rules_unit_and_say_so(env, unit_column: bool) -> None:
    """No unit column, no profile unit: a mL rule judges the values as mL (not as grams needing a density)
    and the verdict, its stored payload and its audit record say unit_assumed; with a unit column, not."""
    cfg, store, intake = env
    head = "lot,product,line,value" + (",unit" if unit_column else "")
    rows = [f"JC-1,JUICE-1L,L5,{v}" + (",mL" if unit_column else "") for v in JUICE]
    p = Path(cfg.watch.folder) / "L5-juice.csv"
    p.write_text("\n".join([head] + rows) + "\n", encoding="utf-8")
    assert intake.process(p).status == "taken"
    (v,) = intake.close_idle(idle_seconds_override=0)
    assert v.unit == "mL" and v.unit_assumed is (not unit_column)
    assert v.mean == pytest.approx(statistics.fmean(JUICE), rel=1e-12)   # no factor applied (Python statistics)
    ref = scipy.stats.ttest_1samp(JUICE, 1000.0, alternative="less")    # the rule: less, alpha 0.01 (scipy)
    assert v.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    assert v.verdict == ("hold" if ref.pvalue < 0.01 else "pass")
    (stored,) = payloads(store, "JC-1")
    assert stored["unit_assumed"] is (not unit_column) and stored["unit"] == "mL"
    assert verdict_audit(store, "JC-1")["unit_assumed"] is (not unit_column)


def drops_file(folder: Path) -> tuple[Path, list[float], dict[int, str]]:
    """100 usable OAT values of lot A1 with four rows of A1 without a usable value among them, then one row
    of lot A2 (which closes A1 within the file). Returns (path, usable values in order, seq -> reason)."""
    lines = ["lot,product,line,value"]
    usable: list[float] = []
    odd = {10: ("", "blank"), 20: ("abc", "not_a_number"), 30: ("nan", "not_finite"), 40: ("-9999", "dropped_value")}
    reasons: dict[int, str] = {}
    for i in range(100):
        if i in odd:
            lines.append(f"A1,OAT-500,L9,{odd[i][0]}")
            reasons[len(lines) - 1] = odd[i][1]              # seq = data row number within the lot
        v = round(500.0 + ((i * 7) % 11 - 5) / 10, 1)
        usable.append(v)
        lines.append(f"A1,OAT-500,L9,{v}")
    lines.append("A2,OAT-500,L9,500.3")
    p = folder / "L9-drops.csv"
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return p, usable, reasons


@pytest.mark.parametrize("recent_max", [10_000, 3], ids=["from-memory", "read-back"])
def test_rows_without_a_usable_value_keep_their_place_and_are_counted_per_reason(env, monkeypatch,
                                                                                 recent_max: int) -> None:
    """Blank, non-numeric, non-finite and drop_values rows of a lot are stored at their place in arrival
    order with their reason; the verdict counts them in excluded / excluded_by (from memory and read back)."""
    from monitor.daemon import judge

    monkeypatch.setattr(judge, "RECENT_LOT_MAX", recent_max)
    cfg, store, intake = env
    p, usable, reasons = drops_file(Path(cfg.watch.folder))
    out = intake.process(p)
    assert out.status == "taken" and out.n_values == len(usable) + 1
    (v,) = out.verdicts
    assert v.key.lot == "A1" and v.n == len(usable) and v.excluded == 4
    assert dict(v.excluded_by) == {r: 1 for r in FOUR}
    assert v.mean == pytest.approx(statistics.fmean(usable), rel=1e-12)   # Python statistics, usable only
    stored = store.conn.execute("SELECT seq, value, excluded FROM lot_values WHERE lot='A1' ORDER BY seq").fetchall()
    assert [s for s, _v, _e in stored] == list(range(1, len(usable) + 5))
    assert {s: e for s, _v, e in stored if e} == reasons
    assert all(val is None for s, val, _e in stored if s in reasons)
    assert [val for s, val, _e in stored if s not in reasons] == usable
    (payload,) = payloads(store, "A1")
    assert payload["excluded"] == 4 and payload["excluded_by"] == {r: 1 for r in FOUR}
    audit = verdict_audit(store, "A1")
    assert audit["excluded"] == 4 and audit["excluded_by"] == {r: 1 for r in FOUR}
    taken = json.loads(store.conn.execute("SELECT detail FROM audit WHERE event='file-taken'").fetchone()[0])
    assert taken["bad_rows"] == 3      # the file's bad-row count still counts blank / not a number / not finite


def test_an_unusable_lot_summary_is_a_review_never_left_out(env) -> None:
    """Summary records with n = 1 and sd nan, or a negative sd, are stored and judged `review` with the
    reason "the lot summary is not usable: ..."; each raises a review alert; the good record is judged."""
    cfg, store, intake = env
    p = Path(cfg.watch.folder) / "L8-summary.csv"
    p.write_text("lot,product,line,n,mean,sd,unit\nS1,OAT-500,L8,1,500.4,nan,g\nS2,OAT-500,L8,30,500.4,1.2,g\n"
                 "S3,OAT-500,L8,30,500.1,-1,g\n", encoding="utf-8")
    out = intake.process(p)
    assert out.status == "taken"
    assert [(v.key.lot, v.verdict) for v in out.verdicts][::2] == [("S1", "review"), ("S3", "review")]
    bad = {v.key.lot: v.reason for v in out.verdicts if v.key.lot != "S2"}
    assert all(r.startswith("the lot summary is not usable: ") for r in bad.values()), bad
    assert "sd" in bad["S1"] and "negative" in bad["S3"]
    # the good record: one-sample t from summary statistics, t = (mean - target) / (sd / sqrt(n)) (scipy t)
    s2 = out.verdicts[1]
    t = (500.4 - 500.0) / (1.2 / 30 ** 0.5)
    assert s2.p_value == pytest.approx(2 * scipy.stats.t.sf(abs(t), 29), rel=1e-9)
    problems = dict(store.conn.execute("SELECT lot, problem FROM lot_summaries"))
    assert problems["S2"] == "" and problems["S1"] and problems["S3"]
    kinds = sorted(store.conn.execute("SELECT kind, lot FROM alerts"))
    assert ("review", "S1") in kinds and ("review", "S3") in kinds
    assert [j["verdict"] for j in payloads(store, "S1")] == ["review"]


# The tables of the first schema (version 1) that later versions changed, as a database of that version has
# them (copied from the store's schema of version 1).
SCHEMA_V1 = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
INSERT INTO meta VALUES ('schema_version', '1');
CREATE TABLE files (
    id INTEGER PRIMARY KEY, sha256 TEXT NOT NULL, path TEXT NOT NULL, size INTEGER NOT NULL, mtime REAL NOT NULL,
    first_seen_at TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN ('processing', 'done', 'rejected', 'duplicate')),
    processed_at TEXT, archived_path TEXT, archived_at TEXT, reason TEXT, kind TEXT,
    n_values INTEGER NOT NULL DEFAULT 0, n_bad_rows INTEGER NOT NULL DEFAULT 0, attempts INTEGER NOT NULL DEFAULT 0,
    duplicate_of INTEGER REFERENCES files(id), revision_of INTEGER REFERENCES files(id));
CREATE TABLE lots (
    id INTEGER PRIMARY KEY, line TEXT NOT NULL, product TEXT NOT NULL, lot TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN ('open', 'closed')), opened_at TEXT NOT NULL, last_value_at TEXT NOT NULL,
    last_value_ts REAL NOT NULL, closed_at TEXT, close_reason TEXT, n INTEGER NOT NULL DEFAULT 0,
    times_closed INTEGER NOT NULL DEFAULT 0, late_values INTEGER NOT NULL DEFAULT 0, UNIQUE (line, product, lot));
CREATE TABLE lot_values (
    id INTEGER PRIMARY KEY, lot_id INTEGER NOT NULL REFERENCES lots(id), line TEXT NOT NULL, product TEXT NOT NULL,
    lot TEXT NOT NULL, seq INTEGER NOT NULL, value REAL, unit TEXT NOT NULL, density REAL,
    head TEXT NOT NULL DEFAULT '', timestamp TEXT, file_id INTEGER NOT NULL REFERENCES files(id),
    source_line INTEGER, UNIQUE (lot_id, seq));
CREATE TABLE lot_summaries (
    id INTEGER PRIMARY KEY, file_id INTEGER NOT NULL REFERENCES files(id), source_line INTEGER, line TEXT NOT NULL,
    product TEXT NOT NULL, lot TEXT NOT NULL, n INTEGER NOT NULL, mean REAL, sd REAL, unit TEXT NOT NULL,
    density REAL, timestamp TEXT);
CREATE TABLE verdicts (
    id INTEGER PRIMARY KEY, decided_at TEXT NOT NULL, line TEXT NOT NULL, product TEXT NOT NULL, lot TEXT NOT NULL,
    rule TEXT NOT NULL, rule_version TEXT NOT NULL, rule_hash TEXT NOT NULL, verdict TEXT NOT NULL,
    n INTEGER NOT NULL, mean REAL, target REAL, unit TEXT NOT NULL, payload TEXT NOT NULL,
    lot_id INTEGER REFERENCES lots(id), summary_id INTEGER REFERENCES lot_summaries(id), close_reason TEXT);
"""
OLD_VALUES = [500.2, 499.8, None, 500.6, 500.1, 499.5]   # None: a non-finite value, stored as NULL then


def test_a_database_of_the_first_schema_opens_and_its_lots_are_judged(tmp_path: Path, clock, make_setup) -> None:
    """A state database made with schema version 1 opens: the new columns are added, old rows kept; an
    open lot stored then is judged with its NULL value counted as not_finite."""
    from monitor.daemon.config import load_config, load_rule_set
    from monitor.daemon.intake import Intake
    from monitor.state.database import Database as Store

    cfg = load_config(make_setup(tmp_path))
    Path(cfg.state.folder).mkdir(parents=True)
    db = Path(cfg.state.folder) / "lotwarden.db"
    old = sqlite3.connect(str(db))
    old.executescript(SCHEMA_V1)
    at = "2026-11-30T05:00:00+00:00"
    old.execute("INSERT INTO files VALUES (1, 'ab', '/old/drop/L1-old.csv', 10, 0, ?, 'done', ?,"
                " '/old/archive/L1-old.csv', ?, NULL, 'values', 5, 1, 0, NULL, NULL)", (at, at, at))
    old.execute("INSERT INTO lots(id, line, product, lot, state, opened_at, last_value_at, last_value_ts, n)"
                " VALUES (1, 'L1', 'OAT-500', 'OLD-1', 'open', ?, ?, 0, ?)", (at, at, len(OLD_VALUES)))
    old.executemany("INSERT INTO lot_values(lot_id, line, product, lot, seq, value, unit, file_id)"
                    " VALUES (1, 'L1', 'OAT-500', 'OLD-1', ?, ?, 'g', 1)", list(enumerate(OLD_VALUES, 1)))
    old.commit()
    old.close()
    store = Store.open(cfg.state.folder)
    try:
        cols = {t: {r[1] for r in store.conn.execute(f"PRAGMA table_info({t})")}
                for t in ("lot_values", "lot_summaries", "verdicts")}
        assert "excluded" in cols["lot_values"] and "problem" in cols["lot_summaries"]
        assert "lot_rows" in cols["verdicts"]
        assert store.conn.execute("SELECT count(*) FROM lot_values WHERE excluded = ''").fetchone()[0] == 6
        intake = Intake(cfg, load_rule_set(cfg), store, clock=clock)
        (v,) = intake.close_idle(idle_seconds_override=0)
        finite = [x for x in OLD_VALUES if x is not None]
        assert v.n == len(finite) and v.mean == pytest.approx(statistics.fmean(finite), rel=1e-12)
        assert v.excluded == 1 and dict(v.excluded_by) == {"blank": 0, "not_a_number": 0, "not_finite": 1,
                                                           "dropped_value": 0}
        assert v.files == ("/old/archive/L1-old.csv",)
        upgraded = store.conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
    finally:
        store.close()
    assert int(upgraded[0]) > 1   # the first schema was upgraded
    again = Store.open(cfg.state.folder)   # opening it a second time changes nothing
    try:
        assert again.conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone() == upgraded
    finally:
        again.close()


def test_held_passed_and_held_again_tells_each_change(env) -> None:
    """Hold, then a pass after late values (one verdict-changed naming the hold), then a hold again after
    more late values: that hold is told again (its own alert), with no verdict-changed (a pass raised no
    notice to replace)."""
    import numpy as np

    cfg, store, intake = env
    low = [497.1, 496.5, 497.8, 496.9, 497.4, 498.0, 496.2, 497.6, 497.0, 496.8, 497.3, 497.9]   # invented
    late = [float(x) for x in np.round(np.random.default_rng(20261212).normal(500.8, 2.0, 36), 1)]
    low2 = [float(x) for x in np.round(np.random.default_rng(0).normal(498.0, 2.5, 40), 1)]
    # inputs checked with scipy.stats: normal enough for the rule's Shapiro–Wilk gate (alpha 0.05), and
    # Student's t at alpha 0.05 gives hold, pass, hold
    for x, held in ((low, True), (low + late, False), (low + late + low2, True)):
        assert scipy.stats.shapiro(x).pvalue > 0.05
        assert bool(scipy.stats.ttest_1samp(x, 500.0).pvalue < 0.05) is held
    drop = Path(cfg.watch.folder)
    verdicts = []
    for i, values in enumerate((low, late, low2)):
        p = drop / f"L1-{i}.csv"
        p.write_text("lot,product,line,value,unit\n" + "".join(f"A1,OAT-500,L1,{v},g\n" for v in values))
        intake.process(p)
        (v,) = intake.close_idle(idle_seconds_override=0)
        verdicts.append(v.verdict)
    assert verdicts == ["hold", "pass", "hold"]
    alerts = store.conn.execute("SELECT kind FROM alerts ORDER BY id").fetchall()
    assert [k for (k,) in alerts] == ["hold", "verdict-changed", "hold"]
    changed = json.loads(store.conn.execute("SELECT payload FROM alerts WHERE kind='verdict-changed'")
                         .fetchone()[0])["data"]
    assert changed["previous"]["verdict"] == "hold" and changed["verdict"] == "pass"
    archived = store.conn.execute("SELECT archived_path FROM files WHERE path LIKE '%L1-1.csv'").fetchone()[0]
    assert changed["why"] == f"{len(late)} late values from {archived} reopened the lot"
