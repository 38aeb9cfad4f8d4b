"""Average-quantity screen: TNE table, rounding, unit conversion and decimal-exact limits against published texts.

Sources read for these checks (stored public copies):
- Council Directive 76/211/EEC Annex I 2.4 (TNE table, 5 g/mL to 10 kg/L), Annex I 1.3 (no pack beyond 2·TNE).
- gov.uk "Weights and measures: the law — packaged goods" (the UK table under SI 2006/659: 10 000 to 15 000
  g/mL → 150, more than 15 000 → 1 %; percentages rounded up to the nearest 0.1 g or mL).
- Fertigpackungsverordnung §9(3) (same table to 10 kg; "auf 0,1 Gramm oder 0,1 Milliliter aufzurunden").
- New Zealand Weights and Measures Regulations 1999, Schedule 7A Table 2 (same values above 10 kg).
- SI 2006/659 Schedule 2 ¶3.1–3.2 (T1 = Qn − TNE is the minimum acceptable content; "less than" it is
  defective).
- NIST SP 811 Appendix B: 1 oz (avoirdupois) = 28.349523125 g; 1 US fl oz = 29.5735295625 mL.
OIML R 87 itself was not found in the stored copies; nothing here relies on it.
"""

from __future__ import annotations

from decimal import Decimal

import numpy as np
import pytest

from monitor.quantity import limits, screen_average_quantity, tolerable_negative_error

OZ_G = 28.349523125            # NIST SP 811 App. B
FLOZ_ML = 29.5735295625        # NIST SP 811 App. B (US fluid ounce)


@pytest.mark.parametrize("nominal,tne", [
    # Directive 76/211/EEC Annex I 2.4; % values rounded UP to 0.1 g/mL (gov.uk packaged goods page; FPackV §9(3))
    (5, 0.5),          # 5 to 50: 9 % -> 0.45, rounded up
    (30, 2.7),         # 9 % exactly 2.7: no rounding
    (49.9, 4.5),       # 9 % = 4.491 -> 4.5
    (50, 4.5),         # edge 5-50 / 50-100 (9 % of 50 = 4.5 = the absolute value)
    (51, 4.5),         # 50 to 100: 4.5 g
    (100, 4.5),        # edge 50-100 / 100-200 (4.5 % of 100 = 4.5)
    (101, 4.6),        # 4.5 % = 4.545 -> 4.6
    (125, 5.7),        # 4.5 % = 5.625 -> 5.7
    (150, 6.8),        # 4.5 % = 6.75 -> 6.8
    (200, 9.0),        # edge 100-200 / 200-300 (4.5 % of 200 = 9)
    (201, 9.0),        # 200 to 300: 9 g
    (300, 9.0),        # edge 200-300 / 300-500 (3 % of 300 = 9)
    (301, 9.1),        # 3 % = 9.03 -> 9.1
    (330, 9.9),        # 3 % = 9.9 exactly
    (453.6, 13.7),     # 3 % = 13.608 -> 13.7
    (500, 15.0),       # edge 300-500 / 500-1000 (3 % of 500 = 15)
    (750, 15.0),       # 500 to 1000: 15 g
    (1000, 15.0),      # edge 500-1000 / 1000-10000 (1.5 % of 1000 = 15)
    (1001, 15.1),      # 1.5 % = 15.015 -> 15.1
    (1500, 22.5),      # 1.5 % exactly
    (10000, 150.0),    # end of the Directive's table: 1.5 % of 10 000
    # beyond 10 kg: UK table (gov.uk packaged goods page), same in NZ regs 1999 Sch. 7A Table 2
    (10001, 150.0),    # 10 000 to 15 000: 150 g
    (15000, 150.0),    # edge (1 % of 15 000 = 150)
    (15001, 150.1),    # more than 15 000: 1 % = 150.01 -> 150.1
    (25000, 250.0),    # 1 % of 25 000; gov.uk: packaged goods are 5 g to 25 kg
])
def test_tne_table(nominal: float, tne: float) -> None:
    """TNE by nominal quantity in g equals the published table, percentages rounded up to 0.1 g."""
    assert tolerable_negative_error(nominal, "g") == tne
    assert tolerable_negative_error(nominal, "mL") == tne   # the table is "in grams or millilitres"


@pytest.mark.parametrize("nominal,unit", [(4.9, "g"), (25001, "g"), (0.0049, "kg"), (26, "L"), (4999, "mg")])
def test_outside_the_table_is_not_extrapolated(nominal: float, unit: str) -> None:
    """The published tables cover 5 g/mL (Directive Annex I 2.4) to 25 kg/L (gov.uk packaged goods page)."""
    with pytest.raises(ValueError, match="outside the published TNE table"):
        tolerable_negative_error(nominal, unit)
    r = screen_average_quantity(np.full(10, nominal), nominal, unit)
    assert r.needs_review and r.passed is None and "outside the published TNE table" in r.reason


def test_above_10_kg_names_its_source() -> None:
    """Beyond the Directive's 10 kg the TNE comes from the UK table, and the screen says so."""
    r = screen_average_quantity(np.full(10, 12.2), 12.0, "kg")
    assert r.tne == pytest.approx(0.150, rel=1e-12)          # 150 g: gov.uk packaged goods page (10-15 kg)
    assert "UK table" in r.reason and "not the EU Directive" in r.reason
    assert "UK table" not in screen_average_quantity(np.full(10, 10.2), 10.0, "kg").reason


@pytest.mark.parametrize("nominal,unit,tne_rule_unit", [
    (5, "L", 0.075),          # 5000 mL: 1.5 % = 75 mL (Directive Annex I 2.4) -> 0.075 L
    (1, "L", 0.015),          # 1000 mL: 15 mL
    (0.25, "L", 0.009),       # 250 mL: 9 mL
    (1, "kg", 0.015),         # 1000 g: 15 g
    (2.5, "kg", 0.0375),      # 2500 g: 1.5 % = 37.5 g
    (12, "kg", 0.15),         # 12 000 g: 150 g (UK table, gov.uk)
    (5000, "mg", 500),        # 5 g: 9 % = 0.45 -> 0.5 g = 500 mg
    (16, "oz", 13.7 / OZ_G),  # 16 oz = 453.59237 g (NIST SP 811): 3 % = 13.6077711 -> 13.7 g
    (1, "fl oz", 2.7 / FLOZ_ML),     # 29.5735295625 mL (NIST SP 811): 9 % = 2.6616... -> 2.7 mL
    (12, "fl oz", 10.7 / FLOZ_ML),   # 354.88235475 mL: 3 % = 10.6465 -> 10.7 mL
])
def test_tne_is_looked_up_in_g_or_ml_and_converted_back(nominal: float, unit: str, tne_rule_unit: float) -> None:
    """The nominal is converted to g or mL, looked up in the table, and the TNE converted back to the unit."""
    assert tolerable_negative_error(nominal, unit) == pytest.approx(tne_rule_unit, rel=1e-12)


def test_limits_are_exact_decimals() -> None:
    """T1 = Qn − TNE and T2 = Qn − 2·TNE (SI 2006/659 Sch. 2 ¶3.1; Directive Annex I 1.3) as exact decimals."""
    lim = limits(453.6, "g")
    assert (lim.tne_base, lim.t1_base, lim.t2_base) == (Decimal("13.7"), Decimal("439.9"), Decimal("426.2"))
    lim = limits(29.6, "mL")          # 9 % of 29.6 = 2.664 -> 2.7 mL (Directive Annex I 2.4; rounding: gov.uk)
    assert (lim.tne_base, lim.t1_base, lim.t2_base) == (Decimal("2.7"), Decimal("26.9"), Decimal("24.2"))
    assert (lim.t1, lim.t2) == (26.9, 24.2)


@pytest.mark.parametrize("values,unit,nominal,below_t1,below_t2", [
    # 1 lb labelled 453.6 g: TNE 13.7, T1 439.9, T2 426.2 (Directive Annex I 2.4; SI 2006/659 Sch. 2 ¶3.2:
    # "less than" the minimum is defective, so a pack exactly at a limit is not below it)
    ([426.2], "g", 453.6, 1, 0),
    ([426.1], "g", 453.6, 1, 1),
    ([439.9], "g", 453.6, 0, 0),
    ([439.8], "g", 453.6, 1, 0),
    # the same product written in kg: 0.4262 kg is at T2, not below it
    ([0.4262], "kg", 0.4536, 1, 0),
    ([0.4399], "kg", 0.4536, 0, 0),
    # values that reached kg through a binary unit conversion (426.2 g * 0.001) keep their printed value
    ([426.2 * 0.001, 439.9 * 0.001], "kg", 0.4536, 1, 0),
    # 29.6 mL (1 US fl oz rounded): TNE 2.7, T1 26.9, T2 24.2
    ([26.9, 24.2], "mL", 29.6, 1, 0),
    ([26.8, 24.1], "mL", 29.6, 2, 1),
])
def test_decimal_boundaries(values: list[float], unit: str, nominal: float, below_t1: int, below_t2: int) -> None:
    """A pack exactly at T1 or T2, at the export's printed resolution, is not below it."""
    x = np.r_[np.asarray(values), np.full(60, nominal * 1.01)]
    r = screen_average_quantity(x, nominal, unit)
    assert (r.below_t1, r.below_t2) == (below_t1, below_t2)


def test_mean_exactly_at_nominal_is_met() -> None:
    """Full inspection: the mean must be at least Qn (Directive Annex I 1.1); a mean of exactly Qn meets it,
    even where the binary floating-point mean comes out a hair below."""
    x = np.array([0.1993, 0.2007] * 24 + [0.2])       # 49 packs of a 0.2 kg product, mean exactly 0.2 kg
    assert float(np.mean(x)) < 0.2                     # binary floating point says "below"
    assert screen_average_quantity(x, 0.2, "kg").mean_ok is True
    assert screen_average_quantity(x - 0.0001, 0.2, "kg").mean_ok is False


def test_json_has_exactly_the_documented_keys() -> None:
    """JSON average_quantity carries exactly the keys issue 10 lists."""
    r = screen_average_quantity(np.full(48, 503.1), 500.0, "g")
    assert set(r.to_json()) == {"nominal", "tne", "t1", "t2", "inspection", "n", "mean", "mean_limit", "mean_ok",
                                "below_t1", "below_t1_allowed", "below_t2", "plan", "passed", "reason"}
    j = r.to_json()
    # 500 g: TNE 15 g (Directive Annex I 2.4), T1 485, T2 470
    assert (j["nominal"], j["tne"], j["t1"], j["t2"], j["plan"], j["inspection"]) == (500.0, 15.0, 485.0, 470.0,
                                                                                     None, "full")


def test_reason_never_prints_a_mean_equal_to_the_limit_it_misses() -> None:
    """A mean a hair below Qn is shown with enough decimals to be visibly below it (common practice, no source)."""
    x = 249.996 + np.tile([2.0, -2.0], 24)
    r = screen_average_quantity(x, 250.0, "mL")
    assert r.mean_ok is False and "mean 249.996 mL < nominal 250" in r.reason


def test_json_is_plain_json() -> None:
    """The JSON object serialises with the standard library (bools, ints, floats, None only)."""
    import json

    for kw in ({}, {"inspection": "sample", "batch_size": 400}, {"inspection": "sample", "batch_size": 4000}):
        r = screen_average_quantity(np.full(50, 503.1), 500.0, "g", **kw)   # type: ignore[arg-type]
        assert json.loads(json.dumps(r.to_json())) == r.to_json()
