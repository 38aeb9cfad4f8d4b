"""Student's t and z tests against scipy, the NIST/SEMATECH t table and Student's sleep data."""

import numpy as np
import pytest
from scipy import stats

from monitor.stats.location import critical_value, t_test, t_test_arrays, z_test

ALTS = ("two-sided", "less", "greater")

# Source: NIST/SEMATECH e-Handbook of Statistical Methods §1.3.6.7.2, table of the t distribution
# (upper-tail quantile level, df, printed value). Printed to 3 decimals -> abs 0.5e-3.
NIST_T_TABLE = [(0.975, 1, 12.706), (0.975, 9, 2.262), (0.975, 15, 2.131), (0.975, 30, 2.042),
                (0.95, 15, 1.753), (0.995, 9, 3.250), (0.995, 15, 2.947), (0.995, 30, 2.750),
                (0.999, 1, 318.309)]

# Source: Student (1908) sleep data as carried in R's datasets::sleep; published R output of the
# paired t-test (R documentation example for `sleep`).
SLEEP_1 = np.array([0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0])
SLEEP_2 = np.array([1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4])


@pytest.mark.parametrize("level,df,printed", NIST_T_TABLE)
def test_critical_values_match_nist_t_table(level, df, printed):
    """Two-sided / one-sided critical values equal the NIST/SEMATECH table to its printed digits."""
    alpha = 1 - level
    assert critical_value(2 * alpha, "two-sided", df) == pytest.approx(printed, abs=0.5e-3)
    assert critical_value(alpha, "greater", df) == pytest.approx(printed, abs=0.5e-3)
    assert critical_value(alpha, "less", df) == pytest.approx(-printed, abs=0.5e-3)


def test_t_120_from_printed_tables():
    """t(0.975, 120) = 1.980 (memory: printed t tables)."""
    assert critical_value(0.05, "two-sided", 120) == pytest.approx(1.980, abs=0.5e-3)


def test_sleep_example_published_r_output():
    """Student's sleep differences: t = -4.0621, df = 9, p = 0.002833, CI (-2.4598858, -0.7001142)."""
    d = SLEEP_1 - SLEEP_2
    r = t_test(d.size, d.mean(), d.std(ddof=1), 0.0)
    assert r.statistic == pytest.approx(-4.0621, abs=0.5e-4)
    assert r.df == 9
    assert r.p_value == pytest.approx(0.002833, abs=0.5e-6)
    assert r.ci_low == pytest.approx(-2.4598858, abs=0.5e-7)
    assert r.ci_high == pytest.approx(-0.7001142, abs=0.5e-7)
    assert r.estimate == pytest.approx(-1.58, abs=1e-12)


def test_sleep_one_sided_computed_value():
    """One-sided (H1: group 2 − group 1 > 0): p = 0.0014164450986921364 (R t.test(extra ~ group, paired = TRUE, alternative = "greater"), as scipy computes it)."""
    d = SLEEP_2 - SLEEP_1
    r = t_test(d.size, d.mean(), d.std(ddof=1), 0.0, "greater")
    assert r.p_value == pytest.approx(0.0014164450986921364, rel=1e-10)


@pytest.mark.parametrize("alternative", ALTS)
@pytest.mark.parametrize("n", [2, 3, 5, 12, 50, 400])
def test_t_test_matches_scipy_ttest_1samp(alternative, n):
    """statistic, p, df and the 1−alpha interval equal scipy.stats.ttest_1samp to 1e-10 (reference library)."""
    rng = np.random.default_rng(1000 + n)
    for rep in range(5):
        x = rng.normal(500.0 + rng.normal(0, 1), rng.uniform(0.5, 4), n)
        alpha = (0.05, 0.01, 0.1, 0.2, 0.001)[rep]
        ref = stats.ttest_1samp(x, 500.0, alternative=alternative)
        ci = ref.confidence_interval(1 - alpha)
        r = t_test(n, float(np.mean(x)), float(np.std(x, ddof=1)), 500.0, alternative, alpha)
        assert r.statistic == pytest.approx(ref.statistic, rel=1e-10)
        assert r.p_value == pytest.approx(ref.pvalue, rel=1e-10)
        assert r.df == ref.df
        for mine, theirs in ((r.ci_low, ci.low), (r.ci_high, ci.high)):
            if np.isfinite(theirs):
                assert mine == pytest.approx(theirs, rel=1e-10)
            else:
                assert mine is None


def test_array_version_matches_scipy_on_many_lots():
    """t_test_arrays on 200 lots at once equals scipy.stats.ttest_1samp along an axis (reference library)."""
    rng = np.random.default_rng(5)
    x = rng.normal(250, 2, size=(200, 17))
    r = t_test_arrays(np.full(200, 17), x.mean(axis=1), x.var(axis=1, ddof=1), 250.5, "less", 0.05)
    ref = stats.ttest_1samp(x, 250.5, axis=1, alternative="less")
    np.testing.assert_allclose(r["statistic"], ref.statistic, rtol=1e-10)
    np.testing.assert_allclose(r["p_value"], ref.pvalue, rtol=1e-10)
    np.testing.assert_allclose(r["ci_high"], ref.confidence_interval(0.95).high, rtol=1e-10)


@pytest.mark.parametrize("alternative", ALTS)
def test_p_value_at_interval_bound_equals_alpha(alternative):
    """Identity: testing against a confidence bound gives p = alpha (scipy ttest_1samp docs state it)."""
    rng = np.random.default_rng(11)
    x = rng.normal(340, 1.5, 25)
    m, s = float(x.mean()), float(x.std(ddof=1))
    r = t_test(25, m, s, 340.0, alternative, 0.05)
    for bound in (r.ci_low, r.ci_high):
        if bound is not None:
            assert t_test(25, m, s, bound, alternative, 0.05).p_value == pytest.approx(0.05, rel=1e-9)


@pytest.mark.parametrize("alternative", ALTS)
def test_z_test_matches_normal_distribution(alternative):
    """z, p and interval follow the standard normal (scipy.stats.norm as reference)."""
    n, mean, sd, target, alpha = 36, 998.7, 6.0, 1000.0, 0.05
    r = z_test(n, mean, sd, target, alternative, alpha)
    z = (mean - target) / (sd / np.sqrt(n))
    p = {"two-sided": 2 * stats.norm.sf(abs(z)), "less": stats.norm.cdf(z), "greater": stats.norm.sf(z)}
    assert r.test == "z" and r.df is None
    assert r.statistic == pytest.approx(z, rel=1e-12)
    assert r.p_value == pytest.approx(p[alternative], rel=1e-10)
    q = stats.norm.ppf(1 - alpha / 2 if alternative == "two-sided" else 1 - alpha)
    if alternative != "greater":
        assert r.ci_high == pytest.approx(mean + q * sd / np.sqrt(n), rel=1e-12)
    if alternative != "less":
        assert r.ci_low == pytest.approx(mean - q * sd / np.sqrt(n), rel=1e-12)


def test_z_critical_values_published():
    """z(0.975) = 1.960 and z(0.95) = 1.645 (standard normal table, NIST/SEMATECH §1.3.6.7.1)."""
    assert critical_value(0.05, "two-sided") == pytest.approx(1.960, abs=0.5e-3)
    assert critical_value(0.05, "greater") == pytest.approx(1.645, abs=0.5e-3)


def test_bad_arguments_name_the_allowed_values():
    """A wrong alternative / alpha / sd raises ValueError saying what is allowed."""
    with pytest.raises(ValueError, match="'two-sided', 'less' or 'greater'"):
        t_test(5, 1.0, 1.0, 0.0, "lower")
    with pytest.raises(ValueError, match="alpha"):
        t_test(5, 1.0, 1.0, 0.0, "less", 1.5)
    with pytest.raises(ValueError, match="sd"):
        t_test(5, 1.0, 0.0, 0.0)
    with pytest.raises(ValueError, match="known_sd"):
        z_test(5, 1.0, -1.0, 0.0)
