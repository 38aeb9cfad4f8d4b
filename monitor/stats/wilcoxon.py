"""Wilcoxon signed-rank test of a lot's location against a target (the fallback when normality fails).

The signed-rank test compares the distribution of ``values − target`` with one symmetric about zero: it
tests location, and the centre it is consistent with is the pseudo-median (the Hodges–Lehmann estimate,
the median of the Walsh averages (x_i + x_j)/2, i <= j) — not the sample median. ``estimate`` is that
pseudo-median.

Conventions match ``scipy.stats.wilcoxon(d, zero_method="wilcox", correction=False, method="auto")`` (its
defaults): zero differences are dropped (Wilcoxon's method), ties get average ranks, no continuity
correction. The p-value is exact (the signed-rank null distribution by counting subsets of ranks) for
n <= 50 without ties or zeros; with ties or zeros it is exact by enumerating all 2^n sign patterns for
n <= 13, and otherwise (and for n > 50) the normal approximation with the tie correction. The statistic
is T+ (sum of positive ranks) for a one-sided test and min(T+, T−) for the two-sided test.

Differences keep decimal ties. Values printed to 0.1 g that are equally far from the target must tie,
but float subtraction breaks that (495.0 − 495.1 and 495.2 − 495.1 differ in the last bits). So the
differences are rounded to the decimals of the data: D is the fewest decimals (0 to 9) in which every
value and the target are written, a number counting as written in D decimals when it is within 4 ulps of
itself rounded to D decimals (and 10^-D is at least 100 times that, so it is a real step, not float
resolution). x − target is then a D-decimal number up to float error, and rounding it to D
decimals gives equal distances equal floats (and a value on target a zero). Data with more decimals
(unrounded measurements) is differenced as it is.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import special

from monitor.stats.location import LocationTest, check_alternative

__all__ = ["WilcoxonTest", "data_decimals", "pseudo_median", "signed_differences", "wilcoxon_test"]

_EXACT_MAX_N = 50
_ENUMERATE_MAX_N = 13
_MAX_DECIMALS = 9
_DECIMAL_ULPS = 4.0
_WALSH_DIRECT_MAX_N = 2000     # up to here all n(n+1)/2 Walsh averages are formed (16 MB); above, selection


@dataclass(frozen=True)
class WilcoxonTest(LocationTest):
    """A signed-rank test result: the location test fields plus how the p-value was computed.

    ``method`` is "exact" or "normal approximation"; ``zeros`` counts differences of exactly zero
    (dropped before ranking); ``n_used`` is the number of differences ranked (n − zeros).
    """

    method: str
    zeros: int
    n_used: int


def data_decimals(values: np.ndarray, target: float) -> int | None:
    """Fewest decimals (0 to 9) in which every value and the target are written; None if there is none.

    A number counts as written in D decimals when it lies within 4 ulps of itself rounded to D decimals;
    only steps 10^-D at least 100 times that tolerance count (near float resolution every number "fits").

    Examples
    --------
    >>> data_decimals(np.array([495.0, 495.2, 496.25]), 495.1), data_decimals(np.array([0.1 + 0.2]), 0.3)
    (2, 1)
    >>> data_decimals(np.array([499.87362516283]), 500.0) is None, data_decimals(np.array([1e9 + 0.001]), 1e9)
    (True, 3)
    """
    x = np.append(np.asarray(values, dtype=np.float64).ravel(), float(target))
    tol = _DECIMAL_ULPS * np.spacing(np.abs(x))
    coarsest = 100.0 * float(tol.max())
    for d in range(_MAX_DECIMALS + 1):
        if 10.0 ** -d < coarsest:        # steps near the float resolution of the data say nothing
            return None
        if np.all(np.abs(np.round(x, d) - x) <= tol):
            return d
    return None


def signed_differences(values: np.ndarray, target: float) -> np.ndarray:
    """``values − target``, rounded to the data's decimals (``data_decimals``) so decimal ties stay ties.

    Examples
    --------
    >>> d = signed_differences(np.array([495.0, 495.2]), 495.1)
    >>> bool(d[0] == -d[1]), bool((495.0 - 495.1) == -(495.2 - 495.1))
    (True, False)
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    d = x - float(target)
    decimals = data_decimals(x, target)
    return d if decimals is None else np.round(d, decimals) + 0.0     # + 0.0 turns -0.0 into 0.0


def _walsh_count(xs: np.ndarray, t: float) -> int:
    """Number of pairs i <= j of the sorted ``xs`` whose float sum xs[i] + xs[j] is <= t.

    For a fixed i the sums are non-decreasing in j (rounded addition is monotone), so each row's count is
    found by a binary search, all rows at once.
    """
    n = xs.shape[0]
    lo = np.arange(n)
    hi = np.full(n, n)
    while True:
        active = lo < hi
        if not active.any():
            break
        mid = (lo + hi) // 2
        ok = xs + xs[np.minimum(mid, n - 1)] <= t
        lo = np.where(active & ok, mid + 1, lo)
        hi = np.where(active & ~ok, mid, hi)
    return int((lo - np.arange(n)).sum())


def _ordered(v: float) -> int:
    """An integer key that orders finite floats as their values (for bisection over the floats)."""
    b = int(np.float64(v).view(np.int64))
    return b if b >= 0 else -(b & 0x7FFFFFFFFFFFFFFF)


def _from_ordered(k: int) -> float:
    b = k if k >= 0 else (-k) | -0x8000000000000000
    return float(np.int64(b).view(np.float64))


def _walsh_sum_kth(xs: np.ndarray, k: int) -> float:
    """The k-th smallest (0-based) float sum xs[i] + xs[j], i <= j, by bisection over the floats."""
    lo, hi = _ordered(2.0 * xs[0]) - 1, _ordered(2.0 * xs[-1])   # count(lo) <= k < count(hi)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if _walsh_count(xs, _from_ordered(mid)) > k:
            hi = mid
        else:
            lo = mid
    return _from_ordered(hi)


def pseudo_median(values: np.ndarray) -> float:
    """Hodges–Lehmann estimate: the median of the Walsh averages (x_i + x_j)/2 over all pairs i <= j.

    Up to 2000 values all n(n+1)/2 averages are formed; above, the one or two middle ones are found by
    bisection over the floats with a pair count (same value, memory O(n)).

    Examples
    --------
    >>> pseudo_median(np.array([1.0, 2.0, 10.0]))   # averages 1, 1.5, 5.5, 2, 6, 10 -> median (2 + 5.5)/2
    3.75
    """
    xs = np.sort(np.asarray(values, dtype=np.float64).ravel())
    n = xs.shape[0]
    if n == 0:
        raise ValueError("the pseudo-median of no values is undefined")
    if n <= _WALSH_DIRECT_MAX_N:
        i, j = np.triu_indices(n)
        return float(np.median((xs[i] + xs[j]) / 2.0))
    m = n * (n + 1) // 2
    if m % 2:
        return _walsh_sum_kth(xs, m // 2) / 2.0
    a, b = _walsh_sum_kth(xs, m // 2 - 1), _walsh_sum_kth(xs, m // 2)
    return a / 4.0 + b / 4.0


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

    def cdf(k: int) -> float:                                                # P(T+ <= k)
        return float(counts[: k + 1].sum()) if k >= 0 else 0.0

    def sf(k: int) -> float:                                                 # P(T+ >= k)
        return float(counts[max(k, 0):].sum())

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
                  alpha: float = 0.05) -> WilcoxonTest:
    """Wilcoxon signed-rank test of the location (pseudo-median) of ``values`` against ``target``.

    Parameters
    ----------
    values : array_like of float
        Finite measurements; at least one must differ from ``target``.
    target : float
    alternative : {"two-sided", "less", "greater"}
        "less": H1 the differences ``values − target`` are stochastically smaller than a distribution
        symmetric about zero (the pseudo-median lies below target); "greater": above.
    alpha : float
        Kept on the result; no interval is computed (``ci_low``/``ci_high`` are None).

    Returns
    -------
    WilcoxonTest
        ``test="wilcoxon"``, ``estimate`` = pseudo-median (Hodges–Lehmann), ``statistic`` as scipy reports
        it, ``method`` ("exact" | "normal approximation"), ``zeros`` and ``n_used``.

    Examples
    --------
    >>> r = wilcoxon_test([498.1, 499.0, 497.2, 500.4, 496.8, 498.9, 497.7], 500.0, "less")
    >>> r.statistic, round(r.p_value, 4), r.method    # T+ = 1 (only 500.4 is above); exact: 2/128
    (1.0, 0.0156, 'exact')
    >>> r = wilcoxon_test([495.0, 495.2, 495.4, 494.9, 495.1], 495.1)   # 495.0, 495.2 tie: rank 1.5 each
    >>> r.statistic, r.zeros, r.n_used                # T+ = 1.5 + 4 = 5.5, T− = 1.5 + 3 = 4.5
    (4.5, 1, 4)
    """
    check_alternative(alternative)
    x = np.asarray(values, dtype=np.float64).ravel()
    if not np.isfinite(x).all():
        raise ValueError("values must be finite; drop NaN and infinities first")
    d = signed_differences(x, target)
    nonzero = d[d != 0]
    if nonzero.shape[0] == 0:
        raise ValueError("every value equals the target: the signed-rank test has nothing to rank")
    ranks, tie_sizes = _average_ranks(np.abs(nonzero))
    r_plus = float(ranks[nonzero > 0].sum())
    r_minus = float(ranks[nonzero < 0].sum())
    has_ties = bool((tie_sizes > 1).any())
    has_zeros = nonzero.shape[0] < d.shape[0]
    if d.shape[0] <= _EXACT_MAX_N and not (has_ties or has_zeros):
        p, method = _exact_p(r_plus, nonzero.shape[0], alternative), "exact"
    elif d.shape[0] <= _ENUMERATE_MAX_N:
        p, method = _enumerated_p(ranks, r_plus, alternative), "exact"
    else:
        p, method = _normal_p(r_plus, ranks, tie_sizes, alternative), "normal approximation"
    statistic = min(r_plus, r_minus) if alternative == "two-sided" else r_plus
    return WilcoxonTest(test="wilcoxon", alternative=alternative, alpha=float(alpha), n=int(x.shape[0]),
                        target=float(target), estimate=pseudo_median(x), statistic=statistic, df=None,
                        p_value=p, critical_value=None, se=None, ci_low=None, ci_high=None, method=method,
                        zeros=int(d.shape[0] - nonzero.shape[0]), n_used=int(nonzero.shape[0]))
