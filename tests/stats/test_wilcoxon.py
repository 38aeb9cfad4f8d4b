"""Wilcoxon signed-rank test of location (pseudo-median) against scipy.stats.wilcoxon (all of its p-value paths)."""

import itertools
import warnings
from decimal import Decimal

import numpy as np
import pytest
from scipy import stats

from monitor.stats.wilcoxon import (
    data_decimals,
    pseudo_median,
    signed_differences,
    wilcoxon_test,
)

ALTS = ("two-sided", "less", "greater")


def _walsh_median(x) -> float:
    """Hodges–Lehmann estimate by its definition: median of (x_i + x_j)/2 over all pairs i <= j
    (Hodges & Lehmann 1963, Ann. Math. Statist. 34, 598-611), written out with itertools."""
    return float(np.median([(a + b) / 2 for a, b in itertools.combinations_with_replacement(list(x), 2)]))


def _decimal_differences(x, target) -> np.ndarray:
    """x − target in exact decimal arithmetic (Python's decimal module) on the numbers as printed."""
    t = Decimal(repr(float(target)))
    return np.array([float(Decimal(repr(float(v))) - t) for v in x])


def _scipy(d: np.ndarray, alternative: str):
    with warnings.catch_warnings():            # scipy warns about ties / small samples; not our concern here
        warnings.simplefilter("ignore")
        return stats.wilcoxon(d, alternative=alternative)


@pytest.mark.parametrize("alternative", ALTS)
@pytest.mark.parametrize("n,decimals,label", [
    (7, 6, "exact, no ties"), (30, 6, "exact, no ties"), (50, 6, "exact, no ties"),
    (6, 0, "ties and zeros, n <= 13: full enumeration"), (10, 0, "enumeration"),
    (25, 0, "ties and zeros, n > 13: normal approximation"), (51, 6, "n > 50: normal"), (300, 1, "normal, ties"),
])
def test_matches_scipy_wilcoxon(alternative, n, decimals, label):
    """Statistic and p-value equal scipy.stats.wilcoxon(x − target) (reference library) on each path."""
    rng = np.random.default_rng(n * 10 + decimals)
    for rep in range(3 if label.startswith(('ties and zeros, n <=', 'enumeration')) else 8):   # scipy's permutation path is slow
        x = np.round(rng.normal(340 + rng.normal(0, 0.7), 1.5, n), decimals)
        ref = _scipy(x - 340.0, alternative)
        r = wilcoxon_test(x, 340.0, alternative)
        assert r.statistic == ref.statistic, label
        assert r.p_value == pytest.approx(ref.pvalue, rel=1e-10), label
        assert r.test == "wilcoxon" and r.ci_low is None and r.ci_high is None
        assert r.estimate == pytest.approx(_walsh_median(x), rel=1e-15)


def test_exact_small_example_by_hand():
    """n = 5, all below target: T+ = 0, exact one-sided p = 1/32 (signed-rank null distribution, by hand)."""
    r = wilcoxon_test([1.0, 2.0, 3.0, 4.0, 5.0], 10.0, "less")
    assert r.statistic == 0.0
    assert r.p_value == pytest.approx(1 / 32, rel=1e-15)


def test_everything_on_target_is_refused():
    """If every value equals the target there is nothing to rank: ValueError."""
    with pytest.raises(ValueError, match="nothing to rank"):
        wilcoxon_test([5.0, 5.0, 5.0], 5.0)


def test_estimate_is_the_pseudo_median_not_the_median():
    """estimate is the Hodges–Lehmann pseudo-median (Walsh averages by definition), unlike the median here."""
    x = np.array([497.0, 497.5, 498.0, 499.0, 503.0, 509.0])
    r = wilcoxon_test(x, 500.0)
    assert r.estimate == pytest.approx(_walsh_median(x), rel=1e-15)
    assert r.estimate != np.median(x)           # the sample median (498.5) is not what the test is about


@pytest.mark.parametrize("n", [1, 2, 3, 17, 2001, 2600])
def test_pseudo_median_both_paths_match_definition(n):
    """Direct (n <= 2000) and selection (n > 2000) paths give the median of all Walsh averages (definition)."""
    x = np.round(np.random.default_rng(n).exponential(1.5, n) + 498.0, 1 if n % 2 else 6)
    if n <= 100:
        expected = _walsh_median(x)
    else:                                        # the same definition, vectorised (itertools is slow here)
        i, j = np.triu_indices(n)
        expected = float(np.median((x[i] + x[j]) / 2.0))
    assert pseudo_median(x) == pytest.approx(expected, rel=1e-15)


def test_float_subtraction_would_break_decimal_ties():
    """The premise: 500.2 − 500.3 and 500.4 − 500.3 are not equal-and-opposite floats; ours are (decimal)."""
    assert abs(500.2 - 500.3) != abs(500.4 - 500.3)
    assert abs(0.1 - 0.3) != abs(0.5 - 0.3)
    d = signed_differences(np.array([500.2, 500.4, 0.1 + 0.2]), 500.3)
    assert d[0] == -d[1] == -0.1
    d = signed_differences(np.array([0.1, 0.5, 0.1 + 0.2]), 0.3)
    assert d[0] == -d[1] and d[2] == 0.0        # 0.1 + 0.2 prints as 0.30000000000000004: on target


def test_data_decimals():
    """Decimals are found from the values and the target; unrounded data has none (differenced as is)."""
    assert data_decimals(np.array([500.1, 499.9]), 500.0) == 1
    assert data_decimals(np.array([500.0, 501.0]), 500.25) == 2
    assert data_decimals(np.array([340.0, 341.0]), 340.0) == 0
    assert data_decimals(np.random.default_rng(1).normal(500, 1, 5), 500.0) is None
    # near float resolution (1e9 has an ulp of 1.2e-7) a 1e-6 step is no real decimal: differenced as is
    assert data_decimals(1e9 + np.random.default_rng(2).normal(0, 1e-3, 50), 1e9) is None
    assert data_decimals(np.array([1e9 + 0.001, 1e9 - 0.002]), 1e9) == 3


TIE_CASES = [
    # target, values printed to 0.1: pairs equally far from target that float subtraction splits
    (500.3, [500.2, 500.4, 499.9, 500.7, 499.7, 500.9, 500.3, 501.2, 499.4, 500.5]),
    (0.3, [0.2, 0.4, 0.1, 0.5, -0.1, 0.7, 0.3, 0.9, 0.6, 0.45]),
    (495.1, [495.0, 495.2, 495.3, 494.9, 495.5, 494.7, 495.1, 496.0, 494.6, 495.4, 495.8, 494.4,
             495.6, 494.8, 495.9, 495.0, 495.2, 496.1, 494.5, 495.3]),
]


@pytest.mark.parametrize("alternative", ALTS)
@pytest.mark.parametrize("target,values", TIE_CASES)
def test_decimal_ties_match_scipy_on_exact_differences(target, values, alternative):
    """With differences taken in exact decimals, statistic and p equal scipy.stats.wilcoxon (reference,
    zero_method="wilcox", correction=False, method="auto": exhaustive permutations for n <= 13 with ties
    or zeros, else asymptotic), while raw float differences give scipy a different ranking."""
    x = np.array(values)
    d = _decimal_differences(x, target)
    ref = _scipy_with(d, alternative, "auto")
    raw = _scipy_with(x - target, alternative, "auto")
    r = wilcoxon_test(x, target, alternative)
    assert r.statistic == ref.statistic
    assert r.p_value == pytest.approx(ref.pvalue, rel=1e-10)
    assert (raw.statistic, raw.pvalue) != (ref.statistic, ref.pvalue)      # float subtraction breaks ties
    assert r.zeros == int(np.sum(d == 0)) and r.n_used == len(values) - r.zeros
    assert r.method == ("exact" if len(values) <= 13 else "normal approximation")


def _scipy_with(d, alternative, method):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return stats.wilcoxon(d, zero_method="wilcox", correction=False, alternative=alternative, method=method)


@pytest.mark.parametrize("alternative", ALTS)
def test_method_labels_name_the_scipy_method_that_agrees(alternative):
    """method "exact" equals scipy's method="exact" (no ties, n <= 50); "normal approximation" equals
    method="asymptotic" (n > 50) — scipy.stats.wilcoxon, zero_method="wilcox", correction=False."""
    rng = np.random.default_rng(7)
    x = rng.normal(500.4, 1.0, 40)
    r = wilcoxon_test(x, 500.0, alternative)
    assert r.method == "exact" and r.zeros == 0 and r.n_used == 40
    assert r.p_value == pytest.approx(_scipy_with(x - 500.0, alternative, "exact").pvalue, rel=1e-10)
    x = rng.normal(500.4, 1.0, 80)
    r = wilcoxon_test(x, 500.0, alternative)
    assert r.method == "normal approximation"
    assert r.p_value == pytest.approx(_scipy_with(x - 500.0, alternative, "asymptotic").pvalue, rel=1e-10)


def test_zeros_are_counted_and_dropped():
    """Values on target are zero differences: counted in `zeros`, left out of n_used (Wilcoxon's method)."""
    x = np.array([340.0, 340.0, 341.5, 338.2, 339.1, 337.9, 340.0, 338.8])
    r = wilcoxon_test(x, 340.0, "less")
    ref = _scipy_with(_decimal_differences(x, 340.0), "less", "auto")   # scipy drops zeros, zero_method="wilcox"
    assert (r.zeros, r.n_used, r.method) == (3, 5, "exact")
    assert r.statistic == ref.statistic and r.p_value == pytest.approx(ref.pvalue, rel=1e-10)
