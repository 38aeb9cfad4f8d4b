"""Unusable lot-summary records are reported as `review` lots with their reason, never left out."""

from __future__ import annotations

from pathlib import Path

import pytest
from scipy import stats

HEADER = "lot,product,line,n,mean,sd,unit\n"


def test_every_summary_record_is_in_the_output(tmp_path: Path, cli) -> None:
    """A record of n = 1 with sd nan and one with a negative sd are review lots; the good record is judged
    as scipy would (t from n, mean, sd); the file is not rejected for them."""
    f = tmp_path / "summaries.csv"
    f.write_text(HEADER + "S-1,SY,L3,1,751.0,nan,mL\nS-2,SY,L3,40,751.0,-2,mL\nS-3,SY,L3,40,751.2,1.9,mL\n",
                 encoding="utf-8")
    r = cli("check", str(f), "--target", "752", "--unit", "mL", "--format", "json")
    assert r.code == 1, r.err
    lots = {d["lot"]: d for d in r.json()}
    assert set(lots) == {"S-1", "S-2", "S-3"}
    assert lots["S-1"]["verdict"] == "review" and "not usable" in lots["S-1"]["reason"]
    assert lots["S-2"]["verdict"] == "review" and "negative" in lots["S-2"]["reason"]
    # t = (mean - target) / (sd / sqrt(n)), two-sided p from Student's t with n - 1 df (scipy.stats.t)
    t = (751.2 - 752.0) / (1.9 / 40 ** 0.5)
    assert lots["S-3"]["p_value"] == pytest.approx(2 * stats.t.sf(abs(t), 39), rel=1e-10)


def test_a_file_of_only_unusable_records_still_lists_them(tmp_path: Path, cli) -> None:
    """A summary file whose only record is unusable gives that record as a review lot, not a file error."""
    f = tmp_path / "one.csv"
    f.write_text(HEADER + "S-9,SY,L3,1,751.0,nan,mL\n", encoding="utf-8")
    r = cli("check", str(f), "--target", "752", "--unit", "mL", "--format", "json")
    assert r.code == 1, r.err
    (lot,) = r.json()
    assert (lot["lot"], lot["verdict"]) == ("S-9", "review")
