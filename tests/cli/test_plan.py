"""`lotwarden plan`: sample size for power against statsmodels and R pwr values."""

from __future__ import annotations

import math

import pytest

from .conftest import lotwarden


def test_plan_matches_published_sample_size() -> None:
    """d = 0.5, alpha 0.05, two-sided, power 0.8 -> n = 34 (statsmodels TTestPower.solve_power gives 33.367,
    rounded up; memory, the next test computes such values with statsmodels)."""
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


def test_plan_unreachable_target_is_one_line_exit_2() -> None:
    """A shift of 1e-5 sd needs about (1.96 + 0.84)^2 / 1e-10 = 7.8e10 units (normal approximation, memory of
    z quantiles): beyond the search, so exit 2 with one line on stderr naming the options, no traceback."""
    r = lotwarden("plan", "--sd", "1", "--shift", "0.00001")
    assert r.code == 2
    assert r.out == ""
    lines = r.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("lotwarden: ")
    assert "Traceback" not in r.err and "--shift" in r.err


def test_plan_unreachable_json_is_exit_2_too() -> None:
    """The same with --format json: no partial JSON on stdout."""
    r = lotwarden("plan", "--sd", "1", "--shift", "0.00001", "--known-sd", "--format", "json")
    assert r.code == 2 and r.out == "" and len(r.err.strip().splitlines()) == 1
