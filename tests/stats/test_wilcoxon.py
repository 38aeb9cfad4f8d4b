"""Wilcoxon signed-rank test of the median against scipy.stats.wilcoxon (all of its p-value paths)."""

import warnings

import numpy as np
import pytest
from scipy import stats

from monitor.stats.wilcoxon import wilcoxon_test

ALTS = ("two-sided", "less", "greater")


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
        assert r.estimate == np.median(x)


def test_exact_small_example_by_hand():
    """n = 5, all below target: T+ = 0, exact one-sided p = 1/32 (signed-rank null distribution, by hand)."""
    r = wilcoxon_test([1.0, 2.0, 3.0, 4.0, 5.0], 10.0, "less")
    assert r.statistic == 0.0
    assert r.p_value == pytest.approx(1 / 32, rel=1e-15)


def test_everything_on_target_is_refused():
    """If every value equals the target there is nothing to rank: ValueError."""
    with pytest.raises(ValueError, match="nothing to rank"):
        wilcoxon_test([5.0, 5.0, 5.0], 5.0)
