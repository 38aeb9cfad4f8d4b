"""Power and sample size for the t- and z-tests against R pwr values and statsmodels."""

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.power import TTestPower

from monitor.stats.power import n_for_power, plan_sample_size, power, power_curve

SM_ALT = {"two-sided": "two-sided", "greater": "larger", "less": "smaller"}


@pytest.mark.parametrize("d,n,alpha,alternative,expected", [
    # Source: R pwr::pwr.t.test values recorded in statsmodels/stats/tests/test_power.py (TestTTPowerOneS1-4)
    (0.2, 20, 0.05, "two-sided", 0.1359562887679666),
    (1.0, 30, 0.05, "two-sided", 0.9995636009612725),
    (1.0, 30, 0.05, "greater", 0.999892010204909),
    (0.05, 20, 0.05, "greater", 0.0764888785042198),
])
def test_r_pwr_values(d, n, alpha, alternative, expected):
    """Strict power of the one-sample t-test equals R pwr.t.test (shift d·sd with sd 2.5)."""
    assert power(n, d * 2.5, 2.5, alpha, alternative) == pytest.approx(expected, rel=1e-9)


def test_not_the_non_strict_r_value():
    """R power.t.test's default (strict = FALSE) gives 0.1334884 for d = 0.2, n = 20: we are strict."""
    assert power(20, 0.2, 1.0, 0.05, "two-sided") != pytest.approx(0.1334884, abs=1e-6)


@pytest.mark.parametrize("alternative", ["two-sided", "less", "greater"])
def test_matches_statsmodels_ttestpower(alternative):
    """Power over a grid of n, d, alpha equals statsmodels TTestPower (reference library)."""
    tp = TTestPower()
    for n in (2, 3, 8, 25, 120):
        for d in (0.1, 0.5, 1.3):
            for alpha in (0.01, 0.05):
                # statsmodels' `smaller` takes a negative effect for a downward shift
                eff = -d if alternative == "less" else d
                ref = tp.power(eff, n, alpha, alternative=SM_ALT[alternative])
                assert power(n, d, 1.0, alpha, alternative) == pytest.approx(ref, rel=1e-8, abs=1e-14)


def test_z_power_formula():
    """z-test power: Φ(δ√n/σ − z₁₋α) one-sided, both tails two-sided (normal distribution, scipy.stats.norm)."""
    n, shift, sd, alpha = 16, 1.5, 3.0, 0.05
    nc = shift / sd * np.sqrt(n)
    one = stats.norm.cdf(nc - stats.norm.ppf(1 - alpha))
    zc = stats.norm.ppf(1 - alpha / 2)
    two = stats.norm.cdf(nc - zc) + stats.norm.cdf(-nc - zc)
    assert power(n, shift, sd, alpha, "less", known_sd=True) == pytest.approx(one, rel=1e-12)
    assert power(n, shift, sd, alpha, "two-sided", known_sd=True) == pytest.approx(two, rel=1e-12)


def test_sample_size_published():
    """d = 0.5, two-sided, alpha 0.05, power 0.8 -> 34 (statsmodels solve_power 33.367 rounded up, §5)."""
    assert plan_sample_size(sd=2.0, shift=1.0, alpha=0.05, power=0.8) == 34


@pytest.mark.parametrize("alternative", ["two-sided", "greater"])
def test_sample_size_matches_statsmodels_solve_power(alternative):
    """n_for_power = ceil(statsmodels TTestPower.solve_power) over a grid (reference library)."""
    tp = TTestPower()
    for d in (0.25, 0.6, 1.0, 2.0):
        for target in (0.8, 0.9):
            ref = tp.solve_power(effect_size=d, nobs=None, alpha=0.05, power=target,
                                 alternative=SM_ALT[alternative])
            assert n_for_power(d, 1.0, 0.05, target, alternative)[0] == max(2, int(np.ceil(ref - 1e-9)))


def test_n_for_power_is_the_smallest():
    """The returned n reaches the power and n − 1 does not (definition), over many cases at once."""
    rng = np.random.default_rng(31)
    shifts = np.r_[rng.uniform(0.02, 6.0, 60), 0.3, 0.8, 1.7, 25.0]
    for alternative in ("two-sided", "less", "greater"):
        for known in (False, True):
            for target, alpha in ((0.8, 0.05), (0.95, 0.01), (0.3, 0.1)):
                ns = n_for_power(shifts, 1.0, alpha, target, alternative, known)
                p_at = power(ns, shifts, 1.0, alpha, alternative, known)
                p_below = power(np.maximum(ns - 1, 2), shifts, 1.0, alpha, alternative, known)
                assert (ns >= 2).all() and (p_at >= target).all()
                assert ((ns == 2) | (p_below < target)).all()


def test_unreachable_and_invalid():
    """A shift far below the sd is reported unreachable (-1); bad inputs raise ValueError naming them."""
    assert n_for_power(1e-6, 1.0, 0.05, 0.8)[0] == -1
    with pytest.raises(ValueError, match="more than"):
        plan_sample_size(1.0, 1e-6, 0.05, 0.8)
    with pytest.raises(ValueError, match="shift"):
        plan_sample_size(1.0, -2.0, 0.05, 0.8)
    with pytest.raises(ValueError, match="target_power"):
        n_for_power(1.0, 1.0, 0.05, 1.5)


def test_power_curve_rises_and_matches_power():
    """power_curve lists (n, power) with power increasing in n, equal to statsmodels at each n."""
    curve = power_curve(2.0, 1.0, 0.05, "less", range(2, 60, 5))
    assert [n for n, _ in curve] == list(range(2, 60, 5))
    ps = [p for _, p in curve]
    assert ps == sorted(ps)
    for n, p in curve:
        assert p == pytest.approx(TTestPower().power(-0.5, n, 0.05, alternative="smaller"), rel=1e-8)
    with pytest.raises(ValueError):
        power_curve(2.0, 1.0, 0.05, "less", [1])
