"""Engine accounting: rows left out per reason, known-sd lots without spread, the Wilcoxon method record."""

from __future__ import annotations

import math
import warnings
from decimal import Decimal

import numpy as np
import pytest
from scipy import stats

from monitor.engine import evaluate, evaluate_many
from monitor.lot import LotData, LotKey, LotSummary
from monitor.rulebook import NormalityRule, Rule

pytestmark = pytest.mark.filterwarnings("error")

KEY = LotKey("L2", "JAM-340", "J-0042")
OFF = NormalityRule(enabled=False)
WILCOXON = NormalityRule(on_fail="wilcoxon")
NONE = {"blank": 0, "not_a_number": 0, "not_finite": 0, "dropped_value": 0}


def with_gaps(values, gaps: int) -> np.ndarray:
    return np.r_[np.asarray(values, dtype=float), np.full(gaps, np.nan)]


def test_excluded_rows_are_counted_per_reason():
    """`excluded` is the lot's NaN rows, `excluded_by` their reasons; the reason text names them; the test
    runs on the rest (scipy.stats.ttest_1samp on the usable values, reference)."""
    x = np.random.default_rng(1).normal(340.0, 1.0, 25)
    lot = LotData(KEY, values=with_gaps(x, 3), excluded_by={"blank": 2, "not_a_number": 1})
    v = evaluate(lot, Rule.adhoc(target=340.0, normality=OFF))
    assert v.excluded == 3 and v.n == 25
    assert v.excluded_by == {"blank": 2, "not_a_number": 1, "not_finite": 0, "dropped_value": 0}
    assert v.to_json()["excluded_by"] == v.excluded_by
    assert "3 rows without a usable value left out (2 blank, 1 not a number)" in v.reason
    assert "non-finite" not in v.reason
    assert v.p_value == pytest.approx(stats.ttest_1samp(x, 340.0).pvalue, rel=1e-10)


def test_one_row_is_singular_and_drop_values_are_named():
    """1 row (not "1 rows"); a profile drop value is named as such."""
    lot = LotData(KEY, values=with_gaps(np.random.default_rng(2).normal(340, 1, 10), 1),
                  excluded_by={"dropped_value": 1})
    v = evaluate(lot, Rule.adhoc(target=340.0, normality=OFF))
    assert "1 row without a usable value left out (1 listed in drop_values)" in v.reason
    assert v.excluded_by == {**NONE, "dropped_value": 1}


def test_unexplained_non_finite_values_count_as_not_finite():
    """NaN / ±inf rows that excluded_by does not explain are `not_finite` (counts add up to `excluded`)."""
    x = np.r_[np.random.default_rng(3).normal(340, 1, 10), np.nan, np.inf, -np.inf]
    v = evaluate(LotData(KEY, values=x, excluded_by={"blank": 1}), Rule.adhoc(target=340.0, normality=OFF))
    assert v.excluded == 3 and v.excluded_by == {**NONE, "blank": 1, "not_finite": 2}
    assert "3 rows without a usable value left out (1 blank, 2 not finite)" in v.reason


def test_lot_of_only_excluded_rows_is_a_review_with_counts():
    """Only blank rows: review, n = 0, every row accounted for."""
    v = evaluate(LotData(KEY, values=with_gaps([], 4), excluded_by={"blank": 4}), Rule.adhoc(target=340.0))
    assert v.verdict == "review" and v.n == 0 and v.excluded == 4 and v.excluded_by == {**NONE, "blank": 4}
    assert "no usable values to judge; 4 rows without a usable value left out (4 blank)" == v.reason


def test_no_excluded_rows_no_note():
    """A lot with every value usable has all four counts at 0 and no note."""
    v = evaluate(LotData(KEY, values=np.random.default_rng(4).normal(340, 1, 10)), Rule.adhoc(target=340.0))
    assert v.excluded == 0 and v.excluded_by == NONE and "left out" not in v.reason


@pytest.mark.parametrize("alternative", ["two-sided", "less", "greater"])
@pytest.mark.parametrize("value,n", [(340.4, 8), (339.7, 25), (340.0, 6)])
def test_known_sd_judges_identical_values(value, n, alternative):
    """A z rule judges a lot of identical values: z = (mean − target)/(σ/√n), p from scipy.stats.norm
    (hand formula + reference library); the reason names z and no t statistic."""
    v = evaluate(LotData(KEY, values=np.full(n, value)),
                 Rule.adhoc(target=340.0, known_sd=0.5, alternative=alternative))
    z = (value - 340.0) / (0.5 / math.sqrt(n))
    p = {"two-sided": 2 * stats.norm.sf(abs(z)), "less": stats.norm.cdf(z), "greater": stats.norm.sf(z)}[alternative]
    assert v.test == "z" and v.statistic == pytest.approx(z, rel=1e-12, abs=1e-12)
    assert v.p_value == pytest.approx(p, rel=1e-10)
    assert v.verdict == ("hold" if p < 0.05 else "pass")
    assert "t statistic" not in v.reason and "t =" not in v.reason
    assert v.normality.passed is None and "do not vary" in v.normality.note
    assert v.sd == 0.0 and v.effect_size == pytest.approx((value - 340.0) / 0.5, abs=1e-12)


def test_known_sd_identical_values_follow_on_unassessed():
    """With on_unassessed = review the unassessable normality sends the flat z lot to review."""
    v = evaluate(LotData(KEY, values=np.full(10, 340.4)),
                 Rule.adhoc(target=340.0, known_sd=0.5, normality=NormalityRule(on_unassessed="review")))
    assert v.verdict == "review" and v.test is None


def test_known_sd_summary_with_zero_sd_is_judged():
    """A summary lot with sd 0 under a z rule: z from n and mean only (hand formula, scipy.stats.norm)."""
    v = evaluate(LotData(KEY, summary=LotSummary(16, 339.6, 0.0)), Rule.adhoc(target=340.0, known_sd=0.8))
    z = (339.6 - 340.0) / (0.8 / 4.0)
    assert v.test == "z" and v.statistic == pytest.approx(z, rel=1e-12)
    assert v.p_value == pytest.approx(2 * stats.norm.sf(abs(z)), rel=1e-10)


def test_t_rule_keeps_review_of_identical_values():
    """Under a t rule identical values stay a review and the reason names the t statistic."""
    v = evaluate(LotData(KEY, values=np.full(10, 340.4)), Rule.adhoc(target=340.0))
    assert v.verdict == "review" and v.test is None and "the t statistic is undefined" in v.reason


def _decimal_differences(x, target) -> np.ndarray:
    """x − target in exact decimal arithmetic (Python's decimal module) on the numbers as printed."""
    t = Decimal(repr(float(target)))
    return np.array([float(Decimal(repr(float(v))) - t) for v in x])


def _skewed_tenths(target: float, n: int, seed: int) -> np.ndarray:
    """Right-skewed fills printed to 0.1 g around ``target`` (they fail Shapiro–Wilk)."""
    rng = np.random.default_rng(seed)
    return np.round(target - 0.6 + rng.exponential(0.7, n), 1)


@pytest.mark.parametrize("alternative", ["two-sided", "less", "greater"])
@pytest.mark.parametrize("target,n,method", [(500.3, 12, "exact"), (500.3, 40, "normal approximation"),
                                             (0.3, 12, "exact"), (340.7, 60, "normal approximation")])
def test_engine_wilcoxon_records_method_zeros_and_keeps_decimal_ties(target, n, method, alternative):
    """Verdict.wilcoxon gives method, zeros, n_used; statistic and p equal scipy.stats.wilcoxon on exact
    decimal differences (reference; zero_method="wilcox", correction=False, method="auto")."""
    x = _skewed_tenths(target, n, seed=n)
    r = Rule.adhoc(target=target, alternative=alternative, normality=WILCOXON)
    v = evaluate(LotData(KEY, values=x), r)
    assert v.test == "wilcoxon", v.reason
    d = _decimal_differences(x, target)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = stats.wilcoxon(d, zero_method="wilcox", correction=False, alternative=alternative, method="auto")
    assert v.statistic == ref.statistic
    assert v.p_value == pytest.approx(ref.pvalue, rel=1e-10)
    zeros = int(np.sum(d == 0))
    assert v.wilcoxon is not None
    assert (v.wilcoxon.method, v.wilcoxon.zeros, v.wilcoxon.n_used) == (method, zeros, n - zeros)
    assert v.to_json()["wilcoxon"] == {"method": method, "zeros": zeros, "n_used": n - zeros}
    assert "pseudo-median" in v.reason and "Wilcoxon signed-rank test of location" in v.reason
    assert f"{plural_values(zeros)} on target left out" in v.reason if zeros else "on target" not in v.reason


def plural_values(k: int) -> str:
    return f"{k} value" if k == 1 else f"{k} values"


def test_wilcoxon_hold_reason_states_the_pseudo_median():
    """A Wilcoxon hold reads 'pseudo-median <HL estimate> g is above target'; HL by its definition."""
    x = _skewed_tenths(500.3, 40, seed=40) + 0.5
    v = evaluate(LotData(KEY, values=x), Rule.adhoc(target=500.3, normality=WILCOXON))
    i, j = np.triu_indices(x.size)
    hl = float(np.median((np.sort(x)[i] + np.sort(x)[j]) / 2))   # Hodges–Lehmann: median of Walsh averages
    assert v.verdict == "hold" and v.test == "wilcoxon"
    assert v.reason.startswith(f"pseudo-median {hl:.2f} g is above target 500.3 g")


def test_t_and_z_verdicts_have_no_wilcoxon_record():
    """`wilcoxon` is None unless the signed-rank test ran."""
    v = evaluate(LotData(KEY, values=np.random.default_rng(5).normal(340, 1, 20)), Rule.adhoc(target=340.0))
    assert v.test == "t" and v.wilcoxon is None and v.to_json()["wilcoxon"] is None


def test_batch_equals_one_by_one_with_accounting():
    """Lots with gaps, reasons, assumed units, flat z lots and Wilcoxon lots: batch == lot by lot."""
    rng = np.random.default_rng(6)
    lots = []
    for i in range(80):
        n = int(rng.integers(0, 50))
        kind = i % 5
        x = np.round(339.4 + rng.exponential(0.8, n), 1) if kind == 3 else rng.normal(340, 1, n)
        if kind == 2:
            x = np.full(n, 340.2)
        gaps = int(rng.integers(0, 3))
        lots.append(LotData(LotKey("L2", "JAM-340", f"J{i}"), values=with_gaps(x, gaps),
                            excluded_by={"blank": gaps // 2, "dropped_value": gaps - gaps // 2} if kind else {},
                            unit_assumed=kind == 1))
    for r in (Rule.adhoc(target=340.0, known_sd=1.0, normality=WILCOXON), Rule.adhoc(target=340.0,
                                                                                      normality=WILCOXON)):
        batch = evaluate_many(lots, r)
        assert batch == [evaluate(lot, r) for lot in lots]
        assert {v.test for v in batch} >= {"wilcoxon", None}


def test_z_rule_reviews_never_mention_t():
    """Reviews under a known-sd rule (normality failed, a single unit) name the z-test, never t."""
    x = np.random.default_rng(7).exponential(1.0, 40) + 339.5           # fails Shapiro–Wilk
    r = Rule.adhoc(target=340.0, known_sd=1.0)
    v = evaluate(LotData(KEY, values=x), r)
    assert v.verdict == "review" and "the z-test may mislead" in v.reason
    v = evaluate(LotData(KEY, values=[340.1]), r)
    assert v.verdict == "review" and "t-test" not in v.reason and "standard deviation" not in v.reason
    v = evaluate(LotData(KEY, values=x), Rule.adhoc(target=340.0))
    assert "the t-test may mislead" in v.reason


@pytest.mark.parametrize("summary,says", [
    (LotSummary(10, float("nan"), 1.0), "mean nan is not finite"),
    (LotSummary(10, 500.0, -1.0), "sd -1.0 is negative"),
    (LotSummary(10, 500.0, float("inf")), "sd inf is not finite (n = 10)"),
    (LotSummary(2.5, 500.0, 1.0), "n 2.5 is not a whole number >= 0"),  # type: ignore[arg-type]
    (LotSummary(-3, 500.0, 1.0), "n -3 is not a whole number >= 0"),
    (LotSummary(10, 500.0, 1e200), "sd 1e+200 g is too large to square (overflow)"),
])
def test_unusable_summary_is_a_review_naming_the_field(summary, says):
    """An unusable summary record is a review whose reason names the bad field and its value."""
    v = evaluate(LotData(KEY, summary=summary), Rule.adhoc(target=500.0))
    assert v.verdict == "review" and v.test is None
    assert v.reason == f"the lot summary is not usable: {says}"


def test_lone_unit_summary_with_nan_sd_is_a_review():
    """n = 1 with sd NaN (a lone unit has no sd) is a review: one unit cannot be judged."""
    v = evaluate(LotData(KEY, summary=LotSummary(1, 500.2, float("nan"))), Rule.adhoc(target=500.0))
    assert v.verdict == "review" and v.reason.startswith("only 1 unit")
