"""Lot assembly for `check`: grouping, arrival order, units into the rule's unit, excluded rows, summaries."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.assemble import assemble_lots
from monitor.ingest import Export
from monitor.lot import EXCLUSION_REASONS
from monitor.rulebook import Rule

from .conftest import lotwarden

ROWS = ("source_line", "lot", "value", "timestamp", "product", "line", "head", "unit")
SUMMARY = ("source_line", "lot", "n", "mean", "sd", "product", "line", "unit", "timestamp")


def _vals(data: object) -> list[float]:
    """A lot's values as a list (the lot must carry values, not a summary)."""
    values = getattr(data, "values", None)
    assert values is not None
    return list(values.tolist())


def _export(path: str, rows: dict[str, list], density: float | None = None) -> Export:
    """An Export value as the reader hands it over (values kind); missing text columns are ""."""
    n = len(rows["value"])
    cols = {c: rows.get(c, [""] * n) for c in ROWS}
    cols["source_line"] = list(range(2, n + 2))
    frame = pd.DataFrame({**cols, **{k: v for k, v in rows.items() if k not in cols}})
    frame["value"] = frame["value"].astype(np.float64)
    empty = pd.DataFrame({c: [] for c in SUMMARY})
    return Export(path=path, kind="values", rows=frame, summaries=empty, density=density)


def _summary_export(path: str, recs: dict[str, list]) -> Export:
    n = len(recs["lot"])
    cols = {c: recs.get(c, [""] * n) for c in SUMMARY}
    cols["source_line"] = list(range(2, n + 2))
    frame = pd.DataFrame({**cols, **{k: v for k, v in recs.items() if k not in cols}})
    empty = pd.DataFrame({c: [] for c in ROWS})
    return Export(path=path, kind="summary", rows=empty, summaries=frame)


def test_grouping_and_order_match_pandas_groupby() -> None:
    """Lots, their values in arrival order across files, heads and files equal a pandas groupby over the
    concatenated rows (reference: pandas DataFrame.groupby(sort=False), first-appearance order)."""
    rng = np.random.default_rng(41)
    exports, frames = [], []
    for f in range(3):
        n = 400
        rows = {"line": rng.choice(["L1", "L2"], n).tolist(), "product": rng.choice(["OAT-500", "RYE-750"], n).tolist(),
                "lot": [f"B{k}" for k in rng.integers(0, 25, n)], "head": rng.choice(["H1", "H2", "H3"], n).tolist(),
                "value": rng.normal(500, 2, n).tolist(), "unit": ["g"] * n}
        exports.append(_export(f"/drop/f{f}.csv", rows))
        frames.append(pd.DataFrame({**rows, "file": f"/drop/f{f}.csv"}))
    rule = Rule.adhoc(target=500.0, unit="g")
    got = assemble_lots(exports, lambda p: rule)
    ref = pd.concat(frames, ignore_index=True).groupby(["line", "product", "lot"], sort=False)
    assert [(a.data.key.line, a.data.key.product, a.data.key.lot) for a in got] == list(ref.groups)
    for a, (_, g) in zip(got, ref, strict=True):
        assert a.problem is None and a.rule is rule
        assert _vals(a.data) == g["value"].tolist()          # same floats, same order
        assert a.data.heads == tuple(g["head"])
        assert a.data.files == tuple(dict.fromkeys(g["file"]))
        assert a.data.unit == "g" and a.data.unit_assumed is False


def test_units_are_converted_into_the_rule_unit() -> None:
    """kg and oz values under a g rule are multiplied by 1000 and 28.349523125 (NIST SP 811, appendix B);
    a value without a unit is taken as g and the lot says unit_assumed."""
    exp = _export("/drop/a.csv", {"lot": ["K", "K", "Z", "Z", "N", "N"],
                                  "value": [0.5, 0.502, 17.6, 17.7, 499.0, 501.0],
                                  "unit": ["kg", "kg", "oz", "oz", "", ""]})
    rule = Rule.adhoc(target=500.0, unit="g")
    lots = {a.data.key.lot: a for a in assemble_lots([exp], lambda p: rule)}
    assert _vals(lots["K"].data) == pytest.approx([500.0, 502.0], rel=1e-15)
    assert _vals(lots["Z"].data) == pytest.approx([17.6 * 28.349523125, 17.7 * 28.349523125], rel=1e-15)
    assert _vals(lots["N"].data) == [499.0, 501.0]
    assert [lots[k].data.unit_assumed for k in "KZN"] == [False, False, True]
    assert all(lots[k].data.unit == "g" and lots[k].problem is None for k in "KZN")


def test_values_without_unit_are_judged_in_a_volume_rule() -> None:
    """A file with no unit column under a mL rule is judged in mL (not 'converting g to mL needs a density')."""
    exp = _export("/drop/a.csv", {"lot": ["V"] * 4, "value": [250.1, 249.8, 250.3, 250.0]})
    rule = Rule.adhoc(target=250.0, unit="mL")
    [lot] = assemble_lots([exp], lambda p: rule)
    assert lot.problem is None and lot.data.unit == "mL" and lot.data.unit_assumed is True


def test_mass_to_volume_without_density_is_a_problem_naming_units() -> None:
    """g values under a mL rule without a density cannot be judged: the lot carries the reason."""
    exp = _export("/drop/a.csv", {"lot": ["V"] * 3, "value": [1.0, 2.0, 3.0], "unit": ["g"] * 3})
    [lot] = assemble_lots([exp], lambda p: Rule.adhoc(target=250.0, unit="mL"))
    assert lot.problem is not None and "density" in lot.problem and "mL" in lot.problem


def test_density_converts_mass_to_volume() -> None:
    """With the export's density 1.25 g/mL, 500 g is 400 mL (mass / density)."""
    exp = _export("/drop/a.csv", {"lot": ["V"] * 2, "value": [500.0, 250.0], "unit": ["g"] * 2}, density=1.25)
    [lot] = assemble_lots([exp], lambda p: Rule.adhoc(target=400.0, unit="mL"))
    assert lot.problem is None and _vals(lot.data) == pytest.approx([400.0, 200.0], rel=1e-15)


def test_excluded_rows_stay_nan_in_place_and_are_counted() -> None:
    """Rows with an `excluded` reason are NaN at their place with their head; counted per reason (hand count)."""
    reasons = ["", "blank", "", "not_a_number", "dropped_value", "", "blank", "not_finite"]
    lots = ["A", "A", "B", "A", "B", "A", "B", "A"]
    values = [1.0, math.nan, 2.0, math.nan, math.nan, 3.0, math.nan, math.nan]
    heads = ["H1", "H2", "H1", "H2", "H1", "H2", "H1", "H2"]
    exp = _export("/drop/a.csv", {"lot": lots, "value": values, "head": heads, "unit": ["g"] * 8, "excluded": reasons})
    got = {a.data.key.lot: a.data for a in assemble_lots([exp], lambda p: Rule.adhoc(target=2.0, unit="g"))}
    a, b = got["A"], got["B"]
    assert np.isnan(_vals(a)).tolist() == [False, True, True, False, True]
    assert a.heads == ("H1", "H2", "H2", "H2", "H2")
    # hand count: lot A has one blank, one not_a_number, one not_finite; lot B one dropped_value, one blank
    assert {k: v for k, v in a.excluded_by.items() if v} == {"blank": 1, "not_a_number": 1, "not_finite": 1}
    assert {k: v for k, v in b.excluded_by.items() if v} == {"dropped_value": 1, "blank": 1}
    assert set(a.excluded_by) <= set(EXCLUSION_REASONS)


def test_missing_excluded_column_means_none() -> None:
    """An export without the `excluded` column has no excluded rows."""
    exp = _export("/drop/a.csv", {"lot": ["A"] * 3, "value": [1.0, 2.0, 3.0], "unit": ["g"] * 3})
    [lot] = assemble_lots([exp], lambda p: Rule.adhoc(target=2.0, unit="g"))
    assert sum(lot.data.excluded_by.values()) == 0


def test_unusable_summary_is_a_review_lot_with_its_reason() -> None:
    """A summary record with a `problem` is kept as a lot whose problem says why; the others are fine."""
    exp = _summary_export("/drop/s.csv", {"lot": ["S1", "S2"], "n": [1, 30], "mean": [501.0, 500.2],
                                          "sd": [math.nan, 1.5], "unit": ["g", "kg"],
                                          "problem": ["sd 'nan' is not finite", ""]})
    lots = assemble_lots([exp], lambda p: Rule.adhoc(target=500.0, unit="g"))
    assert [a.data.key.lot for a in lots] == ["S1", "S2"]
    assert lots[0].problem == "the lot summary is not usable: sd 'nan' is not finite"
    assert lots[1].problem is None
    s = lots[1].data.summary
    assert s is not None and s.n == 30
    assert (s.mean, s.sd) == pytest.approx((500200.0, 1500.0), rel=1e-15)   # kg -> g: x 1000 (NIST SP 811)


def _write(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


def test_check_json_counts_excluded_and_assumed_unit(tmp_path: Path) -> None:
    """Through `check --format json`: blank, non-number, non-finite and drop_values rows of a lot are counted
    per reason (hand count), the lot's n and mean are those of its usable values (numpy), unit assumed."""
    cfg = _write(tmp_path / "cfg.toml", '[profiles.t]\nmatch = ["*.csv"]\nmax_bad_rows = 10\n'
                                        'drop_values = ["-9999"]\n')
    usable = [500.1, 499.7, 500.4, 500.0, 499.9, 500.3]
    body = "lot,value\n" + "".join(f"A,{v}\n" for v in usable[:3]) + "A,\nA,abc\nA,inf\nA,-9999\n" + \
        "".join(f"A,{v}\n" for v in usable[3:])
    f = _write(tmp_path / "x.csv", body)
    r = lotwarden("check", str(f), "--config", str(cfg), "--target", "500", "--unit", "g", "--format", "json")
    assert r.code in (0, 1), r.err
    [o] = r.json()
    assert o["excluded"] == 4
    assert o["excluded_by"] == {"blank": 1, "not_a_number": 1, "not_finite": 1, "dropped_value": 1}
    assert o["n"] == 6 and o["mean"] == pytest.approx(float(np.mean(usable)), rel=1e-12)
    assert o["unit_assumed"] is True and o["unit"] == "g"


def test_check_volume_rule_without_unit_column_is_judged(tmp_path: Path) -> None:
    """A mL rule file and an export without a unit column: judged in mL (scipy t-test p), unit_assumed true."""
    from scipy import stats

    rules = tmp_path / "rules"
    rules.mkdir()
    _write(rules / "juice.toml", 'name = "juice"\nproducts = ["JUICE-1L"]\ntarget = 1000.0\nunit = "mL"\n')
    vals = np.random.default_rng(8).normal(1000.5, 2.0, 25).round(1)
    f = _write(tmp_path / "j.csv", "lot,product,value\n" + "".join(f"J1,JUICE-1L,{v}\n" for v in vals))
    [o] = lotwarden("check", str(f), "--rules", str(rules), "--no-normality-gate", "--format", "json").json()
    assert o["unit"] == "mL" and o["unit_assumed"] is True and o["test"] == "t"
    assert o["p_value"] == pytest.approx(stats.ttest_1samp(vals, 1000.0).pvalue, rel=1e-10)  # reference: scipy


def test_check_reports_unusable_summary_as_review(tmp_path: Path) -> None:
    """A summary export with an unusable record (n 1, sd nan) prints that lot as review, not nothing."""
    cfg = _write(tmp_path / "cfg.toml", '[profiles.t]\nmatch = ["*.csv"]\nmax_bad_rows = 10\n')
    f = _write(tmp_path / "s.csv", "lot,n,mean,sd\nS1,1,501.0,nan\nS2,30,500.2,1.5\n")
    r = lotwarden("check", str(f), "--config", str(cfg), "--target", "500", "--format", "json")
    lots = {o["lot"]: o for o in r.json()}
    assert set(lots) == {"S1", "S2"}, r.err
    assert lots["S1"]["verdict"] == "review"
    assert lots["S1"]["reason"].startswith("the lot summary is not usable: ")


def test_rule_without_unit_judges_in_the_exported_unit() -> None:
    """An ad-hoc rule without a unit takes a lot in the unit its values carry; a lot of two units is a problem."""
    exp = _export("/drop/a.csv", {"lot": ["M", "M", "M", "K", "K"], "value": [1.0, 2.0, 3.0, 0.5, 0.6],
                                  "unit": ["kg", "g", "kg", "", "kg"]})
    lots = {a.data.key.lot: a for a in assemble_lots([exp], lambda p: Rule.adhoc(target=1.0, unit=""))}
    assert lots["M"].problem is not None and "--unit" in lots["M"].problem
    assert lots["K"].problem is None and lots["K"].data.unit == "kg"
    assert _vals(lots["K"].data) == [0.5, 0.6]


def test_many_lots_keep_their_own_numbers(tmp_path: Path) -> None:
    """2,300 lots (more than one engine batch of check): each lot's n, mean and p are its own (numpy mean;
    scipy.stats.ttest_1samp on lots around the batch edges and every 97th)."""
    from scipy import stats

    from monitor.commands.check import CHUNK

    rng = np.random.default_rng(5)
    lots = {f"B{i:05d}": rng.normal(500.0 + rng.normal(0, 1), 2.0, 6 + i % 4).round(2) for i in range(2300)}
    f = _write(tmp_path / "many.csv", "lot,value\n" + "".join(f"{k},{v}\n" for k, vals in lots.items()
                                                              for v in vals.tolist()))
    r = lotwarden("check", str(f), "--target", "500", "--unit", "g", "--no-normality-gate", "--format", "json")
    got = r.json()
    assert [o["lot"] for o in got] == list(lots)
    names = list(lots)
    check = set(range(0, len(names), 97)) | {CHUNK - 2, CHUNK - 1, CHUNK, CHUNK + 1}
    for i, o in enumerate(got):
        vals = lots[names[i]]
        assert o["n"] == len(vals) and o["mean"] == pytest.approx(float(np.mean(vals)), rel=1e-12)
        if i in check:
            assert o["p_value"] == pytest.approx(stats.ttest_1samp(vals, 500.0).pvalue, rel=1e-10)  # reference
