"""Average-quantity rule keys (validated, naming file and key) and the six defects of issue 10 through the engine.

Each defect test goes through ``Rule.from_toml`` / ``Rule.from_file`` and ``monitor.engine.evaluate`` and
fails on the screen as it was before issue 10. Expected values come from the published texts named beside
them (Council Directive 76/211/EEC Annexes I–II; SI 2006/659 Schedule 2; gov.uk "Weights and measures: the
law — packaged goods"; trading standards guidance on SI 2006/659; Fertigpackungsverordnung §9(3)).
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from monitor.engine import evaluate
from monitor.errors import RuleError
from monitor.lot import LotData, LotKey
from monitor.rulebook import RULE_KEYS, Rule

KEY = LotKey("L2", "BF-SOUP-500", "B-0420")     # Brackenfield Foods, invented


def rule(**keys: Any) -> Rule:
    table: dict[str, Any] = {"name": "aq", "target": keys.get("nominal", 500.0), "unit": "g",
                             "normality": {"on_fail": "ignore"}}
    table.update(keys)
    return Rule.from_toml(table, source="rules/aq.toml")


def judge(values: np.ndarray, r: Rule) -> Any:
    v = evaluate(LotData(KEY, values=np.asarray(values, dtype=float), unit=r.unit), r)
    assert v.average_quantity is not None
    return v


# ------------------------------------------------------------------------------------ defect 1: units
def test_defect1_tne_of_a_5_litre_product() -> None:
    """5 L = 5000 mL: TNE 1.5 % = 75 mL = 0.075 L (Directive Annex I 2.4), not 0.5 (5 read as 5 g)."""
    r = rule(unit="L", target=5.0, nominal=5.0)
    v = judge(np.full(20, 5.05), r)
    assert v.average_quantity.tne == pytest.approx(0.075, rel=1e-12)
    assert v.average_quantity.t2 == pytest.approx(4.85, rel=1e-12)


def test_defect1_one_kilogram_is_accepted() -> None:
    """nominal = 1 with unit kg is 1000 g: TNE 15 g = 0.015 kg (Directive Annex I 2.4)."""
    r = rule(unit="kg", target=1.0, nominal=1.0)
    v = judge(np.full(20, 1.004), r)
    assert v.average_quantity.tne == pytest.approx(0.015, rel=1e-12) and v.average_quantity.passed is True


# ------------------------------------------------------------------------------------ defect 2: allowance
def test_defect2_allowance_below_t1_never_drops_with_one_more_pack() -> None:
    """Full inspection: floor(2.5 % × n) (trading standards guidance: "generally no more than 2.5%")."""
    r = rule(nominal=500.0)
    got = [judge(np.full(n, 503.0), r).average_quantity.below_t1_allowed for n in (20, 21, 50, 51, 80, 81, 125, 126)]
    assert got == [0, 0, 1, 1, 2, 2, 3, 3]


# ------------------------------------------------------------------------------------ defect 3: < 100
def test_defect3_batch_under_100_needs_mean_at_least_nominal() -> None:
    """A batch under 100: the average of all packs ≥ Qn (SI 2006/659 Sch. 2 ¶4.7), not Qn − t·s/√n."""
    x = 499.9 + np.tile([-1.5, 1.5], 30)                   # mean 499.9; Qn − t·s/√n ≈ 499.48 would accept
    full = judge(x, rule(nominal=500.0)).average_quantity   # 60 packs, every pack weighed (Annex I 1.1)
    assert full.mean_limit == 500.0 and full.mean_ok is False
    r = rule(nominal=500.0, inspection="sample", batch_size=60)
    v = judge(x, r)
    aq = v.average_quantity
    assert aq.mean_limit == 500.0 and aq.mean_ok is False and aq.passed is False and v.verdict == "hold"


# ------------------------------------------------------------------------------------ defect 4: decimals
def test_defect4_pack_exactly_at_t2_is_not_below_it() -> None:
    """453.6 g: TNE 3 % = 13.608 → 13.7 g, T2 = 426.2 g (Directive Annex I 2.4); a 426.2 g pack is at T2, not
    "short by more than" 2·TNE (Annex I 1.3), so it counts below T1 only."""
    r = rule(nominal=453.6)
    x = np.r_[[426.2], np.full(49, 455.0)]
    aq = judge(x, r).average_quantity
    assert aq.below_t2 == 0
    assert (aq.below_t1, aq.t2) == (1, 426.2)
    assert aq.passed is True                                # 1 of 50 below T1 = floor(2.5 % × 50)


# ------------------------------------------------------------------------------------ defect 5: full lots
def test_defect5_fully_inspected_lot_with_mean_below_nominal_is_held() -> None:
    """Every pack weighed: mean ≥ Qn applies directly (Directive Annex I 1.1): 48 packs, mean 249.70 mL < 250."""
    r = rule(unit="mL", target=250.0, nominal=250.0)
    x = 249.70 + np.tile([2.0, -2.0], 24)                   # sd ≈ 2: Qn − t·s/√n ≈ 249.22 would accept it
    assert abs(float(np.mean(x)) - 249.70) < 1e-9
    v = judge(x, r)
    assert v.average_quantity.mean_ok is False and v.average_quantity.passed is False
    assert v.verdict == "hold" and "not a legal verdict" in v.reason


# ------------------------------------------------------------------------------------ defect 6: visible
def test_defect6_passed_screen_explains_itself() -> None:
    """A passed screen carries nominal, TNE, T1/T2 counts and the mean limit in its reason and JSON."""
    r = rule(nominal=500.0)
    v = judge(np.full(48, 503.1), r)
    aq = v.average_quantity
    assert aq.passed is True
    # 500 g: TNE 15 g, T1 485 g, T2 470 g (Directive Annex I 2.4); 48 packs allow floor(1.2) = 1 below T1
    for text in ("met", "nominal 500 g", "TNE 15 g", "mean 503.10 g", "0 of 48 below T1 485 g", "1 allowed",
                 "0 below T2 470 g"):
        assert text in aq.reason
    j = v.to_json()["average_quantity"]
    assert (j["t1"], j["t2"], j["mean_limit"], j["below_t1_allowed"], j["inspection"]) == (485.0, 470.0, 500.0,
                                                                                        1, "full")


def test_defect6_engine_shows_a_passed_screen_in_the_verdict_reason() -> None:
    """The verdict's reason carries the screen's summary when it passes (remove xfail once wired)."""
    v = judge(np.full(48, 503.1), rule(nominal=500.0))
    assert v.average_quantity.reason in v.reason


def test_sample_too_small_for_its_plan_is_never_a_pass() -> None:
    """A sample smaller than its plan (80 packs for 501–3 200, SI 2006/659 Sch. 2 ¶3.5) is undecided."""
    v = judge(np.full(50, 503.0), rule(nominal=500.0, inspection="sample", batch_size=2000))
    aq = v.average_quantity
    assert aq.needs_review and aq.passed is None and "needs 80 packs" in aq.reason and v.verdict != "pass"


# ------------------------------------------------------------------------------------ key validation
def write(tmp_path: Path, body: str) -> Path:
    p = tmp_path / "soup.toml"
    p.write_text('name = "soup"\ntarget = 500.0\nunit = "g"\n' + body, encoding="utf-8")
    return p


@pytest.mark.parametrize("body,key,words", [
    ('nominal = 4.0\n', "nominal", "outside the published TNE table"),        # Directive Annex I 2.4: from 5
    ('nominal = -1.0\n', "nominal", "must be > 0"),
    ('nominal = 500.0\ninspection = "audit"\n', "inspection", "'full', 'sample'"),
    ('nominal = 500.0\ninspection = "sample"\n', "batch_size", "missing batch_size"),
    ('nominal = 500.0\ninspection = "sample"\nbatch_size = 0\n', "batch_size", "whole number >= 1"),
    ('nominal = 500.0\ninspection = "sample"\nbatch_size = 500.5\n', "batch_size", "whole number >= 1"),
    ('nominal = 500.0\ninspection = "sample"\nbatch_size = true\n', "batch_size", "whole number >= 1"),
    ('nominal = 500.0\nbatch_size = 400\n', "batch_size", 'inspection = "sample"'),
    ('nominal = 500.0\nsampling_plan = "double"\n', "sampling_plan", 'inspection = "sample"'),
    ('nominal = 500.0\ninspection = "sample"\nbatch_size = 400\nsampling_plan = "triple"\n', "sampling_plan",
     "'single', 'double', 'destructive'"),
    ('nominal = 500.0\ninspection = "sample"\nbatch_size = 60\nsampling_plan = "destructive"\n', "sampling_plan",
     "100 or more"),                                                           # Directive Annex II 2.2.2
    ('nominal = 500.0\nt1_share = 0.03\n', "t1_share", "[0, 0.025]"),
    ('nominal = 500.0\nt1_share = "2%"\n', "t1_share", "finite number"),
    ('nominal = 500.0\ninspection = "sample"\nbatch_size = 400\nt1_share = 0.02\n', "t1_share", '"full"'),
    ('inspection = "sample"\nbatch_size = 400\n', "inspection", "no nominal"),
    ('t1_share = 0.02\n', "t1_share", "no nominal"),
    ('nominal = 500.0\ninspektion = "sample"\n', "inspektion", "unknown key"),
])
def test_bad_keys_name_file_and_key(tmp_path: Path, body: str, key: str, words: str) -> None:
    """Unknown or out-of-range average-quantity keys raise RuleError naming the file and the key."""
    p = write(tmp_path, body)
    with pytest.raises(RuleError) as exc:
        Rule.from_file(p)
    assert exc.value.key == key and exc.value.path == str(p)
    assert str(p) in str(exc.value) and key in str(exc.value) and words in str(exc.value)


@pytest.mark.parametrize("unit,nominal", [("kg", 30.0), ("kg", 0.004), ("L", 25.5), ("mg", 4000.0)])
def test_nominal_outside_the_table_after_conversion(tmp_path: Path, unit: str, nominal: float) -> None:
    """The scope (5 g/mL, Directive Annex I 2.4, to 25 kg/L, gov.uk packaged goods page) is checked in g/mL."""
    p = tmp_path / "bulk.toml"
    p.write_text(f'name = "bulk"\ntarget = {nominal}\nunit = "{unit}"\nnominal = {nominal}\n', encoding="utf-8")
    with pytest.raises(RuleError, match="outside the published TNE table") as exc:
        Rule.from_file(p)
    assert exc.value.key == "nominal" and str(p) in str(exc.value)


def test_good_keys_load(tmp_path: Path) -> None:
    """Valid keys load with their values; defaults are full inspection, 2.5 %, single plan."""
    r = Rule.from_file(write(tmp_path, 'nominal = 500.0\n'))
    assert (r.inspection, r.batch_size, r.t1_share, r.sampling_plan) == ("full", None, 0.025, "single")
    r = Rule.from_file(write(tmp_path, 'nominal = 500.0\nt1_share = 0.02\n'))     # FPackV §9(3): 2 %
    assert r.t1_share == 0.02
    r = Rule.from_file(write(tmp_path, 'nominal = 500.0\ninspection = "sample"\nbatch_size = 4000\n'
                                       'sampling_plan = "double"\n'))
    assert (r.inspection, r.batch_size, r.sampling_plan) == ("sample", 4000, "double")


def test_key_reference_names_the_t1_share_sources() -> None:
    """The key reference (README, from RULE_KEYS) documents the new keys and the sources of the 2.5 % share."""
    for key in ("nominal", "inspection", "batch_size", "sampling_plan", "t1_share"):
        assert key in RULE_KEYS
    default, doc = RULE_KEYS["t1_share"]
    assert default == 0.025 and "2.5 %" in doc and "§9(3)" in doc
    assert RULE_KEYS["inspection"][0] == "full" and "sample" in RULE_KEYS["inspection"][1]


def test_t1_share_lowers_the_allowance() -> None:
    """t1_share = 0.02 (FPackV §9(3): "höchstens zwei vom Hundert") allows floor(2 % × n) below T1."""
    r = rule(nominal=500.0, t1_share=0.02)
    aq = judge(np.full(99, 503.0), r).average_quantity
    assert aq.below_t1_allowed == math.floor(99 * 2 / 100) == 1
