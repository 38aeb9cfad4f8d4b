"""Equivalence of a lot mean to its target within ± margin: two one-sided tests (TOST), t or z form.

A lot is *shown* equivalent at level ``alpha`` when both one-sided tests reject: H0 mean <= target − margin
(against H1 mean > target − margin) and H0 mean >= target + margin (against H1 mean < target + margin).
The TOST p-value is the larger of the two one-sided p-values, and the lot is shown when it is below alpha —
which is the same as the ``1 − 2·alpha`` confidence interval of the mean lying strictly inside
target ± margin (Schuirmann 1987, the two one-sided tests procedure). Each one-sided test is
``monitor.stats.location``'s t- or z-test, so the numbers agree with statsmodels'
``DescrStatsW.ttost_mean`` / ``ztost_mean`` and with the ordinary test of the same lot to rounding.

The array functions judge many lots at once and are what the scalar functions call. Like
``t_test_arrays`` they do not gate degenerate lots: n < 2 gives NaN, sd 0 gives the limit (shown when
the mean is strictly inside target ± margin). The engine gates such lots before any test.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special

from monitor.stats.location import t_test_arrays, z_test_arrays
from monitor.stats.wording import format_quantity, plural

__all__ = ["MAX_SHOW_N", "Equivalence", "n_to_show", "not_shown_reason", "tost_t", "tost_t_arrays", "tost_z",
           "tost_z_arrays"]

MAX_SHOW_N = 10 ** 9          # beyond this, n_to_show reports that no practical lot size would show it

JSON_KEYS = ("margin", "p_value", "ci_low", "ci_high", "shown")


@dataclass(frozen=True)
class Equivalence:
    """Result of the two one-sided tests of a lot mean against ``target ± margin``.

    ``statistic_lower`` / ``p_lower`` are those of the test against the lower bound (H1: mean > target −
    margin), ``statistic_upper`` / ``p_upper`` of the test against the upper bound (H1: mean < target +
    margin); ``p_value`` is the larger p. ``ci_low`` / ``ci_high`` bound the ``1 − 2·alpha`` confidence
    interval of the mean. ``df`` is None for the z form.
    """

    test: str
    alpha: float
    n: int
    target: float
    margin: float
    mean: float
    statistic_lower: float
    statistic_upper: float
    df: float | None
    p_lower: float
    p_upper: float
    p_value: float
    ci_low: float
    ci_high: float
    shown: bool

    @property
    def low(self) -> float:
        """Lower equivalence bound, target − margin."""
        return self.target - self.margin

    @property
    def high(self) -> float:
        """Upper equivalence bound, target + margin."""
        return self.target + self.margin

    def to_json(self) -> dict[str, Any]:
        """The verdict's ``equivalence`` object: margin, p_value, ci_low, ci_high, shown."""
        return {"margin": self.margin, "p_value": self.p_value, "ci_low": self.ci_low, "ci_high": self.ci_high,
                "shown": self.shown}


def _check(target: float, margin: float, alpha: float) -> tuple[float, float, float]:
    if not math.isfinite(target):
        raise ValueError(f"target = {target!r} — must be a finite number")
    if not (math.isfinite(margin) and margin > 0):
        raise ValueError(f"margin = {margin!r} — must be a finite number > 0")
    if not 0.0 < alpha <= 0.5:
        raise ValueError(f"alpha = {alpha!r} — must be in (0, 0.5] for the two one-sided tests")
    return float(target), float(margin), float(alpha)


def _combine(lower: dict[str, np.ndarray], upper: dict[str, np.ndarray], alpha: float) -> dict[str, np.ndarray]:
    # lower: the "greater" test against target − margin; its 1 − alpha one-sided bound mean + q(alpha)·se is
    # the low end of the 1 − 2·alpha two-sided interval. upper: the "less" test against target + margin.
    p = np.maximum(lower["p_value"], upper["p_value"])        # NaN stays NaN (never shown)
    with np.errstate(invalid="ignore"):
        shown = p < alpha
    return {"statistic_lower": lower["statistic"], "statistic_upper": upper["statistic"],
            "p_lower": lower["p_value"], "p_upper": upper["p_value"], "p_value": p, "df": lower["df"],
            "se": lower["se"], "ci_low": lower["ci_low"], "ci_high": upper["ci_high"], "shown": shown}


def tost_t_arrays(n: np.ndarray, mean: np.ndarray, var: np.ndarray, target: float, margin: float,
                  alpha: float = 0.05) -> dict[str, np.ndarray]:
    """Two one-sided t-tests of equivalence to ``target ± margin`` for many lots from n, mean, variance.

    Parameters
    ----------
    n, mean, var : ndarray
        Per lot: size (>= 2), mean and sample variance (n − 1).
    target : float
    margin : float
        Half-width of the equivalence range, > 0, in the unit of the mean.
    alpha : float
        Level of each one-sided test, in (0, 0.5]; the interval has confidence 1 − 2·alpha.

    Returns
    -------
    dict of ndarray
        ``statistic_lower``, ``statistic_upper``, ``p_lower``, ``p_upper``, ``p_value`` (the larger),
        ``df``, ``se``, ``ci_low``, ``ci_high`` and ``shown`` (bool: p_value < alpha).

    Examples
    --------
    >>> import numpy as np
    >>> # se = 2/√16 = 0.5; t = (500.4 − 499)/0.5 = 2.8 and (500.4 − 501)/0.5 = −1.2
    >>> r = tost_t_arrays(np.array([16]), np.array([500.4]), np.array([4.0]), 500.0, 1.0)
    >>> round(float(r["statistic_lower"][0]), 6), round(float(r["statistic_upper"][0]), 6), bool(r["shown"][0])
    (2.8, -1.2, False)
    """
    target, margin, alpha = _check(target, margin, alpha)
    lower = t_test_arrays(n, mean, var, target - margin, "greater", alpha)
    upper = t_test_arrays(n, mean, var, target + margin, "less", alpha)
    return _combine(lower, upper, alpha)


def tost_z_arrays(n: np.ndarray, mean: np.ndarray, known_sd: float, target: float, margin: float,
                  alpha: float = 0.05) -> dict[str, np.ndarray]:
    """Two one-sided z-tests (known process sd) for many lots; same keys as `tost_t_arrays` (``df`` NaN).

    Examples
    --------
    >>> import numpy as np
    >>> # se = 4/√64 = 0.5; z = (500.2 − 499)/0.5 = 2.4, (500.2 − 501)/0.5 = −1.6; Φ(−1.6) = 0.0548
    >>> r = tost_z_arrays(np.array([64]), np.array([500.2]), 4.0, 500.0, 1.0)
    >>> round(float(r["p_value"][0]), 4), bool(r["shown"][0])
    (0.0548, False)
    """
    target, margin, alpha = _check(target, margin, alpha)
    lower = z_test_arrays(n, mean, known_sd, target - margin, "greater", alpha)
    upper = z_test_arrays(n, mean, known_sd, target + margin, "less", alpha)
    return _combine(lower, upper, alpha)


def _result(test: str, r: dict[str, np.ndarray], n: int, mean: float, target: float, margin: float,
            alpha: float) -> Equivalence:
    df = float(r["df"][0])
    return Equivalence(test=test, alpha=alpha, n=n, target=float(target), margin=float(margin), mean=mean,
                       statistic_lower=float(r["statistic_lower"][0]),
                       statistic_upper=float(r["statistic_upper"][0]), df=df if math.isfinite(df) else None,
                       p_lower=float(r["p_lower"][0]), p_upper=float(r["p_upper"][0]),
                       p_value=float(r["p_value"][0]), ci_low=float(r["ci_low"][0]),
                       ci_high=float(r["ci_high"][0]), shown=bool(r["shown"][0]))


def tost_t(n: int, mean: float, sd: float, target: float, margin: float, alpha: float = 0.05) -> Equivalence:
    """Two one-sided t-tests: is the lot mean shown within ``target ± margin`` at level ``alpha``?

    Parameters
    ----------
    n : int
        Lot size, >= 2.
    mean, sd : float
        Sample mean and standard deviation (n − 1), sd finite and > 0.
    target, margin : float
        Target and half-width (> 0) of the equivalence range, in the unit of the mean.
    alpha : float
        In (0, 0.5].

    Returns
    -------
    Equivalence

    Raises
    ------
    ValueError
        n < 2, a non-finite mean, sd not finite or <= 0, margin not finite or <= 0, alpha outside (0, 0.5].

    Examples
    --------
    >>> # se = 0.5, df = 15; t(0.95, 15) = 1.753 (NIST/SEMATECH t table): interval 500.1 ± 0.877
    >>> r = tost_t(16, 500.1, 2.0, 500.0, 1.0)
    >>> r.shown, round(r.ci_low, 3), round(r.ci_high, 3), r.df
    (True, 499.223, 500.977, 15.0)
    """
    if n < 2 or not (math.isfinite(mean) and math.isfinite(sd) and sd > 0):
        raise ValueError(f"equivalence t-test needs n >= 2, a finite mean and a finite sd > 0 "
                         f"(got n={n}, mean={mean}, sd={sd})")
    r = tost_t_arrays(np.array([n]), np.array([float(mean)]), np.array([float(sd) ** 2]), target, margin, alpha)
    return _result("t", r, int(n), float(mean), target, margin, alpha)


def tost_z(n: int, mean: float, known_sd: float, target: float, margin: float,
           alpha: float = 0.05) -> Equivalence:
    """Two one-sided z-tests with a known process sd: is the lot mean shown within ``target ± margin``?

    Raises ValueError for n < 1, a non-finite mean, known_sd not finite > 0, or a bad margin / alpha.

    Examples
    --------
    >>> # se = 4/√64 = 0.5; z(0.95) = 1.6449 (standard normal table): interval 500.2 ± 0.822
    >>> r = tost_z(64, 500.2, 4.0, 500.0, 1.0)
    >>> r.shown, round(r.ci_low, 3), round(r.ci_high, 3), r.df
    (False, 499.378, 501.022, None)
    """
    if n < 1 or not math.isfinite(mean):
        raise ValueError(f"equivalence z-test needs n >= 1 and a finite mean (got n={n}, mean={mean})")
    r = tost_z_arrays(np.array([n]), np.array([float(mean)]), known_sd, target, margin, alpha)
    return _result("z", r, int(n), float(mean), target, margin, alpha)


def n_to_show(mean: float, sd: float, target: float, margin: float, alpha: float,
              known_sd: float | None = None) -> int | None:
    """Smallest lot size at which, with this mean and sd, the two one-sided tests would show equivalence.

    With ``known_sd`` the z form is used (``sd`` is then ignored and may be NaN) and the smallest size is 1;
    otherwise Student's t, smallest size 2. The distance of the bounds from the mean, margin − |mean −
    target|, is fixed, and the test statistic grows with √n while the critical value falls with n, so "shown"
    switches once from no to yes; a bracket around the normal-theory size and a bisection find the switch.

    Returns
    -------
    int or None
        None when |mean − target| >= margin (no n can show it) or when more than ``MAX_SHOW_N`` units would
        be needed.

    Raises
    ------
    ValueError
        Non-finite mean / target, margin not finite > 0, alpha outside (0, 0.5], sd (or known_sd) not
        finite >= 0 (known_sd > 0).

    Examples
    --------
    >>> # z form: (1.6449·2/0.6)² = 30.06 -> 31; Student's t needs a little more
    >>> n_to_show(500.4, 2.0, 500.0, 1.0, 0.05, known_sd=2.0), n_to_show(500.4, 2.0, 500.0, 1.0, 0.05)
    (31, 32)
    >>> n_to_show(501.2, 2.0, 500.0, 1.0, 0.05) is None
    True
    """
    target, margin, alpha = _check(target, margin, alpha)
    if not math.isfinite(mean):
        raise ValueError(f"mean = {mean!r} — must be a finite number")
    if known_sd is not None:
        if not (math.isfinite(known_sd) and known_sd > 0):
            raise ValueError(f"known_sd = {known_sd!r} — must be a finite number > 0")
        spread, smallest = float(known_sd), 1
    else:
        if not (math.isfinite(sd) and sd >= 0):
            raise ValueError(f"sd = {sd!r} — must be a finite number >= 0")
        spread, smallest = float(sd), 2
    room = margin - abs(mean - target)
    if not room > 0:
        return None
    if spread == 0:
        return smallest

    def shown(k: int) -> bool:
        nn = np.array([k])
        if known_sd is not None:
            r = tost_z_arrays(nn, np.array([mean]), spread, target, margin, alpha)
        else:
            r = tost_t_arrays(nn, np.array([mean]), np.array([spread * spread]), target, margin, alpha)
        return bool(r["shown"][0])

    if shown(smallest):
        return smallest
    z = -float(special.ndtri(alpha))
    guess = (z * spread / room) ** 2                 # normal theory; Student's t needs about z²/2 more
    if not guess < MAX_SHOW_N:
        return None
    lo = smallest                                    # invariant: not shown at lo, shown at hi
    hi = max(smallest + 1, math.ceil(guess + (z * z / 2.0 if known_sd is None else 0.0)) + 2)
    while not shown(hi):
        if hi >= MAX_SHOW_N:
            return None
        lo, hi = hi, min(2 * hi, MAX_SHOW_N)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if shown(mid):
            hi = mid
        else:
            lo = mid
    return hi


def not_shown_reason(margin: float, target: float, unit: str, n_needed: int | None,
                     known_sd: bool = False) -> str:
    """The ``review`` reason when a lot is not shown within ± margin of target (and not shown off target).

    ``n_needed`` is `n_to_show` at the lot's mean and sd (None: the mean is not inside target ± margin, or
    more than ``MAX_SHOW_N`` units would be needed);
    ``known_sd`` words the spread as the rule's known sd. Margin and target drop trailing zeros.

    Examples
    --------
    >>> not_shown_reason(1.0, 500.0, "g", 33)
    'not shown within ±1 g of target 500 g: too few units or too much spread; about 33 units at this sd would show it'
    >>> not_shown_reason(0.5, 340.0, "g", None)
    'not shown within ±0.5 g of target 340 g: no number of units would show it at this mean and sd'
    """
    head = f"not shown within ±{format_quantity(margin, 6)} {unit} of target {format_quantity(target, 6)} {unit}"
    if n_needed is None:
        return f"{head}: no number of units would show it at this mean and {'the known sd' if known_sd else 'sd'}"
    spread = "the known sd" if known_sd else "this sd"
    return f"{head}: too few units or too much spread; about {plural(n_needed, 'unit')} at {spread} would show it"
