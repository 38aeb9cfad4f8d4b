"""`lotwarden check`: JSON numbers against scipy, exit codes, errors, rule files and overrides."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from .conftest import lotwarden


def _write_lots(path: Path, lots: dict[str, np.ndarray], product: str = "OAT-500") -> None:
    lines = ["lot,product,value"]
    for lot, values in lots.items():
        lines += [f"{lot},{product},{float(v)!r}" for v in values]
    path.write_text("\n".join(lines) + "\n")


@pytest.mark.parametrize("alternative", ["two-sided", "less", "greater"])
def test_json_matches_scipy_ttest(tmp_path: Path, alternative: str) -> None:
    """Every number in the JSON equals scipy.stats.ttest_1samp for each lot (reference library, rel 1e-10)."""
    rng = np.random.default_rng(7)
    lots = {f"A{i}": rng.normal(500 + shift, 2.0, size=n)
            for i, (shift, n) in enumerate([(0.0, 12), (-1.5, 30), (1.2, 25), (0.3, 60)])}
    f = tmp_path / "export.csv"
    _write_lots(f, lots)
    r = lotwarden("check", str(f), "--target", "500", "--alternative", alternative, "--alpha", "0.05",
                  "--no-normality-gate", "--format", "json")
    assert r.code in (0, 1), r.err
    got = {o["lot"]: o for o in r.json()}
    assert set(got) == set(lots)
    for lot, values in lots.items():
        o = got[lot]
        # reference: scipy.stats.ttest_1samp and its confidence_interval
        ref = stats.ttest_1samp(values, 500.0, alternative=alternative)
        ci = ref.confidence_interval(0.95)
        assert o["test"] == "t"
        assert o["n"] == len(values)
        assert o["df"] == len(values) - 1
        assert o["mean"] == pytest.approx(np.mean(values), rel=1e-12)
        assert o["sd"] == pytest.approx(np.std(values, ddof=1), rel=1e-10)
        assert o["statistic"] == pytest.approx(ref.statistic, rel=1e-10)
        assert o["p_value"] == pytest.approx(ref.pvalue, rel=1e-10)
        for key, bound in (("ci_low", ci.low), ("ci_high", ci.high)):
            if math.isinf(bound):
                assert o[key] is None
            else:
                assert o[key] == pytest.approx(bound, rel=1e-10)
        assert o["verdict"] == ("hold" if ref.pvalue < 0.05 else "pass")
        assert o["file"] == str(f)
        assert o["alternative"] == alternative and o["alpha"] == 0.05 and o["target"] == 500.0


def test_exit_codes_pass_hold(tmp_path: Path) -> None:
    """Exit 0 when every lot passes, 1 when a lot is held."""
    rng = np.random.default_rng(11)
    ok = tmp_path / "ok.csv"
    _write_lots(ok, {"L1": 500 + rng.standard_normal(40)})
    low = tmp_path / "low.csv"
    _write_lots(low, {"L2": 497 + rng.standard_normal(40)})
    assert lotwarden("check", str(ok), "--target", "500").code == 0
    r = lotwarden("check", str(low), "--target", "500", "--format", "json")
    assert r.code == 1 and r.json()[0]["verdict"] == "hold"


def test_too_small_lot_is_review_not_a_test(tmp_path: Path) -> None:
    """Below min_n the verdict is review with a reason, never a t verdict."""
    f = tmp_path / "small.csv"
    _write_lots(f, {"S1": np.array([490.0, 491.0, 489.5])})
    r = lotwarden("check", str(f), "--target", "500", "--min-n", "5", "--format", "json")
    assert r.code == 1
    o = r.json()[0]
    assert o["verdict"] == "review" and o["reason"]


def test_unreadable_file_exit_2_names_file(tmp_path: Path) -> None:
    """A file with no usable rows gives exit 2 and a stderr message naming it; no traceback."""
    bad = tmp_path / "garbage.csv"
    bad.write_text("lot,value\nA,abc\nA,def\n")
    r = lotwarden("check", str(bad), "--target", "500")
    assert r.code == 2
    assert "garbage.csv" in r.err and "Traceback" not in r.err


def test_missing_file_exit_2(tmp_path: Path) -> None:
    """A path that does not exist is named on stderr with exit 2."""
    r = lotwarden("check", str(tmp_path / "nope.csv"), "--target", "500")
    assert r.code == 2 and "nope.csv" in r.err


def test_bad_alpha_is_usage_error(tmp_path: Path) -> None:
    """An out-of-range --alpha is refused with exit 2 and the allowed range."""
    f = tmp_path / "x.csv"
    _write_lots(f, {"A": np.arange(10.0)})
    r = lotwarden("check", str(f), "--target", "5", "--alpha", "1.5")
    assert r.code == 2 and "(0, 0.5]" in r.err and "Traceback" not in r.err


def test_no_target_anywhere_is_usage_error(tmp_path: Path) -> None:
    """Without --target, --rules or a rules folder there is nothing to judge against: exit 2."""
    f = tmp_path / "x.csv"
    _write_lots(f, {"A": np.arange(10.0)})
    r = lotwarden("check", str(f), cwd=tmp_path)
    assert r.code == 2 and "target" in r.err


def test_rules_folder_and_unknown_key(tmp_path: Path) -> None:
    """A rule file with a typo'd key is rejected naming file and key (exit 2)."""
    rules = tmp_path / "rules"
    rules.mkdir()
    (rules / "r.toml").write_text('name = "r"\ntarget = 500\nunit = "g"\nalpah = 0.01\n')
    f = tmp_path / "x.csv"
    _write_lots(f, {"A": np.arange(10.0)})
    r = lotwarden("check", str(f), "--rules", str(rules))
    assert r.code == 2 and "r.toml" in r.err and "alpah" in r.err


def test_rule_file_drives_the_test_and_flags_override(tmp_path: Path) -> None:
    """A rule's target/alternative/alpha are used; a flag given beside --rules overrides the rule's key."""
    rules = tmp_path / "rules"
    rules.mkdir()
    (rules / "oat.toml").write_text('name = "oat"\nproducts = ["OAT-500"]\ntarget = 503.0\nunit = "g"\n'
                                    'alternative = "less"\nalpha = 0.01\nmin_n = 5\n')
    rng = np.random.default_rng(3)
    values = rng.normal(502.0, 1.5, size=30)
    f = tmp_path / "x.csv"
    _write_lots(f, {"A": values})
    o = lotwarden("check", str(f), "--rules", str(rules), "--no-normality-gate", "--format", "json").json()[0]
    ref = stats.ttest_1samp(values, 503.0, alternative="less")  # reference: scipy
    assert o["rule"] == "oat" and o["alternative"] == "less" and o["alpha"] == 0.01
    assert o["p_value"] == pytest.approx(ref.pvalue, rel=1e-10)
    o2 = lotwarden("check", str(f), "--rules", str(rules), "--target", "502", "--no-normality-gate",
                   "--format", "json").json()[0]
    ref2 = stats.ttest_1samp(values, 502.0, alternative="less")  # reference: scipy
    assert o2["target"] == 502.0 and o2["p_value"] == pytest.approx(ref2.pvalue, rel=1e-10)


def test_product_without_rule_is_review(tmp_path: Path) -> None:
    """A product no rule matches is a review naming the product, never a silent skip."""
    rules = tmp_path / "rules"
    rules.mkdir()
    (rules / "oat.toml").write_text('name = "oat"\nproducts = ["OAT-500"]\ntarget = 503.0\nunit = "g"\n')
    f = tmp_path / "x.csv"
    _write_lots(f, {"B": np.linspace(1, 2, 10)}, product="RICE-1K")
    r = lotwarden("check", str(f), "--rules", str(rules), "--format", "json")
    o = r.json()[0]
    assert r.code == 1 and o["verdict"] == "review" and "RICE-1K" in o["reason"]


def test_known_sd_gives_z_test(tmp_path: Path) -> None:
    """--known-sd switches to the z-test: statistic (mean-target)/(sigma/sqrt n), normal p (scipy.stats.norm)."""
    rng = np.random.default_rng(5)
    values = rng.normal(999.0, 2.5, size=20)
    f = tmp_path / "x.csv"
    _write_lots(f, {"J": values})
    o = lotwarden("check", str(f), "--target", "1000", "--known-sd", "2.5", "--alternative", "less",
                  "--format", "json").json()[0]
    z = (np.mean(values) - 1000.0) / (2.5 / math.sqrt(20))
    assert o["test"] == "z" and o["df"] is None
    assert o["statistic"] == pytest.approx(z, rel=1e-10)
    assert o["p_value"] == pytest.approx(stats.norm.cdf(z), rel=1e-10)  # reference: scipy.stats.norm


def test_table_output_has_caution_and_reasons(tmp_path: Path) -> None:
    """The table shows each lot with its verdict and ends with the legal caution."""
    f = tmp_path / "x.csv"
    _write_lots(f, {"A1": 500 + np.random.default_rng(1).standard_normal(20)})
    r = lotwarden("check", str(f), "--target", "500")
    assert "A1" in r.out and "PASS" in r.out and "competent authority" in r.out


def test_a_folder_stands_for_its_files(tmp_path: Path) -> None:
    """`check DIR` judges every export file in the folder, as if each were named."""
    rng = np.random.default_rng(12)
    _write_lots(tmp_path / "a.csv", {"A": 500 + rng.standard_normal(20)})
    _write_lots(tmp_path / "b.csv", {"B": 500 + rng.standard_normal(20)})
    r = lotwarden("check", str(tmp_path), "--target", "500", "--format", "json")
    assert r.code in (0, 1), r.err
    assert sorted(o["lot"] for o in r.json()) == ["A", "B"]
