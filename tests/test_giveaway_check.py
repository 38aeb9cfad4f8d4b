"""Giveaway end to end through `lotwarden check`: JSON figures against the values written into the export,
with and without a nominal quantity and a cost per unit; the table says it in words; bad cost keys exit 2."""

from __future__ import annotations

import json
import math
import statistics
import subprocess
import sys
from pathlib import Path

import pytest

HEADER = "timestamp,line,product,lot,head,value,unit\n"
# Brackenfield line L1: an over-filled OAT-500 lot, an under-filled one, and a JAM-340 lot judged by a rule
# with neither nominal nor cost.
OAT_OVER = [502.6, 501.9, 503.4, 502.2, 501.7, 502.8, 503.1, 502.4, 501.5, 502.9, 503.6, 502.0]
OAT_UNDER = [499.2, 498.7, 499.8, 498.4, 499.5, 498.9, 499.1, 498.6]
JAM = [343.1, 342.6, 341.9, 343.4, 342.8, 342.2, 343.0]
OAT_RULE = """\
name = "oat-500"
products = ["OAT-500"]
target = 502.0
nominal = 500.0
unit = "g"
cost_per_unit = 0.0042
currency = "EUR"
"""
JAM_RULE = """\
name = "jam-340"
products = ["JAM-340"]
target = 342.0
unit = "g"
"""


def rows(product: str, lot: str, values: list[float], start: int) -> str:
    return "".join(f"2026-11-30T06:{(start + i) // 60:02d}:{(start + i) % 60:02d},L1,{product},{lot},H1,{v!r},g\n"
                   for i, v in enumerate(values))


def check(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "monitor", "check", *args], capture_output=True, text=True,
                          timeout=120)


@pytest.fixture
def plant(tmp_path: Path) -> tuple[Path, Path]:
    rules = tmp_path / "rules"
    rules.mkdir()
    (rules / "oat-500.toml").write_text(OAT_RULE, encoding="utf-8")
    (rules / "jam-340.toml").write_text(JAM_RULE, encoding="utf-8")
    export = tmp_path / "L1-2026-11-30.csv"
    export.write_text(HEADER + rows("OAT-500", "A1", OAT_OVER, 0) + rows("OAT-500", "A2", OAT_UNDER, 20)
                      + rows("JAM-340", "J1", JAM, 40), encoding="utf-8")
    return export, rules


def expected(values: list[float], reference: float, cost_per_unit: float | None = None) -> dict[str, float]:
    """Giveaway as defined for lotwarden (mean − reference per pack, × n in all, × cost per unit), computed
    here from the written values with statistics.fmean / math.fsum (common practice, no source)."""
    per_pack = statistics.fmean(values) - reference
    total = math.fsum(v - reference for v in values)
    out = {"per_pack": per_pack, "total": total}
    if cost_per_unit is not None:
        out["cost"] = total * cost_per_unit
    return out


def test_json_giveaway_against_nominal_with_cost_and_against_target_without(plant: tuple[Path, Path]) -> None:
    export, rules = plant
    r = check(str(export), "--rules", str(rules), "--format", "json")
    assert r.returncode in (0, 1), r.stderr
    lots = {v["lot"]: v for v in json.loads(r.stdout)}
    for lot, values, ref, cost in (("A1", OAT_OVER, 500.0, 0.0042), ("A2", OAT_UNDER, 500.0, 0.0042),
                                   ("J1", JAM, 342.0, None)):
        got = lots[lot]["giveaway"]
        want = expected(values, ref, cost)
        assert set(got) == (set(want) | {"currency"} if cost is not None else set(want)), got
        for key, value in want.items():
            assert got[key] == pytest.approx(value, rel=1e-9, abs=1e-9), (lot, key)
        if cost is not None:
            assert got["currency"] == "EUR"
    assert lots["A2"]["giveaway"]["per_pack"] < 0 < lots["A1"]["giveaway"]["per_pack"]


def shown(x: float, digits: int = 3) -> str:
    """``x`` rounded to ``digits`` decimals, trailing zeros dropped, sign always shown (the table's style)."""
    text = f"{x:+.{digits}f}".rstrip("0").rstrip(".")
    return text


def test_table_shows_giveaway_per_pack_in_all_and_its_cost(plant: tuple[Path, Path]) -> None:
    export, rules = plant
    r = check(str(export), "--rules", str(rules))
    assert r.returncode in (0, 1), r.stderr
    over, under, jam = (expected(v, ref, c) for v, ref, c in ((OAT_OVER, 500.0, 0.0042),
                                                              (OAT_UNDER, 500.0, 0.0042), (JAM, 342.0, None)))
    lines = r.stdout.splitlines()
    assert "giveaway" in lines[0].split()
    said = [line.strip() for line in lines[2:] if "giveaway " in line]
    assert said == [
        f"giveaway {shown(over['per_pack'])} g per pack above nominal 500 g, {shown(over['total'])} g over "
        f"12 packs (cost {shown(over['cost'], 4)} EUR)",
        f"under-filled: giveaway {shown(under['per_pack'])} g per pack below nominal 500 g, "
        f"{shown(under['total'])} g over 8 packs (cost {shown(under['cost'], 4)} EUR)",
        f"giveaway {shown(jam['per_pack'])} g per pack above target 342 g, {shown(jam['total'])} g over 7 packs",
    ], r.stdout
    # the per-pack column beside the lot's numbers
    a1 = next(line for line in lines if " A1 " in line)
    assert f" {shown(over['per_pack'])} g " in a1, a1


@pytest.mark.parametrize(("line", "says"), [
    ("cost_per_unit = -0.004", "must be >= 0"),
    ("cost_per_unit = inf", "must be a finite number"),
    ("cost_per_unit = nan", "must be a finite number"),
    ('cost_per_unit = "cheap"', "must be a finite number"),
])
def test_bad_cost_per_unit_exits_2_naming_file_and_key(plant: tuple[Path, Path], line: str, says: str) -> None:
    export, rules = plant
    bad = rules / "oat-500.toml"
    bad.write_text(OAT_RULE.replace("cost_per_unit = 0.0042", line), encoding="utf-8")
    r = check(str(export), "--rules", str(rules), "--format", "json")
    assert r.returncode == 2
    err = r.stderr.strip()
    assert err.startswith("lotwarden: ") and str(bad) in err and "cost_per_unit" in err and says in err, err
    assert "Traceback" not in r.stderr and len(err.splitlines()) == 1


def test_currency_without_cost_per_unit_is_an_error(plant: tuple[Path, Path]) -> None:
    export, rules = plant
    bad = rules / "jam-340.toml"
    bad.write_text(JAM_RULE + 'currency = "EUR"\n', encoding="utf-8")
    r = check(str(export), "--rules", str(rules), "--format", "json")
    assert r.returncode == 2
    err = r.stderr.strip()
    assert str(bad) in err and "currency" in err and "cost_per_unit" in err and "Traceback" not in err, err
