"""Holm adjustment, one-way ANOVA and Kruskal–Wallis on arrays (monitor.stats.heads) against references."""

from __future__ import annotations

import doctest
from fractions import Fraction

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from monitor.stats import heads
from monitor.stats.heads import (
    anova_segments,
    average_ranks,
    holm,
    holm_segments,
    kruskal_wallis,
    one_way_anova,
)

REL = 1e-10


def _groups(rng: np.random.Generator, k: int, n: int, offset: float = 0.0, decimals: int | None = None):
    """k heads, n values, every head present; head j shifted by 0.4·j."""
    codes = np.r_[np.arange(k), rng.integers(0, k, n - k)]
    x = offset + rng.normal(500.0, 1.2, n) + 0.4 * codes
    if decimals is not None:
        x = np.round(x, decimals)
    return x, codes


def _split(x: np.ndarray, codes: np.ndarray) -> list[np.ndarray]:
    return [x[codes == j] for j in range(int(codes.max()) + 1)]


def test_docstring_examples():
    """The worked examples in the module's docstrings (hand-computed) pass."""
    result = doctest.testmod(heads, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0


@pytest.mark.parametrize("seed", range(40))
def test_holm_matches_statsmodels(seed):
    """Holm step-down equals statsmodels multipletests(method="holm"), ties and p near 1 included."""
    rng = np.random.default_rng(seed)
    m = int(rng.integers(1, 13))
    p = rng.choice([rng.uniform(0, 0.06, m), rng.uniform(0, 1, m), rng.uniform(0.4, 1, m)])
    if m > 2:
        p[1] = p[0]                                  # a tie
    # reference: statsmodels.stats.multitest.multipletests(method="holm")
    ref = multipletests(p, alpha=0.05, method="holm")[1]
    got = holm(p)
    np.testing.assert_allclose(got, ref, rtol=REL, atol=0)
    assert (got <= 1.0).all() and (got >= p).all()


def test_holm_hand_example():
    """By hand: p = 0.01, 0.04, 0.03 → sorted ×3, ×2, ×1 = 0.03, 0.06, 0.04 → step-down max 0.03, 0.06, 0.06."""
    np.testing.assert_allclose(holm(np.array([0.01, 0.04, 0.03])), [0.03, 0.06, 0.06], rtol=1e-14)


def test_holm_segments_equal_each_family_alone():
    """Many families end to end give each family's own adjustment (statsmodels on each family), empty ones too."""
    rng = np.random.default_rng(3)
    lengths = np.array([3, 0, 1, 6, 2, 12, 0, 4])
    p = rng.uniform(0, 0.2, int(lengths.sum()))
    got = holm_segments(p, lengths)
    start = 0
    for m in lengths.tolist():
        if m:
            # reference: statsmodels.stats.multitest.multipletests(method="holm")
            np.testing.assert_allclose(got[start:start + m], multipletests(p[start:start + m], method="holm")[1],
                                       rtol=REL, atol=0)
        start += m


def test_holm_rejects_bad_lengths():
    with pytest.raises(ValueError, match="lengths"):
        holm_segments(np.array([0.1, 0.2]), np.array([3]))


@pytest.mark.parametrize("seed", range(30))
def test_anova_matches_scipy_f_oneway(seed):
    """F and p equal scipy.stats.f_oneway (rel 1e-10) for 2 to 8 heads of unequal sizes."""
    rng = np.random.default_rng(100 + seed)
    k = int(rng.integers(2, 9))
    x, codes = _groups(rng, k, int(rng.integers(k + 1, 120)))
    # reference: scipy.stats.f_oneway
    ref = stats.f_oneway(*_split(x, codes))
    r = one_way_anova(x, codes)
    assert r.test == "anova" and r.df_between == k - 1 and r.df_within == x.size - k
    assert r.statistic == pytest.approx(ref.statistic, rel=REL)
    assert r.p_value == pytest.approx(ref.pvalue, rel=REL)


def _exact_f(x: np.ndarray, codes: np.ndarray) -> float:
    """F from the definitions (NIST StRD one-way ANOVA: SSt, SSe, MSt / MSe) in exact rational arithmetic."""
    xs = [Fraction(float(v)) for v in x]
    grand = sum(xs) / len(xs)
    k = int(codes.max()) + 1
    ssb = ssw = Fraction(0)
    for j in range(k):
        g = [xs[i] for i in range(len(xs)) if codes[i] == j]
        m = sum(g) / len(g)
        ssb += len(g) * (m - grand) ** 2
        ssw += sum((v - m) ** 2 for v in g)
    return float((ssb / (k - 1)) / (ssw / (len(xs) - k)))


@pytest.mark.parametrize("offset", [0.0, 1e6, 1e9])
def test_anova_is_stable_far_from_zero(offset):
    """Values near 1e9 that differ in the decimals: F equals the exact rational F of the stored floats (sums
    of squares by definition, NIST StRD ANOVA definitions), to 1e-10; the values are centred before squaring."""
    rng = np.random.default_rng(7)
    x, codes = _groups(rng, 5, 80, offset=offset, decimals=1)
    assert one_way_anova(x, codes).statistic == pytest.approx(_exact_f(x, codes), rel=REL)


def test_anova_segments_equal_each_lot_alone():
    """Many lots at once give each lot's own F and p (scipy.stats.f_oneway per lot); undefined lots are NaN."""
    rng = np.random.default_rng(5)
    parts, lengths, groups, refs = [], [], [], []
    for k, n in [(3, 40), (1, 10), (4, 4), (2, 9), (6, 200)]:
        x, codes = _groups(rng, k, n)
        order = np.argsort(codes, kind="stable")
        parts.append(x[order])
        lengths += np.bincount(codes).tolist()
        groups.append(k)
        # reference: scipy.stats.f_oneway (None where it has no within-head df or one group)
        refs.append(stats.f_oneway(*_split(x, codes)) if k >= 2 and n > k else None)
    f, p, dfb, dfw = anova_segments(np.concatenate(parts), np.array(lengths), np.array(groups))
    for j, ref in enumerate(refs):
        if ref is None:
            assert np.isnan(f[j]) and np.isnan(p[j])
        else:
            assert f[j] == pytest.approx(ref.statistic, rel=REL) and p[j] == pytest.approx(ref.pvalue, rel=REL)
    assert dfb.tolist() == [2, 0, 3, 1, 5] and dfw.tolist() == [37, 9, 0, 7, 194]


def test_anova_undefined_without_spread_within_heads():
    """Identical values within every head (a stuck sensor, or values at rounding noise): no F, not noise/noise."""
    codes = np.array([0, 0, 1, 1, 2, 2])
    assert np.isnan(one_way_anova(np.full(6, 340.25), codes).statistic)
    assert np.isnan(one_way_anova(np.array([1e9, 1e9, 1e9 + 1, 1e9 + 1, 1e9, 1e9]), codes).statistic)
    ulp = np.spacing(1e9)
    noise = 1e9 + ulp * np.array([0.0, 1.0, 2.0, 0.0, 1.0, 3.0])      # spread of a few ulps: rounding, not data
    assert np.isnan(one_way_anova(noise, codes).statistic)
    assert np.isnan(one_way_anova(np.array([1.0, 2.0]), np.array([0, 1])).statistic)      # N = k


@pytest.mark.parametrize("seed", range(30))
def test_kruskal_matches_scipy(seed):
    """H (tie-corrected) and p equal scipy.stats.kruskal (rel 1e-10); values printed to 0.1 g tie a lot."""
    rng = np.random.default_rng(200 + seed)
    k = int(rng.integers(2, 9))
    x, codes = _groups(rng, k, int(rng.integers(k + 1, 150)), decimals=int(rng.integers(0, 3)))
    # reference: scipy.stats.kruskal
    ref = stats.kruskal(*_split(x, codes))
    r = kruskal_wallis(x, codes)
    assert r.test == "kruskal" and r.df_between == k - 1 and r.df_within is None
    assert r.statistic == pytest.approx(ref.statistic, rel=REL)
    assert r.p_value == pytest.approx(ref.pvalue, rel=REL)


def test_kruskal_undefined_cases():
    """All values equal (nothing to rank), one head, or one value per head: NaN."""
    assert np.isnan(kruskal_wallis(np.full(6, 500.0), np.array([0, 0, 1, 1, 2, 2])).statistic)
    assert np.isnan(kruskal_wallis(np.array([1.0, 2.0, 3.0]), np.array([0, 0, 0])).statistic)
    assert np.isnan(kruskal_wallis(np.array([1.0, 2.0, 3.0]), np.array([0, 1, 2])).statistic)


def test_average_ranks_match_scipy_rankdata():
    """Average ranks and the tie sum Σ(t³ − t) equal scipy.stats.rankdata and a hand count of the ties."""
    x = np.array([500.1, 499.9, 500.1, 500.3, 499.9, 500.1, 501.0])
    r, ties = average_ranks(x)
    # reference: scipy.stats.rankdata(method="average")
    np.testing.assert_allclose(r, stats.rankdata(x), rtol=0, atol=0)
    assert ties == (3 ** 3 - 3) + (2 ** 3 - 2)          # by hand: 500.1 three times, 499.9 twice


def test_bad_codes_rejected():
    with pytest.raises(ValueError, match="codes"):
        one_way_anova(np.array([1.0, 2.0, 3.0]), np.array([0, 2, 2]))
    with pytest.raises(ValueError, match="finite"):
        kruskal_wallis(np.array([1.0, np.nan, 3.0]), np.array([0, 1, 1]))
