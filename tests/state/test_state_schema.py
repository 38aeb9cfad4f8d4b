"""The versioned schema on real SQLite files: a version-2 database made by release 0.1.0, a version-3
database with the senders' rows and a version-1 database upgrade in place with every row kept; a database
newer than the code is refused; an upgrade is whole or not at all."""

from __future__ import annotations

import hashlib
import importlib.util
import shutil
import sqlite3
import statistics
from datetime import UTC
from pathlib import Path
from types import ModuleType

import pytest
import scipy.stats

from monitor.state import audit, files, lots, schema, verdicts
from monitor.state.database import DB_NAME, Database
from monitor.state.schema import CURRENT_VERSION, SchemaVersionError

FIXTURES = Path(__file__).resolve().parent / "fixtures"
V2_DB = FIXTURES / "lotwarden-v2.db"

# Every table of the current schema (version 6).
TABLES = {"meta", "files", "lots", "lot_values", "lot_summaries", "verdicts", "audit", "alerts", "deliveries",
          "email_messages", "email_recipient_sends", "email_lot_notices", "digest_runs", "email_batches",
          "dispositions", "rule_texts", "drift_tracks", "drift_lots", "drift_signals"}
# Rows per table in the fixture, as make_v2.py wrote them: two files (a values export, a summary export),
# lots A1 (9 rows, one blank) and A2 (1 row), one summary record, two verdicts (A1 hold, S2 pass), four
# audit records (a verdict and a file-taken per file), A1's hold alert with its one log delivery.
V2_COUNTS = {"files": 2, "lots": 2, "lot_values": 10, "lot_summaries": 1, "verdicts": 2, "audit": 4,
             "alerts": 1, "deliveries": 1}


def _make_v2() -> ModuleType:
    spec = importlib.util.spec_from_file_location("make_v2", FIXTURES / "make_v2.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _counts(conn: sqlite3.Connection, tables: set[str] | dict[str, int]) -> dict[str, int]:
    return {t: conn.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in tables}


def _tables(conn: sqlite3.Connection) -> set[str]:
    return {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}


def _version(db: Path) -> str:
    conn = sqlite3.connect(str(db))
    try:
        return str(conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0])
    finally:
        conn.close()


@pytest.fixture
def v2_folder(tmp_path: Path) -> Path:
    """A state folder holding a copy of the version-2 fixture (the committed file is never opened)."""
    folder = tmp_path / "state"
    folder.mkdir()
    shutil.copyfile(V2_DB, folder / DB_NAME)
    return folder


def test_the_fixture_is_a_version_2_database_of_release_0_1_0() -> None:
    """The committed file is what it claims: schema version 2, the senders' tables not yet there."""
    conn = sqlite3.connect(f"file:{V2_DB}?mode=ro", uri=True)
    try:
        assert conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone() == ("2",)
        assert _counts(conn, V2_COUNTS) == V2_COUNTS
        assert not {"email_messages", "digest_runs"} & _tables(conn)
    finally:
        conn.close()
    assert V2_DB.stat().st_size < 64 * 1024


def test_a_version_2_database_upgrades_keeping_every_row(v2_folder: Path) -> None:
    """Opening the v2 fixture brings it to the current version: same rows per table, the same values as
    make_v2.py wrote, the new tables created empty."""
    made = _make_v2()
    with Database.open(v2_folder) as db:
        c = db.conn
        assert _tables(c) == TABLES
        assert _counts(c, V2_COUNTS) == V2_COUNTS
        assert _counts(c, TABLES - set(V2_COUNTS) - {"meta"}) == {t: 0 for t in TABLES - set(V2_COUNTS) - {"meta"}}
        with db.read() as conn:
            f1, f2 = files.get(conn, 1), files.get(conn, 2)
            a1 = lots.find(conn, "L1", "OAT-500", "A1")
            assert a1 is not None
            rows = lots.values_of(conn, a1.id)
            (summary,) = lots.summaries(conn)
            stored = verdicts.all_rows(conn)
            taken = audit.records(conn, "file-taken")
    assert f1 is not None and f2 is not None
    # the files are known by the SHA-256 of their bytes (hashlib over the texts make_v2.py wrote)
    assert f1.sha256 == hashlib.sha256(made.VALUES_FILE.encode("utf-8")).hexdigest()
    assert f2.sha256 == hashlib.sha256(made.SUMMARY_FILE.encode("utf-8")).hexdigest()
    assert (f1.state, f1.kind, f1.n_values, f1.n_bad_rows, f1.size) == ("done", "values", 9, 1,
                                                                        len(made.VALUES_FILE))
    assert (f2.state, f2.kind, f2.n_values) == ("done", "summary", 1)
    fills = [497.1, 496.5, 497.8, None, 496.9, 497.4, 498.0, 496.2, 497.6]   # make_v2.VALUES_FILE, lot A1
    assert [r.value for r in rows] == fills
    assert [r.seq for r in rows] == list(range(1, 10))
    assert [r.excluded for r in rows] == ["", "", "", "blank", "", "", "", "", ""]
    assert (a1.state, a1.n) == ("closed", 9)
    assert (summary.lot, summary.n, summary.mean, summary.sd, summary.problem) == ("S2", 30, 500.4, 1.2, "")
    hold, passed = stored
    usable = [v for v in fills if v is not None]
    assert hold.lot == "A1" and hold.n == len(usable) and hold.lot_rows == 9
    assert hold.mean == pytest.approx(statistics.fmean(usable), rel=1e-12)          # Python statistics
    # the rule: two-sided one-sample t against 500 g at alpha 0.05 (scipy.stats.ttest_1samp)
    assert scipy.stats.ttest_1samp(usable, 500.0).pvalue < 0.05 and hold.verdict == "hold"
    assert (passed.lot, passed.verdict, passed.summary_id, passed.lot_rows) == ("S2", "pass", summary.id, None)
    assert [r.file_id for r in taken] == [1, 2]
    assert _version(v2_folder / DB_NAME) == str(CURRENT_VERSION) == "6"


def test_an_upgraded_database_is_used_as_before(v2_folder: Path, tmp_path: Path) -> None:
    """The daemon's intake on the upgraded fixture knows its files: the same bytes again are a duplicate
    of file 1; the alert it raises joins the one from 0.1.0 (which is still pending)."""
    from datetime import datetime

    from monitor.daemon.config import load_config, load_rule_set
    from monitor.daemon.intake import Intake

    made = _make_v2()
    for d in ("drop", "rules", "config"):
        (tmp_path / d).mkdir()
    (tmp_path / "rules" / "oat-500.toml").write_text(made.RULE, encoding="utf-8")
    (tmp_path / "config" / "lotwarden.toml").write_text(made.CONFIG, encoding="utf-8")
    cfg = load_config(tmp_path / "config" / "lotwarden.toml")
    assert Path(cfg.state.folder).resolve() == v2_folder.resolve()
    with Database.open(cfg.state.folder) as db:
        intake = Intake(cfg, load_rule_set(cfg), db, clock=lambda: datetime(2026, 12, 1, 6, 0, tzinfo=UTC))
        p = tmp_path / "drop" / "L1-again.csv"
        p.write_text(made.VALUES_FILE, encoding="utf-8")
        out = intake.process(p)
        assert out.status == "duplicate" and "same content as file 1 (L1-fills.csv" in out.reason
        kinds = [r[0] for r in db.conn.execute("SELECT kind FROM alerts ORDER BY id")]
        states = [r[0] for r in db.conn.execute("SELECT state FROM deliveries ORDER BY alert_id")]
    assert kinds == ["hold", "file-duplicate"] and states == ["pending", "pending"]


# The tables of the first schema (version 1) as a database of that version has them: no audit or outbox
# tables yet, and lot_values / lot_summaries / verdicts without the columns version 2 added.
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
V1_VALUES = [500.2, 499.8, None, 500.6, 500.1]   # invented; None: a non-finite value, stored as NULL then
AT = "2026-11-30T05:00:00+00:00"


def _write_v1(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    db = folder / DB_NAME
    old = sqlite3.connect(str(db))
    old.executescript(SCHEMA_V1)
    old.execute("INSERT INTO files VALUES (1, 'ab', '/old/drop/L1-old.csv', 10, 0, ?, 'done', ?,"
                " '/old/archive/L1-old.csv', ?, NULL, 'values', 5, 0, 0, NULL, NULL)", (AT, AT, AT))
    old.execute("INSERT INTO lots(id, line, product, lot, state, opened_at, last_value_at, last_value_ts, n)"
                " VALUES (1, 'L1', 'OAT-500', 'OLD-1', 'closed', ?, ?, 0, ?)", (AT, AT, len(V1_VALUES)))
    old.executemany("INSERT INTO lot_values(lot_id, line, product, lot, seq, value, unit, file_id)"
                    " VALUES (1, 'L1', 'OAT-500', 'OLD-1', ?, ?, 'g', 1)", list(enumerate(V1_VALUES, 1)))
    old.execute("INSERT INTO lot_summaries(file_id, line, product, lot, n, mean, sd, unit)"
                " VALUES (1, 'L1', 'OAT-500', 'S-OLD', 12, 500.5, 0.9, 'g')")
    old.execute("INSERT INTO verdicts(decided_at, line, product, lot, rule, rule_version, rule_hash, verdict, n,"
                " mean, target, unit, payload, lot_id) VALUES (?, 'L1', 'OAT-500', 'OLD-1', 'oat-500', 'v1', 'h',"
                " 'pass', 4, 500.175, 500.0, 'g', '{\"excluded\": 1}', 1)", (AT,))
    old.commit()
    old.close()
    return db


def test_a_version_1_database_upgrades_keeping_every_row(tmp_path: Path) -> None:
    """A first-schema database gets the columns of version 2 (old rows take the defaults), the tables it
    lacked and the senders' tables; every row stays; opening it again changes nothing."""
    db = _write_v1(tmp_path / "state")
    with Database.open(tmp_path / "state") as store:
        c = store.conn
        assert _tables(c) == TABLES
        assert _counts(c, {"files", "lots", "lot_values", "lot_summaries", "verdicts", "audit", "alerts"}) == {
            "files": 1, "lots": 1, "lot_values": 5, "lot_summaries": 1, "verdicts": 1, "audit": 0, "alerts": 0}
        with store.read() as conn:
            rows = lots.values_of(conn, 1)
            (summary,) = lots.summaries(conn)
            (verdict,) = verdicts.all_rows(conn)
            latest = verdicts.latest_for_lot(conn, "L1", "OAT-500", "OLD-1", 1)
    assert [r.value for r in rows] == V1_VALUES and {r.excluded for r in rows} == {""}
    assert (summary.lot, summary.n, summary.problem) == ("S-OLD", 12, "")
    assert (verdict.verdict, verdict.lot_rows, verdict.payload) == ("pass", None, '{"excluded": 1}')
    assert latest is not None and latest.id == verdict.id
    assert _version(db) == str(CURRENT_VERSION) == "6"
    with Database.open(tmp_path / "state") as again:
        assert _counts(again.conn, {"lot_values", "verdicts"}) == {"lot_values": 5, "verdicts": 1}
    assert _version(db) == str(CURRENT_VERSION)


# Rows a version-3 database of a daemon that has sent e-mail holds in the senders' tables (invented).
V3_MESSAGE = ("<lotwarden.0123456789abcdef0123456789abcdef@brackenfield.example>", 1764655200.0,
              '["qa@brackenfield.example"]', "[1]", 0)
V3_SENDS = [("qa@brackenfield.example", 1764655200.0), ("shift@brackenfield.example", 1764655260.0)]
V3_NOTICE = ("L1", "OAT-500", "A1", 1764655200.0)
V3_DIGEST = ("2026-12-02T06:00:00+00:00", "2026-12-01T06:00:00+00:00", "2026-12-02T06:00:00+00:00",
             "2026-12-02T06:00:01+00:00", "digest|2026-12-02T06:00:00+00:00")


def _write_v3(folder: Path) -> Path:
    """The v2 fixture brought to version 3 by the frozen DDL of step 3 (the tables as version 3 made them),
    with a row in each of the senders' tables and A1's hold delivered by e-mail."""
    folder.mkdir(parents=True, exist_ok=True)
    db = folder / DB_NAME
    shutil.copyfile(V2_DB, db)
    conn = sqlite3.connect(str(db))
    conn.executescript(schema.TABLES_V3)
    conn.execute("UPDATE meta SET value = '3' WHERE key = 'schema_version'")
    conn.execute("INSERT INTO deliveries(alert_id, channel, state, attempts, sent_at) VALUES (1, 'email', 'sent', 1,"
                 " '2026-12-02T06:00:00+00:00')")
    conn.execute("INSERT INTO email_messages(message_id, sent_at, recipients, alert_ids, folded) VALUES (?,?,?,?,?)",
                 V3_MESSAGE)
    conn.executemany("INSERT INTO email_recipient_sends(recipient, sent_at) VALUES (?,?)", V3_SENDS)
    conn.execute("INSERT INTO email_lot_notices(line, product, lot, notified_at) VALUES (?,?,?,?)", V3_NOTICE)
    conn.execute("INSERT INTO digest_runs(due_at, period_start, period_end, created_at, dedup_key) VALUES (?,?,?,?,?)",
                 V3_DIGEST)
    conn.commit()
    conn.close()
    return db


def test_a_version_3_database_upgrades_keeping_every_row(tmp_path: Path) -> None:
    """A version-3 database (the senders' tables filled) gets email_batches (and version 5's tables), empty,
    and keeps every row of
    every table, values as written; the new table takes a recorded message."""
    from monitor.state import outbox

    db = _write_v3(tmp_path / "state")
    before = sqlite3.connect(str(db))
    old_tables = _tables(before)
    dump = {t: sorted(before.execute(f"SELECT * FROM {t}").fetchall(), key=repr) for t in old_tables - {"meta"}}
    before.close()
    assert old_tables == TABLES - {"email_batches", "dispositions", "rule_texts", "drift_tracks", "drift_lots",
                                  "drift_signals"}
    with Database.open(tmp_path / "state") as store:
        c = store.conn
        assert _tables(c) == TABLES
        assert {t: sorted(c.execute(f"SELECT * FROM {t}").fetchall(), key=repr) for t in dump} == dump
        assert c.execute("SELECT * FROM email_messages").fetchall() == [(1, *V3_MESSAGE)]
        assert c.execute("SELECT count(*) FROM email_batches").fetchone() == (0,)
        with store.write() as conn:
            bid = outbox.record_batch(conn, message_id="<m@x.example>", planned_at=1.0,
                                      recipients=("qa@brackenfield.example",), alert_ids=[1], folded=False)
        with store.read() as conn:
            (open_batch,) = outbox.unfinished_batches(conn)
    assert (open_batch.id, open_batch.alert_ids, open_batch.recipients) == (bid, (1,), ("qa@brackenfield.example",))
    assert _version(db) == str(CURRENT_VERSION)


def test_a_new_database_is_built_at_the_current_version(tmp_path: Path) -> None:
    """An empty folder gets every table and meta.schema_version = the current version."""
    with Database.open(tmp_path / "new") as db:
        assert _tables(db.conn) == TABLES
    assert _version(tmp_path / "new" / DB_NAME) == str(CURRENT_VERSION)


def test_a_database_newer_than_the_code_is_refused(v2_folder: Path) -> None:
    """schema_version above the current one: a clear error naming the file and both versions; the rows
    and the stored version stay as they were."""
    db = v2_folder / DB_NAME
    conn = sqlite3.connect(str(db))
    conn.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(CURRENT_VERSION + 1),))
    conn.commit()
    conn.close()
    with pytest.raises(SchemaVersionError) as info:
        Database.open(v2_folder)
    text = str(info.value)
    assert str(db) in text
    assert f"schema version {CURRENT_VERSION + 1}" in text and f"schema version {CURRENT_VERSION})" in text
    assert _version(db) == str(CURRENT_VERSION + 1)
    conn = sqlite3.connect(str(db))
    try:
        assert _counts(conn, V2_COUNTS) == V2_COUNTS
        assert "digest_runs" not in _tables(conn)
    finally:
        conn.close()


@pytest.mark.parametrize("value", ["two", "0"])
def test_a_schema_version_that_is_not_a_version_is_refused(v2_folder: Path, value: str) -> None:
    """A schema_version that is not a whole number from 1 is refused naming the file and the value."""
    db = v2_folder / DB_NAME
    conn = sqlite3.connect(str(db))
    conn.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (value,))
    conn.commit()
    conn.close()
    with pytest.raises(SchemaVersionError, match=value) as info:
        Database.open(v2_folder)
    assert str(db) in str(info.value)


def test_an_upgrade_is_whole_or_not_at_all(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A step that fails leaves the database at the version it had: version 1, without the columns the
    step before it added (the whole upgrade is one transaction)."""
    db = _write_v1(tmp_path / "state")

    def fails(conn: sqlite3.Connection) -> None:
        raise RuntimeError("step 3 cannot run")

    monkeypatch.setattr(schema, "MIGRATIONS", (schema.MIGRATIONS[0], schema.Migration(3, "fails", fails)))
    with pytest.raises(RuntimeError, match="step 3"):
        Database.open(tmp_path / "state")
    assert _version(db) == "1"
    conn = sqlite3.connect(str(db))
    try:
        assert "excluded" not in {r[1] for r in conn.execute("PRAGMA table_info(lot_values)")}
        assert "audit" not in _tables(conn)
        assert conn.execute("SELECT count(*) FROM lot_values").fetchone()[0] == len(V1_VALUES)
    finally:
        conn.close()
    monkeypatch.undo()
    with Database.open(tmp_path / "state"):
        pass
    assert _version(db) == str(CURRENT_VERSION)


def test_the_daemon_refuses_a_newer_database_and_says_why(v2_folder: Path, tmp_path: Path) -> None:
    """`lotwarden run` on a state folder whose database is newer than the code exits 2 at once with one line
    naming the file and both versions (a real subprocess)."""
    import subprocess
    import sys

    made = _make_v2()
    for d in ("drop", "rules", "config"):
        (tmp_path / d).mkdir()
    (tmp_path / "rules" / "oat-500.toml").write_text(made.RULE, encoding="utf-8")
    cfg = tmp_path / "config" / "lotwarden.toml"
    cfg.write_text(made.CONFIG, encoding="utf-8")
    db = v2_folder / DB_NAME
    conn = sqlite3.connect(str(db))
    conn.execute("UPDATE meta SET value = '9' WHERE key = 'schema_version'")
    conn.commit()
    conn.close()
    done = subprocess.run([sys.executable, "-m", "monitor", "run", "--config", str(cfg)], capture_output=True,
                          text=True, timeout=60)
    assert done.returncode == 2, done.stderr
    line = next(x for x in done.stderr.splitlines() if x.startswith("lotwarden: "))
    assert str(db.resolve()) in line or str(db) in line
    assert "schema version 9" in line and f"schema version {CURRENT_VERSION})" in line
    assert _version(db) == "9"
