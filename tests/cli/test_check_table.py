"""`check` table: df as JSON has it, p shown on the side of alpha that decided, no None, assumed units, excluded."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from .conftest import lotwarden


def _row(out: str, lot: str) -> list[str]:
    """The cells of a lot's table row (cells are separated by two or more spaces)."""
    import re

    for line in out.splitlines():
        cells = re.split(r"\s{2,}", line.strip())
        if len(cells) > 2 and cells[1] == lot:
            return cells
    raise AssertionError(f"no row for lot {lot!r} in:\n{out}")


def _header(out: str) -> list[str]:
    import re

    return re.split(r"\s{2,}", out.splitlines()[0].strip())


def _lot_with_p(p_target: float, n: int, seed: int = 3) -> np.ndarray:
    """n values around 500 whose two-sided one-sample t-test against 500 has p close to ``p_target``
    (scipy.stats.t.isf gives the t statistic; the values are a standardised sample shifted to it)."""
    z = np.random.default_rng(seed).standard_normal(n)
    z = (z - z.mean()) / z.std(ddof=1)
    t = stats.t.isf(p_target / 2, n - 1)
    return 500.0 + z + t / math.sqrt(n)


def test_df_and_p_just_below_alpha(tmp_path: Path) -> None:
    """A hold at alpha 0.01 with p = 0.00997 (scipy) shows df 30 and a p that reads below 0.01, never 0.0100."""
    values = _lot_with_p(0.00997, 31)
    ref = stats.ttest_1samp(values, 500.0)                      # reference: scipy
    assert 0.00995 <= ref.pvalue < 0.01                        # the case where 4 decimals print 0.0100
    f = tmp_path / "x.csv"
    f.write_text("lot,value\n" + "".join(f"A1,{v!r}\n" for v in values.tolist()))
    r = lotwarden("check", str(f), "--target", "500", "--unit", "g", "--alpha", "0.01", "--no-normality-gate")
    assert r.code == 1, r.err
    head, row = _header(r.out), _row(r.out, "A1")
    cell = dict(zip(head, row, strict=False))
    assert cell["df"] == "30"                                   # n - 1 = 30 (JSON prints 30.0)
    assert cell["verdict"] == "HOLD"
    shown, side, alpha = cell["p vs alpha"].split()
    assert side == "<" and alpha == "0.01"
    assert float(shown) < 0.01 and float(shown) == pytest.approx(ref.pvalue, rel=1e-2)
    assert "0.0100" not in cell["p vs alpha"]


@pytest.mark.parametrize("p,alpha", [(0.00997, 0.01), (0.0100004, 0.01), (0.049996, 0.05), (0.01, 0.01),
                                     (3.2e-12, 0.05), (0.41, 0.05), (0.9999999, 0.05)])
def test_p_text_is_on_the_side_of_alpha_that_decided(p: float, alpha: float) -> None:
    """The printed p, read back as a number, compares with alpha as p does (hold iff p < alpha)."""
    from monitor.commands.check import p_vs_alpha

    shown, side, a = p_vs_alpha(p, alpha).split()
    assert float(a) == alpha
    assert side == ("<" if p < alpha else "≥")
    assert (float(shown) < alpha) == (p < alpha)
    assert float(shown) == pytest.approx(p, rel=5e-3)


def test_table_has_no_none_or_nan_and_marks_assumed_unit_and_excluded(tmp_path: Path) -> None:
    """Lots of every kind (tested, too small, no rule, unusable summary, excluded rows) print no None or nan;
    a lot whose values carried no unit says so, and excluded rows are shown with their count (hand count)."""
    rules = tmp_path / "rules"
    rules.mkdir()
    (rules / "oat.toml").write_text('name = "oat"\nproducts = ["OAT-500"]\ntarget = 500.0\nunit = "g"\n'
                                    "min_n = 5\n")
    cfg = tmp_path / "cfg.toml"
    cfg.write_text('[profiles.t]\nmatch = ["*.csv"]\nmax_bad_rows = 10\n')
    rng = np.random.default_rng(21)
    good = rng.normal(500.0, 1.0, 12).round(1)
    lines = ["lot,product,value"] + [f"G1,OAT-500,{v}" for v in good] + ["G1,OAT-500,", "G1,OAT-500,x"]
    lines += ["S1,OAT-500,500.2", "S1,OAT-500,499.9"]                       # too small: review
    lines += [f"R1,RYE-750,{v}" for v in good]                              # no rule: review
    (tmp_path / "v.csv").write_text("\n".join(lines) + "\n")
    (tmp_path / "s.csv").write_text("lot,product,n,mean,sd\nU1,OAT-500,1,501.0,nan\nU2,OAT-500,30,500.1,1.2\n")
    r = lotwarden("check", str(tmp_path / "v.csv"), str(tmp_path / "s.csv"), "--rules", str(rules),
                  "--config", str(cfg))
    assert r.code == 1, r.err
    assert "None" not in r.out
    head = _header(r.out)
    cells = {lot: dict(zip(head, _row(r.out, lot), strict=False)) for lot in ("G1", "S1", "R1", "U1", "U2")}
    for lot, row in cells.items():           # a reason may quote a raw cell ('nan'); the numbers never show it
        assert not {"nan", "NaN", "None", "inf", ""} & set(row.values()), (lot, row)
        assert len(row) == len(head), (lot, row)
    assert "unit assumed (g)" in cells["G1"]["notes"]
    assert "2 excluded (1 blank, 1 not a number)" in cells["G1"]["notes"]
    assert cells["G1"]["n"] == "12" and cells["G1"]["df"] == "11"
    assert cells["R1"]["verdict"] == "REVIEW" and cells["U1"]["verdict"] == "REVIEW"
    assert "5 lots" in r.out
