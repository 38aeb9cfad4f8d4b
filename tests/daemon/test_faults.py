"""The fault tracker: backoff steps, one log line per step, one alert after a lasting fault and one on clear."""

from __future__ import annotations

import errno

from monitor.daemon.faults import FaultPolicy, FaultTracker, fault_key


def _run(tracker: FaultTracker, key: str, until: float) -> list[tuple[float, bool, bool]]:
    """Retry ``key`` whenever the tracker allows, failing every time, from t=0 to ``until``."""
    out = []
    t = 0.0
    while t <= until:
        if tracker.ready(key, t):
            step = tracker.failed(key, "disk full", t)
            out.append((t, step.log, step.alert))
        t += 0.25
    return out


def test_retries_back_off_and_log_once_per_step() -> None:
    """Attempts at 0, 1, 3, 7, 15 … s (doubling waits); a 25 s fault is about 5 attempts, not hundreds."""
    tracker = FaultTracker(FaultPolicy(first_retry_seconds=1, max_retry_seconds=300, alert_after_seconds=180))
    attempts = _run(tracker, "archive: ENOSPC", 25)
    assert [t for t, _, _ in attempts] == [0, 1, 3, 7, 15]
    assert all(log for _, log, _ in attempts)  # each attempt here starts a new, longer wait
    assert not any(alert for _, _, alert in attempts)


def test_wait_is_capped_and_alert_comes_once() -> None:
    """Waits stop growing at the cap; the alert is raised once, on the first failure after alert_after."""
    tracker = FaultTracker(FaultPolicy(first_retry_seconds=1, max_retry_seconds=60, alert_after_seconds=180))
    attempts = _run(tracker, "state: ENOSPC", 600)
    gaps = [b[0] - a[0] for a, b in zip(attempts, attempts[1:], strict=False)]
    assert max(gaps) == 60
    alerts = [t for t, _, alert in attempts if alert]
    assert len(alerts) == 1 and alerts[0] >= 180
    # In ten minutes of a permanent fault: at most one attempt per minute once capped.
    assert len(attempts) <= 7 + 600 // 60


def test_clear_reports_whether_alerted() -> None:
    """A short fault clears silently (alerted False); a long one clears with alerted True; no fault → None."""
    tracker = FaultTracker(FaultPolicy(alert_after_seconds=10))
    tracker.failed("k", "m", 0)
    short = tracker.succeeded("k", 2)
    assert short is not None and not short.alerted and short.attempts == 1
    tracker.failed("k", "m", 0)
    assert tracker.failed("k", "m", 11).alert
    long = tracker.succeeded("k", 12)
    assert long is not None and long.alerted and long.lasted_seconds == 12
    assert tracker.succeeded("k", 13) is None
    assert tracker.ready("k", 13)


def test_fault_key_names_errno() -> None:
    """OS errors are keyed by errno name so every file hitting one full disk is one fault."""
    a = fault_key("moving files to /a", OSError(errno.ENOSPC, "No space left on device", "/a/x.csv"))
    b = fault_key("moving files to /a", OSError(errno.ENOSPC, "No space left on device", "/a/y.csv"))
    assert a == b == "moving files to /a: ENOSPC"
    assert fault_key("x", ValueError("v")) == "x: ValueError"
