"""Average-quantity screen: full inspection and the published sampling plans at their accept/reject boundaries.

Sources read for these checks (stored public copies):
- SI 2006/659 Schedule 2 (legislation.gov.uk, as made): ¶2.8 (batches under 100 checked 100 %), ¶3.3–3.5
  (single plans: 100–500: 50 packs, accept 3, reject 4; 501–3 200: 80, 5, 6; 3 201 and above: 125, 7, 8),
  ¶3.6 (under 100: acceptable if the defective packages do not exceed 5 %), ¶3.7 ff. double plans (read as far as ¶3.9),
  ¶4.1–4.2 (mean > Qn − t(0.995, n−1)·s/√n), ¶4.5–4.6 (factors 0.503 for 30, 0.379 for 50, 0.640 for 20
  destructive), ¶4.7 (under 100: the mean of all packs ≥ Qn).
- Council Directive 76/211/EEC Annex II 2.2.1 (double plans: 100–500: 30 (1, 3) then 60 aggregate (4, 5);
  501–3 200: 50 (2, 5), 100 (6, 7); 3 201 and over: 80 (3, 7), 160 (8, 9)), 2.2.2 (destructive: 20 packs,
  accept 1, reject 2, batches of 100 or more).
- New Zealand Weights and Measures Regulations 1999, Schedule 7A Table 1 (correction factor 0.295 for 80).
- Trading standards guidance on SI 2006/659 (tradingstandards.gov.uk, "Guidance notes on average quantity"):
  the share below TNE "generally no more than 2.5%".
The destructive plan's numbers are from the Directive (its paragraph in SI 2006/659 was not read).
"""

from __future__ import annotations

import itertools
import math
from typing import Any

import numpy as np
import pytest
from scipy import stats

from monitor.quantity import (
    allowed_below_t1,
    mean_criterion_factor,
    plan_for,
    screen_average_quantity,
)

NOMINAL = 500.0        # g: TNE 15 (Directive Annex I 2.4), T1 485, T2 470
GOOD, SHORT = 502.0, 484.0      # a good pack; a pack below T1 but above T2


def packs(n: int, short: int, first: int | None = None) -> np.ndarray:
    """``n`` packs, ``short`` of them below T1 placed in the first ``first`` packs (default: at the start)."""
    x = np.full(n, GOOD) + np.tile([0.5, -0.5], n // 2 + 1)[:n]
    x[:short] = SHORT
    return x


@pytest.mark.parametrize("n,allowed", [
    # floor(2.5 % of n) (trading standards guidance on SI 2006/659: "generally no more than 2.5%")
    (20, 0), (21, 0), (39, 0), (40, 1), (50, 1), (51, 1), (79, 1), (80, 2), (81, 2), (120, 3), (125, 3), (126, 3),
    (1000, 25), (4000, 100),
])
def test_full_inspection_allowance_is_floor_of_the_share(n: int, allowed: int) -> None:
    """Full inspection allows floor(t1_share × n) packs below T1, exactly (no binary rounding at 40, 80, 120)."""
    assert allowed_below_t1(n) == allowed
    assert allowed_below_t1(n, 0.02) == math.floor(n * 2 / 100)   # FPackV §9(3): 2 %


def test_full_inspection_allowance_never_decreases() -> None:
    """One more weighed pack never lowers the packs allowed below T1."""
    a = [allowed_below_t1(n) for n in range(1, 5001)]
    assert all(x <= y for x, y in itertools.pairwise(a))


def test_full_inspection_rules() -> None:
    """Every pack weighed: mean ≥ Qn, ≤ floor(2.5 %) below T1, none below T2 (packers' rules, gov.uk)."""
    r = screen_average_quantity(packs(80, 2), NOMINAL)
    assert (r.below_t1, r.below_t1_allowed, r.passed, r.plan, r.mean_limit) == (2, 2, True, None, NOMINAL)
    assert screen_average_quantity(packs(80, 3), NOMINAL).passed is False
    x = packs(80, 0)
    x[5] = 469.9                                         # below T2 = 470
    r = screen_average_quantity(x, NOMINAL)
    assert (r.below_t2, r.passed) == (1, False)


@pytest.mark.parametrize("batch,size,accept,reject", [
    (100, 50, 3, 4), (500, 50, 3, 4),                    # SI 2006/659 Sch. 2 ¶3.5 table: 100 to 500
    (501, 80, 5, 6), (3200, 80, 5, 6),                   # 501 to 3,200
    (3201, 125, 7, 8), (10000, 125, 7, 8), (250000, 125, 7, 8),   # 3,201 and above
])
def test_single_plans_by_batch_size(batch: int, size: int, accept: int, reject: int) -> None:
    """The single plan and its accept/reject boundary for each batch-size band (SI 2006/659 Sch. 2 ¶3.3–3.5)."""
    (p,) = plan_for(batch)
    assert (p.sample_size, p.accept, p.reject) == (size, accept, reject)
    ok = screen_average_quantity(packs(size, accept), NOMINAL, inspection="sample", batch_size=batch)
    bad = screen_average_quantity(packs(size, reject), NOMINAL, inspection="sample", batch_size=batch)
    assert ok.passed is True and bad.passed is False
    assert ok.plan is not None and ok.plan.to_json() == {"batch_size": batch, "sample_size": size,
                                                          "accept": accept, "reject": reject}
    short = screen_average_quantity(packs(size - 1, 0), NOMINAL, inspection="sample", batch_size=batch)
    assert short.needs_review and short.passed is None and f"needs {size} packs" in short.reason


def test_single_plan_counts_its_own_sample_only() -> None:
    """The plan's defectives are counted in its sample (¶3.3: the number checked equals the sample number)."""
    x = np.r_[packs(50, 3), np.full(10, SHORT)]          # 3 in the first 50, 10 more beyond
    r = screen_average_quantity(x, NOMINAL, inspection="sample", batch_size=400)
    assert r.below_t1 == 3 and "first 50 of 60" in r.reason


@pytest.mark.parametrize("batch,first,both", [
    # Directive 76/211/EEC Annex II 2.2.1 (table read there); SI 2006/659 Sch. 2 ¶3.7 ff.
    (100, (30, 1, 3), (60, 4, 5)), (500, (30, 1, 3), (60, 4, 5)),
    (501, (50, 2, 5), (100, 6, 7)), (3200, (50, 2, 5), (100, 6, 7)),
    (3201, (80, 3, 7), (160, 8, 9)),
])
def test_double_plans(batch: int, first: tuple[int, int, int], both: tuple[int, int, int]) -> None:
    """Double plan: accept or reject on the first sample, else decide on both samples together."""
    n1, a1, r1 = first
    n2, a2, r2 = both
    p1, p2 = plan_for(batch, "double")
    assert (p1.sample_size, p1.accept, p1.reject, p2.sample_size, p2.accept, p2.reject) == (*first, *both)
    kw: dict[str, Any] = {"inspection": "sample", "batch_size": batch, "sampling_plan": "double"}
    assert screen_average_quantity(packs(n1, a1), NOMINAL, **kw).passed is True          # first accept
    r = screen_average_quantity(packs(n1, r1), NOMINAL, **kw)                            # first reject
    assert r.passed is False and r.plan is not None and r.plan.sample_size == n1
    mid = screen_average_quantity(packs(n1, a1 + 1), NOMINAL, **kw)                      # undecided
    assert mid.needs_review and f"{n2} packs in all" in mid.reason
    r = screen_average_quantity(packs(n2, a2), NOMINAL, **kw)     # a2 defectives in the first n1 -> 2nd sample
    if a2 < r1:
        assert r.passed is True and r.plan is not None and r.plan.sample_size == n2
    x = packs(n2, 0)
    x[: a1 + 1] = SHORT                                            # undecided on the first sample ...
    x[n1: n1 + (r2 - a1 - 1)] = SHORT                              # ... r2 in the aggregate
    r = screen_average_quantity(x, NOMINAL, **kw)
    assert r.passed is False and r.below_t1 == r2 and r.plan is not None and r.plan.reject == r2
    x[n1] = GOOD                                                   # a2 in the aggregate
    assert screen_average_quantity(x, NOMINAL, **kw).passed is True


def test_destructive_plan() -> None:
    """Destructive testing: 20 packs, accept 1, reject 2, batches of 100 or more (Directive Annex II 2.2.2)."""
    (p,) = plan_for(5000, "destructive")
    assert (p.sample_size, p.accept, p.reject) == (20, 1, 2)
    kw: dict[str, Any] = {"inspection": "sample", "batch_size": 5000, "sampling_plan": "destructive"}
    assert screen_average_quantity(packs(20, 1), NOMINAL, **kw).passed is True
    assert screen_average_quantity(packs(20, 2), NOMINAL, **kw).passed is False
    with pytest.raises(ValueError, match="100 or more"):
        plan_for(99, "destructive")
    r = screen_average_quantity(packs(20, 0), NOMINAL, inspection="sample", batch_size=99,
                                sampling_plan="destructive")
    assert r.needs_review


@pytest.mark.parametrize("batch,allowed", [(20, 1), (39, 1), (40, 2), (60, 3), (99, 4)])
def test_batches_under_100(batch: int, allowed: int) -> None:
    """Under 100 packs: all packs checked (¶2.8), defectives ≤ 5 % of the batch (¶3.6), mean ≥ Qn (¶4.7)."""
    assert allowed == math.floor(batch * 5 / 100)
    kw: dict[str, Any] = {"inspection": "sample", "batch_size": batch}
    r = screen_average_quantity(packs(batch, allowed), NOMINAL, **kw)
    assert r.passed is True and r.mean_limit == NOMINAL and r.below_t1_allowed == allowed
    assert screen_average_quantity(packs(batch, allowed + 1), NOMINAL, **kw).passed is False
    r = screen_average_quantity(packs(batch - 1, 0), NOMINAL, **kw)
    assert r.needs_review and "checked in full" in r.reason
    x = packs(batch, 0) - 2.1                                # every pack 499.4 or 500.4: mean 499.9 < Qn
    r = screen_average_quantity(x, NOMINAL, **kw)
    assert r.mean_ok is False and r.passed is False          # Qn − t·s/√n would have let it through


@pytest.mark.parametrize("n,factor", [
    (30, 0.503), (50, 0.379),        # SI 2006/659 Sch. 2 ¶4.5 (non-destructive)
    (20, 0.640),                     # ¶4.6 (destructive)
    (80, 0.295),                     # NZ Weights and Measures Regulations 1999 Sch. 7A Table 1
])
def test_mean_criterion_factor_matches_the_published_factors(n: int, factor: float) -> None:
    """t(0.995, n−1)/√n equals the published factor to its three printed decimals."""
    assert mean_criterion_factor(n) == pytest.approx(factor, abs=0.5e-3)


@pytest.mark.parametrize("batch,n,plan", [(400, 30, "double"), (400, 50, "single"), (2000, 80, "single"),
                                          (400, 20, "destructive")])
def test_sample_mean_limit_equals_scipy(batch: int, n: int, plan: str) -> None:
    """Sample inspection: mean limit = Qn − t(0.995, n−1)·s/√n over the sample (¶4.1–4.2), equal to scipy."""
    x = np.random.default_rng(n).normal(501.0, 3.0, n).round(1)
    x = np.clip(x, 486.0, None)
    r = screen_average_quantity(x, NOMINAL, inspection="sample", batch_size=batch, sampling_plan=plan)
    expect = NOMINAL - stats.t.ppf(0.995, n - 1) * np.std(x, ddof=1) / math.sqrt(n)
    assert r.mean_limit == pytest.approx(expect, rel=1e-12)
    assert r.mean_ok is bool(np.mean(x) >= expect)


def test_sample_mean_criterion_boundary() -> None:
    """A sample whose mean is just above / below Qn − 0.379·s (50 packs, ¶4.5) is accepted / rejected."""
    base = np.tile([-1.0, 1.0], 25)                          # s = sqrt(50/49)
    s = math.sqrt(50 / 49)
    for delta, ok in ((+0.01, True), (-0.01, False)):
        x = NOMINAL - 0.379 * s + delta + base
        r = screen_average_quantity(x, NOMINAL, inspection="sample", batch_size=400)
        assert r.mean_ok is ok


def test_sample_larger_than_the_batch_is_review() -> None:
    """An export holding more packs than the batch cannot be a sample of it."""
    r = screen_average_quantity(packs(60, 0), NOMINAL, inspection="sample", batch_size=50)
    assert r.needs_review and "more than the batch" in r.reason
