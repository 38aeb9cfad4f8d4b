"""Frozen records the report page is built from: per line and product, its lots, rules and counts."""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from datetime import datetime

from monitor.giveaway import Giveaway, total_giveaway

DISPOSITION_ACTIONS = ("release", "rework", "scrap")
REPORT_VERDICTS = ("pass", "hold", "review")


def _aware(value: datetime, what: str) -> None:
    if value.tzinfo is None or value.utcoffset() is None:
        raise ValueError(f"{what} must carry a time zone, got naive {value.isoformat()}")


@dataclass(frozen=True)
class Disposition:
    """What a person decided about a held lot: ``action`` (release / rework / scrap), by whom, why, when."""

    action: str
    by: str
    note: str
    at: datetime

    def __post_init__(self) -> None:
        if self.action not in DISPOSITION_ACTIONS:
            raise ValueError(f"disposition action must be one of {', '.join(DISPOSITION_ACTIONS)}, "
                             f"got {self.action!r}")
        _aware(self.at, "disposition time")


@dataclass(frozen=True)
class HeadOffset:
    """One filler head's figures in one lot: packs and the offset of its mean from target (rule's unit)."""

    head: str
    n: int
    offset: float | None


@dataclass(frozen=True)
class LotRow:
    """One lot as the report shows it, with its latest verdict (``ci_low``/``ci_high`` None = open end)."""

    lot: str
    decided_at: datetime
    n: int
    mean: float | None
    target: float
    nominal: float | None
    unit: str
    ci_low: float | None
    ci_high: float | None
    verdict: str
    reason: str
    p_value: float | None
    rule: str
    rule_version: str
    disposition: Disposition | None = None
    heads: tuple[HeadOffset, ...] = ()
    giveaway: Giveaway | None = None
    screen: str | None = None          # the average-quantity screen's result text; None: the rule has no nominal

    def __post_init__(self) -> None:
        if self.verdict not in REPORT_VERDICTS:
            raise ValueError(f"verdict must be one of {', '.join(REPORT_VERDICTS)}, got {self.verdict!r}")
        _aware(self.decided_at, f"decision time of lot {self.lot!r}")

    @property
    def is_open(self) -> bool:
        """A hold or review with no disposition yet."""
        return self.verdict in ("hold", "review") and self.disposition is None


@dataclass(frozen=True)
class RuleText:
    """A rule version in force during the period, with its full text as it was stored."""

    rule: str
    version: str
    text: str


@dataclass(frozen=True)
class DriftMark:
    """A drift signal of the section's line and product in the period (whole lots, or one head)."""

    at: datetime
    lot: str
    head: str | None
    method: str
    direction: str
    statistic: float
    limit: float
    lots: int

    def __post_init__(self) -> None:
        _aware(self.at, "DriftMark.at")


@dataclass(frozen=True)
class ProductSection:
    """One line and product: its lots (kept in time order of decision) and the rule versions in force."""

    line: str
    product: str
    unit: str
    lots: tuple[LotRow, ...]
    rules: tuple[RuleText, ...] = ()
    drift: tuple[DriftMark, ...] = ()

    def __post_init__(self) -> None:
        ordered = tuple(sorted(self.lots, key=lambda r: r.decided_at))
        object.__setattr__(self, "lots", ordered)

    @property
    def count_lots(self) -> int:
        return len(self.lots)

    @property
    def count_holds(self) -> int:
        return sum(1 for r in self.lots if r.verdict == "hold")

    @property
    def count_reviews(self) -> int:
        return sum(1 for r in self.lots if r.verdict == "review")

    @property
    def count_open(self) -> int:
        """Holds and reviews with no disposition."""
        return sum(1 for r in self.lots if r.is_open)

    @property
    def giveaway_total(self) -> Giveaway | None:
        """All lots' giveaway together (lots with an unknown mean left out)."""
        return total_giveaway((r.giveaway, r.n) for r in self.lots)[0]

    @property
    def heads(self) -> tuple[str, ...]:
        """Every filler head seen in the section's lots, in natural order (H2 before H10)."""
        names = {h.head for r in self.lots for h in r.heads}
        return tuple(sorted(names, key=_natural))


def _natural(name: str) -> tuple[tuple[int, int | str], ...]:
    return tuple((0, int(p)) if p.isdigit() else (1, p) for p in re.split(r"(\d+)", name) if p)


@dataclass(frozen=True)
class Report:
    """A period's report for a plant: the sections (one per line and product) and when it was made."""

    plant: str
    config_name: str
    period_start: datetime
    period_end: datetime
    generated_at: datetime
    sections: tuple[ProductSection, ...]
    zone: str = ""                      # the time zone the page's times are shown in (name for the header)

    def __post_init__(self) -> None:
        for what, value in (("period start", self.period_start), ("period end", self.period_end),
                            ("generation time", self.generated_at)):
            _aware(value, what)
        if self.period_end < self.period_start:
            raise ValueError("the period ends before it starts")


def finite(x: float | None) -> bool:
    """True for a real, finite number (not None, not NaN, not ±inf)."""
    return x is not None and not isinstance(x, bool) and math.isfinite(float(x))
