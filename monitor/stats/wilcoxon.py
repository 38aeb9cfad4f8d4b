"""Wilcoxon signed-rank test of a lot's median against a target (the fallback when normality fails).

Conventions match ``scipy.stats.wilcoxon(x - target)`` with its defaults: zero differences are dropped
(Wilcoxon's method), ties get average ranks, no continuity correction. The p-value is exact (the
signed-rank null distribution by counting subsets of ranks) for n <= 50 without ties or zeros; with ties
or zeros it is exact by enumerating all 2^n sign patterns for n <= 13, and otherwise (and for n > 50)
the normal approximation with the tie correction. The statistic is T+ (sum of positive ranks) for a
one-sided test and min(T+, T−) for the two-sided test.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import special

from monitor.stats.location import LocationTest, check_alternative

__all__ = ["wilcoxon_test"]

_EXACT_MAX_N = 50
_ENUMERATE_MAX_N = 13


def _average_ranks(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Average ranks (1-based) of ``a`` and the sizes of its tie groups."""
    order = np.argsort(a, kind="mergesort")
    s = a[order]
    new = np.r_[True, s[1:] != s[:-1]]
    group = np.cumsum(new) - 1
    first = np.flatnonzero(new)
    sizes = np.diff(np.r_[first, s.shape[0]])
    avg = first + (sizes + 1) / 2.0
    ranks = np.empty(a.shape[0])
    ranks[order] = avg[group]
    return ranks, sizes


@lru_cache(maxsize=64)
def _null_counts(n: int) -> tuple[int, ...]:
    """Number of subsets of {1..n} with each sum 0..n(n+1)/2 (the signed-rank null distribution × 2^n)."""
    counts = [1] + [0] * (n * (n + 1) // 2)
    top = 0
    for r in range(1, n + 1):
        top += r
        for s in range(top, r - 1, -1):
            counts[s] += counts[s - r]
    return tuple(counts)


def _exact_p(r_plus: float, n: int, alternative: str) -> float:
    counts = np.array(_null_counts(n), dtype=np.float64) / 2.0 ** n
    cdf = lambda k: float(counts[: k + 1].sum()) if k >= 0 else 0.0          # P(T+ <= k)
    sf = lambda k: float(counts[max(k, 0):].sum())                           # P(T+ >= k)
    lo, hi = int(np.ceil(r_plus)), int(np.floor(r_plus))
    if alternative == "less":
        return cdf(lo)
    if alternative == "greater":
        return sf(hi)
    return min(1.0, 2.0 * min(sf(hi), cdf(lo)))


def _enumerated_p(ranks: np.ndarray, r_plus: float, alternative: str) -> float:
    n = ranks.shape[0]
    signs = (np.arange(2 ** n)[:, None] >> np.arange(n)) & 1
    null = signs @ ranks
    tol = abs(1e-12 * r_plus)
    p_less = np.count_nonzero(null <= r_plus + tol) / null.shape[0]
    p_greater = np.count_nonzero(null >= r_plus - tol) / null.shape[0]
    if alternative == "less":
        return float(p_less)
    if alternative == "greater":
        return float(p_greater)
    return float(min(1.0, 2.0 * min(p_less, p_greater)))


def _normal_p(r_plus: float, ranks: np.ndarray, tie_sizes: np.ndarray, alternative: str) -> float:
    m = ranks.shape[0]
    mean = m * (m + 1) / 4.0
    var = (m * (m + 1) * (2 * m + 1) - float(np.sum(tie_sizes ** 3 - tie_sizes)) / 2.0) / 24.0
    z = (r_plus - mean) / np.sqrt(var)
    if alternative == "less":
        return float(special.ndtr(z))
    if alternative == "greater":
        return float(special.ndtr(-z))
    return float(2.0 * special.ndtr(-abs(z)))


def wilcoxon_test(values: np.ndarray, target: float, alternative: str = "two-sided",
                  alpha: float = 0.05) -> LocationTest:
    """Wilcoxon signed-rank test of the median of ``values`` against ``target``.

    Parameters
    ----------
    values : array_like of float
        Finite measurements; at least one must differ from ``target``.
    target : float
    alternative : {"two-sided", "less", "greater"}
        "less": H1 median < target; "greater": H1 median > target.
    alpha : float
        Kept on the result; no interval is computed (``ci_low``/``ci_high`` are None).

    Returns
    -------
    LocationTest
        ``test="wilcoxon"``, ``estimate`` = sample median, ``statistic`` as scipy reports it.

    Examples
    --------
    >>> r = wilcoxon_test([498.1, 499.0, 497.2, 500.4, 496.8, 498.9, 497.7], 500.0, "less")
    >>> r.statistic, round(r.p_value, 4)            # T+ = 1 (only 500.4 is above); exact: 2/128
    (1.0, 0.0156)
    """
    check_alternative(alternative)
    x = np.asarray(values, dtype=np.float64).ravel()
    if not np.isfinite(x).all():
        raise ValueError("values must be finite; drop NaN and infinities first")
    d = x - float(target)
    nonzero = d[d != 0]
    if nonzero.shape[0] == 0:
        raise ValueError("every value equals the target: the signed-rank test has nothing to rank")
    ranks, tie_sizes = _average_ranks(np.abs(nonzero))
    r_plus = float(ranks[nonzero > 0].sum())
    r_minus = float(ranks[nonzero < 0].sum())
    has_ties = bool((tie_sizes > 1).any())
    has_zeros = nonzero.shape[0] < d.shape[0]
    if d.shape[0] <= _EXACT_MAX_N and not (has_ties or has_zeros):
        p = _exact_p(r_plus, nonzero.shape[0], alternative)
    elif d.shape[0] <= _ENUMERATE_MAX_N:
        p = _enumerated_p(ranks, r_plus, alternative)
    else:
        p = _normal_p(r_plus, ranks, tie_sizes, alternative)
    statistic = min(r_plus, r_minus) if alternative == "two-sided" else r_plus
    return LocationTest(test="wilcoxon", alternative=alternative, alpha=float(alpha), n=int(x.shape[0]),
                        target=float(target), estimate=float(np.median(x)), statistic=statistic, df=None,
                        p_value=p, critical_value=None, se=None, ci_low=None, ci_high=None)
