"""Giveaway of a lot (mean − nominal, or − target; × n; cost), and of several lots together."""

from __future__ import annotations

import math

import pytest

from monitor.giveaway import Giveaway, giveaway_of, total_giveaway

# All expected values below: arithmetic from the definition (per_pack = mean − nominal, or mean −
# target when the rule has no nominal; total = per_pack × n; cost = total × cost per unit), worked by hand.


def test_against_nominal_when_the_rule_has_one() -> None:
    g = giveaway_of(503.5, 40, nominal=500.0, target=502.0)
    assert g is not None
    assert g.per_pack == pytest.approx(3.5)          # 503.5 − 500
    assert g.total == pytest.approx(140.0)           # 3.5 × 40
    assert g.cost is None and g.currency is None
    assert g.to_json() == {"per_pack": pytest.approx(3.5), "total": pytest.approx(140.0)}


def test_against_target_without_nominal() -> None:
    g = giveaway_of(1003.0, 60, nominal=None, target=1004.0)
    assert g is not None
    assert g.per_pack == pytest.approx(-1.0)         # 1003 − 1004: under-filled is negative
    assert g.total == pytest.approx(-60.0)


def test_cost_and_currency_only_with_a_cost_per_unit() -> None:
    g = giveaway_of(502.0, 120, nominal=500.0, target=502.0, cost_per_unit=0.0042, currency="EUR")
    assert g is not None
    assert g.total == pytest.approx(240.0)           # 2 g × 120 packs
    assert g.cost == pytest.approx(1.008)            # 240 g × 0.0042 EUR/g
    assert g.to_json() == {"per_pack": pytest.approx(2.0), "total": pytest.approx(240.0),
                           "cost": pytest.approx(1.008), "currency": "EUR"}
    no_cost = giveaway_of(502.0, 120, nominal=500.0, target=502.0, currency="EUR")
    assert no_cost is not None and "cost" not in no_cost.to_json() and no_cost.currency is None


@pytest.mark.parametrize("mean", [None, math.nan, math.inf, -math.inf])
def test_unknown_mean_gives_none(mean: float | None) -> None:
    assert giveaway_of(mean, 10, nominal=500.0, target=502.0) is None


def test_n_zero_is_a_zero_total_not_nan() -> None:
    g = giveaway_of(501.0, 0, nominal=500.0, target=502.0, cost_per_unit=0.01, currency="EUR")
    assert g is not None
    assert g.total == 0.0 and not math.copysign(1.0, g.total) < 0
    assert g.cost == 0.0


@pytest.mark.parametrize("n", [-1, 2.0, True])
def test_bad_n_is_refused(n: object) -> None:
    with pytest.raises(ValueError, match="n must be"):
        giveaway_of(501.0, n, nominal=500.0, target=502.0)  # type: ignore[arg-type]


def test_non_finite_reference_or_cost_is_refused() -> None:
    with pytest.raises(ValueError, match="nominal"):
        giveaway_of(501.0, 3, nominal=math.nan, target=502.0)
    with pytest.raises(ValueError, match="target"):
        giveaway_of(501.0, 3, nominal=None, target=math.inf)
    with pytest.raises(ValueError, match="cost_per_unit"):
        giveaway_of(501.0, 3, nominal=500.0, target=502.0, cost_per_unit=math.nan)


def test_the_object_is_frozen() -> None:
    g = Giveaway(per_pack=1.0, total=2.0)
    with pytest.raises(AttributeError):
        g.total = 3.0  # type: ignore[misc]


def test_total_of_lots_weights_by_packs_and_skips_unknown() -> None:
    a = giveaway_of(502.0, 100, nominal=500.0, target=502.0, cost_per_unit=0.5, currency="EUR")   # +200 g
    b = giveaway_of(499.0, 300, nominal=500.0, target=502.0, cost_per_unit=0.5, currency="EUR")   # −300 g
    total, unknown = total_giveaway([(a, 100), (b, 300), (None, 50)])
    assert unknown == 1
    assert total is not None
    assert total.total == pytest.approx(-100.0)      # 200 − 300
    assert total.per_pack == pytest.approx(-0.25)    # −100 g over 400 packs
    assert total.cost == pytest.approx(-50.0) and total.currency == "EUR"


def test_total_drops_cost_when_currencies_differ_or_a_lot_has_none() -> None:
    a = giveaway_of(501.0, 10, nominal=500.0, target=502.0, cost_per_unit=1.0, currency="EUR")
    b = giveaway_of(501.0, 10, nominal=500.0, target=502.0, cost_per_unit=1.0, currency="GBP")
    c = giveaway_of(501.0, 10, nominal=500.0, target=502.0)
    assert total_giveaway([(a, 10), (b, 10)])[0].cost is None  # type: ignore[union-attr]
    assert total_giveaway([(a, 10), (c, 10)])[0].cost is None  # type: ignore[union-attr]


def test_total_of_nothing_is_none() -> None:
    assert total_giveaway([]) == (None, 0)
    assert total_giveaway([(None, 5)]) == (None, 1)


def test_total_sums_without_cancellation_loss() -> None:
    # 1e16 + 1 − 1e16 in float64 naive left-to-right summation gives 0; the exact sum is 1
    # (IEEE 754 double precision: 1 is below half an ulp of 1e16).
    lots = [(Giveaway(per_pack=1e16, total=1e16), 1), (Giveaway(per_pack=1.0, total=1.0), 1),
            (Giveaway(per_pack=-1e16, total=-1e16), 1)]
    total, _ = total_giveaway(lots)
    assert total is not None and total.total == 1.0
