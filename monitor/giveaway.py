"""Giveaway of a lot: how far its mean fill lies above (or below) the declared quantity, per pack and in all."""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass


def _finite(x: float | None) -> bool:
    return x is not None and not isinstance(x, bool) and math.isfinite(float(x))


@dataclass(frozen=True)
class Giveaway:
    """A lot's giveaway in the rule's unit: ``per_pack`` = mean − nominal (or − target without a nominal;
    negative means under-filled), ``total`` = per_pack × n; ``cost`` (= total × cost per unit) and
    ``currency`` only when the rule sets a cost per unit."""

    per_pack: float
    total: float
    cost: float | None = None
    currency: str | None = None

    def to_json(self) -> dict[str, float | str | None]:
        """``per_pack`` and ``total``; ``cost`` and ``currency`` too when a cost per unit is set."""
        out: dict[str, float | str | None] = {"per_pack": self.per_pack, "total": self.total}
        if self.cost is not None:
            out["cost"] = self.cost
            out["currency"] = self.currency
        return out


def _check_n(n: int) -> int:
    if isinstance(n, bool) or not isinstance(n, int) or n < 0:
        raise ValueError(f"n must be a whole number ≥ 0, got {n!r}")
    return n


def _cost(total: float, cost_per_unit: float | None) -> float | None:
    if cost_per_unit is None:
        return None
    if not _finite(cost_per_unit):
        raise ValueError(f"cost_per_unit must be a finite number, got {cost_per_unit!r}")
    return total * float(cost_per_unit)


def giveaway_of(mean: float | None, n: int, *, nominal: float | None, target: float,
                cost_per_unit: float | None = None, currency: str | None = None) -> Giveaway | None:
    """The giveaway of a lot of ``n`` packs whose mean is ``mean`` (rule's unit); None when the mean is
    unknown (None, NaN or infinite). The reference is ``nominal`` when the rule has one, else ``target``.

    Raises ValueError for a negative or non-integer ``n`` and for a non-finite reference or cost per unit
    (those are rule errors, not missing data)."""
    _check_n(n)
    ref = nominal if nominal is not None else target
    if not _finite(ref):
        which = "nominal" if nominal is not None else "target"
        raise ValueError(f"{which} must be a finite number, got {ref!r}")
    if not _finite(mean):
        return None
    assert mean is not None
    per_pack = float(mean) - float(ref)
    total = per_pack * n if n else 0.0
    cost = _cost(total, cost_per_unit)
    return Giveaway(per_pack=per_pack, total=total, cost=cost,
                    currency=currency if cost is not None else None)


def total_giveaway(lots: Iterable[tuple[Giveaway | None, int]]) -> tuple[Giveaway | None, int]:
    """The giveaway of several lots together, from (giveaway, n) pairs: totals and costs added with
    ``math.fsum``; ``per_pack`` is the total over all packs of the lots whose giveaway is known. Returns
    the sum (None when no lot's giveaway is known or those lots hold no pack) and how many lots had none.
    ``cost`` is set only when every known lot has one in the same currency."""
    totals: list[float] = []
    costs: list[float] = []
    currencies: set[str | None] = set()
    packs = 0
    unknown = 0
    all_costed = True
    for g, n in lots:
        _check_n(n)
        if g is None:
            unknown += 1
            continue
        totals.append(g.total)
        packs += n
        if g.cost is None:
            all_costed = False
        else:
            costs.append(g.cost)
            currencies.add(g.currency)
    if not totals or packs == 0:
        return None, unknown
    total = math.fsum(totals)
    costed = all_costed and len(currencies) == 1
    return Giveaway(per_pack=total / packs, total=total,
                    cost=math.fsum(costs) if costed else None,
                    currency=next(iter(currencies)) if costed else None), unknown
