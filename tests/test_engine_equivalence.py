"""release = "equivalence": a lot passes only when two one-sided tests show its mean within target ± margin;
checked against statsmodels (DescrStatsW.ttost_mean) and scipy's normal distribution for the z form."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
from statsmodels.stats.weightstats import DescrStatsW

from monitor.engine import evaluate
from monitor.errors import RuleError
from monitor.lot import LotData, LotKey
from monitor.rulebook import Rule

KEY = LotKey("L1", "OAT-500", "E1")


def lot(values: list[float]) -> LotData:
    return LotData(KEY, values=np.array(values, dtype=float))


def rule(**kw) -> Rule:
    base = {"name": "oat-500", "target": 500.0, "unit": "g", "release": "equivalence", "margin": 1.0}
    base.update(kw)
    return Rule.adhoc(**base)


# Normal quantiles (Python's statistics.NormalDist) in a fixed order, scaled: a well-behaved lot.
def normal_lot(centre: float, sd: float, n: int) -> list[float]:
    from statistics import NormalDist

    z = [NormalDist().inv_cdf((i + 0.5) / n) for i in range(n)]
    return [round(centre + sd * z[(7 * i) % n], 3) for i in range(n)]


def test_a_tight_lot_on_target_passes_with_the_statsmodels_tost_p():
    values = normal_lot(500.2, 0.8, 40)
    v = evaluate(lot(values), rule())
    # statsmodels.stats.weightstats.DescrStatsW.ttost_mean(low, upp): (p, lower test, upper test)
    p_ref = DescrStatsW(np.array(values)).ttost_mean(499.0, 501.0)[0]
    assert v.verdict == "pass"
    eq = v.to_json()["equivalence"]
    assert set(eq) == {"margin", "p_value", "ci_low", "ci_high", "shown"}
    assert eq["shown"] is True and eq["margin"] == 1.0
    assert math.isclose(eq["p_value"], p_ref, rel_tol=1e-10)
    # the 1 − 2·alpha t-interval (scipy.stats.ttest_1samp(...).confidence_interval(0.90))
    ci = scipy.stats.ttest_1samp(values, 500.0).confidence_interval(0.90)
    assert math.isclose(eq["ci_low"], ci.low, rel_tol=1e-10) and math.isclose(eq["ci_high"], ci.high, rel_tol=1e-10)


def test_too_few_units_to_show_it_is_review_naming_the_n_that_would():
    values = normal_lot(500.4, 1.0, 6)
    v = evaluate(lot(values), rule())
    p_ref = DescrStatsW(np.array(values)).ttost_mean(499.0, 501.0)[0]       # statsmodels
    assert p_ref >= 0.05                      # statsmodels does not show it either
    assert v.verdict == "review" and v.to_json()["equivalence"]["shown"] is False
    assert math.isclose(v.to_json()["equivalence"]["p_value"], p_ref, rel_tol=1e-10)
    assert "not shown within ±1 g" in v.reason and "too few units or too much spread" in v.reason
    # the n it names: at the lot's mean and sd, scipy's t gives a (1 − 2α) interval inside ±1 g at that n
    # and not at n − 1
    n_named = int(v.reason.split("about ")[1].split(" units")[0])
    mean, sd = float(np.mean(values)), float(np.std(values, ddof=1))

    def inside(n: int) -> bool:
        half = scipy.stats.t.ppf(0.95, n - 1) * sd / math.sqrt(n)
        return mean - half > 499.0 and mean + half < 501.0
    assert inside(n_named) and not inside(n_named - 1)


def test_a_lot_shown_off_target_is_still_held():
    values = normal_lot(502.5, 0.8, 30)
    v = evaluate(lot(values), rule())
    assert scipy.stats.ttest_1samp(values, 500.0).pvalue < 0.05             # scipy: shown off target
    assert v.verdict == "hold" and v.to_json()["equivalence"] is None


def test_the_default_release_keeps_todays_behaviour():
    values = normal_lot(500.2, 0.8, 6)
    v = evaluate(lot(values), Rule.adhoc(name="oat-500", target=500.0, unit="g"))
    assert v.verdict == "pass" and v.to_json()["equivalence"] is None


def test_known_sd_uses_the_z_form():
    values = normal_lot(500.1, 0.8, 25)
    v = evaluate(lot(values), rule(known_sd=0.8))
    se = 0.8 / math.sqrt(25)
    mean = float(np.mean(values))
    # two one-sided z-tests with scipy.stats.norm: the larger of the two one-sided p-values
    p_ref = max(scipy.stats.norm.sf((mean - 499.0) / se), scipy.stats.norm.cdf((mean - 501.0) / se))
    eq = v.to_json()["equivalence"]
    assert v.verdict == "pass" and eq["shown"] is True
    assert math.isclose(eq["p_value"], p_ref, rel_tol=1e-10)


@pytest.mark.parametrize("body, key", [
    ('release = "equivalence"\n', "margin"),
    ("margin = 1.0\n", "margin"),
    ('release = "equivalence"\nmargin = -1.0\n', "margin"),
    ('release = "same"\nmargin = 1.0\n', "release"),
])
def test_release_and_margin_are_validated(tmp_path, body, key):
    p = tmp_path / "r.toml"
    p.write_text('name = "r"\ntarget = 500.0\nunit = "g"\n' + body, encoding="utf-8")
    with pytest.raises(RuleError) as err:
        Rule.from_file(p)
    assert err.value.key == key and "r.toml" in str(err.value)
