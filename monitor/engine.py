"""Applies a rule to a lot: gates (min n, normality), the location test, interval, power -> Verdict.

Pure: no I/O, no clock. ``evaluate`` judges one lot; ``evaluate_many`` judges many lots of one rule
at once with vectorised numpy/scipy and gives the same numbers as ``evaluate`` lot by lot.
"""

from __future__ import annotations

from typing import Sequence

from monitor.lot import LotData, Verdict
from monitor.rulebook import Rule


def evaluate(lot: LotData, rule: Rule) -> Verdict:  # pragma: no cover - implemented by the engine work
    raise NotImplementedError


def evaluate_many(lots: Sequence[LotData], rule: Rule) -> list[Verdict]:  # pragma: no cover
    raise NotImplementedError
