"""The outbox as the alert side sees it: the names of the repository in ``monitor.state.outbox``, kept
importable from here for callers that store alerts (``enqueue`` inside their own write transaction)."""

from __future__ import annotations

from monitor.state.outbox import (
    delivery_counts,
    due_rows,
    enqueue,
    mark_dead,
    mark_retry,
    mark_sent,
    mark_suppressed,
    pending,
)

__all__ = ["delivery_counts", "due_rows", "enqueue", "mark_dead", "mark_retry", "mark_sent", "mark_suppressed",
           "pending"]
