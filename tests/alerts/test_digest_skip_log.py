"""A digest missed by more than catch_up_hours is logged as skipped once, not on every drain tick."""

from __future__ import annotations

import logging
from datetime import datetime

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, DigestSettings, LogSettings


def ts(iso: str) -> float:
    return datetime.fromisoformat(iso).timestamp()


def test_late_digest_skip_is_logged_once_per_missed_digest(db_path, tmp_path, caplog):
    """Many ticks after the catch-up window log one "skipped" line per missed scheduled time."""
    s = AlertSettings(log=LogSettings(path=tmp_path / "alerts.jsonl"),
                      digest=DigestSettings(cron="0 6 * * *", timezone="UTC", catch_up_hours=12.0))
    d = Dispatcher(db_path, s)
    caplog.set_level(logging.INFO, logger="monitor.alerts")
    try:
        # 06:00 UTC due, now 19:00 UTC: 13 h late; the drain asks every few seconds
        start = ts("2026-12-01T19:00:00+00:00")
        for k in range(200):
            assert d.run_digest(now=start + 5 * k) is False
        skipped = [r for r in caplog.records if "skipped" in r.getMessage()]
        assert len(skipped) == 1 and "2026-12-01T06:00:00+00:00" in skipped[0].getMessage()
        # the next day's digest is missed too: one more line, for that one
        nxt = ts("2026-12-02T18:30:00+00:00")
        for k in range(50):
            d.run_digest(now=nxt + 5 * k)
        skipped = [r.getMessage() for r in caplog.records if "skipped" in r.getMessage()]
        assert len(skipped) == 2 and "2026-12-02T06:00:00+00:00" in skipped[1]
    finally:
        d.close()
