"""Heads compared properly within a lot: Holm-adjusted head p-values, the heads test (ANOVA / Kruskal–Wallis),
a head named as drifting only on its adjusted p; and `lotwarden check --format json` shows the keys."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from monitor.engine import evaluate, evaluate_many
from monitor.lot import LotData, LotKey
from monitor.rulebook import NormalityRule, Rule

pytestmark = pytest.mark.filterwarnings("error")       # no numpy / scipy warning may escape the engine

REPO = Path(__file__).resolve().parent.parent
KEY = LotKey("L1", "OAT-500", "OAT-26K014")
REL = 1e-10
IGNORE = NormalityRule(on_fail="ignore")


def lot(values, heads) -> LotData:
    return LotData(KEY, values=np.asarray(values, dtype=float), heads=tuple(heads))


def _drifting_lot(seed: int, shift: float = -2.5, n: int = 96, names=("H1", "H2", "H3", "H4")):
    rng = np.random.default_rng(seed)
    h = np.array(rng.choice(list(names), n))
    x = np.round(rng.normal(502.0, 1.1, n) + np.where(h == names[-1], shift, 0.0), 1)
    return x, h


def _by_head(x, h):
    names = sorted(set(h.tolist()))
    return names, [x[h == name] for name in names]


def test_p_holm_is_holm_over_the_heads_t_tests():
    """Each head's p_holm = statsmodels multipletests(method="holm") over the heads' own scipy t-tests."""
    x, h = _drifting_lot(1)
    v = evaluate(lot(x, h), Rule.adhoc(target=502.0, normality=IGNORE))
    names, groups = _by_head(x, h)
    # reference: scipy.stats.ttest_1samp per head, then statsmodels.stats.multitest.multipletests(method="holm")
    raw = [stats.ttest_1samp(g, 502.0).pvalue for g in groups]
    adjusted = multipletests(raw, method="holm")[1]
    assert [s.head for s in v.heads] == names
    for s, p, a in zip(v.heads, raw, adjusted, strict=True):
        assert s.p_value == pytest.approx(p, rel=1e-9)
        assert s.p_holm == pytest.approx(a, rel=1e-9)
    j = v.to_json()["heads"]
    assert [e["p_holm"] for e in j] == pytest.approx(list(adjusted), rel=1e-9)


def test_holm_family_leaves_out_heads_without_a_test():
    """A one-value head has no p and no p_holm, and is not counted in the family (m = the heads with a p)."""
    x = [502.4, 501.1, 502.9, 501.7, 503.3, 501.0, 502.2, 500.8, 499.6]
    h = ["A", "A", "A", "B", "B", "B", "B", "B", "C"]
    v = evaluate(lot(x, h), Rule.adhoc(target=502.0, normality=IGNORE))
    xs = np.array(x)
    hs = np.array(h)
    # reference: scipy.stats.ttest_1samp on heads A and B; statsmodels multipletests(method="holm") over the two
    raw = [stats.ttest_1samp(xs[hs == k], 502.0).pvalue for k in ("A", "B")]
    adjusted = multipletests(raw, method="holm")[1]
    a, b, c = v.heads
    assert (a.p_holm, b.p_holm) == (pytest.approx(adjusted[0], rel=1e-9), pytest.approx(adjusted[1], rel=1e-9))
    assert c.head == "C" and c.p_value is None and c.p_holm is None


def test_heads_test_is_anova_when_normality_holds():
    """Shapiro–Wilk passes (checked with scipy.stats.shapiro): heads_test = scipy.stats.f_oneway over the heads."""
    x, h = _drifting_lot(4, shift=-0.6)
    # reference: scipy.stats.shapiro decides the gate at the rule's normality alpha 0.05
    assert stats.shapiro(x).pvalue >= 0.05
    v = evaluate(lot(x, h), Rule.adhoc(target=502.0))
    # reference: scipy.stats.f_oneway
    ref = stats.f_oneway(*_by_head(x, h)[1])
    t = v.to_json()["heads_test"]
    assert t["test"] == "anova"
    assert t["statistic"] == pytest.approx(ref.statistic, rel=REL)
    assert t["p_value"] == pytest.approx(ref.pvalue, rel=REL)
    assert (t["df_between"], t["df_within"]) == (3, x.size - 4)
    assert v.to_json()["heads_test_note"] is None


@pytest.mark.parametrize("on_fail", ["review", "wilcoxon", "ignore"])
def test_heads_test_is_kruskal_when_normality_fails(on_fail):
    """Skewed fills fail Shapiro–Wilk (scipy.stats.shapiro): heads_test = scipy.stats.kruskal, whatever on_fail."""
    rng = np.random.default_rng(8)
    h = np.array(rng.choice(["V1", "V2", "V3"], 80))
    x = np.round(501.0 + rng.exponential(1.5, 80) + np.where(h == "V2", 1.0, 0.0), 1)
    # reference: scipy.stats.shapiro rejects at 0.05
    assert stats.shapiro(x).pvalue < 0.05
    v = evaluate(lot(x, h), Rule.adhoc(target=502.0, normality=NormalityRule(on_fail=on_fail)))
    assert v.normality.passed is False
    # reference: scipy.stats.kruskal (tie-corrected H)
    ref = stats.kruskal(*_by_head(x, h)[1])
    t = v.to_json()["heads_test"]
    assert t["test"] == "kruskal" and t["df_between"] == 2 and t["df_within"] is None
    assert t["statistic"] == pytest.approx(ref.statistic, rel=REL)
    assert t["p_value"] == pytest.approx(ref.pvalue, rel=REL)


def test_anova_without_normality_gate():
    """With the gate off the heads are compared by ANOVA even on skewed values (scipy.stats.f_oneway)."""
    rng = np.random.default_rng(9)
    h = np.array(rng.choice(["V1", "V2"], 40))
    x = 501.0 + rng.exponential(1.5, 40)
    v = evaluate(lot(x, h), Rule.adhoc(target=502.0, normality=NormalityRule(enabled=False)))
    ref = stats.f_oneway(x[h == "V1"], x[h == "V2"])
    assert v.heads_test is not None and v.heads_test.test == "anova"
    assert v.heads_test.statistic == pytest.approx(ref.statistic, rel=REL)


@pytest.mark.parametrize("values,heads,why", [
    ([502.1, 501.4, 503.0, 502.2, 501.8], ["H1"] * 5, "only 1 head with data (H1)"),
    ([502.1, 501.4, 503.0], ["H1", "H2", "H3"], "too few values"),
    ([502.1, 502.1, 501.5, 501.5, 503.0, 503.0], ["H1", "H1", "H2", "H2", "H3", "H3"], "do not vary within any head"),
    ([502.0] * 6, ["H1", "H2"] * 3, "do not vary within any head"),
    ([np.nan, np.nan, np.nan], ["H1", "H2", "H1"], "no head has a usable value"),
])
def test_no_heads_test_and_why(values, heads, why):
    """Fewer than 2 heads with data, one value per head, no spread within heads: heads_test null, note says why."""
    j = evaluate(lot(values, heads), Rule.adhoc(target=502.0, min_n=2)).to_json()
    assert j["heads_test"] is None
    assert why in j["heads_test_note"]


def test_lot_without_heads_has_null_heads_test():
    """No head column: heads [], heads_test null, no note."""
    v = evaluate(LotData(KEY, values=np.array([502.1, 501.4, 503.0, 502.2, 501.8])), Rule.adhoc(target=502.0))
    j = v.to_json()
    assert j["heads"] == [] and j["heads_test"] is None and j["heads_test_note"] is None


def _standout_case(d: float):
    """Heads A, B, C symmetric about target (offset 0, p = 1); head D's mean off by d with the same spread."""
    base = np.array([-0.2, -0.1, 0.0, 0.1, 0.2])
    x = np.concatenate([502.0 + base] * 3 + [502.0 + d + base])
    h = ["A"] * 5 + ["B"] * 5 + ["C"] * 5 + ["D"] * 5
    # reference: scipy.stats.ttest_1samp of each head; statsmodels multipletests(method="holm")
    raw = [stats.ttest_1samp(x[i * 5:(i + 1) * 5], 502.0).pvalue for i in range(4)]
    return x, h, raw[3], multipletests(raw, method="holm")[1][3]


def test_drifting_head_named_only_on_its_adjusted_p():
    """Head D's raw p < alpha but its Holm p >= alpha: not named; further off (Holm p < alpha): named.

    min_n = 100 sends the lot to review, where the remark is given (it is left out of a pass)."""
    r = Rule.adhoc(target=502.0, min_n=100, normality=IGNORE)
    x, h, raw, adj = _standout_case(0.27)
    assert raw < 0.05 <= adj                                  # the case the adjustment is for
    v = evaluate(lot(x, h), r)
    assert v.verdict == "review" and "furthest off" not in v.reason
    x, h, raw, adj = _standout_case(0.6)
    assert adj < 0.05
    v = evaluate(lot(x, h), r)
    assert "head D is furthest off" in v.reason


def test_batch_equals_one_by_one_with_heads():
    """evaluate_many gives each lot with heads the same heads, p_holm and heads_test as evaluate alone."""
    rng = np.random.default_rng(21)
    lots = []
    for i in range(60):
        n = int(rng.choice([1, 2, 3, 6, 20, 50]))
        x = rng.normal(340.0, 1.0, n) if i % 3 else 339.0 + rng.exponential(1.0, n)
        names = rng.choice(["J1", "J2", "J3", "J4"][: int(rng.integers(1, 5))], n)
        lots.append(LotData(LotKey("L2", "JAM-340", f"J{i:03d}"), values=x, heads=tuple(names)))
    lots.append(LotData(LotKey("L2", "JAM-340", "NOHEADS"), values=rng.normal(340, 1, 12)))
    r = Rule.adhoc(target=340.0, normality=NormalityRule(on_fail="wilcoxon"))
    batch = evaluate_many(lots, r)
    assert any(v.heads_test is not None and v.heads_test.test == "kruskal" for v in batch)
    assert any(v.heads_test is not None and v.heads_test.test == "anova" for v in batch)
    for one, v in zip(lots, batch, strict=True):
        assert v == evaluate(one, r)


def test_check_json_shows_heads_keys(tmp_path: Path):
    """`lotwarden check --format json` (a real subprocess) on an export with a head column carries p_holm and
    heads_test, equal to statsmodels / scipy recomputed from the numbers written into the export."""
    rng = np.random.default_rng(33)
    rows = ["lot,product,head,value"]
    lots: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for lot_code, shift in (("OAT-26K101", 0.0), ("OAT-26K102", -3.0)):
        h = np.array(rng.choice(["H1", "H2", "H3", "H4", "H5", "H6"], 72))
        x = np.round(rng.normal(502.0, 1.0, 72) + np.where(h == "H5", shift, 0.0), 1)
        lots[lot_code] = (x, h)
        rows += [f"{lot_code},OAT-500,{hh},{v!r}" for hh, v in zip(h.tolist(), x.tolist(), strict=True)]
    export = tmp_path / "L1-oat-export.csv"
    export.write_text("\n".join(rows) + "\n")
    cmd = [sys.executable, "-m", "monitor", "check", str(export), "--target", "502", "--format", "json"]
    proc = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True, timeout=120, check=False)
    assert proc.returncode in (0, 1), proc.stderr
    got = {o["lot"]: o for o in json.loads(proc.stdout)}
    for lot_code, (x, h) in lots.items():
        o = got[lot_code]
        names, groups = _by_head(x, h)
        # reference: scipy.stats.ttest_1samp per head + statsmodels multipletests(method="holm")
        adjusted = multipletests([stats.ttest_1samp(g, 502.0).pvalue for g in groups], method="holm")[1]
        assert [e["head"] for e in o["heads"]] == names
        assert [e["p_holm"] for e in o["heads"]] == pytest.approx(list(adjusted), rel=1e-9)
        # the gate decides the test: reference scipy.stats.shapiro, then scipy.stats.f_oneway / scipy.stats.kruskal
        failed = stats.shapiro(x).pvalue < 0.05
        ref = stats.kruskal(*groups) if failed else stats.f_oneway(*groups)
        t = o["heads_test"]
        assert t["test"] == ("kruskal" if failed else "anova")
        assert t["statistic"] == pytest.approx(ref.statistic, rel=REL)
        assert t["p_value"] == pytest.approx(ref.pvalue, rel=REL)
    assert "head H5 is furthest off" in got["OAT-26K102"]["reason"]
