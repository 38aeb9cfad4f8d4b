"""Two one-sided tests of equivalence against statsmodels, scipy, Schuirmann's interval rule and NIST data."""

import dataclasses
import doctest
import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.weightstats import DescrStatsW, ztost

from monitor.stats import equivalence
from monitor.stats.equivalence import (
    Equivalence,
    n_to_show,
    not_shown_reason,
    tost_t,
    tost_t_arrays,
    tost_z,
    tost_z_arrays,
)

# Source: NIST Statistical Reference Datasets, univariate summary statistics, dataset "Mavro" (n = 50;
# certified mean 2.00185600000000, certified sd 0.000429123454003053).
MAVRO = np.array([
    2.00180, 2.00170, 2.00180, 2.00190, 2.00180, 2.00170, 2.00150, 2.00140, 2.00150, 2.00150,
    2.00170, 2.00180, 2.00180, 2.00190, 2.00190, 2.00210, 2.00200, 2.00160, 2.00140, 2.00130,
    2.00130, 2.00150, 2.00150, 2.00160, 2.00150, 2.00140, 2.00130, 2.00140, 2.00150, 2.00140,
    2.00150, 2.00160, 2.00150, 2.00160, 2.00190, 2.00200, 2.00200, 2.00210, 2.00220, 2.00230,
    2.00240, 2.00250, 2.00270, 2.00260, 2.00260, 2.00260, 2.00270, 2.00260, 2.00250, 2.00240])
# Source: NIST StRD univariate dataset "NumAcc1" (n = 3; certified mean 10000002, certified sd 1).
NUMACC1 = np.array([10000001.0, 10000003.0, 10000002.0])
# Our own invented scenario: net fills (g) of a Brackenfield OAT-500 lot, target 502 g.
OAT_500 = np.array([501.8, 502.6, 503.1, 501.2, 502.9, 501.7, 502.2, 503.4, 501.9, 502.5, 502.0, 501.4])

# (name, data, target, margins to try)
DATASETS = [
    ("Mavro", MAVRO, 2.0019, (0.0001, 0.0002, 0.0005)),
    ("NumAcc1", NUMACC1, 10000002.5, (1.0, 2.0, 5.0)),
    ("OAT-500", OAT_500, 502.0, (0.2, 0.5, 1.0)),
]
ALPHAS = (0.05, 0.01, 0.1, 0.25)
REL = 1e-10


def _summary(x):
    return x.size, float(np.mean(x)), float(np.std(x, ddof=1))


def test_nist_summaries_are_the_certified_values():
    """The copied NIST values give the certified mean and sd (NIST StRD certificates), so the data is intact."""
    assert np.mean(MAVRO) == pytest.approx(2.00185600000000, rel=1e-14)
    assert np.std(MAVRO, ddof=1) == pytest.approx(0.000429123454003053, rel=1e-9)
    assert np.mean(NUMACC1) == 10000002.0
    assert np.std(NUMACC1, ddof=1) == pytest.approx(1.0, rel=1e-14)


@pytest.mark.parametrize("alpha", ALPHAS)
@pytest.mark.parametrize("name,x,target,margins", DATASETS, ids=[d[0] for d in DATASETS])
def test_t_form_matches_statsmodels_ttost_mean(name, x, target, margins, alpha):
    """p, both one-sided p's, both statistics and df equal statsmodels DescrStatsW.ttost_mean (reference library)."""
    n, mean, sd = _summary(x)
    for margin in margins:
        p, (t1, p1, df1), (t2, p2, df2) = DescrStatsW(x).ttost_mean(target - margin, target + margin)
        r = tost_t(n, mean, sd, target, margin, alpha)
        assert r.p_value == pytest.approx(p, rel=REL)
        assert r.p_lower == pytest.approx(p1, rel=REL)
        assert r.p_upper == pytest.approx(p2, rel=REL)
        assert r.statistic_lower == pytest.approx(t1, rel=REL)
        assert r.statistic_upper == pytest.approx(t2, rel=REL)
        assert r.df == df1 == df2
        assert r.shown == (p < alpha)
        assert (r.test, r.n, r.margin, r.target, r.alpha) == ("t", n, margin, target, alpha)


@pytest.mark.parametrize("name,x,target,margins", DATASETS, ids=[d[0] for d in DATASETS])
def test_z_form_matches_statsmodels_ztost(name, x, target, margins):
    """With known_sd = the sample sd the z form equals statsmodels ztost and DescrStatsW.ztost_mean (reference)."""
    n, mean, sd = _summary(x)
    for margin in margins:
        p, (z1, p1), (z2, p2) = ztost(x, target - margin, target + margin)
        q, (w1, q1), (w2, q2) = DescrStatsW(x).ztost_mean(target - margin, target + margin)
        r = tost_z(n, mean, sd, target, margin, 0.05)
        for mine, a, b in ((r.p_value, p, q), (r.p_lower, p1, q1), (r.p_upper, p2, q2),
                           (r.statistic_lower, z1, w1), (r.statistic_upper, z2, w2)):
            assert mine == pytest.approx(a, rel=REL)
            assert mine == pytest.approx(b, rel=REL)
        assert r.df is None and r.test == "z"


def test_z_form_with_known_sd_from_the_normal_distribution():
    """A known process sd: p's from scipy.stats.norm with se = known_sd/√n (reference library)."""
    n, mean, known_sd, target, margin, alpha = 40, 341.3, 2.5, 340.0, 2.0, 0.05   # invented JAM-340 lot
    se = known_sd / math.sqrt(n)
    p1 = stats.norm.sf((mean - (target - margin)) / se)
    p2 = stats.norm.cdf((mean - (target + margin)) / se)
    r = tost_z(n, mean, known_sd, target, margin, alpha)
    assert r.p_lower == pytest.approx(p1, rel=REL)
    assert r.p_upper == pytest.approx(p2, rel=REL)
    assert r.p_value == pytest.approx(max(p1, p2), rel=REL)
    z = stats.norm.ppf(1 - alpha)
    assert r.ci_low == pytest.approx(mean - z * se, rel=REL)
    assert r.ci_high == pytest.approx(mean + z * se, rel=REL)
    assert r.shown == (max(p1, p2) < alpha)


@pytest.mark.parametrize("alpha", ALPHAS)
@pytest.mark.parametrize("name,x,target,margins", DATASETS, ids=[d[0] for d in DATASETS])
def test_interval_is_the_scipy_one_minus_two_alpha_interval(name, x, target, margins, alpha):
    """ci_low/ci_high equal scipy.stats.ttest_1samp(...).confidence_interval(1 − 2·alpha) (reference library)."""
    n, mean, sd = _summary(x)
    ci = stats.ttest_1samp(x, target).confidence_interval(1 - 2 * alpha)
    r = tost_t(n, mean, sd, target, margins[0], alpha)
    assert r.ci_low == pytest.approx(ci.low, rel=REL)
    assert r.ci_high == pytest.approx(ci.high, rel=REL)


def test_shown_exactly_when_the_interval_lies_inside_the_margin():
    """Schuirmann (1987), the two one-sided tests procedure: the TOST at alpha rejects non-equivalence exactly
    when the (1 − 2·alpha) t-interval lies inside target ± margin (recalled from memory); checked on 2000
    random lots against scipy's interval and statsmodels' p-value."""
    rng = np.random.default_rng(20261202)
    inside_seen = outside_seen = 0
    for _ in range(2000):
        n = int(rng.integers(2, 60))
        x = rng.normal(500.0 + rng.normal(0, 0.6), rng.uniform(0.3, 3.0), n)
        margin, alpha = float(rng.uniform(0.2, 2.0)), float(rng.choice(ALPHAS))
        ci = stats.ttest_1samp(x, 500.0).confidence_interval(1 - 2 * alpha)
        inside = (500.0 - margin < ci.low) and (ci.high < 500.0 + margin)
        p = DescrStatsW(x).ttost_mean(500.0 - margin, 500.0 + margin)[0]
        if abs(p - alpha) < 1e-9:          # too close to the boundary for rounding to settle
            continue
        r = tost_t(*_summary(x), 500.0, margin, alpha)
        assert r.shown == inside == (p < alpha)
        inside_seen += inside
        outside_seen += not inside
    assert inside_seen > 100 and outside_seen > 100


def test_p_value_at_the_interval_bound_equals_alpha():
    """Identity: a margin that puts target − margin on the lower 1 − 2α bound gives p_lower = alpha (scipy t)."""
    n, mean, sd, alpha = 25, 342.4, 1.8, 0.05
    bound = mean - stats.t.ppf(1 - alpha, n - 1) * sd / math.sqrt(n)     # scipy.stats.t quantile
    r = tost_t(n, mean, sd, target=mean, margin=mean - bound, alpha=alpha)
    assert r.p_lower == pytest.approx(alpha, rel=1e-9)
    assert r.p_upper == pytest.approx(alpha, rel=1e-9)      # symmetric: target = mean


def test_arrays_match_statsmodels_lot_by_lot():
    """tost_t_arrays on 300 lots at once equals statsmodels ttost_mean per lot; tost_z_arrays equals ztost."""
    rng = np.random.default_rng(77)
    x = rng.normal(250.0, 1.5, size=(300, 14)) + rng.normal(0, 0.5, size=(300, 1))
    n = np.full(300, 14)
    mean, var = x.mean(axis=1), x.var(axis=1, ddof=1)
    r = tost_t_arrays(n, mean, var, 250.0, 0.8, 0.05)
    z = tost_z_arrays(n, mean, 1.5, 250.0, 0.8, 0.05)
    se_z = 1.5 / math.sqrt(14)
    for i in range(300):
        p, (t1, p1, _), (t2, p2, _) = DescrStatsW(x[i]).ttost_mean(249.2, 250.8)
        assert r["p_value"][i] == pytest.approx(p, rel=REL)
        assert r["p_lower"][i] == pytest.approx(p1, rel=REL)
        assert r["p_upper"][i] == pytest.approx(p2, rel=REL)
        assert r["statistic_lower"][i] == pytest.approx(t1, rel=REL)
        assert r["statistic_upper"][i] == pytest.approx(t2, rel=REL)
        assert bool(r["shown"][i]) == (p < 0.05)
        pz = max(stats.norm.sf((mean[i] - 249.2) / se_z), stats.norm.cdf((mean[i] - 250.8) / se_z))
        assert z["p_value"][i] == pytest.approx(pz, rel=REL)
    assert 0 < int(r["shown"].sum()) < 300
    assert r["df"].tolist() == [13.0] * 300


def test_arrays_degenerate_lots_follow_location_conventions():
    """n < 2 gives NaN and not shown; sd 0 gives the limit: shown strictly inside, not shown outside."""
    r = tost_t_arrays(np.array([1, 5, 5, 5]), np.array([500.0, 500.3, 501.5, 501.0]),
                      np.array([np.nan, 0.0, 0.0, 0.0]), 500.0, 1.0)
    assert math.isnan(r["p_value"][0]) and not r["shown"][0]
    assert r["p_value"][1] == 0.0 and r["shown"][1]
    assert r["p_value"][2] == 1.0 and not r["shown"][2]
    assert math.isnan(r["p_value"][3]) and not r["shown"][3]      # on the bound exactly: 0/0


def test_scalar_one_lot_equals_the_batch():
    """A lot judged alone gives the same numbers as in a batch (same code path)."""
    a = tost_t(12, *_summary(OAT_500)[1:], 502.0, 0.5, 0.05)
    b = tost_t_arrays(np.array([7, 12, 30]), np.array([501.0, a.mean, 503.0]),
                      np.array([1.0, _summary(OAT_500)[2] ** 2, 4.0]), 502.0, 0.5, 0.05)
    assert b["p_value"][1] == a.p_value and b["ci_low"][1] == a.ci_low and b["ci_high"][1] == a.ci_high


@pytest.mark.parametrize("bad", [dict(margin=0.0), dict(margin=-1.0), dict(margin=math.nan), dict(margin=math.inf),
                                 dict(alpha=0.0), dict(alpha=0.6), dict(target=math.nan), dict(n=1), dict(sd=0.0),
                                 dict(sd=math.nan), dict(mean=math.inf), dict(sd=-1.0)])
def test_bad_input_raises_value_error(bad):
    """margin <= 0 / not finite, alpha outside (0, 0.5], n < 2, sd not finite > 0, non-finite mean: ValueError."""
    args = dict(n=10, mean=500.0, sd=1.0, target=500.0, margin=1.0, alpha=0.05) | bad
    with pytest.raises(ValueError):
        tost_t(**args)


def test_z_bad_input_raises_value_error():
    """The z form rejects known_sd <= 0, n < 1 and margin <= 0."""
    for kw in (dict(known_sd=0.0), dict(n=0), dict(margin=0.0), dict(known_sd=math.nan)):
        args = dict(n=10, mean=500.0, known_sd=1.0, target=500.0, margin=1.0) | kw
        with pytest.raises(ValueError):
            tost_z(**args)
    with pytest.raises(ValueError):
        tost_t_arrays(np.array([5]), np.array([1.0]), np.array([1.0]), 0.0, -0.5)


def test_to_json_has_exactly_the_verdict_keys_and_the_result_is_frozen():
    """to_json gives margin, p_value, ci_low, ci_high, shown (the verdict's equivalence object); frozen."""
    r = tost_t(16, 500.1, 2.0, 500.0, 1.0)
    j = r.to_json()
    assert list(j) == ["margin", "p_value", "ci_low", "ci_high", "shown"]
    assert j["margin"] == 1.0 and j["shown"] is True and j["p_value"] == r.p_value
    assert isinstance(r, Equivalence) and (r.low, r.high) == (499.0, 501.0)
    with pytest.raises(dataclasses.FrozenInstanceError):
        r.shown = False  # type: ignore[misc]


def _shown_scipy_t(n, mean, sd, target, margin, alpha):
    se = sd / math.sqrt(n)                     # scipy.stats.t, independent of the code under test
    return max(stats.t.sf((mean - target + margin) / se, n - 1), stats.t.cdf((mean - target - margin) / se, n - 1)) \
        < alpha


def _shown_scipy_z(n, mean, sd, target, margin, alpha):
    se = sd / math.sqrt(n)
    return max(stats.norm.sf((mean - target + margin) / se), stats.norm.cdf((mean - target - margin) / se)) < alpha


@pytest.mark.parametrize("mean,sd,target,margin,alpha", [
    (500.4, 2.0, 500.0, 1.0, 0.05), (499.1, 2.0, 500.0, 1.0, 0.05), (502.0, 0.8, 502.0, 0.3, 0.01),
    (340.2, 3.1, 340.0, 0.5, 0.1), (2.0019, 0.000429123454003053, 2.0019, 0.0001, 0.05),
    (10000002.0, 1.0, 10000002.5, 2.0, 0.05), (500.0, 1.0, 500.0, 20.0, 0.05), (500.95, 1.0, 500.0, 1.0, 0.05),
    (500.0, 10.0, 500.0, 0.05, 0.25)])
def test_n_to_show_is_the_first_n_shown_by_scipy(mean, sd, target, margin, alpha):
    """n_to_show: the TOST computed with scipy.stats.t (norm for known sd) fails at n − 1 and passes at n."""
    n = n_to_show(mean, sd, target, margin, alpha)
    assert n is not None and n >= 2
    assert _shown_scipy_t(n, mean, sd, target, margin, alpha)
    if n > 2:
        assert not _shown_scipy_t(n - 1, mean, sd, target, margin, alpha)
    m = n_to_show(mean, math.nan, target, margin, alpha, known_sd=sd)
    assert m is not None and m >= 1 and m <= n
    assert _shown_scipy_z(m, mean, sd, target, margin, alpha)
    if m > 1:
        assert not _shown_scipy_z(m - 1, mean, sd, target, margin, alpha)


def test_n_to_show_none_outside_the_margin_and_smallest_with_no_spread():
    """No n shows a mean at or beyond the margin (None); sd 0 inside the margin: the smallest lot (2; z: 1)."""
    assert n_to_show(501.0, 1.0, 500.0, 1.0, 0.05) is None
    assert n_to_show(498.5, 1.0, 500.0, 1.0, 0.05) is None
    assert n_to_show(500.2, 0.0, 500.0, 1.0, 0.05) == 2
    assert n_to_show(500.0, 1.0, 500.0, 100.0, 0.05) == 2
    assert n_to_show(500.0, 1.0, 500.0, 100.0, 0.05, known_sd=1.0) == 1
    assert n_to_show(500.0, 1e6, 500.0, 1e-3, 0.05) is None          # beyond MAX_SHOW_N units
    for bad in (dict(margin=0.0), dict(mean=math.nan), dict(sd=-1.0), dict(sd=math.inf), dict(alpha=1.0)):
        args = dict(mean=500.0, sd=1.0, target=500.0, margin=1.0, alpha=0.05) | bad
        with pytest.raises(ValueError):
            n_to_show(**args)
    with pytest.raises(ValueError):
        n_to_show(500.0, 1.0, 500.0, 1.0, 0.05, known_sd=0.0)


def test_not_shown_reason_wording():
    """The review reason names margin, unit, target and the units that would show it (our own wording)."""
    assert not_shown_reason(0.5, 502.0, "g", 48) == (
        "not shown within ±0.5 g of target 502 g: too few units or too much spread; "
        "about 48 units at this sd would show it")
    assert not_shown_reason(2.25, 340.0, "mL", 1, known_sd=True).endswith("about 1 unit at the known sd would show it")
    assert not_shown_reason(1.0, 500.0, "g", None) == (
        "not shown within ±1 g of target 500 g: no number of units would show it at this mean and sd")


def test_docstring_examples():
    """The worked examples in monitor.stats.equivalence run and print what they say."""
    result = doctest.testmod(equivalence, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0
