"""`lotwarden plan`: sample size for power against statsmodels and R pwr values."""

from __future__ import annotations

import math

import pytest

from .conftest import lotwarden


def test_plan_matches_published_sample_size() -> None:
    """d = 0.5, alpha 0.05, two-sided, power 0.8 -> n = 34 (statsmodels solve_power 33.367, rounded up;
    ../shared/REFERENCES.md §5)."""
    r = lotwarden("plan", "--sd", "2", "--shift", "1", "--alpha", "0.05", "--power", "0.8", "--format", "json")
    assert r.code == 0, r.err
    assert r.json()["n"] == 34


@pytest.mark.parametrize("alternative,alpha,power,d", [("two-sided", 0.01, 0.9, 0.75), ("less", 0.05, 0.8, 0.4),
                                                        ("greater", 0.01, 0.95, 1.1)])
def test_plan_matches_statsmodels(alternative: str, alpha: float, power: float, d: float) -> None:
    """n is the ceiling of statsmodels TTestPower.solve_power (reference library)."""
    from statsmodels.stats.power import TTestPower

    alt = {"two-sided": "two-sided", "less": "smaller", "greater": "larger"}[alternative]
    effect = -d if alternative == "less" else d
    ref = TTestPower().solve_power(effect_size=effect, alpha=alpha, power=power, alternative=alt)
    r = lotwarden("plan", "--sd", "1", "--shift", str(d), "--alpha", str(alpha), "--power", str(power),
                  "--alternative", alternative, "--format", "json")
    assert r.code == 0, r.err
    assert r.json()["n"] == math.ceil(ref)


def test_plan_rejects_bad_power() -> None:
    """--power outside (0, 1) is a usage error with exit 2."""
    r = lotwarden("plan", "--sd", "1", "--shift", "1", "--power", "1.5")
    assert r.code == 2 and "--power" in r.err
