"""Power of the one-sample t- and z-tests against a mean shift, and the sample size that reaches a power.

Power is "strict": for a two-sided test both rejection tails count (as R's ``power.t.test(strict=TRUE)``
and statsmodels' ``TTestPower``). For Student's t the statistic under a true shift δ follows the noncentral
t with df = n − 1 and noncentrality δ/σ·√n; for the z-test (σ known) it is normal with mean δ/σ·√n. The
shift's direction follows the test: ``less`` looks for a downward shift, ``greater`` for an upward one; a
two-sided test's power does not depend on the sign of the shift.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from monitor.stats.location import check_alternative, critical_value

__all__ = ["MAX_PLAN_N", "n_for_power", "plan_sample_size", "power", "power_curve"]

MAX_PLAN_N = 10 ** 9          # beyond this, sample-size planning reports "not reachable"
_WINDOW = 4                   # half-width of the fast path's window of sizes around the normal-theory guess


def _nct_cdf(df: np.ndarray, nc: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Noncentral t cdf; where ``nctdtr`` gives NaN far in a tail, the complement of the mirrored cdf."""
    df, nc, t = np.broadcast_arrays(np.asarray(df, dtype=np.float64), np.asarray(nc, dtype=np.float64),
                                    np.asarray(t, dtype=np.float64))
    out = np.asarray(special.nctdtr(df, nc, t), dtype=np.float64)
    bad = np.isnan(out) & ~(np.isnan(df) | np.isnan(nc) | np.isnan(t))
    if bad.any():
        out = out.copy()
        alt = 1.0 - special.nctdtr(df[bad], -nc[bad], -t[bad])
        out[bad] = np.where(np.isnan(alt), np.where(t[bad] < nc[bad], 0.0, 1.0), alt)
    return out


def power(n: np.ndarray | int, shift: float | np.ndarray, sd: float | np.ndarray, alpha: float,
          alternative: str = "two-sided", known_sd: bool = False) -> np.ndarray | float:
    """Probability that the test rejects when the true mean is ``shift`` away from target.

    Parameters
    ----------
    n : int or ndarray of int
        Sample sizes (>= 2 for the t-test, >= 1 for z).
    shift : float or ndarray
        Size of the mean shift (> 0), in the unit of the values.
    sd : float or ndarray
        Process standard deviation (> 0): the sample sd for the t-test, the known sd for z.
    alpha : float
        Significance level of the test.
    alternative : {"two-sided", "less", "greater"}
    known_sd : bool
        True for the z-test (normal distribution), False for Student's t (noncentral t).

    Returns
    -------
    float or ndarray

    Examples
    --------
    >>> round(float(power(20, 0.2, 1.0, 0.05)), 6)    # R pwr.t.test(d=0.2, n=20): 0.1359563
    0.135956
    """
    check_alternative(alternative)
    nn = np.asarray(n, dtype=np.float64)
    with np.errstate(all="ignore"):
        delta = np.abs(np.asarray(shift, dtype=np.float64)) / np.asarray(sd, dtype=np.float64) * np.sqrt(nn)
        one_sided = alternative != "two-sided"
        a = alpha if one_sided else alpha / 2.0
        if known_sd:
            z_crit = float(critical_value(a, "greater", None))
            result = special.ndtr(delta - z_crit)
            if not one_sided:
                result = result + special.ndtr(-delta - z_crit)
        else:
            df = nn - 1.0
            crit = np.asarray(critical_value(a, "greater", np.broadcast_to(df, np.broadcast(df, delta).shape)))
            # P(T' > c) = P(T'' < −c) with T'' noncentral t of noncentrality −δ: accurate in both tails
            result = _nct_cdf(df, -delta, -crit)
            if not one_sided:
                result = result + _nct_cdf(df, delta, -crit)
        result = np.minimum(result, 1.0)
    return result if np.ndim(result) else float(result)


def n_for_power(shift: float | np.ndarray, sd: float | np.ndarray, alpha: float, target_power: float,
                alternative: str = "two-sided", known_sd: bool = False) -> np.ndarray:
    """Smallest n >= 2 whose power reaches ``target_power`` (vectorised over ``shift`` / ``sd``).

    Power rises with n, so a bracket around the normal-theory size, widened where needed, and a
    bisection find it.

    Parameters
    ----------
    shift, sd : float or ndarray
        Shift of interest and process sd (both > 0).
    alpha, target_power : float
    alternative : {"two-sided", "less", "greater"}
    known_sd : bool

    Returns
    -------
    ndarray of int64
        -1 where even ``MAX_PLAN_N`` units would not reach the power (or inputs are not finite > 0).

    Examples
    --------
    >>> n_for_power(0.5, 1.0, 0.05, 0.8).tolist()      # statsmodels solve_power: 33.37 -> 34
    [34]
    """
    if not 0.0 < target_power < 1.0:
        raise ValueError(f"target_power = {target_power!r} — must be in (0, 1)")
    s, d = np.broadcast_arrays(np.atleast_1d(np.asarray(shift, dtype=np.float64)),
                               np.atleast_1d(np.asarray(sd, dtype=np.float64)))
    ok = np.isfinite(s) & np.isfinite(d) & (s > 0) & (d > 0)
    s = np.where(ok, s, 1.0)
    d = np.where(ok, d, 1.0)

    def reaches(n: np.ndarray) -> np.ndarray:
        return np.asarray(power(n, s, d, alpha, alternative, known_sd)) >= target_power

    # Bracket around the normal-theory size ((z_a + z_power)·σ/δ)², which Student's t exceeds by about
    # z_a²/2; widen (halve / double) where the guess misses, then bisect the bracket.
    a = alpha if alternative != "two-sided" else alpha / 2.0
    za, zp = -float(special.ndtri(a)), float(special.ndtri(target_power))
    with np.errstate(all="ignore"):
        guess = np.minimum(((za + zp) * d / s) ** 2, float(MAX_PLAN_N))
    # Fast path: one vectorised power call on a window of sizes around the corrected guess settles most
    # inputs (the smallest n is inside the window when its first size misses and its last reaches).
    result = np.full(s.shape[0], -1, dtype=np.int64)
    settled = np.zeros(s.shape[0], dtype=bool)
    with np.errstate(all="ignore"):
        centre = np.ceil(guess + (0.0 if known_sd else za * za / 2.0))
    window = np.arange(-_WINDOW, _WINDOW + 1)
    fits = ok & np.isfinite(centre) & (centre - _WINDOW >= 2) & (centre + _WINDOW < MAX_PLAN_N)
    if fits.any():
        cand = centre[fits, None].astype(np.int64) + window[None, :]
        hit = np.asarray(power(cand, s[fits, None], d[fits, None], alpha, alternative, known_sd)) >= target_power
        inside = ~hit[:, 0] & hit[:, -1]
        first = np.argmax(hit, axis=1)
        rows = np.flatnonzero(fits)[inside]
        result[rows] = cand[inside, first[inside]]
        settled[rows] = True
        # power rises with n: a window that is not monotone (numerical noise) is left to the bisection
        mono = np.all(hit[:, 1:] >= hit[:, :-1], axis=1)
        settled[np.flatnonzero(fits)[inside & ~mono]] = False
    if settled.all():
        return result
    lo = np.clip(np.floor(0.9 * guess) - 1, 1, MAX_PLAN_N).astype(np.int64)     # want: power(lo) < target
    hi = np.clip(np.ceil(1.1 * guess + za * za / 2 + 5), 2, MAX_PLAN_N).astype(np.int64)   # want: reached
    low_hit = (lo >= 2) & reaches(np.maximum(lo, 2))
    while low_hit.any():
        hi = np.where(low_hit, lo, hi)
        lo = np.where(low_hit, np.maximum(lo // 2, 1), lo)
        low_hit = low_hit & (lo >= 2) & reaches(np.maximum(lo, 2))
    done = reaches(hi) | (hi >= MAX_PLAN_N)
    while not done.all():
        grow = ~done
        lo = np.where(grow, hi, lo)
        hi = np.where(grow, np.minimum(hi * 2, MAX_PLAN_N), hi)
        done = done | reaches(hi) | (hi >= MAX_PLAN_N)
    unreachable = ~reaches(hi)
    while True:
        gap = (hi - lo) > 1
        if not gap.any():
            break
        mid = np.where(gap, (lo + hi) // 2, hi)
        hit = reaches(mid)
        hi = np.where(gap & hit, mid, hi)
        lo = np.where(gap & ~hit, mid, lo)
    return np.where(settled, result, np.where(ok & ~unreachable, hi, -1))


def plan_sample_size(sd: float, shift: float, alpha: float, power: float, alternative: str = "two-sided",
                     known_sd: bool = False) -> int:
    """Smallest lot size (>= 2) at which the test detects ``shift`` with probability ``power``.

    Parameters
    ----------
    sd : float
        Process standard deviation (> 0).
    shift : float
        Mean shift worth detecting (> 0), in the unit of ``sd``.
    alpha : float
        Significance level in (0, 1).
    power : float
        Wanted power in (0, 1).
    alternative : {"two-sided", "less", "greater"}
    known_sd : bool
        True if ``sd`` is a known process sd (z-test), False for Student's t.

    Returns
    -------
    int

    Raises
    ------
    ValueError
        If an argument is out of range or more than ``MAX_PLAN_N`` units would be needed.

    Examples
    --------
    >>> # d = 0.5: statsmodels TTestPower.solve_power gives 33.37 -> 34 (statsmodels 0.14, computed)
    >>> plan_sample_size(sd=4.0, shift=2.0, alpha=0.05, power=0.8)
    34
    """
    check_alternative(alternative)
    for name, v in (("sd", sd), ("shift", shift)):
        if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise ValueError(f"{name} = {v!r} — must be a finite number > 0")
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha = {alpha!r} — must be in (0, 1)")
    n = int(n_for_power(shift, sd, alpha, power, alternative, known_sd)[0])
    if n < 0:
        raise ValueError(f"a shift of {shift:g} against sd {sd:g} needs more than {MAX_PLAN_N} units")
    return n


def power_curve(sd: float, shift: float, alpha: float, alternative: str,
                ns: list[int] | range | np.ndarray, known_sd: bool = False) -> list[tuple[int, float]]:
    """Power of the test at each lot size in ``ns``.

    Parameters
    ----------
    sd, shift, alpha : float
    alternative : {"two-sided", "less", "greater"}
    ns : iterable of int
        Lot sizes (>= 2 for Student's t).
    known_sd : bool

    Returns
    -------
    list of (n, power)

    Examples
    --------
    >>> # statsmodels TTestPower().power(1.0, n, 0.05, "larger"): 0.5797 (n = 5), 0.8975 (n = 10)
    >>> [(n, round(p, 3)) for n, p in power_curve(1.0, 1.0, 0.05, "greater", [5, 10])]
    [(5, 0.58), (10, 0.898)]
    """
    sizes = [int(n) for n in ns]
    if any(n < (1 if known_sd else 2) for n in sizes):
        raise ValueError("every n must be >= 2 (>= 1 with a known sd)")
    if not sizes:
        return []
    p = np.atleast_1d(power(np.array(sizes), shift, sd, alpha, alternative, known_sd))
    return list(zip(sizes, (float(v) for v in p), strict=True))
