"""What each judged lot adds to the drift charts, and the tracks and signals built from it (monitor.drift)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from monitor import drift
from monitor.engine import evaluate
from monitor.errors import RuleError
from monitor.lot import LotData, LotKey
from monitor.rulebook import Rule

BASE = {"name": "jam-450", "target": 450.0, "unit": "g", "min_n": 5}


def _rule(**drift_keys: object) -> Rule:
    return Rule.from_toml({**BASE, "drift": dict(drift_keys)}, source="rules/jam-450.toml", content_hash="a" * 64)


def _lot(values: np.ndarray, heads: tuple[str, ...] | None = None, lot: str = "J1") -> LotData:
    return LotData(key=LotKey("L3", "JAM-450", lot), values=values, heads=heads)


def test_a_lot_adds_the_t_of_its_test() -> None:
    """The whole-lot series takes the verdict's t against target (scipy.stats.ttest_1samp)."""
    x = np.random.default_rng(11).normal(450.4, 1.2, 40)
    rule = _rule()
    obs = drift.observations(evaluate(_lot(x), rule), rule)
    assert obs == [("", pytest.approx(scipy.stats.ttest_1samp(x, 450.0).statistic, rel=1e-10))]


def test_a_known_sd_lot_adds_its_z() -> None:
    """With known_sd the lot adds z = (mean - target) / (known_sd / sqrt(n)) (the z-test's statistic)."""
    x = np.random.default_rng(12).normal(449.5, 1.0, 30)
    rule = Rule.from_toml({**BASE, "known_sd": 1.1, "drift": {}}, source="r.toml", content_hash="b" * 64)
    ((_s, z),) = drift.observations(evaluate(_lot(x), rule), rule)
    assert z == pytest.approx((x.mean() - 450.0) / (1.1 / math.sqrt(30)), rel=1e-10)


def test_a_lot_without_a_test_adds_nothing() -> None:
    """Too few units for min_n: no test, so nothing for the chart; a rule without [drift] adds nothing."""
    rule = _rule()
    small = evaluate(_lot(np.array([450.1, 450.3, 449.9])), rule)
    assert small.test is None and drift.observations(small, rule) == []
    plain = Rule.from_toml(BASE, source="r.toml")
    assert drift.observations(evaluate(_lot(np.linspace(449, 451, 20)), plain), plain) == []


def test_a_wilcoxon_lot_adds_the_t_of_its_values() -> None:
    """A lot judged by Wilcoxon (normality gate failed) still adds the t of its mean and sd."""
    x = np.concatenate([np.full(30, 450.2), [458.0, 459.0, 441.0]]) + np.linspace(0, 0.05, 33)
    rule = Rule.from_toml({**BASE, "normality": {"on_fail": "wilcoxon"}, "drift": {}}, source="r.toml",
                          content_hash="c" * 64)
    v = evaluate(_lot(x), rule)
    assert v.test == "wilcoxon"
    assert drift.observations(v, rule) == [("", pytest.approx(scipy.stats.ttest_1samp(x, 450.0).statistic,
                                                              rel=1e-10))]


def test_heads_add_their_own_t_when_asked() -> None:
    """[drift] heads = true: each head with at least min_n values adds its own t (scipy on that head's
    values), after the lot; a head with fewer adds nothing."""
    rng = np.random.default_rng(13)
    x = rng.normal(450.0, 1.0, 44)
    heads = tuple(["A", "B"] * 20 + ["C"] * 4)
    x[np.array(heads) == "B"] += 1.0
    rule = _rule(heads=True)
    obs = dict(drift.observations(evaluate(_lot(x, heads), rule), rule))
    assert set(obs) == {"", "A", "B"}
    for h in ("A", "B"):
        want = scipy.stats.ttest_1samp(x[np.array(heads) == h], 450.0).statistic
        assert obs[h] == pytest.approx(want, rel=1e-10)


def test_a_track_survives_json_and_restarts_on_another_rule_version() -> None:
    """A track written to JSON and read back goes on as before; under another rule version it starts again."""
    rule = _rule(h=10.0)
    t, _ = drift.advance(None, line="L3", product="JAM-450", head="", lot="J1", z=2.5, rule=rule)
    t, _ = drift.advance(drift.Track.from_json(t.to_json()), line="L3", product="JAM-450", head="", lot="J2",
                         z=2.5, rule=rule)
    assert t.state.upper == pytest.approx(4.0) and t.lots == ("J1", "J2")      # 2 x (2.5 - 0.5)
    other = Rule.from_toml({**BASE, "drift": {"h": 10.0}}, source="r.toml", content_hash="d" * 64)
    t2, _ = drift.advance(t, line="L3", product="JAM-450", head="", lot="J3", z=2.5, rule=other)
    assert t2.state.upper == pytest.approx(2.0) and t2.lots == ("J3",)


def test_a_signal_names_the_lots_since_the_restart_and_the_track_starts_again() -> None:
    """The EWMA chart with lambda = 1 is a Shewhart chart of z at +-L (e-Handbook §6.3.2.4 with lambda = 1):
    z = 3.2 > 3 signals up after J1, J2 (no signal), and the next track is empty."""
    rule = _rule(method="ewma", **{"lambda": 1.0, "L": 3.0})
    t = None
    sig = None
    for lot, z in (("J1", 1.0), ("J2", -2.0), ("J3", 3.2)):
        t, sig = drift.advance(t, line="L3", product="JAM-450", head="", lot=lot, z=z, rule=rule)
    assert sig is not None and t is not None
    j = sig.to_json()
    assert (j["method"], j["direction"], j["statistic"], j["limit"], j["lots"]) == ("ewma", "up", 3.2, 3.0,
                                                                                     ["J1", "J2", "J3"])
    assert t.points == () and t.state.i == 0


@pytest.mark.parametrize("table,key,text", [
    ({"method": "shewhart"}, "drift.method", "must be one of"),
    ({"lambda": 0.0}, "drift.lambda", "(0, 1]"),
    ({"lambda": 1.5}, "drift.lambda", "(0, 1]"),
    ({"h": 0}, "drift.h", "> 0"),
    ({"k": -0.1}, "drift.k", ">= 0"),
    ({"L": -3}, "drift.L", "> 0"),
    ({"heads": "yes"}, "drift.heads", "true or false"),
    ({"window": 5}, "drift.window", "unknown key"),
])
def test_bad_drift_keys_name_the_file_and_key(table: dict[str, object], key: str, text: str) -> None:
    """Every [drift] key is checked; the error names the rule file, the key path and what is allowed."""
    with pytest.raises(RuleError) as err:
        Rule.from_toml({**BASE, "drift": table}, source="rules/jam-450.toml")
    msg = str(err.value)
    assert "rules/jam-450.toml" in msg and key in msg and text in msg, msg


def test_drift_values_are_part_of_the_rule_values() -> None:
    """The [drift] table appears in Rule.values() as written (what a rule-changed alert compares)."""
    assert _rule(method="ewma").values()["drift"] == {"method": "ewma", "k": 0.5, "h": 5.0, "lambda": 0.2,
                                                      "L": 3.0, "heads": False}
    assert Rule.from_toml(BASE, source="r.toml").values()["drift"] is None
