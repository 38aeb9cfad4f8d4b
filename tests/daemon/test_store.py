"""The state store: a real SQLite file with WAL, FULL sync, the documented tables and safe transactions."""

from __future__ import annotations

import sqlite3
import threading
from datetime import datetime, timezone
from pathlib import Path

import pytest

from monitor.alerts.alert import Alert
from monitor.state import outbox
from monitor.state.database import DB_NAME, utc_iso
from monitor.state.database import Database as Store


def _columns(conn: sqlite3.Connection, table: str) -> set[str]:
    return {row[1] for row in conn.execute(f"PRAGMA table_info({table})")}


def test_open_creates_folder_and_database_with_pragmas(tmp_path: Path) -> None:
    """open() creates the folder and lotwarden.db in WAL mode with synchronous=FULL."""
    with Store.open(tmp_path / "state" / "deep") as store:
        assert (tmp_path / "state" / "deep" / DB_NAME).is_file()
        assert store.conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        # SQLite docs, "PRAGMA synchronous": 0 = OFF, 1 = NORMAL, 2 = FULL, 3 = EXTRA
        assert store.conn.execute("PRAGMA synchronous").fetchone()[0] == 2
        assert store.conn.isolation_level is None  # autocommit: transactions are explicit


def test_tables_have_the_columns_others_read(tmp_path: Path) -> None:
    """files, verdicts, lot_values, lots, audit and the outbox tables exist with the agreed columns."""
    with Store.open(tmp_path) as store:
        c = store.conn
        assert {"id", "sha256", "path", "size", "mtime", "first_seen_at", "state", "processed_at",
                "archived_path", "reason"} <= _columns(c, "files")
        assert {"id", "decided_at", "line", "product", "lot", "rule", "rule_version", "rule_hash", "verdict",
                "n", "mean", "target", "unit", "payload"} <= _columns(c, "verdicts")
        assert {"line", "product", "lot", "seq", "value", "unit", "density", "head", "timestamp", "file_id",
                "source_line"} <= _columns(c, "lot_values")
        assert {"line", "product", "lot", "state", "opened_at", "last_value_at", "closed_at",
                "close_reason"} <= _columns(c, "lots")
        assert {"at", "event", "detail"} <= _columns(c, "audit")
        assert {"dedup_key", "kind", "payload"} <= _columns(c, "alerts")
        assert {"alert_id", "channel", "state"} <= _columns(c, "deliveries")


def test_reopen_keeps_data(tmp_path: Path) -> None:
    """A committed write survives closing and reopening the database file."""
    now = datetime(2026, 12, 1, 6, 0, tzinfo=timezone.utc)
    with Store.open(tmp_path) as store:
        store.record_event(now, "daemon-started", config="abc")
    with Store.open(tmp_path) as store:
        rows = store.conn.execute("SELECT at, event, detail FROM audit").fetchall()
    assert rows == [("2026-12-01T06:00:00+00:00", "daemon-started", '{"config": "abc"}')]


def test_write_rolls_back_when_the_block_raises(tmp_path: Path) -> None:
    """An exception inside write() leaves no trace: the audit row and the outbox alert are both gone."""
    with Store.open(tmp_path) as store:
        alert = Alert(kind="hold", dedup_key="hold|L1|OAT-500|OAT-24A101|v1", created_at="2026-12-01T06:00:00+00:00")
        with pytest.raises(RuntimeError):
            with store.write() as conn:
                store.audit(conn, "2026-12-01T06:00:00+00:00", "verdict")
                assert outbox.enqueue(conn, alert, ["log"])
                raise RuntimeError("boom")
        assert store.conn.execute("SELECT count(*) FROM audit").fetchone()[0] == 0
        assert store.conn.execute("SELECT count(*) FROM alerts").fetchone()[0] == 0
        with store.write() as conn:
            assert outbox.enqueue(conn, alert, ["log"])


def test_begin_immediate_takes_the_write_lock(tmp_path: Path) -> None:
    """While one store holds a write transaction, a second connection cannot start one (no lost update)."""
    with Store.open(tmp_path) as store:
        other = sqlite3.connect(str(tmp_path / DB_NAME), isolation_level=None, timeout=0.05)
        try:
            with store.write():
                with pytest.raises(sqlite3.OperationalError, match="locked"):
                    other.execute("BEGIN IMMEDIATE")
            other.execute("BEGIN IMMEDIATE")
            other.execute("COMMIT")
        finally:
            other.close()


def test_threads_share_one_store(tmp_path: Path) -> None:
    """Several threads writing through one Store lose no row (the store's lock serialises them)."""
    with Store.open(tmp_path) as store:
        def work(k: int) -> None:
            for i in range(50):
                with store.write() as conn:
                    store.audit(conn, "2026-12-01T06:00:00+00:00", "test", detail={"k": k, "i": i})

        threads = [threading.Thread(target=work, args=(k,)) for k in range(4)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert store.conn.execute("SELECT count(*) FROM audit").fetchone()[0] == 200


def test_utc_iso_needs_an_aware_time() -> None:
    """Naive datetimes are refused: every stored time is UTC."""
    with pytest.raises(ValueError):
        utc_iso(datetime(2026, 12, 1, 6, 0))
    assert utc_iso(datetime(2026, 12, 1, 6, 0, tzinfo=timezone.utc)) == "2026-12-01T06:00:00+00:00"


def test_a_non_durable_write_commits_and_full_sync_comes_back(tmp_path: Path) -> None:
    """write(durable=False) commits (seen by a second connection) and leaves synchronous at FULL; sync()
    is a durable commit of its own."""
    with Store.open(tmp_path) as store:
        with store.write(durable=False) as conn:
            conn.execute("INSERT INTO meta(key, value) VALUES ('probe', 'x')")
        # SQLite docs, "PRAGMA synchronous": 2 = FULL
        assert store.conn.execute("PRAGMA synchronous").fetchone()[0] == 2
        other = sqlite3.connect(str(tmp_path / DB_NAME))
        try:
            assert other.execute("SELECT value FROM meta WHERE key='probe'").fetchone() == ("x",)
        finally:
            other.close()
        with pytest.raises(RuntimeError):
            with store.write(durable=False) as conn:
                conn.execute("INSERT INTO meta(key, value) VALUES ('gone', 'y')")
                raise RuntimeError("rolled back")
        assert store.conn.execute("PRAGMA synchronous").fetchone()[0] == 2
        assert store.conn.execute("SELECT count(*) FROM meta WHERE key='gone'").fetchone()[0] == 0
        store.sync()
        assert store.conn.execute("SELECT count(*) FROM meta WHERE key='synced_at'").fetchone()[0] == 1
