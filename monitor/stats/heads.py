"""Comparing the filler heads of one lot: Holm's step-down adjustment, one-way ANOVA F and Kruskal–Wallis H.

Pure functions on arrays. Groups are given as integer codes ``0 .. k−1`` beside the values (every code
present at least once), families of p-values and groups of many lots as segments end to end, so a batch
of lots is adjusted and tested with numpy reductions instead of a loop per lot.

Holm (1979): sort a family's m p-values ascending, multiply the j-th smallest (j = 0, 1, …) by m − j, take
the running maximum (step-down: an adjusted p never falls below that of a smaller raw p) and clip at 1.
Ties keep their input order (a stable sort), so equal raw p-values get equal adjusted ones.

One-way ANOVA: F = (SSB / (k − 1)) / (SSW / (N − k)), p from the F distribution's upper tail. The sums of
squares come from per-group two-pass moments (``monitor.stats.moments``: each group's values are centred
on their own mean before squaring) and the group means are centred on the grand mean, so values near 1e9
differing in the fourth decimal lose no digits to cancellation.

Kruskal–Wallis: average ranks over the pooled values, H = 12 / (N (N + 1)) · Σ n_g (R̄_g − (N + 1)/2)² (the
rank means centred on their expectation before squaring), divided by the tie correction
1 − Σ (t³ − t) / (N³ − N); p from the chi-square upper tail with k − 1 degrees of freedom.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from monitor.stats.moments import segment_moments

__all__ = ["RESOLUTION_ULPS", "GroupTest", "anova_segments", "average_ranks", "holm", "holm_segments",
           "kruskal_wallis", "one_way_anova"]

RESOLUTION_ULPS = 8.0      # a within-group sd below this many ulps of the mean is rounding noise (as the engine)


@dataclass(frozen=True)
class GroupTest:
    """A test across k groups of N values: statistic, p-value and degrees of freedom.

    ``df_within`` is N − k for ANOVA and None for Kruskal–Wallis. ``statistic`` and ``p_value`` are NaN
    when the test is undefined (fewer than 2 groups, N <= k, no spread).
    """

    test: str                # "anova" | "kruskal"
    statistic: float
    p_value: float
    df_between: int
    df_within: int | None


def holm(p: np.ndarray) -> np.ndarray:
    """Holm step-down adjusted p-values of one family, in the input order.

    Examples
    --------
    >>> import numpy as np
    >>> # by hand: sorted 0.01, 0.02, 0.04 times 3, 2, 1 -> 0.03, 0.04, 0.04; running max keeps them
    >>> holm(np.array([0.04, 0.01, 0.02])).round(12).tolist()
    [0.04, 0.03, 0.04]
    >>> # sorted 0.3, 0.5, 0.8 times 3, 2, 1 -> 0.9, 1.0, 0.8: the running max lifts 0.8 to 1.0
    >>> holm(np.array([0.5, 0.3, 0.8])).round(12).tolist()
    [1.0, 0.9, 1.0]
    """
    x = np.asarray(p, dtype=np.float64)
    return holm_segments(x, np.array([x.shape[0]], dtype=np.int64))


def holm_segments(p: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Holm adjustment of many families at once: ``p`` holds the families end to end, ``lengths`` their sizes.

    Each family is adjusted on its own (its own m); the result has the input's order.

    Examples
    --------
    >>> import numpy as np
    >>> # two families: (0.01, 0.04) -> (0.02, 0.04); (0.2,) -> (0.2,)
    >>> holm_segments(np.array([0.01, 0.04, 0.2]), np.array([2, 1])).round(12).tolist()
    [0.02, 0.04, 0.2]
    """
    x = np.asarray(p, dtype=np.float64)
    m = np.asarray(lengths, dtype=np.int64)
    if x.ndim != 1 or m.ndim != 1 or int(m.sum()) != x.shape[0] or (m < 0).any():
        raise ValueError("lengths must be >= 0 and add up to len(p)")
    if x.shape[0] == 0:
        return x.copy()
    family = np.repeat(np.arange(m.shape[0]), m)
    order = np.lexsort((x, family))                 # by family, then p ascending; stable on ties
    starts = np.cumsum(m) - m
    rank = np.arange(x.shape[0]) - np.repeat(starts, m)          # j = 0, 1, … inside each family
    scaled = np.minimum((m[family] - rank) * x[order], 1.0)
    # running maximum inside each family: one vector step per rank (families are as long as a lot's heads)
    for j in range(1, int(m.max())):
        at = np.flatnonzero(rank == j)
        scaled[at] = np.maximum(scaled[at], scaled[at - 1])
    out = np.empty_like(scaled)
    out[order] = scaled
    return out


def anova_segments(values: np.ndarray, lengths: np.ndarray,
                   groups: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """One-way ANOVA of many lots at once: F, p, df between and df within per lot.

    ``values`` (finite) holds the lots end to end and, inside a lot, its groups one after the other;
    ``lengths`` is each group's size (>= 1) and ``groups`` how many consecutive groups make each lot. Each
    lot's values are centred on a provisional lot mean before any sum of squares is formed. F and p are
    NaN where the lot has fewer than 2 groups, N <= k, or no spread within its groups: a pooled
    within-group sd at or below ``RESOLUTION_ULPS`` ulps of the lot's mean is rounding noise, not spread
    (a stuck sensor's identical values must not give an F of noise over noise).

    Examples
    --------
    >>> import numpy as np
    >>> # by hand: groups (1, 2, 3) and (4, 5, 6): means 2, 5, grand 3.5; SSB = 3·1.5² + 3·1.5² = 13.5,
    >>> # SSW = 2 + 2 = 4; F = (13.5 / 1) / (4 / 4) = 13.5. A second lot of one group has no F.
    >>> f, p, dfb, dfw = anova_segments(np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0]),
    ...                                 np.array([3, 3, 2]), np.array([2, 1]))
    >>> f.tolist()[0], bool(np.isnan(f[1])), dfb.tolist(), dfw.tolist()
    (13.5, True, [1, 0], [4, 1])
    """
    x = np.asarray(values, dtype=np.float64)
    gl = np.asarray(lengths, dtype=np.int64)
    g = np.asarray(groups, dtype=np.int64)
    if (x.ndim != 1 or gl.ndim != 1 or g.ndim != 1 or int(gl.sum()) != x.shape[0] or int(g.sum()) != gl.shape[0]
            or (gl < 1).any() or (g < 0).any()):
        raise ValueError("lengths (each >= 1) must add up to len(values) and groups to len(lengths)")
    lots = g.shape[0]
    group_owner = np.repeat(np.arange(lots), g)
    big_n = np.bincount(group_owner, weights=gl, minlength=lots).astype(np.int64)
    dfb = np.maximum(g - 1, 0)
    dfw = np.maximum(big_n - g, 0)
    f = np.full(lots, np.nan)
    p = np.full(lots, np.nan)
    if x.shape[0] == 0:
        return f, p, dfb, dfw
    value_owner = np.repeat(group_owner, gl)
    total = np.maximum(big_n, 1).astype(np.float64)
    provisional = np.bincount(value_owner, weights=x, minlength=lots) / total
    gn, gm, gv = segment_moments(x - provisional[value_owner], gl)        # centred before squaring
    w = gn.astype(np.float64)
    with np.errstate(all="ignore"):
        grand = np.bincount(group_owner, weights=w * gm, minlength=lots) / total
        dev = gm - grand[group_owner]
        ssb = np.bincount(group_owner, weights=w * dev * dev, minlength=lots)
        ssw = np.bincount(group_owner, weights=np.where(gn >= 2, (w - 1.0) * gv, 0.0), minlength=lots)
        floor = (RESOLUTION_ULPS * np.spacing(np.abs(provisional))) ** 2 * np.maximum(dfw, 1)
    ok = (g >= 2) & (dfw >= 1) & (ssw > floor) & np.isfinite(ssw) & np.isfinite(ssb)
    if ok.any():
        f[ok] = (ssb[ok] / dfb[ok]) / (ssw[ok] / dfw[ok])
        p[ok] = special.fdtrc(dfb[ok].astype(np.float64), dfw[ok].astype(np.float64), f[ok])
    return f, p, dfb, dfw


def one_way_anova(values: np.ndarray, codes: np.ndarray) -> GroupTest:
    """One-way ANOVA of finite ``values`` in the groups named by ``codes`` (0 .. k−1, each present).

    Examples
    --------
    >>> import numpy as np
    >>> r = one_way_anova(np.array([1.0, 4.0, 2.0, 5.0, 3.0, 6.0]), np.array([0, 1, 0, 1, 0, 1]))
    >>> r.test, float(r.statistic), r.df_between, r.df_within
    ('anova', 13.5, 1, 4)
    """
    x, c = _checked(values, codes)
    counts = np.bincount(c)
    f, p, dfb, dfw = anova_segments(x[np.argsort(c, kind="stable")], counts, np.array([counts.shape[0]]))
    return GroupTest("anova", float(f[0]), float(p[0]), int(dfb[0]), int(dfw[0]))


def average_ranks(values: np.ndarray) -> tuple[np.ndarray, float]:
    """Ranks 1 .. N of ``values`` with ties given their average rank, and Σ (t³ − t) over the tie groups.

    Examples
    --------
    >>> import numpy as np
    >>> r, ties = average_ranks(np.array([3.0, 1.0, 3.0, 2.0]))
    >>> r.tolist(), ties
    ([3.5, 1.0, 3.5, 2.0], 6.0)
    """
    x = np.asarray(values, dtype=np.float64)
    size = x.shape[0]
    order = np.argsort(x, kind="stable")
    s = x[order]
    first = np.flatnonzero(np.r_[True, s[1:] != s[:-1]])        # start of each run of equal values
    t = np.diff(np.r_[first, size]).astype(np.float64)
    avg = first + (t + 1.0) / 2.0                                # 1-based mean rank of the run
    ranks = np.empty(size)
    ranks[order] = np.repeat(avg, t.astype(np.int64))
    return ranks, float(np.sum(t * t * t - t))


def kruskal_wallis(values: np.ndarray, codes: np.ndarray) -> GroupTest:
    """Kruskal–Wallis H (tie-corrected) of finite ``values`` in the groups named by ``codes`` (0 .. k−1).

    Statistic and p are NaN with fewer than 2 groups, N <= k, or all values equal.

    Examples
    --------
    >>> import numpy as np
    >>> # by hand: ranks (1, 2, 3) and (4, 5, 6), rank means 2 and 5 against 3.5:
    >>> # H = 12 / (6 · 7) · (3 · 1.5² + 3 · 1.5²) = 27 / 7, no ties
    >>> r = kruskal_wallis(np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0]), np.array([0, 0, 0, 1, 1, 1]))
    >>> r.test, round(float(r.statistic), 12), round(27 / 7, 12), r.df_between
    ('kruskal', 3.857142857143, 3.857142857143, 1)
    """
    x, c = _checked(values, codes)
    k = int(c.max()) + 1 if c.shape[0] else 0
    size = x.shape[0]
    if k < 2 or size <= k:
        return GroupTest("kruskal", np.nan, np.nan, max(k - 1, 0), None)
    ranks, ties = average_ranks(x)
    nf = float(size)
    correction = 1.0 - ties / (nf ** 3 - nf)
    if correction <= 0.0:
        return GroupTest("kruskal", np.nan, np.nan, k - 1, None)
    counts = np.bincount(c, minlength=k).astype(np.float64)
    centred = np.bincount(c, weights=ranks - (nf + 1.0) / 2.0, minlength=k) / counts   # R̄_g − (N + 1)/2
    h = 12.0 / (nf * (nf + 1.0)) * float(np.sum(counts * centred * centred)) / correction
    return GroupTest("kruskal", h, float(special.chdtrc(k - 1, h)), k - 1, None)


def _checked(values: np.ndarray, codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(values, dtype=np.float64)
    c = np.asarray(codes, dtype=np.int64)
    if x.ndim != 1 or c.shape != x.shape:
        raise ValueError("values and codes must be one-dimensional and of equal length")
    if c.shape[0] and (c.min() < 0 or np.bincount(c).min() == 0):
        raise ValueError("codes must be 0 .. k-1, each present at least once")
    if not np.isfinite(x).all():
        raise ValueError("values must be finite")
    return x, c
