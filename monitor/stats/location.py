"""One-sample tests of a lot mean against a target from its summary (n, mean, sd): Student's t and z.

The array functions (``t_test_arrays``, ``z_test_arrays``) judge many lots at once and are what the
scalar functions call, so one lot gives the same numbers alone or in a batch. Conventions follow
``scipy.stats.ttest_1samp``: ``alternative="less"`` means H1: mean < target (low fill), ``"greater"``
means H1: mean > target (giveaway); p-values use ``scipy.special.stdtr`` / ``ndtr`` and intervals the
quantile functions ``stdtrit`` / ``ndtri`` exactly as scipy does, so results agree to rounding.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

__all__ = ["ALTERNATIVES", "LocationTest", "check_alternative", "critical_value", "t_test", "t_test_arrays",
           "z_test", "z_test_arrays"]

ALTERNATIVES = ("two-sided", "less", "greater")


@dataclass(frozen=True)
class LocationTest:
    """Result of a one-sample test of location against ``target``.

    ``estimate`` is the sample mean (t, z) or the pseudo-median (Wilcoxon signed-rank: the Hodges–Lehmann
    estimate). ``ci_low`` / ``ci_high`` bound the ``1 − alpha`` confidence interval of the mean; None is the
    open end of a one-sided interval, or no interval (Wilcoxon computes none). ``df`` is None for z.
    """

    test: str
    alternative: str
    alpha: float
    n: int
    target: float
    estimate: float
    statistic: float
    df: float | None
    p_value: float
    critical_value: float | None
    se: float | None
    ci_low: float | None
    ci_high: float | None


def check_alternative(alternative: str) -> str:
    """Return ``alternative`` if valid, else raise ValueError naming the allowed values."""
    if alternative not in ALTERNATIVES:
        raise ValueError(f"alternative = {alternative!r} — must be 'two-sided', 'less' or 'greater'")
    return alternative


def _check_alpha(alpha: float) -> float:
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha = {alpha!r} — must be in (0, 1)")
    return float(alpha)


def _quantile(p: float | np.ndarray, df: np.ndarray | None) -> np.ndarray:
    """Quantile of Student's t (``df`` given) or of the standard normal (``df`` None)."""
    if df is None:
        return special.ndtri(np.asarray(p, dtype=np.float64))
    return special.stdtrit(df, p)


def critical_value(alpha: float, alternative: str, df: float | np.ndarray | None = None) -> np.ndarray | float:
    """Critical value of the test statistic at level ``alpha``.

    Two-sided: the positive quantile ``t(1 − α/2, df)``; less: ``t(α, df)`` (negative); greater:
    ``t(1 − α, df)``. With ``df=None`` the standard normal replaces Student's t.

    Parameters
    ----------
    alpha : float
        Significance level in (0, 1).
    alternative : {"two-sided", "less", "greater"}
    df : float or ndarray or None
        Degrees of freedom (n − 1); None for the z-test.

    Returns
    -------
    float or ndarray

    Examples
    --------
    >>> round(float(critical_value(0.05, "two-sided", 9)), 4)    # NIST/SEMATECH t table: 2.262
    2.2622
    >>> round(float(critical_value(0.05, "less", None)), 4)
    -1.6449
    """
    check_alternative(alternative)
    _check_alpha(alpha)
    d = None if df is None else np.asarray(df, dtype=np.float64)
    if alternative == "two-sided":
        q = _quantile(1.0 - alpha / 2.0, d)
    elif alternative == "less":
        q = _quantile(alpha, d)
    else:
        q = _quantile(1.0 - alpha, d)
    return q if np.ndim(q) else float(q)


def _test_arrays(estimate: np.ndarray, se: np.ndarray, target: float, alternative: str, alpha: float,
                 df: np.ndarray | None) -> dict[str, np.ndarray]:
    with np.errstate(all="ignore"):
        stat = (estimate - target) / se
        if df is None:
            lower_tail, upper_tail = special.ndtr(stat), special.ndtr(-stat)
            two_tail = 2.0 * special.ndtr(-np.abs(stat))
        else:
            lower_tail, upper_tail = special.stdtr(df, stat), special.stdtr(df, -stat)
            two_tail = 2.0 * special.stdtr(df, -np.abs(stat))
        conf = 1.0 - alpha                       # the interval at confidence 1 − alpha, as scipy builds it
        nan = np.full_like(stat, np.nan)
        if alternative == "less":
            p = lower_tail
            low, high = nan, _quantile(conf, df) * se + estimate
        elif alternative == "greater":
            p = upper_tail
            low, high = _quantile(1.0 - conf, df) * se + estimate, nan
        else:
            p = np.minimum(two_tail, 1.0)
            tail = (1.0 - conf) / 2.0
            low = _quantile(tail, df) * se + estimate
            high = _quantile(1.0 - tail, df) * se + estimate
        crit = critical_value(alpha, alternative, df)
    return {"statistic": stat, "p_value": p, "se": se, "ci_low": low, "ci_high": high,
            "critical_value": np.broadcast_to(crit, stat.shape)}


def t_test_arrays(n: np.ndarray, mean: np.ndarray, var: np.ndarray, target: float, alternative: str = "two-sided",
                  alpha: float = 0.05) -> dict[str, np.ndarray]:
    """Student's one-sample t-test for many lots from their n, mean and variance (n − 1).

    Parameters
    ----------
    n, mean, var : ndarray
        Per lot: size (>= 2), mean and sample variance.
    target : float
        The hypothesised mean.
    alternative : {"two-sided", "less", "greater"}
    alpha : float
        Significance level; the interval has confidence 1 − alpha.

    Returns
    -------
    dict of ndarray
        ``statistic``, ``df``, ``p_value``, ``se``, ``critical_value``, ``ci_low``, ``ci_high``
        (NaN marks the open end of a one-sided interval).

    Examples
    --------
    >>> import numpy as np
    >>> r = t_test_arrays(np.array([10]), np.array([-1.58]), np.array([1.23**2]), 0.0)
    >>> round(float(r["statistic"][0]), 2)
    -4.06
    """
    check_alternative(alternative)
    _check_alpha(alpha)
    nn = np.asarray(n, dtype=np.float64)
    df = nn - 1.0
    with np.errstate(all="ignore"):
        se = np.sqrt(np.asarray(var, dtype=np.float64) / nn)
    out = _test_arrays(np.asarray(mean, dtype=np.float64), se, float(target), alternative, alpha, df)
    out["df"] = df
    return out


def z_test_arrays(n: np.ndarray, mean: np.ndarray, known_sd: float, target: float,
                  alternative: str = "two-sided", alpha: float = 0.05) -> dict[str, np.ndarray]:
    """One-sample z-test for many lots with a known process sd; same keys as `t_test_arrays`.

    Examples
    --------
    >>> import numpy as np
    >>> # z = (498 − 500)/(5/√25) = −2; Φ(−2) = 0.02275 (standard normal table)
    >>> r = z_test_arrays(np.array([25]), np.array([498.0]), 5.0, 500.0, "less")
    >>> round(float(r["statistic"][0]), 3), round(float(r["p_value"][0]), 4)
    (-2.0, 0.0228)
    """
    check_alternative(alternative)
    _check_alpha(alpha)
    if not (np.isfinite(known_sd) and known_sd > 0):
        raise ValueError(f"known_sd = {known_sd!r} — must be a finite number > 0")
    nn = np.asarray(n, dtype=np.float64)
    with np.errstate(all="ignore"):
        se = float(known_sd) / np.sqrt(nn)
    out = _test_arrays(np.asarray(mean, dtype=np.float64), se, float(target), alternative, alpha, None)
    out["df"] = np.full_like(nn, np.nan)
    return out


def _result(test: str, r: dict[str, np.ndarray], n: int, target: float, estimate: float, alternative: str,
            alpha: float) -> LocationTest:
    def opt(key: str) -> float | None:
        v = float(r[key][0])
        return v if np.isfinite(v) else None
    return LocationTest(test=test, alternative=alternative, alpha=alpha, n=n, target=float(target),
                        estimate=estimate, statistic=float(r["statistic"][0]), df=opt("df"),
                        p_value=float(r["p_value"][0]), critical_value=float(r["critical_value"][0]),
                        se=float(r["se"][0]), ci_low=opt("ci_low"), ci_high=opt("ci_high"))


def t_test(n: int, mean: float, sd: float, target: float, alternative: str = "two-sided",
           alpha: float = 0.05) -> LocationTest:
    """Student's one-sample t-test of a mean against ``target`` from n, mean and sd (n − 1).

    Parameters
    ----------
    n : int
        Sample size, >= 2.
    mean, sd : float
        Sample mean and standard deviation (sd > 0).
    target : float
    alternative : {"two-sided", "less", "greater"}
    alpha : float

    Returns
    -------
    LocationTest

    Examples
    --------
    Student's sleep data, differences group 1 − group 2 (R ``datasets::sleep``):

    >>> r = t_test(10, -1.58, 1.2299954832880436, 0.0)
    >>> round(r.statistic, 4), r.df, round(r.p_value, 6)
    (-4.0621, 9.0, 0.002833)
    """
    if n < 2 or not (np.isfinite(mean) and np.isfinite(sd) and sd > 0):
        raise ValueError(f"t-test needs n >= 2 and a finite sd > 0 (got n={n}, mean={mean}, sd={sd})")
    r = t_test_arrays(np.array([n]), np.array([mean]), np.array([float(sd) ** 2]), target, alternative, alpha)
    return _result("t", r, int(n), target, float(mean), alternative, alpha)


def z_test(n: int, mean: float, known_sd: float, target: float, alternative: str = "two-sided",
           alpha: float = 0.05) -> LocationTest:
    """One-sample z-test of a mean against ``target`` with a known process sd.

    Examples
    --------
    >>> # upper bound 498 + 1.6449·5/√25 = 499.645 (z(0.95) = 1.6449, standard normal table)
    >>> r = z_test(25, 498.0, 5.0, 500.0, "less")
    >>> round(r.statistic, 3), r.df, r.ci_low, round(r.ci_high, 3)
    (-2.0, None, None, 499.645)
    """
    if n < 1 or not np.isfinite(mean):
        raise ValueError(f"z-test needs n >= 1 and a finite mean (got n={n}, mean={mean})")
    r = z_test_arrays(np.array([n]), np.array([mean]), known_sd, target, alternative, alpha)
    return _result("z", r, int(n), target, float(mean), alternative, alpha)
