"""Any lot, however odd its numbers, gets a defined verdict with a reason — no exception, no warning."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.engine import evaluate, evaluate_many
from monitor.lot import VERDICTS, LotData, LotKey, LotSummary
from monitor.rulebook import NormalityRule, Rule

pytestmark = [pytest.mark.filterwarnings("error::RuntimeWarning"), pytest.mark.filterwarnings("error::UserWarning")]

any_float = st.floats(allow_nan=True, allow_infinity=True, width=64)
rules = st.builds(
    Rule.adhoc,
    target=st.sampled_from([0.0, 340.0, 1e9, -5.0]),
    alternative=st.sampled_from(["two-sided", "less", "greater"]),
    alpha=st.sampled_from([0.001, 0.05, 0.5]),
    min_n=st.integers(2, 6),
    known_sd=st.sampled_from([None, 1e-9, 2.0, 1e12]),
    shift_of_interest=st.sampled_from([None, 1e-9, 1.0, 1e6]),
    normality=st.builds(NormalityRule, on_fail=st.sampled_from(["review", "wilcoxon", "ignore"]),
                        on_unassessed=st.sampled_from(["proceed", "review"]), enabled=st.booleans()),
)


@st.composite
def lots(draw):
    key = LotKey("L1", "OAT-500", "F")
    if draw(st.booleans()):
        summary = LotSummary(draw(st.integers(-1, 10**7)), draw(any_float), draw(any_float))
        return LotData(key, summary=summary)
    values = draw(st.lists(st.one_of(any_float, st.floats(339, 341)), max_size=40))
    heads = tuple(draw(st.sampled_from(["A", "B", "C"])) for _ in values) if draw(st.booleans()) else None
    return LotData(key, values=np.array(values, dtype=float), heads=heads)


def _check(v) -> None:
    assert v.verdict in VERDICTS
    assert v.reason
    assert "nan" not in v.reason or "summary is not usable" in v.reason      # quoting the bad summary
    if v.verdict != "review":
        assert v.test is not None and v.p_value is not None and 0.0 <= v.p_value <= 1.0
    else:
        assert v.test is None or v.average_quantity is not None
    v.to_json()


@settings(max_examples=150, deadline=None, derandomize=True)
@given(lots(), rules)
def test_any_lot_gets_a_defined_verdict(lot, rule):
    """Extreme, non-finite, empty and constant lots and summaries: a verdict, a reason, no warning."""
    _check(evaluate(lot, rule))


@settings(max_examples=25, deadline=None, derandomize=True)
@given(st.lists(lots(), max_size=5), rules)
def test_any_batch_equals_one_by_one(batch, rule):
    """Batches of odd lots give the same Verdicts as one at a time."""
    got = evaluate_many(batch, rule)
    for lot, v in zip(batch, got):
        assert v.to_json() == evaluate(lot, rule).to_json()
