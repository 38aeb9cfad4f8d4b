"""What a channel's send can report (retry later / give up) and the capped, jittered retry delay."""

from __future__ import annotations

import random


class RetryLater(Exception):
    """A transient failure (connection refused, timeout, 4xx reply): try again after a backoff."""


class GiveUp(Exception):
    """A permanent failure (5xx reply, missing program, bad login): mark the delivery dead."""


def backoff_seconds(attempts: int, first: float, cap: float, rng: random.Random) -> float:
    """Delay before retry number ``attempts + 1``: ``first * 2**attempts`` capped at ``cap``, times U(0.5, 1].

    The jitter keeps several daemons (or channels) from retrying in lock-step; the cap keeps a recovered
    server from waiting long.
    """
    base = min(cap, first * (2.0 ** min(attempts, 30)))
    return base * (0.5 + 0.5 * rng.random())
