"""Intake on real files and a real SQLite store: values stored once, duplicates, revisions, rejects, archive."""

from __future__ import annotations

import csv
import json
import statistics
from pathlib import Path

import pytest


CANON = "timestamp,line,product,lot,head,value,unit\n"


def write_export(folder: Path, name: str, rows: list[tuple], header: str = CANON) -> Path:
    """rows: (line, product, lot, value, unit); timestamps and heads are filled in."""
    p = folder / name
    lines = [f"2026-11-30T06:{i // 60:02d}:{i % 60:02d},{r[0]},{r[1]},{r[2]},H{i % 4 + 1},{r[3]},{r[4]}"
             for i, r in enumerate(rows)]
    p.write_text(header + "\n".join(lines) + "\n", encoding="utf-8")
    return p


def csv_values(path: Path) -> list[float]:
    """The value column read with Python's csv module (independent of the project's reader)."""
    with open(path, newline="", encoding="utf-8") as fh:
        return [float(r["value"]) for r in csv.DictReader(fh)]


def count(store, sql: str, *args) -> int:
    return store.conn.execute(sql, args).fetchone()[0]


def oat(lot: str, values: list[float], line: str = "L1") -> list[tuple]:
    return [(line, "OAT-500", lot, v, "g") for v in values]


def test_values_are_stored_once_in_order_and_the_file_archived(intake_env, clock) -> None:
    """A file's values land in lot_values in file order; the file moves to archive/YYYY-MM-DD/."""
    cfg, store, intake, drop = intake_env
    vals = [502.6, 501.4, 500.2, 503.2, 499.8, 501.1]
    p = write_export(drop, "L1-oat-0600.csv", oat("OAT-24A101", vals))
    expected = csv_values(p)  # Python csv module
    original = p.read_bytes()
    out = intake.process(p)
    assert out.status == "taken" and out.n_values == len(vals)
    got = [r[0] for r in store.conn.execute("SELECT value FROM lot_values ORDER BY lot_id, seq")]
    assert got == expected
    target = cfg.state.archive / "2026-11-30" / "L1-oat-0600.csv"
    assert out.moved_to == str(target) and target.read_bytes() == original
    assert list(drop.iterdir()) == []
    row = store.conn.execute("SELECT state, archived_path, archived_at IS NOT NULL, size FROM files").fetchone()
    assert row == ("done", str(target), 0, len(original))  # the move is recorded with the next write
    intake.flush()
    row = store.conn.execute("SELECT state, archived_path, archived_at IS NOT NULL, size FROM files").fetchone()
    assert row == ("done", str(target), 1, len(original))
    assert count(store, "SELECT count(*) FROM audit WHERE event='file-taken'") == 1
    assert "taken L1-oat-0600.csv: 6 values" in out.describe()


def test_same_content_again_is_a_duplicate_not_counted(intake_env) -> None:
    """The same bytes under another name are not counted again; a file-duplicate alert is enqueued."""
    cfg, store, intake, drop = intake_env
    p = write_export(drop, "a.csv", oat("OAT-24A101", [500.0, 501.0, 502.0]))
    data = p.read_bytes()
    intake.process(p)
    q = drop / "b.csv"
    q.write_bytes(data)
    out = intake.process(q)
    assert out.status == "duplicate"
    assert count(store, "SELECT count(*) FROM lot_values") == 3
    assert count(store, "SELECT count(*) FROM alerts WHERE kind='file-duplicate'") == 1
    assert (cfg.state.archive / "2026-11-30" / "b.csv").read_bytes() == data
    # the same name again: archived beside the first under a suffixed name, nothing overwritten
    p.write_bytes(data)
    out2 = intake.process(p)
    assert out2.status == "duplicate" and Path(out2.moved_to).name == "a-1.csv"
    assert count(store, "SELECT count(*) FROM alerts WHERE kind='file-duplicate'") == 2
    assert count(store, "SELECT count(*) FROM lot_values") == 3


def test_changed_content_at_a_known_path_is_a_revision(intake_env) -> None:
    """New bytes at a path already taken: file-revised alert, and its rows are counted as new rows."""
    cfg, store, intake, drop = intake_env
    write_export(drop, "L1.csv", oat("OAT-24A101", [500.0, 501.0]))
    intake.process(drop / "L1.csv")
    write_export(drop, "L1.csv", oat("OAT-24A101", [500.0, 501.0, 502.0]))
    out = intake.process(drop / "L1.csv")
    assert out.status == "revision"
    assert count(store, "SELECT count(*) FROM lot_values") == 5
    alert = store.conn.execute("SELECT dedup_key, payload FROM alerts WHERE kind='file-revised'").fetchone()
    assert alert is not None and json.loads(alert[1])["data"]["previous"]["id"] == 1


def test_a_rejected_file_goes_to_quarantine_with_a_reason(intake_env) -> None:
    """An unreadable export is quarantined untouched with <name>.reason.txt and a file-rejected alert."""
    cfg, store, intake, drop = intake_env
    p = drop / "L1-broken.csv"
    p.write_bytes(b"this is not,an export\n\x00\x01\x02\n")
    original = p.read_bytes()
    out = intake.process(p)
    assert out.status == "rejected" and out.reason
    q = cfg.state.quarantine / "2026-11-30" / "L1-broken.csv"
    assert q.read_bytes() == original
    reason = (q.parent / "L1-broken.csv.reason.txt").read_text()
    assert "L1-broken.csv" in reason and out.reason in reason
    assert store.conn.execute("SELECT state, reason FROM files").fetchone() == ("rejected", out.reason)
    payload = json.loads(store.conn.execute("SELECT payload FROM alerts WHERE kind='file-rejected'").fetchone()[0])
    assert payload["data"]["reason"] == out.reason
    assert count(store, "SELECT count(*) FROM lot_values") == 0


def test_a_vanished_file_is_reported_not_raised(intake_env, tmp_path: Path) -> None:
    """A path that is gone when intake looks returns status vanished (the watcher may race a mover)."""
    _cfg, _store, intake, drop = intake_env
    assert intake.process(drop / "gone.csv").status == "vanished"


def test_recover_finishes_moves_and_retries_processing(intake_env, clock) -> None:
    """Rows left 'processing' are retried; done files left in the drop folder are just moved."""
    cfg, store, intake, drop = intake_env
    p = write_export(drop, "L1.csv", oat("OAT-24A101", [500.0, 501.0, 502.0]))
    # a 'processing' row as a crash after the first transaction leaves it
    import hashlib
    import os
    st = os.stat(p)
    with store.write() as conn:
        conn.execute("INSERT INTO files(sha256, path, size, mtime, first_seen_at, state) VALUES (?,?,?,?,?,"
                     "'processing')", (hashlib.sha256(p.read_bytes()).hexdigest(), str(p), st.st_size,
                                       st.st_mtime, "2026-11-30T06:00:00+00:00"))
    outs = intake.recover()
    assert [o.status for o in outs] == ["taken"]
    assert count(store, "SELECT count(*) FROM files") == 1
    assert count(store, "SELECT count(*) FROM lot_values") == 3
    assert intake.recover() == []


def test_a_file_that_keeps_stopping_the_daemon_is_quarantined(intake_env) -> None:
    """A file found 'processing' at more than three start-ups is quarantined instead of retried again."""
    import hashlib
    import os

    cfg, store, intake, drop = intake_env
    p = write_export(drop, "L1-poison.csv", oat("OAT-24A101", [500.0, 501.0]))
    st = os.stat(p)
    with store.write() as conn:
        conn.execute("INSERT INTO files(sha256, path, size, mtime, first_seen_at, state, attempts) VALUES"
                     " (?,?,?,?,?,'processing',3)", (hashlib.sha256(p.read_bytes()).hexdigest(), str(p),
                                                      st.st_size, st.st_mtime, "2026-11-30T06:00:00+00:00"))
    (out,) = intake.recover()
    assert out.status == "rejected" and "3 attempts" in out.reason
    assert (cfg.state.quarantine / "2026-11-30" / "L1-poison.csv").exists()
    assert count(store, "SELECT count(*) FROM lot_values") == 0
    assert count(store, "SELECT count(*) FROM alerts WHERE kind='file-rejected'") == 1


def test_a_batch_gives_the_same_result_as_one_by_one(intake_env, tmp_path: Path, make_setup, clock) -> None:
    """process_batch (one commit) stores the same values, lots and alerts as process on each file in turn."""
    from monitor.daemon.config import load_config, load_rule_set
    from monitor.daemon.intake import Intake
    from monitor.state.database import Database as Store

    cfg, store, intake, drop = intake_env
    specs = {"1.csv": oat("OAT-24A101", [500.0, 501.0, 502.0]), "2.csv": oat("OAT-24A101", [503.0, 499.0]),
             "3.csv": oat("OAT-24A102", [500.5, 500.1])}
    for name, rows in specs.items():
        write_export(drop, name, rows)
    (drop / "4-copy.csv").write_bytes((drop / "3.csv").read_bytes())  # duplicate inside the batch
    (drop / "5-bad.csv").write_bytes(b"\x00\x01")
    outs = intake.process_batch(sorted(drop.iterdir()))
    assert [o.status for o in outs] == ["taken", "taken", "taken", "duplicate", "rejected"]
    assert outs[2].lots_closed == ("L1/OAT-500/OAT-24A101",)
    # the same files one by one into a second store
    root2 = tmp_path / "one-by-one"
    cfg2 = load_config(make_setup(root2))
    drop2 = cfg2.watch.folder
    for name, rows in specs.items():
        write_export(drop2, name, rows)
    (drop2 / "4-copy.csv").write_bytes((drop2 / "3.csv").read_bytes())
    (drop2 / "5-bad.csv").write_bytes(b"\x00\x01")
    with Store.open(cfg2.state.folder) as store2:
        intake2 = Intake(cfg2, load_rule_set(cfg2), store2, clock=clock)
        assert [intake2.process(p).status for p in sorted(drop2.iterdir())] == [o.status for o in outs]
        for sql in ("SELECT lot, seq, value FROM lot_values ORDER BY id", "SELECT kind, dedup_key FROM alerts",
                    "SELECT lot, state, n FROM lots ORDER BY id", "SELECT state FROM files ORDER BY id"):
            assert store.conn.execute(sql).fetchall() == store2.conn.execute(sql).fetchall(), sql
    assert [v for (v,) in store.conn.execute("SELECT value FROM lot_values ORDER BY id")] == \
        [r[3] for name in ("1.csv", "2.csv", "3.csv") for r in specs[name]]  # values as written, file order


def test_archive_names_never_overwrite(tmp_path: Path) -> None:
    """free_name picks name-1, name-2 … past files on disk and names planned for others; moves never clobber."""
    from monitor.daemon.archive import free_name, move_file

    folder = tmp_path / "archive" / "2026-11-30"
    folder.mkdir(parents=True)
    (folder / "L1.csv").write_text("first")
    planned = {folder / "L1-1.csv"}
    assert free_name(folder, "L1.csv", lambda p: p in planned) == folder / "L1-2.csv"
    assert free_name(folder, "NOEXT", lambda p: False) == folder / "NOEXT"
    src = tmp_path / "L1.csv"
    src.write_text("second")
    with pytest.raises(FileExistsError):
        move_file(src, folder / "L1.csv")
    assert (folder / "L1.csv").read_text() == "first" and src.read_text() == "second"
    move_file(src, folder / "L1-2.csv")
    assert (folder / "L1-2.csv").read_text() == "second" and not src.exists()


def test_an_internal_failure_on_one_file_spares_the_batch(intake_env, monkeypatch) -> None:
    """If intake itself fails on one file, that file's part is undone and it is quarantined; the rest commit."""
    from monitor.daemon import accumulate

    cfg, store, intake, drop = intake_env
    write_export(drop, "1.csv", oat("OAT-24A101", [500.0, 501.0]))
    write_export(drop, "2.csv", oat("OAT-24A101", [502.0, 503.0]))
    write_export(drop, "3.csv", oat("OAT-24A101", [504.0]))
    real = accumulate.add_values

    def failing_on_second(conn, how, file_id, export, *args, **kw):  # fault injection for this test
        if export.path.endswith("2.csv"):
            real(conn, how, file_id, export, *args, **kw)  # writes rows, then fails: they must be undone
            raise RuntimeError("injected fault")
        return real(conn, how, file_id, export, *args, **kw)

    monkeypatch.setattr(accumulate, "add_values", failing_on_second)
    outs = intake.process_batch(sorted(drop.iterdir()))
    assert [o.status for o in outs] == ["taken", "rejected", "taken"]
    assert "injected fault" in outs[1].reason
    assert [v for (v,) in store.conn.execute("SELECT value FROM lot_values ORDER BY id")] == [500.0, 501.0, 504.0]
    assert store.conn.execute("SELECT n FROM lots").fetchone() == (3,)
    assert (cfg.state.quarantine / "2026-11-30" / "2.csv").exists()
    assert count(store, "SELECT count(*) FROM alerts WHERE kind='file-rejected'") == 1
    # the lot, closed now, is judged over the three values that were kept (mean by the standard library)
    write_export(drop, "4.csv", oat("OAT-24A102", [500.0]))
    (v,) = intake.process(drop / "4.csv").verdicts
    assert v.n == 3 and v.mean == pytest.approx(statistics.fmean([500.0, 501.0, 504.0]), rel=1e-12)
