"""Average-quantity screen of a lot against its nominal quantity (the "average system" for prepackages).

Pure. Implements the tolerable negative error (TNE) table and the three checks of the average system as
published in Council Directive 76/211/EEC Annexes I–II and the UK Weights and Measures (Packaged Goods)
Regulations 2006 (SI 2006/659), Schedule 2:

1. the mean criterion x̄ ≥ Qn − t(0.995, n−1)·s/√n (for a sample; with every pack weighed the same bound is
   a conservative screen),
2. few packs short by more than the TNE ("T1"): the published sampling plans accept at most 3 of 50, 5 of 80,
   7 of 125 (about 2.5 % of the batch; a 2.5 % share is used for lots of other sizes: common practice),
3. no pack short by more than twice the TNE ("T2").

lotwarden screens; net-quantity compliance is decided under local weights-and-measures law by the
competent authority.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from decimal import ROUND_CEILING, Decimal
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import stats

if TYPE_CHECKING:
    from monitor.rulebook import Rule

# (upper Qn bound inclusive, kind, amount): kind "pct" -> percent of Qn, "abs" -> g or mL.
_TNE_TABLE = (
    (Decimal(50), "pct", Decimal(9)),
    (Decimal(100), "abs", Decimal("4.5")),
    (Decimal(200), "pct", Decimal("4.5")),
    (Decimal(300), "abs", Decimal(9)),
    (Decimal(500), "pct", Decimal(3)),
    (Decimal(1000), "abs", Decimal(15)),
    (Decimal(10000), "pct", Decimal("1.5")),
    (Decimal(15000), "abs", Decimal(150)),
)
T1_SHARE = 0.025


def tolerable_negative_error(nominal: float) -> float:
    """TNE in g or mL for a nominal quantity ``nominal`` (same unit), 5 g/mL and up.

    Percentages are rounded up to the next 0.1 g or mL.

    Examples
    --------
    >>> tolerable_negative_error(250), tolerable_negative_error(125)
    (9.0, 5.7)
    """
    if not (math.isfinite(nominal) and nominal >= 5):
        raise ValueError(f"nominal quantity must be at least 5 g or mL (got {nominal!r})")
    q = Decimal(repr(float(nominal)))
    for upper, kind, amount in _TNE_TABLE:
        if q <= upper:
            break
    else:
        kind, amount = "pct", Decimal(1)
    if kind == "abs":
        return float(amount)
    value = (q * amount / 100).quantize(Decimal("0.1"), rounding=ROUND_CEILING)
    return float(value)


@dataclass(frozen=True)
class AverageQuantityResult:
    """Outcome of the average-quantity screen of one lot."""

    nominal: float
    tne: float
    n: int
    mean: float
    mean_limit: float | None      # Qn − t(0.995, n−1)·s/√n
    mean_ok: bool | None
    below_t1: int                 # packs short by more than the TNE
    below_t1_allowed: int
    below_t2: int                 # packs short by more than 2·TNE
    passed: bool
    reason: str

    def to_json(self) -> dict[str, Any]:
        return {"nominal": self.nominal, "tne": self.tne, "n": self.n, "mean": self.mean,
                "mean_limit": self.mean_limit, "mean_ok": self.mean_ok, "below_t1": self.below_t1,
                "below_t1_allowed": self.below_t1_allowed, "below_t2": self.below_t2, "passed": self.passed,
                "reason": self.reason}


def allowed_below_t1(n: int) -> int:
    """Packs short by more than TNE a lot of ``n`` may hold: the published plans for 50/80/125, else 2.5 %."""
    published = {50: 3, 80: 5, 125: 7, 20: 1}
    return published.get(n, int(math.floor(T1_SHARE * n)))


def screen_average_quantity(values: np.ndarray, nominal: float) -> AverageQuantityResult:
    """Screen one lot's net quantities (already in the nominal's unit) against the average system."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    n = int(v.shape[0])
    tne = tolerable_negative_error(nominal)
    if n == 0:
        return AverageQuantityResult(nominal, tne, 0, math.nan, None, None, 0, 0, 0, False, "no values")
    mean = float(np.mean(v))
    below_t1 = int(np.count_nonzero(v < nominal - tne))
    below_t2 = int(np.count_nonzero(v < nominal - 2 * tne))
    allowed = allowed_below_t1(n)
    mean_limit = mean_ok = None
    if n >= 2:
        s = float(np.std(v, ddof=1))
        mean_limit = nominal - float(stats.t.ppf(0.995, n - 1)) * s / math.sqrt(n)
        mean_ok = mean >= mean_limit
    problems = []
    if mean_ok is False:
        problems.append(f"mean {mean:.4g} below the limit {mean_limit:.4g}")
    if below_t1 > allowed:
        problems.append(f"{below_t1} packs short by more than TNE {tne:g} (at most {allowed} allowed)")
    if below_t2:
        problems.append(f"{below_t2} packs short by more than 2×TNE")
    passed = not problems
    reason = ("average-quantity screen met" if passed else "average-quantity screen fails: " + "; ".join(problems))
    return AverageQuantityResult(nominal, tne, n, mean, mean_limit, mean_ok, below_t1, allowed, below_t2,
                                 passed, reason)


def screen_lot(values: np.ndarray, rule: "Rule") -> AverageQuantityResult:
    """The average-quantity screen of one lot under ``rule`` (which has a ``nominal``); values in the rule's
    unit, non-finite ones already left out. ``reason`` is the one-line summary shown with every verdict."""
    assert rule.nominal is not None
    return screen_average_quantity(values, rule.nominal)
