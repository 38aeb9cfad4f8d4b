"""Shapiro–Wilk W test of normality, vectorised over many samples of the same size (Royston's algorithm).

Implements Royston (1992, 1995; Applied Statistics algorithm AS R94): the coefficients a_i from normal
scores m_i = Φ⁻¹((i − 3/8)/(n + 1/4)) (Φ⁻¹ by AS 111, as the published algorithm does) with Royston's
polynomial corrections for the two outermost coefficients; W as the squared correlation between the
ordered sample and the coefficients, with 1 − W formed without cancellation; and Royston's normalising
transformation of 1 − W (log-normal for n ≥ 12, a γ-shifted form for 4 ≤ n ≤ 11, exact for n = 3) whose
upper normal tail (AS 66) is the p-value. Using the published algorithm's own auxiliary routines makes the
results agree with ``scipy.stats.shapiro`` (which implements the same algorithm) to rounding error.

Valid for 3 ≤ n ≤ 5000: Royston's p-value approximation was fitted up to n = 5000 and is not valid
beyond, so the functions here refuse larger samples (the engine reports "not assessed" there).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

__all__ = ["MAX_N", "MIN_N", "ShapiroWilk", "shapiro_coefficients", "shapiro_wilk", "shapiro_wilk_rows"]

MIN_N = 3
MAX_N = 5000
_SMALL_P = 1e-19          # AS R94 returns this p-value when 1 − W lies beyond the γ bound (n <= 11)

# Royston's polynomial coefficients (AS R94), ascending powers.
_C1 = (0.0, 0.221157, -0.147981, -2.07119, 4.434685, -2.706056)     # a_n in u = 1/√n
_C2 = (0.0, 0.042981, -0.293762, -1.752461, 5.682633, -3.582633)    # a_(n−1) in u
_C3 = (0.544, -0.39978, 0.025054, -0.0006714)      # mean of −log(γ − log(1 − W)), in n, 4 <= n <= 11
_C4 = (1.3822, -0.77857, 0.062767, -0.0020322)     # log sd of the same
_C5 = (-1.5861, -0.31082, -0.083751, 0.0038915)    # mean of log(1 − W), in log n, n >= 12
_C6 = (-0.4803, -0.082676, 0.0030302)              # log sd of the same
_G = (-2.273, 0.459)                               # γ(n)


@dataclass(frozen=True)
class ShapiroWilk:
    """W statistic and p-value of the Shapiro–Wilk test for a sample of size ``n``."""

    n: int
    statistic: float
    p_value: float


def _poly(c: tuple[float, ...], x: float | np.ndarray) -> float | np.ndarray:
    """c[0] + c[1]·x + c[2]·x² + … by Horner's rule."""
    acc = c[-1] * x
    for coef in c[-2:0:-1]:
        acc = (acc + coef) * x
    return c[0] + acc


def _ppnd(p: np.ndarray) -> np.ndarray:
    """Normal quantile by Beasley & Springer (1977), Applied Statistics AS 111 (about 7 digits)."""
    a = (2.50662823884, -18.61500062529, 41.39119773534, -25.44106049637)
    b = (-8.47351093090, 23.08336743743, -21.06224101826, 3.13082909833)
    c = (-2.78718931138, -2.29796479134, 4.85014127135, 2.32121276858)
    d = (3.54388924762, 1.63706781897)
    q = p - 0.5
    r = q * q
    central = q * (((a[3] * r + a[2]) * r + a[1]) * r + a[0]) / ((((b[3] * r + b[2]) * r + b[1]) * r + b[0]) * r + 1.0)
    with np.errstate(all="ignore"):
        rt = np.sqrt(-np.log(np.where(q > 0, 1.0 - p, p)))
        tail = (((c[3] * rt + c[2]) * rt + c[1]) * rt + c[0]) / ((d[1] * rt + d[0]) * rt + 1.0)
    return np.where(np.abs(q) <= 0.42, central, np.where(q < 0, -tail, tail))


def _upper_normal_tail(x: np.ndarray) -> np.ndarray:
    """P(Z > x) by Hill (1973), Applied Statistics AS 66 (as used by AS R94)."""
    a = (0.398942280444, 0.399903438504, 5.75885480458, 29.8213557808, 2.62433121679, 48.6959930692,
         5.92885724438)
    b = (0.398942280385, 3.8052e-8, 1.00000615302, 3.98064794e-4, 1.98615381364, 0.151679116635,
         5.29330324926, 4.8385912808, 15.1508972451, 0.742380924027, 30.789933034, 3.99019417011)
    x = np.asarray(x, dtype=np.float64)
    upper = x > 0                         # NaN counts as "not > 0", as in AS 66
    z = np.where(upper, x, -x)
    y = 0.5 * z * z
    with np.errstate(all="ignore"):
        near = 0.5 - z * (a[0] - a[1] * y / (y + a[2] - a[3] / (y + a[4] + a[5] / (y + a[6]))))
        far = b[0] * np.exp(-y) / (z - b[1] + b[2] / (z + b[3] + b[4] / (z - b[5] + b[6] / (
            z + b[7] - b[8] / (z + b[9] + b[10] / (z + b[11]))))))
    tail = np.where(z <= 1.28, near, far)
    tail = np.where(upper, np.where(z <= 38.0, tail, 0.0), np.where(z <= 7.0, 1.0 - tail, 1.0))
    return tail


@lru_cache(maxsize=256)
def shapiro_coefficients(n: int) -> np.ndarray:
    """Royston's Shapiro–Wilk coefficients for the ordered sample x_(1) <= … <= x_(n).

    Parameters
    ----------
    n : int
        Sample size, 3 <= n <= 5000.

    Returns
    -------
    ndarray of shape (n,)
        Antisymmetric coefficients (negative for the lower half, 0 in the middle for odd n), read-only.

    Examples
    --------
    >>> shapiro_coefficients(3).round(6).tolist()
    [-0.707107, 0.0, 0.707107]
    """
    n = int(n)
    if not MIN_N <= n <= MAX_N:
        raise ValueError(f"n = {n} — Shapiro–Wilk needs {MIN_N} <= n <= {MAX_N}")
    half = n // 2
    if n == 3:
        upper = np.array([math.sqrt(0.5)])
    else:
        m = _ppnd((np.arange(1, half + 1) - 0.375) / (n + 0.25))       # negative normal scores
        summ2 = 2.0 * math.fsum((m * m).tolist())
        ssumm2 = math.sqrt(summ2)
        rsn = 1.0 / math.sqrt(n)
        a1 = _poly(_C1, rsn) - m[0] / ssumm2
        upper = -m.copy()
        if n > 5:
            a2 = -m[1] / ssumm2 + _poly(_C2, rsn)
            fac = math.sqrt((summ2 - 2.0 * m[0] ** 2 - 2.0 * m[1] ** 2) / (1.0 - 2.0 * a1 ** 2 - 2.0 * a2 ** 2))
            upper = upper / fac
            upper[1] = a2
        else:
            fac = math.sqrt((summ2 - 2.0 * m[0] ** 2) / (1.0 - 2.0 * a1 ** 2))
            upper = upper / fac
        upper[0] = a1
    coef = np.zeros(n)
    coef[n - half:] = upper[::-1]
    coef[:half] = -upper
    coef.setflags(write=False)
    return coef


def _p_values(n: int, w1: np.ndarray) -> np.ndarray:
    """Royston's p-value for 1 − W (``w1``) at sample size n >= 4."""
    with np.errstate(all="ignore"):
        y = np.log(w1)
        if n <= 11:
            gamma = _poly(_G, float(n))
            small = y >= gamma
            y = -np.log(gamma - y)
            m, s = _poly(_C3, float(n)), math.exp(_poly(_C4, float(n)))
            return np.where(small, _SMALL_P, _upper_normal_tail((y - m) / s))
        ln = math.log(n)
        m, s = _poly(_C5, ln), math.exp(_poly(_C6, ln))
        return _upper_normal_tail((y - m) / s)


def shapiro_wilk_rows(sorted_rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shapiro–Wilk W and p-value for each row of a matrix of samples, each row sorted ascending.

    Parameters
    ----------
    sorted_rows : ndarray of shape (k, n)
        k samples of the same size n (3 <= n <= 5000), each sorted ascending and finite.

    Returns
    -------
    w, p : ndarray of shape (k,)
        NaN for a row whose values are all equal (W is undefined there).

    Examples
    --------
    >>> import numpy as np
    >>> x = np.sort(np.array([[148, 154, 158, 160, 161, 162, 166, 170, 182, 195, 236.0]]), axis=1)
    >>> w, p = shapiro_wilk_rows(x)          # Shapiro & Wilk (1965), Example 1
    >>> round(float(w[0]), 4), round(float(p[0]), 5)
    (0.7888, 0.0067)
    """
    xs = np.asarray(sorted_rows, dtype=np.float64)
    if xs.ndim != 2:
        raise ValueError("sorted_rows must be a 2-D array (one sample per row)")
    n = xs.shape[1]
    coef = shapiro_coefficients(n)
    with np.errstate(all="ignore"):
        shifted = xs - xs[:, n // 2: n // 2 + 1]        # centre on a middle value first: less rounding
        spread = shifted[:, -1] - shifted[:, 0]
        scaled = shifted / spread[:, None]
        dev = scaled - (scaled.sum(axis=1) / n)[:, None]
        acoef = coef - coef.sum() / n
        ssa = float((acoef * acoef).sum())
        ssx = (dev * dev).sum(axis=1)
        sax = (dev * acoef).sum(axis=1)
        root = np.sqrt(ssa * ssx)
        w1 = (root - sax) * (root + sax) / (ssa * ssx)  # 1 − W without cancellation
        w = 1.0 - w1
        if n == 3:
            p = np.where(w < 0.75, 0.0, 1.0 - (6.0 / math.pi) * np.arccos(np.sqrt(w)))
            w = np.where(w < 0.75, 0.75, w)
        else:
            p = _p_values(n, w1)
    bad = ~(spread > 0)
    w = np.where(bad, np.nan, w)
    p = np.where(bad, np.nan, p)
    return w, p


def shapiro_wilk(values: np.ndarray) -> ShapiroWilk:
    """Shapiro–Wilk test of normality of one sample (3 <= n <= 5000, finite, not all equal).

    Parameters
    ----------
    values : array_like of float

    Returns
    -------
    ShapiroWilk

    Examples
    --------
    >>> r = shapiro_wilk([148, 154, 158, 160, 161, 162, 166, 170, 182, 195, 236])
    >>> r.n, round(r.statistic, 4), round(r.p_value, 5)
    (11, 0.7888, 0.0067)
    """
    x = np.sort(np.asarray(values, dtype=np.float64).ravel())
    if not np.isfinite(x).all():
        raise ValueError("values must be finite; drop NaN and infinities first")
    if x.shape[0] and x[0] == x[-1]:
        raise ValueError("all values are equal: the Shapiro–Wilk W is undefined")
    w, p = shapiro_wilk_rows(x[None, :])
    return ShapiroWilk(n=int(x.shape[0]), statistic=float(w[0]), p_value=float(p[0]))
