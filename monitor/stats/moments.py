"""Numerically stable sample moments (n, mean, sd) for one lot or many lots concatenated end to end.

Method: the corrected two-pass algorithm (Chan, Golub & LeVeque 1983): a first pass gives a provisional
mean, a second pass sums the deviations from it; the sum of deviations corrects the mean and removes the
cancellation that makes the one-pass formula ``(Σx² − (Σx)²/n)/(n−1)`` fail on data such as NIST StRD
NumAcc4 (values near 1e7 differing by 0.1). Sums are numpy segment reductions (``np.add.reduceat``), so a
lot gives bit-for-bit the same moments alone or inside a batch.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Moments", "compute_moments", "segment_moments"]


@dataclass(frozen=True)
class Moments:
    """Sample size, mean and standard deviation (n − 1 divisor) of one sample.

    ``mean`` is NaN for n = 0; ``sd`` and ``var`` are NaN for n < 2.
    """

    n: int
    mean: float
    var: float
    sd: float


def segment_moments(values: np.ndarray, lengths: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean and variance (n − 1) of consecutive segments of ``values``.

    Parameters
    ----------
    values : ndarray of float64
        All segments concatenated end to end. Must be finite.
    lengths : ndarray of int
        Length of each segment; they must add up to ``len(values)``. Zero lengths are allowed.

    Returns
    -------
    n, mean, var : ndarray
        Per segment: size (int64), mean (NaN if empty) and variance with divisor n − 1 (NaN if n < 2).

    Examples
    --------
    >>> import numpy as np
    >>> # by hand: mean(1, 2, 3) = 2, var = 1; mean(10, 12) = 11, var = 2
    >>> n, mean, var = segment_moments(np.array([1.0, 2.0, 3.0, 10.0, 12.0]), np.array([3, 2]))
    >>> mean.tolist(), var.tolist()
    ([2.0, 11.0], [1.0, 2.0])
    """
    x = np.asarray(values, dtype=np.float64)
    n = np.asarray(lengths, dtype=np.int64)
    if n.ndim != 1 or x.ndim != 1:
        raise ValueError("values and lengths must be one-dimensional")
    if int(n.sum()) != x.shape[0] or (n < 0).any():
        raise ValueError("lengths must be >= 0 and add up to len(values)")
    k = n.shape[0]
    mean = np.full(k, np.nan)
    var = np.full(k, np.nan)
    nonempty = n > 0
    if not nonempty.any():
        return n, mean, var
    starts = (np.cumsum(n) - n)[nonempty]
    m = n[nonempty].astype(np.float64)
    with np.errstate(all="ignore"):
        provisional = np.add.reduceat(x, starts) / m
        dev = x - np.repeat(provisional, n[nonempty])
        sum_dev = np.add.reduceat(dev, starts)
        sum_sq = np.add.reduceat(dev * dev, starts)
        seg_mean = provisional + sum_dev / m
        seg_var = np.where(m > 1, (sum_sq - sum_dev * sum_dev / m) / np.maximum(m - 1.0, 1.0), np.nan)
        seg_var = np.where(seg_var < 0.0, 0.0, seg_var)
    mean[nonempty] = seg_mean
    var[nonempty] = seg_var
    return n, mean, var


def compute_moments(values: np.ndarray) -> Moments:
    """Stable mean and sd (n − 1) of one sample of finite values.

    Parameters
    ----------
    values : array_like of float
        The sample; every value must be finite (the engine drops non-finite values before this).

    Returns
    -------
    Moments
        ``n``, ``mean``, ``var`` and ``sd``.

    Examples
    --------
    >>> compute_moments([10000001.0, 10000003.0, 10000002.0])   # NIST StRD NumAcc1
    Moments(n=3, mean=10000002.0, var=1.0, sd=1.0)
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    if not np.isfinite(x).all():
        raise ValueError("values must be finite; drop NaN and infinities first")
    n, mean, var = segment_moments(x, np.array([x.shape[0]]))
    v = float(var[0])
    return Moments(n=int(n[0]), mean=float(mean[0]), var=v, sd=float(np.sqrt(v)) if v == v else float("nan"))
