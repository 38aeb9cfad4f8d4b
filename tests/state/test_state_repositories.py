"""Each repository's round trip on a real SQLite file: what is written comes back as written, in the order
and with the filters each read promises; several repositories share one transaction."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pytest

from monitor.state import audit, files, lots, verdicts
from monitor.state.database import DB_NAME, Database, Savepoint, read_only

AT = "2026-12-01T06:00:00+00:00"


@pytest.fixture
def db(tmp_path: Path):
    with Database.open(tmp_path) as database:
        yield database


def _file(conn: sqlite3.Connection, sha: str = "aa", path: str = "/drop/L1.csv", state: str = "processing") -> int:
    return files.insert(conn, sha256=sha, path=path, size=120, mtime=1796190700.5, first_seen_at=AT, state=state)


def test_files_round_trip(db: Database) -> None:
    """A file goes processing -> done with its archive path; the reads find it by content, path and plan."""
    with db.write() as conn:
        fid = _file(conn)
        assert files.left_over(conn, "aa", "/drop/L1.csv") == (fid, "processing", None)
        assert files.first_done(conn, "aa") is None
        files.set_archived_path(conn, fid, "/arch/L1.csv")
        files.mark_done(conn, fid, at=AT, archived_path="/arch/L1.csv", kind="values", n_values=7, n_bad_rows=2)
    with db.read() as conn:
        row = files.get(conn, fid)
        assert row is not None
        assert (row.sha256, row.path, row.size, row.mtime, row.first_seen_at) == ("aa", "/drop/L1.csv", 120,
                                                                                   1796190700.5, AT)
        assert (row.state, row.processed_at, row.archived_path, row.kind, row.n_values, row.n_bad_rows) == (
            "done", AT, "/arch/L1.csv", "values", 7, 2)
        assert files.first_done(conn, "aa") == (fid, "/drop/L1.csv", AT, "/arch/L1.csv")
        assert files.is_planned(conn, "/arch/L1.csv") and not files.is_planned(conn, "/arch/other.csv")
        assert files.earlier_version(conn, "/drop/L1.csv", "aa") is None
        assert files.earlier_version(conn, "/drop/L1.csv", "bb") == (fid, "aa", AT)
        assert files.unarchived(conn) == [(fid, "/drop/L1.csv", "/arch/L1.csv", "done", "aa")]
    with db.write() as conn:
        files.record_moves(conn, [("2026-12-01T06:00:05+00:00", "/arch/L1-2.csv", fid)])
    with db.read() as conn:
        assert files.unarchived(conn) == []
        assert files.left_over(conn, "aa", "/drop/L1.csv") is None
        row = files.get(conn, fid)
        assert row is not None and (row.archived_at, row.archived_path) == ("2026-12-01T06:00:05+00:00",
                                                                             "/arch/L1-2.csv")


def test_files_duplicate_revision_rejection_and_attempts(db: Database) -> None:
    """The other ways a file is settled, and the start-up attempt counter."""
    with db.write() as conn:
        first = _file(conn, state="processing")
        files.mark_done(conn, first, at=AT, archived_path="/arch/a", kind="values", n_values=1, n_bad_rows=0)
        dup = _file(conn, state="duplicate", path="/drop/copy.csv")
        files.mark_duplicate(conn, dup, at=AT, archived_path="/arch/b", reason="same content", duplicate_of=first)
        rev = _file(conn, sha="cc")
        files.set_revision_of(conn, rev, first)
        files.mark_rejected(conn, rev, at=AT, archived_path="/quar/c", reason="no value column")
        gone = _file(conn, sha="dd", path="/drop/gone.csv")
        assert [files.count_attempt(conn, gone) for _ in range(3)] == [1, 2, 3]
        files.mark_abandoned(conn, gone, at=AT, reason="it disappeared")
        last = _file(conn, sha="ee", path="/drop/e.csv")
        files.set_archived_at(conn, last, AT)
    with db.read() as conn:
        d, r, g = files.get(conn, dup), files.get(conn, rev), files.get(conn, gone)
        assert d is not None and (d.state, d.duplicate_of, d.reason, d.archived_path) == (
            "duplicate", first, "same content", "/arch/b")
        assert r is not None and (r.state, r.revision_of, r.reason) == ("rejected", first, "no value column")
        assert files.reject_reason(conn, rev) == ("no value column", "cc", AT)
        assert g is not None and (g.state, g.archived_at, g.attempts, g.reason) == ("rejected", AT, 3,
                                                                                    "it disappeared")
        assert [u.id for u in files.unarchived(conn)] == [first, dup, rev]


def test_processed_since_gives_the_digest_its_file_rows(db: Database) -> None:
    """(state, processed_at, path, reason) of files processed from a time on, oldest first; a file still
    processing has no processed_at and is left out."""
    with db.write() as conn:
        late = _file(conn, sha="1", path="/d/late.csv")
        files.mark_rejected(conn, late, at="2026-12-01T09:00:00+00:00", archived_path="/q/late", reason="bad")
        early = _file(conn, sha="2", path="/d/early.csv")
        files.mark_done(conn, early, at="2026-12-01T07:00:00+00:00", archived_path="/a/e", kind="values",
                        n_values=3, n_bad_rows=0)
        old = _file(conn, sha="3", path="/d/old.csv")
        files.mark_done(conn, old, at="2026-11-30T07:00:00+00:00", archived_path="/a/o", kind="values",
                        n_values=3, n_bad_rows=0)
        _file(conn, sha="4", path="/d/busy.csv")
    with db.read() as conn:
        got = files.processed_since(conn, "2026-12-01T00:00:00+00:00")
    assert got == [("done", "2026-12-01T07:00:00+00:00", "/d/early.csv", None),
                   ("rejected", "2026-12-01T09:00:00+00:00", "/d/late.csv", "bad")]
    assert got[1].reason == "bad" and got[0].path == "/d/early.csv"


def test_lots_and_values_round_trip(db: Database) -> None:
    """A lot opens, takes rows in order (one without a usable value), closes, reopens with late rows from a
    second file; the reads give the rows, groups and files as stored."""
    with db.write() as conn:
        f1 = _file(conn, sha="1", path="/drop/a.csv")
        files.set_archived_path(conn, f1, "/arch/a.csv")
        f2 = _file(conn, sha="2", path="/drop/b.csv")
        lot = lots.insert_open(conn, "L1", "OAT-500", "A1", at=AT, ts=100.0, n=3)
        lots.insert_values(conn, [
            (lot, "L1", "OAT-500", "A1", 1, 500.1, "g", None, "H1", "2026-11-30T06:00:00", f1, 2, ""),
            (lot, "L1", "OAT-500", "A1", 2, None, "g", None, "H2", None, f1, 3, "blank"),
            (lot, "L1", "OAT-500", "A1", 3, 0.4991, "kg", None, "H1", None, f1, 4, "")])
        assert lots.open_lot_names(conn) == [("L1", "OAT-500", "A1")]
        assert lots.find_open(conn, "L1", "OAT-500", "A1") == (lot, "open", 3)
        lots.close(conn, lot, at=AT, reason="next-lot")
        assert lots.find_open(conn, "L1", "OAT-500", "A1") is None
        assert lots.find(conn, "L1", "OAT-500", "A1") == (lot, "closed", 3)
        lots.reopen(conn, lot, 1)
        lots.add_rows(conn, lot, 1, at="2026-12-01T07:00:00+00:00", ts=200.0)
        lots.insert_values(conn, [(lot, "L1", "OAT-500", "A1", 4, 500.3, "g", None, "", None, f2, 2, "")])
    with db.read() as conn:
        row = lots.get(conn, lot)
        assert row is not None
        assert (row.state, row.n, row.late_values, row.times_closed, row.closed_at, row.close_reason,
                row.last_value_ts, row.opened_at) == ("open", 4, 1, 1, None, None, 200.0, AT)
        assert lots.open_lots(conn) == [("L1", "OAT-500", "A1", 200.0)]
        assert [(r.seq, r.value, r.unit, r.head, r.excluded, r.file_id, r.source_line)
                for r in lots.values_of(conn, lot)] == [
            (1, 500.1, "g", "H1", "", f1, 2), (2, None, "g", "H2", "blank", f1, 3),
            (3, 0.4991, "kg", "H1", "", f1, 4), (4, 500.3, "g", "", "", f2, 2)]
        assert lots.value_groups(conn, lot) == [("g", None, "", 1, 2), ("g", None, "blank", 2, 1),
                                                ("kg", None, "", 3, 1)]
        assert lots.file_paths(conn, lot) == ("/arch/a.csv", "/drop/b.csv")   # where each file lies now
        assert lots.files_after(conn, lot, 3) == [("/drop/b.csv", 1)]
        assert lots.files_after(conn, lot, 0) == [("/arch/a.csv", 3), ("/drop/b.csv", 1)]
        chunks = list(lots.value_chunks(conn, lot, with_units=False, chunk=3))
        assert chunks == [[(500.1, "H1"), (None, "H2"), (0.4991, "H1")], [(500.3, "")]]
        (first, *_rest), = list(lots.value_chunks(conn, lot, with_units=True, chunk=10))
        assert first == (500.1, "H1", "g", None)


def test_lot_summaries_round_trip(db: Database) -> None:
    with db.write() as conn:
        fid = _file(conn)
        sid = lots.insert_summary(conn, file_id=fid, source_line=2, line="L8", product="OAT-500", lot="S1", n=1,
                                  mean=500.4, sd=None, unit="g", density=1.03, timestamp=None,
                                  problem="sd is missing")
    with db.read() as conn:
        assert lots.summaries(conn) == [(sid, fid, 2, "L8", "OAT-500", "S1", 1, 500.4, None, "g", 1.03, None,
                                         "sd is missing")]


def _verdict(decided_at: str, lot: str, verdict: str = "pass", line: str = "L1", **kw: object) -> verdicts.NewVerdict:
    payload = kw.pop("payload", json.dumps({"reason": "", "mean": 500.2}))
    return verdicts.NewVerdict(decided_at, line, "OAT-500", lot, "oat-500", "v3", "abc", verdict, 30, 500.2, 500.0,
                               "g", str(payload), **kw)  # type: ignore[arg-type]


def test_verdicts_round_trip_and_latest_for_a_lot(db: Database) -> None:
    with db.write() as conn:
        lot = lots.insert_open(conn, "L1", "OAT-500", "A1", at=AT, ts=0.0, n=30)
        first = verdicts.insert(conn, _verdict(AT, "A1", "hold", lot_id=lot, close_reason="idle", lot_rows=30))
        second = verdicts.insert(conn, _verdict("2026-12-01T07:00:00+00:00", "A1", "pass", lot_id=lot,
                                                close_reason="next-lot", lot_rows=31))
    with db.read() as conn:
        rows = verdicts.all_rows(conn)
        latest = verdicts.latest_for_lot(conn, "L1", "OAT-500", "A1", lot)
        assert verdicts.latest_for_lot(conn, "L2", "OAT-500", "A1", lot) is None
    assert [r.id for r in rows] == [first, second]
    assert (rows[0].verdict, rows[0].close_reason, rows[0].lot_rows, rows[0].rule_version, rows[0].target) == (
        "hold", "idle", 30, "v3", 500.0)
    assert latest is not None and (latest.id, latest.verdict, latest.lot_rows) == (second, "pass", 31)


def test_decided_between_gives_the_digest_its_verdict_rows(db: Database) -> None:
    """Rows inside the text bounds, in the order stored, with the average-quantity screen's outcome read
    from the payload: met / not met / undecided, None when the payload has no such object."""
    aq = {"met": {"passed": True}, "not met": {"passed": False}, "undecided": {"passed": None}}
    with db.write() as conn:
        verdicts.insert(conn, _verdict("2026-11-30T23:59:59+00:00", "OLD"))
        for i, (want, obj) in enumerate(aq.items()):
            verdicts.insert(conn, _verdict(f"2026-12-01T0{i + 1}:00:00+00:00", want.replace(" ", "-"),
                                           payload=json.dumps({"average_quantity": obj})))
        verdicts.insert(conn, _verdict("2026-12-01T05:00:00+00:00", "NONE", "hold"))
        verdicts.insert(conn, _verdict("2026-12-02T00:00:00+00:00", "NEXT"))
    with db.read() as conn:
        got = verdicts.decided_between(conn, "2026-12-01T00:00:00+00:00", "2026-12-02T00:00:00+00:00")
    assert [(r.lot, r.screen) for r in got] == [("met", "met"), ("not-met", "not met"),
                                                ("undecided", "undecided"), ("NONE", None)]
    decided_at, line, product, _lot, verdict, mean, target, unit, _screen = got[-1]
    assert (decided_at, line, product, verdict, mean, target, unit) == ("2026-12-01T05:00:00+00:00", "L1",
                                                                        "OAT-500", "hold", 500.2, 500.0, "g")


def test_listing_orders_by_line_product_then_decision(db: Database) -> None:
    with db.write() as conn:
        verdicts.insert(conn, _verdict(AT, "B1", line="L2"))
        verdicts.insert(conn, _verdict(AT, "A2", line="L1"))
        verdicts.insert(conn, _verdict(AT, "A1", "hold", line="L1"))
    with db.read() as conn:
        got = verdicts.listing(conn)
    assert [(r.line, r.lot, r.verdict) for r in got] == [("L1", "A2", "pass"), ("L1", "A1", "hold"),
                                                         ("L2", "B1", "pass")]
    assert got[0] == ("L1", "OAT-500", "A2", 30, 500.2, 500.0, "g", "pass", json.dumps({"reason": "", "mean": 500.2}))


def test_audit_round_trip(db: Database) -> None:
    with db.write() as conn:
        audit.append(conn, AT, "file-taken", file_id=None, detail={"path": "/d/ä.csv", "values": 3})
        audit.append(conn, AT, "verdict", line="L1", product="OAT-500", lot="A1")
    with db.read() as conn:
        everything = audit.records(conn)
        only = audit.records(conn, "verdict")
    assert [r.event for r in everything] == ["file-taken", "verdict"]
    assert json.loads(everything[0].detail) == {"path": "/d/ä.csv", "values": 3}
    assert "ä" in everything[0].detail          # stored as text, not \\u escapes
    assert [(r.line, r.product, r.lot, r.detail) for r in only] == [("L1", "OAT-500", "A1", "{}")]


def test_one_transaction_spans_repositories_and_rolls_back_whole(db: Database) -> None:
    """A file, a lot, its verdict and an audit record written in one write() vanish together when it raises;
    a savepoint undoes only its own part."""
    with pytest.raises(RuntimeError), db.write() as conn:
        fid = _file(conn)
        lot = lots.insert_open(conn, "L1", "OAT-500", "A1", at=AT, ts=0.0, n=0)
        verdicts.insert(conn, _verdict(AT, "A1", lot_id=lot))
        audit.append(conn, AT, "verdict", file_id=fid)
        raise RuntimeError("boom")
    with db.read() as conn:
        assert files.unarchived(conn) == [] and lots.open_lots(conn) == []
        assert verdicts.all_rows(conn) == [] and audit.records(conn) == []
    with db.write() as conn:
        kept = _file(conn, sha="keep")
        sp = Savepoint(conn, "one_file")
        sp.begin()
        _file(conn, sha="undone")
        sp.rollback()
        sp.release()
    with db.read() as conn:
        assert [u.sha256 for u in files.unarchived(conn)] == ["keep"] and files.get(conn, kept) is not None


def test_read_only_connection_sees_commits_and_cannot_write(db: Database, tmp_path: Path) -> None:
    with db.write() as conn:
        verdicts.insert(conn, _verdict(AT, "A1"))
    with read_only(tmp_path / DB_NAME) as ro:
        assert [r.lot for r in verdicts.listing(ro)] == ["A1"]
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            audit.append(ro, AT, "x")


def test_email_batches_record_repeat_and_finish(db: Database) -> None:
    """A recorded message stays 'sending' until finished; only 'sending' ones are listed, oldest first; a
    finished one is not changed again; the states are the four the schema allows."""
    from monitor.alerts.alert import Alert
    from monitor.state import outbox

    def hold(lot: str) -> Alert:
        return Alert(kind="hold", dedup_key=f"hold|L1|OAT-500|{lot}|r1", created_at="2026-12-01T22:00:00+00:00",
                     data={"lot": lot}, line="L1", product="OAT-500", lot=lot)

    with db.write() as conn:
        outbox.enqueue(conn, hold("A1"), ["email"])
        outbox.enqueue(conn, hold("A2"), ["email"])
        ids = [r[0] for r in conn.execute("SELECT id FROM alerts ORDER BY id")]
        first = outbox.record_batch(conn, message_id="<m1@brackenfield.example>", planned_at=10.0,
                                    recipients=("qa@brackenfield.example",), alert_ids=ids, folded=True)
        second = outbox.record_batch(conn, message_id="<m2@brackenfield.example>", planned_at=11.0,
                                     recipients=("qa@brackenfield.example", "l1@brackenfield.example"),
                                     alert_ids=ids[:1], folded=False)
        outbox.batch_attempted(conn, first)
        outbox.mark_sent(conn, ids[0], "email", "2026-12-01T22:00:05+00:00")
    with db.read() as conn:
        listed = outbox.unfinished_batches(conn)
        assert outbox.pending_among(conn, "email", ids) == {ids[1]}
        assert outbox.alerts_by_id(conn, ids)[ids[1]].lot == "A2"
    assert [(b.id, b.message_id, b.alert_ids, b.folded, b.attempts) for b in listed] == [
        (first, "<m1@brackenfield.example>", tuple(ids), True, 2), (second, "<m2@brackenfield.example>", (ids[0],),
                                                                     False, 1)]
    with db.write() as conn:
        outbox.finish_batch(conn, second, "sent", 20.0)
        outbox.finish_batch(conn, second, "failed", 21.0, "too late")     # already finished: left as it is
        with pytest.raises(ValueError, match="sending"):
            outbox.finish_batch(conn, first, "sending", 22.0)
        with pytest.raises(sqlite3.IntegrityError):                       # the schema's CHECK
            conn.execute("UPDATE email_batches SET state = 'lost' WHERE id = ?", (first,))
    with db.read() as conn:
        assert [b.id for b in outbox.unfinished_batches(conn)] == [first]
        assert conn.execute("SELECT state, finished_at, note FROM email_batches WHERE id = ?",
                            (second,)).fetchone() == ("sent", 20.0, None)
