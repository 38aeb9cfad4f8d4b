"""Issue 7 §3: a digest too late to send is logged once by the running daemon, not at every drain tick."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

from test_service import (
    Running,
    _no_leaked_threads,  # noqa: F401  (autouse fixture: no threads left running)
    make_plant,
    wait_for,
)


def test_a_digest_too_late_to_send_is_logged_once(tmp_path: Path) -> None:
    """The daily digest was due 13 h ago (catch_up_hours 12): the daemon says once that it is
    skipped; ten more digest checks on the running daemon's own dispatcher add no line."""
    due = datetime.now(UTC) - timedelta(hours=13)
    cfg = make_plant(tmp_path, extra=f"""
        [alerts.digest]
        cron = "{due.minute} {due.hour} * * *"
        timezone = "UTC"
        catch_up_hours = 12
        """)
    with Running(cfg) as r:
        assert wait_for(lambda: "skipped: more than 12 h late" in r.log.getvalue(), 10), r.log.getvalue()
        dispatcher = r.daemon.components.dispatcher
        assert dispatcher is not None
        assert not any(dispatcher.run_digest() for _ in range(10))   # ten more checks, none raises a digest
        text = r.log.getvalue()
    assert text.count("skipped: more than 12 h late") == 1, text
