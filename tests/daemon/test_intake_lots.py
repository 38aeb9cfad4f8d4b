"""Lots across files in the real store: closing by next lot, marker and idle time; late values; units;
lots with no rule; summary exports; verdict numbers checked against independent references."""

from __future__ import annotations

import csv
import json
import math
import statistics
from pathlib import Path

import pytest
import scipy.stats

CANON = "timestamp,line,product,lot,head,value,unit\n"


def write_export(folder: Path, name: str, rows: list[tuple]) -> Path:
    """rows: (line, product, lot, value, unit); a value of None writes an end-of-lot row "END"."""
    out = []
    for i, r in enumerate(rows):
        if r is None:
            out.append(",,,END,,,")
        else:
            out.append(f"2026-11-30T06:{i // 60:02d}:{i % 60:02d},{r[0]},{r[1]},{r[2]},H{i % 4 + 1},{r[3]},{r[4]}")
    p = folder / name
    p.write_text(CANON + "\n".join(out) + "\n", encoding="utf-8")
    return p


def csv_values(path: Path, lot: str | None = None) -> list[float]:
    """Values of ``path`` (optionally of one lot) read with Python's csv module, independent of the reader."""
    with open(path, newline="", encoding="utf-8") as fh:
        return [float(r["value"]) for r in csv.DictReader(fh)
                if r["value"] and (lot is None or r["lot"] == lot)]


def oat(lot: str, values: list[float], line: str = "L1", product: str = "OAT-500") -> list[tuple]:
    return [(line, product, lot, v, "g") for v in values]


def verdict_rows(store, lot: str) -> list[dict]:
    return [json.loads(r[0]) for r in store.conn.execute(
        "SELECT payload FROM verdicts WHERE lot = ? ORDER BY id", (lot,))]


A_VALUES_1 = [502.6, 501.4, 500.2, 503.2, 499.8, 501.1]
A_VALUES_2 = [504.0, 503.3, 502.9, 505.1]


def test_a_lot_spans_files_and_closes_when_the_next_lot_starts(intake_env) -> None:
    """Values of one lot from two files are judged together, in arrival order, when lot B begins."""
    cfg, store, intake, drop = intake_env
    f1 = write_export(drop, "L1-a.csv", oat("OAT-24A101", A_VALUES_1))
    f2 = write_export(drop, "L1-b.csv", oat("OAT-24A101", A_VALUES_2))
    expected = csv_values(f1) + csv_values(f2)  # Python csv module, arrival order
    assert intake.process(f1).verdicts == ()
    assert intake.process(f2).verdicts == ()
    out = intake.process(write_export(drop, "L1-c.csv", oat("OAT-24A102", [500.0, 500.5])))
    assert out.lots_closed == ("L1/OAT-500/OAT-24A101",)
    (v,) = out.verdicts
    assert v.n == len(expected)
    assert v.mean == pytest.approx(statistics.fmean(expected), rel=1e-12)  # Python statistics module
    lot = store.conn.execute("SELECT state, close_reason, n FROM lots WHERE lot='OAT-24A101'").fetchone()
    assert lot == ("closed", "next-lot", len(expected))
    assert store.conn.execute("SELECT state FROM lots WHERE lot='OAT-24A102'").fetchone() == ("open",)
    row = store.conn.execute("SELECT rule, rule_version, rule_hash, n FROM verdicts").fetchone()
    rule = next(r for r in intake.rules if r.name == "oat-500")
    assert row == ("oat-500", rule.version, rule.content_hash, len(expected))
    audit = [json.loads(r[0]) for r in store.conn.execute("SELECT detail FROM audit WHERE event='verdict'")]
    assert audit[0]["rule_hash"] == rule.content_hash


def test_verdict_numbers_match_scipy(intake_env, engine_ready: bool) -> None:
    """The judged lot's t statistic and p-value equal scipy.stats.ttest_1samp on the same values."""
    assert engine_ready
    cfg, store, intake, drop = intake_env
    f1 = write_export(drop, "L1-a.csv", oat("OAT-24A101", A_VALUES_1))
    f2 = write_export(drop, "L1-b.csv", oat("OAT-24A101", A_VALUES_2))
    values = csv_values(f1) + csv_values(f2)
    intake.process(f1)
    intake.process(f2)
    (v,) = intake.close_idle(idle_seconds_override=0)
    ref = scipy.stats.ttest_1samp(values, 500.0)  # reference: scipy.stats.ttest_1samp, two-sided
    assert v.test == "t"
    assert v.statistic == pytest.approx(ref.statistic, rel=1e-9)
    assert v.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    assert v.verdict == ("hold" if ref.pvalue < 0.05 else "pass")


def test_hold_or_review_alert_carries_verdict_and_values(intake_env) -> None:
    """A lot of a product with no rule gets a review alert naming the product, with its values in order."""
    cfg, store, intake, drop = intake_env
    f = write_export(drop, "L1-x.csv", oat("MX-01", [250.1, 249.8, 250.3], product="MYSTERY-250"))
    intake.process(f)
    (v,) = intake.close_idle(idle_seconds_override=0)
    assert v.verdict == "review" and "MYSTERY-250" in v.reason
    key, payload = store.conn.execute("SELECT dedup_key, payload FROM alerts WHERE kind='review'").fetchone()
    assert key == "review|L1|MYSTERY-250|MX-01|"
    data = json.loads(payload)["data"]
    assert data["values"] == [250.1, 249.8, 250.3]  # as written in the file
    assert data["product"] == "MYSTERY-250" and data["verdict"] == "review"
    # closing again finds nothing open and raises nothing twice
    assert intake.close_idle(idle_seconds_override=0) == []
    assert store.conn.execute("SELECT count(*) FROM alerts").fetchone()[0] == 1


def test_end_of_lot_marker_closes_the_lot(intake_env) -> None:
    """With a profile's end_of_lot text, the marker row closes its lot inside the file (end-marker)."""
    cfg, store, intake, drop = intake_env
    rows = oat("OAT-24A201", A_VALUES_1, line="L4") + [None] + oat("OAT-24A202", [500.0], line="L4")
    out = intake.process(write_export(drop, "L4-oat.csv", rows))
    assert out.lots_closed == ("L4/OAT-500/OAT-24A201",)
    assert store.conn.execute("SELECT close_reason FROM lots WHERE lot='OAT-24A201'").fetchone() == ("end-marker",)
    assert out.verdicts[0].n == len(A_VALUES_1)


def test_idle_lots_close_after_their_rule_idle_minutes(intake_env, clock) -> None:
    """A lot closes once no value arrived for its rule's idle_minutes (30 for OAT-500, 10 for JUICE-1L)."""
    cfg, store, intake, drop = intake_env
    intake.process(write_export(drop, "L1.csv", oat("OAT-24A101", A_VALUES_1)))
    intake.process(write_export(drop, "L3.csv", [("L3", "JUICE-1L", "JC-0901", 1001.0, "mL")] * 5))
    clock.advance(10 * 60 - 1)
    assert intake.close_idle() == []
    clock.advance(1)
    assert [v.key.lot for v in intake.close_idle()] == ["JC-0901"]
    clock.advance(20 * 60)
    assert [v.key.lot for v in intake.close_idle()] == ["OAT-24A101"]
    assert store.conn.execute("SELECT DISTINCT close_reason FROM lots").fetchall() == [("idle",)]


def test_late_values_reopen_a_closed_lot_and_it_is_judged_again(intake_env) -> None:
    """Values for a closed lot are kept: the lot reopens, and its next verdict covers old and late values."""
    cfg, store, intake, drop = intake_env
    intake.process(write_export(drop, "1.csv", oat("OAT-24A101", A_VALUES_1)))
    intake.process(write_export(drop, "2.csv", oat("OAT-24A102", [500.0, 500.2])))
    out = intake.process(write_export(drop, "3.csv", oat("OAT-24A101", A_VALUES_2)))
    assert out.lots_closed == ("L1/OAT-500/OAT-24A102",)
    lot = store.conn.execute("SELECT state, late_values, n FROM lots WHERE lot='OAT-24A101'").fetchone()
    assert lot == ("open", len(A_VALUES_2), len(A_VALUES_1) + len(A_VALUES_2))
    assert store.conn.execute("SELECT count(*) FROM audit WHERE event='lot-reopened'").fetchone()[0] == 1
    intake.close_idle(idle_seconds_override=0)
    judged = verdict_rows(store, "OAT-24A101")
    assert [j["n"] for j in judged] == [len(A_VALUES_1), len(A_VALUES_1) + len(A_VALUES_2)]
    assert judged[1]["mean"] == pytest.approx(statistics.fmean(A_VALUES_1 + A_VALUES_2), rel=1e-12)


def test_mass_is_converted_to_volume_with_the_profile_density(intake_env) -> None:
    """Juice weighed in g is judged in the rule's mL using the profile's density (1.045 g/mL)."""
    cfg, store, intake, drop = intake_env
    grams = [1045.0, 1046.2, 1043.9, 1044.5, 1047.0, 1045.8]
    f = write_export(drop, "L3-juice-0600.csv", [("L3", "JUICE-1L", "JC-0901", g, "g") for g in grams])
    intake.process(f)
    (v,) = intake.close_idle(idle_seconds_override=0)
    assert v.unit == "mL"
    # mL = g / (g/mL): definition of density (SI; NIST SP 811)
    assert v.mean == pytest.approx(statistics.fmean(g / 1.045 for g in grams), rel=1e-12)


def test_unconvertible_units_give_a_review(intake_env) -> None:
    """Grams without a density cannot be judged against a mL rule: review naming the units, values kept."""
    cfg, store, intake, drop = intake_env
    f = write_export(drop, "juice-nodensity.csv", [("L3", "JUICE-1L", "JC-0902", 1045.0, "g")] * 6)
    intake.process(f)
    (v,) = intake.close_idle(idle_seconds_override=0)
    assert v.verdict == "review" and "mL" in v.reason and "density" in v.reason
    assert store.conn.execute("SELECT count(*) FROM lot_values").fetchone()[0] == 6
    assert store.conn.execute("SELECT count(*) FROM alerts WHERE kind='review'").fetchone()[0] == 1


def test_summary_rows_are_lots_of_their_own(intake_env, engine_ready: bool) -> None:
    """Each row of a summary export is judged at once from n, mean and sd."""
    cfg, store, intake, drop = intake_env
    p = drop / "L1-summary.csv"
    p.write_text("lot,product,line,n,mean,sd,unit\nOAT-S1,OAT-500,L1,30,500.4,1.2,g\n"
                 "OAT-S2,OAT-500,L1,30,501.1,1.3,g\n", encoding="utf-8")
    out = intake.process(p)
    assert [v.key.lot for v in out.verdicts] == ["OAT-S1", "OAT-S2"]
    assert "2 lot summaries" in out.describe()
    assert store.conn.execute("SELECT count(*) FROM lot_summaries").fetchone()[0] == 2
    assert store.conn.execute("SELECT count(*) FROM lot_values").fetchone()[0] == 0
    assert store.conn.execute("SELECT count(*) FROM lots").fetchone()[0] == 0
    assert engine_ready
    # one-sample t from summary statistics: t = (mean - target) / (sd / sqrt(n)), df = n - 1;
    # two-sided p from scipy.stats.t.sf (reference library)
    t = (501.1 - 500.0) / (1.3 / math.sqrt(30))
    v = out.verdicts[1]
    assert v.statistic == pytest.approx(t, rel=1e-12)
    assert v.p_value == pytest.approx(2 * scipy.stats.t.sf(abs(t), 29), rel=1e-9)


def test_rule_reload_applies_to_lots_closed_afterwards(intake_env) -> None:
    """set_rules swaps the rule set; the next verdict names the new rule version."""
    cfg, store, intake, drop = intake_env
    intake.process(write_export(drop, "1.csv", oat("OAT-24A101", A_VALUES_1)))
    new_rule = next(r for r in intake.rules if r.name == "oat-500").replace(content_hash="f" * 64)
    intake.set_rules([r if r.name != "oat-500" else new_rule for r in intake.rules])
    (v,) = intake.close_idle(idle_seconds_override=0)
    assert store.conn.execute("SELECT rule_version FROM verdicts").fetchone() == ("f" * 12,)


def csv_groups(path: Path) -> dict[tuple[str, str, str], list[tuple[float, int]]]:
    """(line, product, lot) -> [(value, file line)] in file order, read with Python's csv module."""
    out: dict[tuple[str, str, str], list[tuple[float, int]]] = {}
    with open(path, newline="", encoding="utf-8") as fh:
        for i, r in enumerate(csv.DictReader(fh)):
            out.setdefault((r["line"], r["product"], r["lot"]), []).append((float(r["value"]), i + 2))
    return out


def test_values_across_insert_windows_keep_their_lot_and_order(intake_env, monkeypatch) -> None:
    """With a 7-row insert window and 5-row fetches, interleaved lots on two lines keep every value, in
    order, with its file line; each lot's seq runs 1..n."""
    from monitor.daemon import accumulate, judge

    monkeypatch.setattr(accumulate, "CHUNK_ROWS", 7)  # a smaller setting, so windows split segments
    monkeypatch.setattr(judge, "FETCH_ROWS", 5)
    cfg, store, intake, drop = intake_env
    rows = []
    for i in range(10):
        rows += oat("OAT-24A301", [500.0 + i / 10])
        rows.append(("L2", "JAM-340", "J-5530", 340.0 + i / 10, "g"))
    rows += oat("OAT-24A302", [501.0 + i / 10 for i in range(13)])
    f = write_export(drop, "L1-L2-mixed.csv", rows)
    expected = csv_groups(f)  # read before intake moves the file to the archive
    out = intake.process(f)
    assert out.status == "taken" and out.n_values == len(rows)
    assert out.lots_closed == ("L1/OAT-500/OAT-24A301",)
    got: dict[tuple[str, str, str], list[tuple[float, int]]] = {}
    for line, product, lot, seq, value, src in store.conn.execute(
            "SELECT line, product, lot, seq, value, source_line FROM lot_values ORDER BY lot_id, seq"):
        got.setdefault((line, product, lot), []).append((value, src))
        assert seq == len(got[(line, product, lot)])
    assert got == expected
    # the closed lot was judged over its ten values: mean as computed by the standard library
    assert out.verdicts[0].n == 10
    assert out.verdicts[0].mean == pytest.approx(statistics.fmean(500.0 + i / 10 for i in range(10)), rel=1e-12)


@pytest.mark.parametrize("recent_max", [10_000, 3])
def test_a_lot_closed_in_the_same_batch_is_judged_like_scipy(intake_env, monkeypatch, engine_ready: bool,
                                                             recent_max: int) -> None:
    """A lot stored and closed within one batch (from memory, or read back when longer than the memory
    limit) gets the t statistic and p-value of scipy.stats.ttest_1samp and names its files in order."""
    assert engine_ready
    from monitor.daemon import judge

    monkeypatch.setattr(judge, "RECENT_LOT_MAX", recent_max)
    cfg, store, intake, drop = intake_env
    f1 = write_export(drop, "1-a.csv", oat("OAT-24A101", A_VALUES_1))
    f2 = write_export(drop, "2-a.csv", oat("OAT-24A101", A_VALUES_2))
    f3 = write_export(drop, "3-b.csv", oat("OAT-24A102", [500.0, 500.1]))
    values = csv_values(f1) + csv_values(f2)
    outs = intake.process_batch([f1, f2, f3])
    (v,) = outs[2].verdicts
    ref = scipy.stats.ttest_1samp(values, 500.0)  # reference: scipy.stats.ttest_1samp, two-sided
    assert v.n == len(values)
    assert v.statistic == pytest.approx(ref.statistic, rel=1e-9)
    assert v.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    # issue 7 §3: a verdict names its files where they now lie (the archive), in arrival order
    day = Path(cfg.state.archive) / "2026-11-30"   # the test clock's UTC date
    assert v.files == (str(day / f1.name), str(day / f2.name))
    assert all(Path(f).exists() for f in v.files) and not f1.exists() and not f2.exists()
    assert {h.head for h in v.heads} == {"H1", "H2", "H3", "H4"}  # written by write_export


def test_mixed_units_in_one_lot_are_converted_row_by_row(intake_env) -> None:
    """A lot with values in g and in kg is judged in the rule's g, each value converted by its own unit."""
    cfg, store, intake, drop = intake_env
    rows = [("L1", "OAT-500", "OAT-24A401", 500.2, "g"), ("L1", "OAT-500", "OAT-24A401", 0.5011, "kg"),
            ("L1", "OAT-500", "OAT-24A401", 499.7, "g"), ("L1", "OAT-500", "OAT-24A401", 0.5003, "kg"),
            ("L1", "OAT-500", "OAT-24A401", 500.9, "g")]
    intake.process(write_export(drop, "L1-units.csv", rows))
    (v,) = intake.close_idle(idle_seconds_override=0)
    assert v.unit == "g" and v.n == 5
    # 1 kg = 1000 g (SI; NIST SP 811)
    assert v.mean == pytest.approx(statistics.fmean([500.2, 501.1, 499.7, 500.3, 500.9]), rel=1e-12)


def test_lot_codes_from_arrow_text_object_columns_and_gaps() -> None:
    """Rows get one code per (line, product, lot): Arrow-backed text, plain Python objects and missing
    values ("" for a missing text, as the policy says) all give the same lots."""
    import numpy as np
    import pandas as pd

    from monitor.daemon.accumulate import lot_codes
    from monitor.lot import LotKey

    lines = ["L1", "L1", "L2", "L1", None, "L1"]
    prods = ["OAT-500"] * 6
    lotcodes = ["A", "A", "A", "B", "A", "B"]
    for dtype in ("str", object):
        df = pd.DataFrame({"line": pd.Series(lines, dtype=dtype), "product": pd.Series(prods, dtype=dtype),
                           "lot": pd.Series(lotcodes, dtype=dtype)})
        codes, keys = lot_codes(df, 6)
        got = [keys[c] for c in np.asarray(codes).tolist()]
        assert got == [LotKey(ln or "", p, lt) for ln, p, lt in zip(lines, prods, lotcodes)]
    # a frame without a line column is one line, ""; one lot in the whole file is one code
    codes, keys = lot_codes(pd.DataFrame({"lot": pd.Series(["X1"] * 3, dtype="str")}), 3)
    assert np.asarray(codes).tolist() == [0, 0, 0] and keys == [LotKey("", "", "X1")]
