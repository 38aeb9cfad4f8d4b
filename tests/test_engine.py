"""The engine applies a rule to one lot: gates, t / z / Wilcoxon, interval, power, heads -> Verdict."""

import dataclasses
import warnings

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.power import TTestPower

from monitor.engine import NOTE_LARGE_N, SCREENING_NOTE, evaluate
from monitor.lot import LotData, LotKey, LotSummary
from monitor.rulebook import NormalityRule, Rule

pytestmark = pytest.mark.filterwarnings("error")       # no numpy / scipy warning may escape the engine

KEY = LotKey("L1", "OAT-500", "B-0001")
# Source: Student's sleep data (R datasets::sleep); published R output of the paired t-test (R documentation example for `sleep`)
SLEEP_DIFF = (np.array([0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0])
              - np.array([1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4]))


def lot(values, heads=None) -> LotData:
    return LotData(KEY, values=np.asarray(values, dtype=float), heads=heads)


def rule(**kw) -> Rule:
    kw.setdefault("target", 500.0)
    return Rule.adhoc(**kw)


IGNORE = NormalityRule(on_fail="ignore")


def test_sleep_example_through_evaluate():
    """t = -4.0621, df = 9, p = 0.002833, 95 % CI (-2.4598858, -0.7001142) (published R output); hold."""
    v = evaluate(lot(SLEEP_DIFF), rule(target=0.0, normality=IGNORE))
    assert v.test == "t" and v.df == 9 and v.n == 10
    assert v.statistic == pytest.approx(-4.0621, abs=0.5e-4)
    assert v.p_value == pytest.approx(0.002833, abs=0.5e-6)
    assert v.ci_low == pytest.approx(-2.4598858, abs=0.5e-7)
    assert v.ci_high == pytest.approx(-0.7001142, abs=0.5e-7)
    assert v.mean == pytest.approx(-1.58, abs=1e-12)
    assert v.verdict == "hold"
    assert "below target" in v.reason and "p = 0.0028 < 0.05" in v.reason
    assert "Shapiro–Wilk rejected normality" in v.reason          # the gate failed and was ignored


def test_sleep_example_fails_normality_gate_by_default():
    """Sleep differences fail Shapiro–Wilk at 0.05 (scipy.stats.shapiro p = 0.0333): review naming W and p."""
    v = evaluate(lot(SLEEP_DIFF), rule(target=0.0))
    ref = stats.shapiro(SLEEP_DIFF)
    assert v.verdict == "review" and v.test is None and v.p_value is None
    assert v.normality.test == "shapiro" and v.normality.passed is False
    assert v.normality.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert v.normality.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    assert f"W = {ref.statistic:.3f}" in v.reason and "p = 0.033" in v.reason


@pytest.mark.parametrize("alternative", ["two-sided", "less", "greater"])
def test_wilcoxon_fallback_matches_scipy(alternative):
    """on_fail = wilcoxon: signed-rank test of x − target equals scipy.stats.wilcoxon (reference library)."""
    v = evaluate(lot(SLEEP_DIFF), rule(target=0.0, alternative=alternative,
                                       normality=NormalityRule(on_fail="wilcoxon")))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = stats.wilcoxon(SLEEP_DIFF, alternative=alternative)
    assert v.test == "wilcoxon" and v.df is None and v.ci_low is None and v.ci_high is None
    assert v.statistic == ref.statistic
    assert v.p_value == pytest.approx(ref.pvalue, rel=1e-10)
    assert v.verdict == ("hold" if ref.pvalue < 0.05 else "pass")
    assert "pseudo-median" in v.reason and "Wilcoxon signed-rank test of location" in v.reason
    assert " median" not in v.reason.replace("pseudo-median", "")
    assert v.power is None


@pytest.mark.parametrize("alternative", ["two-sided", "less", "greater"])
def test_t_fields_match_scipy(alternative):
    """statistic, p, df, critical value, se, CI and effect size agree with scipy / their definitions."""
    rng = np.random.default_rng({"two-sided": 1, "less": 2, "greater": 3}[alternative])
    for n in (5, 9, 40, 333):
        x = rng.normal(499.4, 2.2, n)
        v = evaluate(lot(x), rule(alternative=alternative, alpha=0.01, normality=NormalityRule(enabled=False)))
        ref = stats.ttest_1samp(x, 500.0, alternative=alternative)
        ci = ref.confidence_interval(0.99)
        assert v.statistic == pytest.approx(ref.statistic, rel=1e-10)
        assert v.p_value == pytest.approx(ref.pvalue, rel=1e-10)
        assert v.df == n - 1
        assert (v.ci_low is None) == (not np.isfinite(ci.low)) and (v.ci_high is None) == (not np.isfinite(ci.high))
        if v.ci_low is not None:
            assert v.ci_low == pytest.approx(ci.low, rel=1e-10)
        if v.ci_high is not None:
            assert v.ci_high == pytest.approx(ci.high, rel=1e-10)
        q = {"two-sided": stats.t.ppf(0.995, n - 1), "less": stats.t.ppf(0.01, n - 1),
             "greater": stats.t.ppf(0.99, n - 1)}[alternative]
        assert v.critical_value == pytest.approx(q, rel=1e-10)
        assert v.se == pytest.approx(np.std(x, ddof=1) / np.sqrt(n), rel=1e-12)
        assert v.effect_size == pytest.approx((np.mean(x) - 500.0) / np.std(x, ddof=1), rel=1e-10)
        assert v.verdict == ("hold" if ref.pvalue < 0.01 else "pass")
        assert v.normality.note == "gate off" and v.normality.passed is None


def test_z_test_with_known_sd():
    """known_sd: z statistic with se = known_sd/√n, normal p-value, df None, test "z"."""
    x = np.random.default_rng(4).normal(1000.8, 6.0, 64)
    v = evaluate(lot(x), rule(target=1000.0, unit="mL", known_sd=6.0, alternative="greater"))
    z = (np.mean(x) - 1000.0) / (6.0 / 8.0)
    assert v.test == "z" and v.df is None
    assert v.statistic == pytest.approx(z, rel=1e-12)
    assert v.p_value == pytest.approx(stats.norm.sf(z), rel=1e-10)
    assert v.ci_high is None and v.ci_low == pytest.approx(np.mean(x) - stats.norm.ppf(0.95) * 0.75, rel=1e-12)
    assert v.effect_size == pytest.approx((np.mean(x) - 1000.0) / 6.0, rel=1e-10)


@pytest.mark.parametrize("values,expected", [
    ([], "no usable values to judge"),
    ([501.0], "only 1 unit; at least 2 are needed for a standard deviation"),
    ([501.0, 499.0, 500.5], "only 3 units; the rule needs at least 5 to judge"),
    ([500.2] * 8, "all 8 values are identical"),
])
def test_gates_give_review_with_plain_reason(values, expected):
    """n = 0, 1, below min_n and zero spread give review, no test, a plain reason."""
    v = evaluate(lot(values), rule())
    assert v.verdict == "review" and v.test is None and v.p_value is None and v.statistic is None
    assert expected in v.reason
    assert v.n == len(values)


def test_non_finite_values_are_excluded_and_counted():
    """NaN / ±inf are left out, counted in `excluded`, and mentioned in the reason."""
    x = np.r_[np.random.default_rng(5).normal(500, 1, 20), np.nan, np.inf, -np.inf]
    v = evaluate(lot(x), rule(normality=IGNORE))
    ref = stats.ttest_1samp(x[:20], 500.0)
    assert v.excluded == 3 and v.n == 20
    assert v.p_value == pytest.approx(ref.pvalue, rel=1e-10)
    assert "3 rows without a usable value left out (3 not finite)" in v.reason
    assert v.excluded_by == {"blank": 0, "not_a_number": 0, "not_finite": 3, "dropped_value": 0}


def test_only_non_finite_values():
    """A lot of NaNs only is a review with n = 0 and everything counted as excluded."""
    v = evaluate(lot([np.nan, np.nan, np.inf]), rule())
    assert v.verdict == "review" and v.n == 0 and v.excluded == 3 and v.mean is None


def test_min_n_two_lets_two_units_through_with_normality_unassessed():
    """n = 2 with min_n = 2: Shapiro–Wilk needs 3, so the gate is not assessed and on_unassessed decides."""
    x = [499.0, 501.5]
    v = evaluate(lot(x), rule(min_n=2))
    assert v.test == "t" and v.normality.passed is None and "n < 3" in v.normality.note
    assert v.p_value == pytest.approx(stats.ttest_1samp(x, 500.0).pvalue, rel=1e-10)
    v = evaluate(lot(x), rule(min_n=2, normality=NormalityRule(on_unassessed="review")))
    assert v.verdict == "review" and "normality cannot be assessed" in v.reason


def test_huge_offset_and_tiny_noise():
    """1e9 + noise below float resolution is 'no spread'; 1e9 + resolvable noise is tested; no warnings."""
    rng = np.random.default_rng(6)
    v = evaluate(lot(1e9 + rng.normal(0, 1e-9, 30)), rule())
    assert v.verdict == "review" and ("identical" in v.reason or "rounding" in v.reason)
    v = evaluate(lot(1e9 + np.r_[0.0, 1.2e-7, 0.0, 2.4e-7, 0.0, 0.0, 1.2e-7]), rule())
    assert v.verdict == "review" and "rounding" in v.reason
    v = evaluate(lot(1e9 + rng.normal(0, 1e-3, 30)), rule(normality=IGNORE))
    assert v.verdict == "hold" and v.test == "t" and np.isfinite(v.statistic)


def test_overflowing_values_give_review():
    """Values near the float maximum cannot give a mean: review, no warning."""
    v = evaluate(lot([1.7e308, 1.7e308, 1.6e308, 1.5e308, 1.7e308]), rule())
    assert v.verdict == "review" and "overflow" in v.reason


def test_large_lot_skips_shapiro_with_note():
    """n > 5000: normality not assessed (Royston's approximation stops at 5000), the t-test proceeds."""
    x = np.random.default_rng(8).exponential(2.0, 6000) + 498.0
    v = evaluate(lot(x), rule())
    assert v.normality.passed is None and v.normality.note == NOTE_LARGE_N
    assert v.test == "t" and v.p_value == pytest.approx(stats.ttest_1samp(x, 500.0).pvalue, rel=1e-10)


def test_summary_lot_proceeds_or_reviews():
    """A summary-only lot: t from n, mean, sd with normality unassessed; on_unassessed = review -> review."""
    s = LotSummary(n=40, mean=339.4, sd=1.6)
    v = evaluate(LotData(KEY, summary=s, unit="g"), rule(target=340.0, alternative="less"))
    t = (339.4 - 340.0) / (1.6 / np.sqrt(40))
    assert v.test == "t" and v.statistic == pytest.approx(t, rel=1e-12)
    assert v.p_value == pytest.approx(stats.t.cdf(t, 39), rel=1e-10)
    assert v.normality.passed is None and "summary" in v.normality.note
    v = evaluate(LotData(KEY, summary=s), rule(target=340.0, normality=NormalityRule(on_unassessed="review")))
    assert v.verdict == "review" and "summary" in v.reason


@pytest.mark.parametrize("s", [LotSummary(10, float("nan"), 1.0), LotSummary(10, 500.0, -1.0),
                               LotSummary(1, 500.0, 0.0), LotSummary(10, 500.0, 0.0)])
def test_bad_or_degenerate_summaries_review(s):
    """Non-finite or negative summary numbers, n < 2 and sd 0 give review, never a crash."""
    v = evaluate(LotData(KEY, summary=s), rule())
    assert v.verdict == "review" and v.test is None


def test_power_and_n_for_power_in_a_pass():
    """Power against the shift of interest equals statsmodels TTestPower; the reason tells 'too few units'."""
    x = np.random.default_rng(9).normal(500.2, 4.0, 12)
    v = evaluate(lot(x), rule(shift_of_interest=2.0))
    d = 2.0 / np.std(x, ddof=1)
    assert v.verdict == "pass"
    assert v.power == pytest.approx(TTestPower().power(d, 12, 0.05), rel=1e-8)
    expected_n = int(np.ceil(TTestPower().solve_power(d, None, 0.05, 0.8)))
    assert v.n_for_power == expected_n
    assert "no shift shown" in v.reason and "too few units" in v.reason and f"n ≥ {expected_n}" in v.reason


def test_no_shift_of_interest_no_power():
    """Without shift_of_interest: power and n_for_power are None."""
    v = evaluate(lot(np.random.default_rng(10).normal(500, 1, 20)), rule())
    assert v.power is None and v.n_for_power is None


def test_heads_breakdown_and_standout_head():
    """Per head: n, mean, sd, offset and that head's t-test p (scipy); the drifting head is named."""
    rng = np.random.default_rng(11)
    heads = tuple(rng.choice(["V2", "V1", "V3"], 90))
    h = np.array(heads)
    x = rng.normal(500.0, 0.8, 90) - np.where(h == "V3", 3.0, 0.0)
    v = evaluate(lot(x, heads), rule(normality=IGNORE))
    assert [s.head for s in v.heads] == ["V1", "V2", "V3"]
    for s in v.heads:
        xs = x[h == s.head]
        assert s.n == xs.size and s.mean == pytest.approx(xs.mean(), rel=1e-14)
        assert s.sd == pytest.approx(xs.std(ddof=1), rel=1e-12)
        assert s.offset == pytest.approx(xs.mean() - 500.0, rel=1e-12)
        assert s.p_value == pytest.approx(stats.ttest_1samp(xs, 500.0).pvalue, rel=1e-9)
    assert v.verdict == "hold" and "head V3 is furthest off" in v.reason


def test_single_unit_head_has_no_sd():
    """A head with one value: sd None, p None; its value still counts in the lot."""
    x = [500.1, 499.7, 500.4, 499.9, 500.3, 497.0]
    v = evaluate(lot(x, ("A", "A", "A", "A", "A", "B")), rule(normality=IGNORE))
    b = v.heads[1]
    assert b.head == "B" and b.n == 1 and b.sd is None and b.p_value is None and b.offset == pytest.approx(-3.0)


def test_heads_skip_non_finite_values():
    """Non-finite values are dropped from their head too."""
    v = evaluate(lot([500.0, np.nan, 501.0, 499.0, 500.5, 499.5], ("A", "B", "A", "A", "B", "B")), rule())
    assert {s.head: s.n for s in v.heads} == {"A": 3, "B": 2}


def test_verdict_is_frozen_and_json_ready():
    """The Verdict cannot be changed in place and serialises to plain JSON values."""
    v = evaluate(lot(np.random.default_rng(12).normal(500, 1, 10)), rule())
    with pytest.raises(dataclasses.FrozenInstanceError):
        v.verdict = "pass"  # type: ignore[misc]
    j = v.to_json()
    assert j["verdict"] == v.verdict and j["normality"]["test"] == "shapiro"


def test_average_quantity_screen_holds_a_lot():
    """A rule with a nominal attaches the average-quantity screen; a failed screen holds the lot."""
    x = np.r_[np.full(45, 500.5), np.full(5, 480.0)] + np.random.default_rng(13).normal(0, 0.1, 50)
    v = evaluate(lot(x), rule(nominal=500.0, normality=NormalityRule(enabled=False)))
    assert v.average_quantity is not None and v.average_quantity.passed is False
    assert v.verdict == "hold" and "average-quantity" in v.reason and "not a legal verdict" in v.reason
    assert "competent authority" in SCREENING_NOTE
