"""evaluate_many gives exactly the Verdicts evaluate gives lot by lot, degenerate lots included."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from monitor.engine import evaluate, evaluate_many
from monitor.lot import LotData, LotKey, LotSummary
from monitor.rulebook import NormalityRule, Rule

pytestmark = [pytest.mark.filterwarnings("error::RuntimeWarning"), pytest.mark.filterwarnings("error::UserWarning")]


def _random_lots(seed: int, count: int) -> list[LotData]:
    rng = np.random.default_rng(seed)
    lots = []
    for i in range(count):
        key = LotKey("L2", "JAM-340", f"J{i:04d}")
        kind = rng.integers(0, 12)
        n = int(rng.choice([0, 1, 2, 3, 4, 5, 7, 12, 30, 50, 50, 50, 120]))
        x = rng.normal(340 + rng.normal(0, 0.6), rng.uniform(0.3, 2.5), n)
        if kind == 0:
            x = np.full(n, 340.25)                               # stuck sensor
        elif kind == 1 and n:
            x[rng.integers(0, n, 2)] = rng.choice([np.nan, np.inf, -np.inf])
        elif kind == 2:
            x = rng.exponential(1.0, n) + 339.0                  # skewed: fails the normality gate
        elif kind == 3:
            x = np.round(x)                                      # ties for the Wilcoxon path
        elif kind == 4:
            lots.append(LotData(key, summary=LotSummary(n, float(rng.normal(340, 1)), float(rng.uniform(0, 2)))))
            continue
        elif kind == 5:
            x = 1e9 + rng.normal(0, 1e-8, n)
        heads = tuple(rng.choice(["H1", "H2", "H3"], x.size)) if kind in (6, 7) else None
        lots.append(LotData(key, values=x, heads=heads))
    return lots


RULES = [
    Rule.adhoc(target=340.0),
    Rule.adhoc(target=340.0, alternative="less", shift_of_interest=1.0, normality=NormalityRule(on_fail="wilcoxon")),
    Rule.adhoc(target=340.0, alternative="greater", alpha=0.01, min_n=2, normality=NormalityRule(on_fail="ignore")),
    Rule.adhoc(target=340.0, known_sd=1.2, shift_of_interest=0.5, normality=NormalityRule(on_unassessed="review")),
    Rule.adhoc(target=340.0, nominal=340.0, normality=NormalityRule(enabled=False)),
]


@pytest.mark.parametrize("seed,r", list(enumerate(RULES)),
                         ids=["default", "less-wilcoxon-power", "greater-ignore", "z-review", "aq"])
def test_batch_equals_one_by_one(seed, r):
    """Every Verdict of a mixed batch equals the Verdict of that lot judged alone."""
    lots = _random_lots(100 + seed, 150)
    batch = evaluate_many(lots, r)
    assert len(batch) == len(lots)
    for one_lot, v in zip(lots, batch):
        alone = evaluate(one_lot, r)
        assert v == alone
        assert v.to_json() == alone.to_json()
    assert {v.verdict for v in batch} >= {"review", "pass"}


def test_batch_matches_scipy_per_lot():
    """Batch t results equal scipy.stats.ttest_1samp lot by lot (reference library)."""
    rng = np.random.default_rng(21)
    lots = [LotData(LotKey("L1", "OAT-500", str(i)), values=rng.normal(500, 2, int(rng.integers(5, 80))))
            for i in range(300)]
    r = Rule.adhoc(target=500.0, alternative="less", normality=NormalityRule(enabled=False))
    for lot, v in zip(lots, evaluate_many(lots, r)):
        ref = stats.ttest_1samp(lot.values, 500.0, alternative="less")
        assert v.statistic == pytest.approx(ref.statistic, rel=1e-10)
        assert v.p_value == pytest.approx(ref.pvalue, rel=1e-10)
        assert v.ci_high == pytest.approx(ref.confidence_interval(0.95).high, rel=1e-10)


def test_batch_shapiro_matches_scipy():
    """The per-size Shapiro–Wilk matrices give scipy.stats.shapiro's W and p for every lot (reference)."""
    rng = np.random.default_rng(22)
    lots = [LotData(LotKey("L3", "JUICE-1L", str(i)), values=rng.normal(1000, 4, int(rng.integers(3, 60))))
            for i in range(200)]
    for lot, v in zip(lots, evaluate_many(lots, Rule.adhoc(target=1000.0, unit="mL", min_n=2))):
        ref = stats.shapiro(lot.values)
        assert v.normality.statistic == pytest.approx(ref.statistic, rel=1e-12)
        assert v.normality.p_value == pytest.approx(ref.pvalue, rel=1e-9)


def test_empty_batch():
    """No lots, no verdicts."""
    assert evaluate_many([], RULES[0]) == []


values = st.lists(st.one_of(st.floats(339.0, 341.0), st.sampled_from([340.0, float("nan"), float("inf")])),
                  max_size=25)


@settings(max_examples=40, deadline=None, derandomize=True)
@given(st.lists(values, min_size=1, max_size=6), st.sampled_from(RULES))
def test_fuzzed_batches_equal_one_by_one(batches, r):
    """Any small batch of arbitrary lots (NaN, inf, ties, constants) gives the same Verdicts lot by lot."""
    lots = [LotData(LotKey("L1", "X", str(i)), values=np.array(v, dtype=float)) for i, v in enumerate(batches)]
    assert evaluate_many(lots, r) == [evaluate(lot, r) for lot in lots]
