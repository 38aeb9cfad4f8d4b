"""The batch path's z, Wilcoxon and power numbers against the reference libraries directly."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from monitor.engine import evaluate_many
from monitor.lot import LotData, LotKey
from monitor.rulebook import NormalityRule, Rule


def _lots(rng: np.random.Generator, make) -> list[LotData]:
    return [LotData(LotKey("L1", "OAT-500", f"B{i}"), values=make(rng, i)) for i in range(40)]


@pytest.mark.parametrize("alternative", ["two-sided", "less", "greater"])
def test_batch_z_test_matches_scipy_norm(alternative: str) -> None:
    """z statistic (mean − target)/(σ/√n) and its p-value from scipy.stats.norm, lot by lot in one batch."""
    rng = np.random.default_rng(41)
    lots = _lots(rng, lambda r, i: r.normal(500 + r.normal(0, 0.8), 2.0, 10 + i))
    rule = Rule.adhoc(target=500.0, known_sd=2.0, alternative=alternative, normality=NormalityRule(enabled=False))
    for lot, v in zip(lots, evaluate_many(lots, rule)):
        z = (np.mean(lot.values) - 500.0) / (2.0 / math.sqrt(len(lot.values)))
        p = {"two-sided": 2 * stats.norm.sf(abs(z)), "less": stats.norm.cdf(z),
             "greater": stats.norm.sf(z)}[alternative]          # reference: scipy.stats.norm
        assert v.test == "z" and v.statistic == pytest.approx(z, rel=1e-10)
        assert v.p_value == pytest.approx(p, rel=1e-9, abs=1e-300)


@pytest.mark.parametrize("alternative", ["two-sided", "less", "greater"])
def test_batch_wilcoxon_fallback_matches_scipy(alternative: str) -> None:
    """Lots that fail Shapiro–Wilk with on_fail = wilcoxon get scipy.stats.wilcoxon's statistic and p-value."""
    rng = np.random.default_rng(42)
    lots = _lots(rng, lambda r, i: 499.0 + r.exponential(2.0, 20 + i))   # skewed: the gate fails for most
    rule = Rule.adhoc(target=500.0, alternative=alternative, min_n=5,
                      normality=NormalityRule(alpha=0.05, on_fail="wilcoxon"))
    checked = 0
    for lot, v in zip(lots, evaluate_many(lots, rule)):
        if v.test != "wilcoxon":
            continue
        ref = stats.wilcoxon(lot.values - 500.0, alternative=alternative)   # reference: scipy.stats.wilcoxon
        assert v.statistic == pytest.approx(ref.statistic, rel=1e-12)
        assert v.p_value == pytest.approx(ref.pvalue, rel=1e-10)
        checked += 1
    assert checked >= 20


def test_batch_power_matches_statsmodels() -> None:
    """Power against the shift of interest equals statsmodels TTestPower at each lot's n and sample sd."""
    from statsmodels.stats.power import TTestPower

    rng = np.random.default_rng(43)
    lots = _lots(rng, lambda r, i: r.normal(500, 1.5 + 0.05 * i, 8 + i))
    rule = Rule.adhoc(target=500.0, shift_of_interest=1.0, alpha=0.05, normality=NormalityRule(enabled=False))
    for lot, v in zip(lots, evaluate_many(lots, rule)):
        d = 1.0 / np.std(lot.values, ddof=1)
        ref = TTestPower().power(effect_size=d, nobs=len(lot.values), alpha=0.05, alternative="two-sided")
        assert v.power == pytest.approx(ref, rel=1e-7)   # reference: statsmodels (noncentral t, both tails)
