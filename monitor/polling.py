"""Waiting for a condition with a deadline instead of fixed sleeps (the demo and the tests use it)."""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any


def wait_until(pred: Callable[[], Any], timeout: float = 30.0, step: float = 0.05) -> Any:
    """Call ``pred`` every ``step`` seconds until it returns something truthy or ``timeout`` passes;
    return its last value."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = pred()
        if value:
            return value
        time.sleep(step)
    return pred()
