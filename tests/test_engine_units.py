"""Units in the engine: values without a unit say so; a lot in the wrong unit is a review, never judged."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from monitor.engine import evaluate, evaluate_many
from monitor.lot import LotData, LotKey, LotSummary
from monitor.rulebook import NormalityRule, Rule

pytestmark = pytest.mark.filterwarnings("error")

KEY = LotKey("L4", "OAT-1KG", "K-0007")
# Conversion factors, NIST SP 811 (2008), appendix B.8: 1 oz (avoirdupois) = 28.349523125 g, 1 lb
# (avoirdupois) = 0.45359237 kg, 1 fl oz (US) = 29.5735295625 mL; SI prefixes for mg, kg, L (1 L = 1000 mL).
GRAMS = {"mg": 1e-3, "g": 1.0, "kg": 1000.0, "oz": 28.349523125, "lb": 453.59237}
MILLILITRES = {"mL": 1.0, "L": 1000.0, "fl oz": 29.5735295625}
NOTE = "values carry no unit: taken to be in g, the rule's unit"
OFF = NormalityRule(enabled=False)


def fills(mean: float, sd: float, n: int, seed: int = 1) -> np.ndarray:
    return np.random.default_rng(seed).normal(mean, sd, n)


def test_unit_assumed_is_passed_on_and_noted():
    """LotData.unit_assumed reaches Verdict.unit_assumed and JSON, with one short note in the reason."""
    x = fills(1006.0, 2.0, 30)
    v = evaluate(LotData(KEY, values=x, unit_assumed=True), Rule.adhoc(target=1006.0, normality=OFF))
    ref = stats.ttest_1samp(x, 1006.0)                          # reference: scipy; the note changes no number
    assert v.unit_assumed is True and v.to_json()["unit_assumed"] is True
    assert v.reason.count(NOTE) == 1 and v.reason.endswith(NOTE)
    assert v.p_value == pytest.approx(ref.pvalue, rel=1e-10)
    v = evaluate(LotData(KEY, values=x), Rule.adhoc(target=1006.0, normality=OFF))
    assert v.unit_assumed is False and v.to_json()["unit_assumed"] is False and "carry no unit" not in v.reason


def test_unit_assumed_note_on_reviews_and_summaries_too():
    """The note is on every lot whose values carried no unit: a min-n review and a summary lot."""
    v = evaluate(LotData(KEY, values=[1005.0, 1007.0], unit_assumed=True), Rule.adhoc(target=1006.0))
    assert v.verdict == "review" and "only 2 units" in v.reason and NOTE in v.reason and v.unit_assumed
    v = evaluate(LotData(KEY, summary=LotSummary(40, 1005.8, 1.9), unit_assumed=True), Rule.adhoc(target=1006.0))
    assert v.test == "t" and NOTE in v.reason and v.unit_assumed


def _rules(target: float, unit: str) -> list[Rule]:
    return [Rule.adhoc(target=target, unit=unit, alternative=a, known_sd=sd)
            for a in ("two-sided", "less", "greater") for sd in (None, 2.0)]


MIXUPS = [  # (rule unit, target, unit the values were really in, unit the reason must name)
    ("g", 1006.0, "kg", "kg"), ("g", 1006.0, "mg", "mg"), ("g", 1006.0, "oz", "oz"), ("g", 1006.0, "lb", "lb"),
    ("kg", 1.006, "g", "g"), ("kg", 2.5, "lb", "lb"), ("oz", 16.0, "g", "g"), ("oz", 35.2, "lb", "lb"),
    ("mL", 1000.0, "L", "L"), ("mL", 1000.0, "fl oz", "fl oz"), ("L", 1.5, "mL", "mL"),
    ("fl oz", 12.0, "mL", "mL"),
    ("mL", 1000.0, "oz", "oz"),      # a mass unit under a volume rule (density 1): 28.35 is nearer than 29.57
    ("g", 500.0, "L", "kg"),         # kg and L are both 1000 (density 1): the rule's own kind is named
]


def _factor(src: str, dst: str) -> float:
    """value_in_dst = value_in_src * factor, from the NIST SP 811 constants above, density 1 g/mL."""
    base = {**GRAMS, **MILLILITRES}
    return base[src] / base[dst]


@pytest.mark.parametrize("rule_unit,target,true_unit,named", MIXUPS)
def test_unit_mixup_is_a_review_naming_the_likely_unit(rule_unit, target, true_unit, named):
    """Values in another unit than the rule's: review naming that unit, no test, for every alternative, with
    and without known_sd, for values lots and summary lots."""
    x = fills(target * 1.001, target * 0.002, 30) / _factor(true_unit, rule_unit)    # exported in true_unit
    m = float(np.mean(x))
    for lot in (LotData(KEY, values=x, unit=rule_unit),
                LotData(KEY, summary=LotSummary(30, m, float(np.std(x, ddof=1))), unit=rule_unit)):
        for r in _rules(target, rule_unit):
            v = evaluate(lot, r)
            assert v.verdict == "review", (r.alternative, r.known_sd)
            assert v.reason.startswith(f"values look like {named}, not {rule_unit}: mean "), v.reason
            assert f"against target {target:g} {rule_unit}" in v.reason
            assert v.test is None and v.p_value is None and v.statistic is None and v.effect_size is None
            assert v.mean == pytest.approx(m, rel=1e-12)


def test_reason_reads_like_the_issue_example():
    """kg values under a g rule: 'values look like kg, not g: mean 1.006 against target 1006 g' (4 digits)."""
    x = fills(1006.0, 2.0, 30, seed=3) / 1000.0
    v = evaluate(LotData(KEY, values=x), Rule.adhoc(target=1006.0))
    assert v.reason.startswith(f"values look like kg, not g: mean {np.mean(x):.3f} against target 1006 g")


@pytest.mark.parametrize("values", [[1.0051, 1.0069, 1.0062], [1.006] * 8, [1.006]])
def test_mixup_wins_over_small_lots_and_flat_lots(values):
    """A 3-unit, a 1-unit and a flat lot in kg under a g rule still say the unit problem first."""
    v = evaluate(LotData(KEY, values=values), Rule.adhoc(target=1006.0))
    assert v.verdict == "review" and v.reason.startswith("values look like kg, not g")


def test_mixup_lot_gets_no_average_quantity_screen():
    """A nominal rule does not screen a lot whose values are in the wrong unit (the screen would hold it)."""
    x = fills(1006.0, 2.0, 50, seed=4) / 1000.0
    v = evaluate(LotData(KEY, values=x), Rule.adhoc(target=1006.0, nominal=1000.0, normality=OFF))
    assert v.verdict == "review" and v.average_quantity is None and "values look like kg" in v.reason


@pytest.mark.parametrize("ratio", [1.0, 1.04, 0.96, 1.0432, 1 / 1.0432, 0.55, 1.9, 10.0, 1 / 10.0, 200.0])
def test_no_mixup_where_no_single_conversion_explains_the_ratio(ratio):
    """Ratios near 1 (oz vs fl oz 1.0432, g vs mL 1) or far from every factor are judged as usual."""
    x = fills(500.0 * ratio, 1.0, 30, seed=5)
    for unit in ("g", "mL"):
        v = evaluate(LotData(KEY, values=x, unit=unit), Rule.adhoc(target=500.0, unit=unit, normality=OFF))
        assert v.test == "t" and not v.reason.startswith("values look like")


@pytest.mark.parametrize("off", [0.96, 1.04])
def test_mixup_tolerance_is_a_few_percent(off):
    """Within 5 % of the kg factor is a mix-up (a drifting filler in kg is still in kg); 8 % off is not."""
    r = Rule.adhoc(target=1000.0, normality=OFF)
    v = evaluate(LotData(KEY, values=fills(off, 0.002, 30)), r)
    assert v.reason.startswith("values look like kg, not g")
    v = evaluate(LotData(KEY, values=fills(off * (1.08 if off > 1 else 0.92), 0.002, 30)), r)
    assert not v.reason.startswith("values look like")


def test_no_mixup_check_without_a_positive_target_or_a_known_unit():
    """A target of 0 or below, or a lot whose unit is not a known one, skips the check."""
    v = evaluate(LotData(KEY, values=fills(0.001, 0.0001, 20)), Rule.adhoc(target=0.0, normality=OFF))
    assert v.test == "t"
    v = evaluate(LotData(KEY, values=fills(1.0, 0.01, 20), unit=""), Rule.adhoc(target=1000.0, unit="",
                                                                                 normality=OFF))
    assert v.test == "t"


def test_mixup_batch_equals_one_by_one():
    """In a batch mixing good lots, kg lots and mL lots, each Verdict equals the lot judged alone."""
    rng = np.random.default_rng(6)
    lots = []
    for i in range(60):
        x = rng.normal(1006.0, 2.0, int(rng.integers(1, 40)))
        kind = i % 4
        if kind == 1:
            x = x / 1000.0
        lots.append(LotData(LotKey("L4", "OAT-1KG", f"K{i}"), values=x, unit="mL" if kind == 3 else "g",
                            unit_assumed=kind == 2))
    r = Rule.adhoc(target=1006.0, known_sd=2.0)
    batch = evaluate_many(lots, r)
    assert batch == [evaluate(lot, r) for lot in lots]
    assert sum(v.reason.startswith("values look like kg") for v in batch) == 15
    assert sum(v.unit_assumed for v in batch) == 15


def test_to_rule_unit_is_the_one_conversion_into_the_rule_unit():
    """monitor.units.to_rule_unit: factors of NIST SP 811 appendix B.8 (oz -> g, L -> mL, fl oz -> mL), a value
    without a unit is assumed in the rule's unit, and a pair it cannot convert carries a reason naming both
    units instead of raising."""
    from monitor.units import to_rule_unit

    assert to_rule_unit("oz", "g").factor == pytest.approx(GRAMS["oz"], rel=1e-15)
    assert to_rule_unit("kg", "g").factor == pytest.approx(GRAMS["kg"], rel=1e-15)
    assert to_rule_unit("fl oz", "L").factor == pytest.approx(MILLILITRES["fl oz"] / MILLILITRES["L"], rel=1e-15)
    # density 1.25 g/mL: 1 g is 0.8 mL (mass / density)
    assert to_rule_unit("g", "mL", 1.25).factor == pytest.approx(0.8, rel=1e-15)
    blank = to_rule_unit("", "mL")
    assert (blank.factor, blank.assumed, blank.problem) == (1.0, True, None)
    bad = to_rule_unit("g", "mL")
    assert np.isnan(bad.factor) and bad.assumed is False
    assert bad.problem is not None and "'g'" in bad.problem and "mL" in bad.problem and "density" in bad.problem
