"""Fault tracker by place: one backoff for every kind of fault at one place, SQLite error names, the env knob."""

from __future__ import annotations

import errno
import sqlite3

from monitor.daemon.faults import ALERT_AFTER_ENV, FaultPolicy, FaultTracker, fault_key, policy_from_env


def test_a_place_waits_while_any_fault_there_backs_off_and_clears_at_once() -> None:
    """Two kinds of fault at one place: the place is not tried until both waits are over; one success clears
    both; another place is not held up."""
    t = FaultTracker(FaultPolicy(first_retry_seconds=1))
    t.failed("moving files to /a: ENOSPC", "m", 0.0)
    t.failed("moving files to /a: ENOSPC", "m", 1.0)                  # next try at 3
    t.failed("moving files to /a: ENOTDIR", "m", 1.0)                 # next try at 2
    assert not t.ready_where("moving files to /a", 2.5)
    assert t.ready_where("moving files to /a", 3.0)
    assert t.ready_where("moving files to /b", 0.5)
    cleared = t.succeeded_where("moving files to /a", 4.0)
    assert sorted(c.key for c in cleared) == ["moving files to /a: ENOSPC", "moving files to /a: ENOTDIR"]
    assert t.open_keys() == ()


def test_sqlite_errors_are_keyed_by_their_error_name() -> None:
    """A database error is keyed by SQLite's own error name (SQLITE_FULL on a full disk, per sqlite.org's result
    code list), so each full-disk failure is the same fault."""
    conn = sqlite3.connect(":memory:")
    try:
        conn.execute("SELECT * FROM nowhere")
    except sqlite3.OperationalError as exc:
        assert fault_key("db", exc) == "db: SQLITE_ERROR"
    finally:
        conn.close()
    assert fault_key("x", OSError(errno.ENOTDIR, "Not a directory")) == "x: ENOTDIR"


def test_alert_delay_from_the_environment() -> None:
    """LOTWARDEN_FAULT_ALERT_AFTER sets alert_after_seconds; unset or bad keeps 180 s."""
    assert policy_from_env({ALERT_AFTER_ENV: "4"}).alert_after_seconds == 4.0
    assert policy_from_env({}).alert_after_seconds == 180.0
    assert policy_from_env({ALERT_AFTER_ENV: "soon"}).alert_after_seconds == 180.0
    assert policy_from_env({ALERT_AFTER_ENV: "-1"}).alert_after_seconds == 180.0
