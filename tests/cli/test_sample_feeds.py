"""`lotwarden check sample_feeds/*` tells the demo scenario's story, each verdict recomputed independently.

The sample feeds are invented demo data; the expected verdicts are not hard-coded but recomputed here with
pandas (reading each layout with explicit, hand-written parameters) and scipy.stats as the reference.
"""

from __future__ import annotations

import glob
import math
import tomllib

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from .conftest import REPO, lotwarden

FEEDS = REPO / "sample_feeds"
DAMAGED = "L2-jam-20261130-0700.txt"   # the scenario's damaged export, rejected as a whole


def _rules() -> dict[str, dict]:
    out = {}
    for p in (REPO / "rules").glob("*.toml"):
        t = tomllib.loads(p.read_text())
        for prod in t["products"]:
            out[prod] = t
    return out


def _independent_lots() -> dict[str, tuple[str, np.ndarray | tuple[int, float, float]]]:
    """lot -> (product, values in the rule's unit) read without lotwarden."""
    lots: dict[str, tuple[str, np.ndarray | tuple[int, float, float]]] = {}
    l1 = pd.concat([pd.read_csv(p, dtype={"lot": str}) for p in sorted(FEEDS.glob("L1-*.csv"))])
    for lot, g in l1.groupby("lot", sort=False):
        lots[lot] = ("OAT-500", g["value"].to_numpy())
    for p in sorted(FEEDS.glob("L2-*.txt")):
        if p.name == DAMAGED:
            continue
        j = pd.read_csv(p, sep=";", decimal=",", skiprows=4, encoding="latin-1", na_values=["ERR"])
        j = j.dropna(subset=["Net wt [g]"])
        for lot, g in j.groupby("Batch", sort=False):
            lots[lot] = ("JAM-340", g["Net wt [g]"].astype(float).to_numpy())
    juice = pd.read_csv(FEEDS / "L3-juice-20261130-0600.csv")
    for lot, g in juice.groupby("lot", sort=False):
        lots[lot] = ("JUICE-1L", (g["value"].to_numpy() - 28.0) / 1.045)  # tare 28 g, density 1.045 g/mL
    s = pd.read_csv(FEEDS / "L3-syrup-summary-20261130.csv")
    for rec in s.itertuples():
        lots[rec.lot] = ("SYRUP-750", (int(rec.n), float(rec.mean), float(rec.sd)))
    return lots


def _expected(product: str, data, rule: dict) -> tuple[str, float | None]:
    target, alpha, alt = rule["target"], rule.get("alpha", 0.05), rule.get("alternative", "two-sided")
    if isinstance(data, tuple):
        n, mean, sd = data
        t = (mean - target) / (sd / math.sqrt(n))
        # reference: scipy.stats.t distribution (the one-sample t-test from summary statistics)
        p = {"two-sided": 2 * stats.t.sf(abs(t), n - 1), "less": stats.t.cdf(t, n - 1),
             "greater": stats.t.sf(t, n - 1)}[alt]
        return ("hold" if p < alpha else "pass"), p
    values = np.asarray(data)
    if len(values) < rule.get("min_n", 5):
        return "review", None
    norm = rule.get("normality", {})
    if len(values) >= 3 and "known_sd" not in rule:
        w = stats.shapiro(values)  # reference: scipy.stats.shapiro
        if w.pvalue < norm.get("alpha", 0.05):
            if norm.get("on_fail", "review") == "review":
                return "review", None
            if norm.get("on_fail") == "wilcoxon":
                p = stats.wilcoxon(values - target, alternative=alt).pvalue
                return ("hold" if p < alpha else "pass"), p
    if "known_sd" in rule:
        z = (values.mean() - target) / (rule["known_sd"] / math.sqrt(len(values)))
        p = {"two-sided": 2 * stats.norm.sf(abs(z)), "less": stats.norm.cdf(z), "greater": stats.norm.sf(z)}[alt]
    else:
        p = stats.ttest_1samp(values, target, alternative=alt).pvalue  # reference: scipy.stats.ttest_1samp
    return ("hold" if p < alpha else "pass"), p


def test_sample_feeds_story() -> None:
    """Every lot of the scenario gets the verdict an independent computation gives; the damaged file is named."""
    paths = sorted(glob.glob(str(FEEDS / "*")))
    r = lotwarden("check", *paths, "--format", "json")
    assert r.code == 2, "the damaged export must make check exit 2"
    assert DAMAGED in r.err
    got = {o["lot"]: o for o in r.json()}
    rules = _rules()
    expected = _independent_lots()
    assert set(got) == set(expected)
    for lot, (product, data) in expected.items():
        verdict, p = _expected(product, data, rules[product])
        assert got[lot]["verdict"] == verdict, (lot, got[lot]["reason"])
        if p is not None:
            assert got[lot]["p_value"] == pytest.approx(p, rel=1e-9), lot
    # the story, in words (facts of our own invented scenario, not reference values): one drifted low, one
    # high, one faulty head, one too small, one noisy
    assert got["OAT-24A102"]["verdict"] == "hold" and got["OAT-24A102"]["mean"] < 503
    assert got["J-5522"]["verdict"] == "hold" and got["J-5522"]["mean"] > 342
    heads = {h["head"]: h["offset"] for h in got["OAT-24A103"]["heads"]}
    assert min(heads, key=lambda h: heads[h]) == "H4"
    assert got["OAT-24A104"]["verdict"] == "review"
    assert got["J-5523"]["verdict"] == "pass" and got["J-5523"]["power"] < 0.5
    assert got["J-5521"]["n"] == 38  # two "ERR" weighings dropped
