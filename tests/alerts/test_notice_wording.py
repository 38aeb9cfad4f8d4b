"""Notices say exactly what happened: verdict-changed notices, plurals, no "None", p-values beside alpha,
unit, exclusions, Wilcoxon method and average quantity shown."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from scipy import stats

from monitor.alerts.compose import build_message
from monitor.alerts.headers import clean_header_text
from monitor.alerts.templates import TemplateSet, message_context
from monitor.engine import evaluate
from monitor.lot import LotData, LotKey, unjudged
from monitor.rulebook import Rule

# An invented Brackenfield Foods lot on line L2: eight short fills, then fourteen late values around target.
FIRST = [497.8, 498.4, 497.1, 498.9, 497.6, 498.2, 497.9, 498.6]
LATE = [500.3, 501.9, 499.2, 502.8, 500.6, 501.1, 499.9, 502.5, 500.4, 501.2, 503.8, 500.6, 501.4, 502.0]
KEY = LotKey("L2", "OAT-500", "C1")
RULE = Rule.adhoc(name="oat-500", target=500.0, alpha=0.05, min_n=5)
FIRST_FILE = "state/archive/2026-12-01/L2-oat-2100.csv"
LATE_FILE = "state/archive/2026-12-01/L2-oat-late-2230.csv"


def render(kind: str, data: dict[str, Any], *, line: str = "L2", product: str = "OAT-500", lot: str = "C1",
           extra: list[dict[str, Any]] | None = None) -> Any:
    items = [{"kind": kind, "dedup_key": f"{kind}|{lot}", "created_at": "2026-12-01T22:40:00+00:00", "line": line,
              "product": product, "lot": lot, "data": data, "chart_cid": None}] + (extra or [])
    ctx = message_context(items, folded=False, generated_at="2026-12-01T22:40:05+00:00")
    return TemplateSet.load().render("group" if len(items) > 1 else kind, ctx)


def changed_payload() -> tuple[dict[str, Any], Any, Any]:
    """(verdict-changed data from two real verdicts, the earlier verdict, the new verdict)."""
    before = evaluate(LotData(key=KEY, values=np.array(FIRST), files=(FIRST_FILE,), unit="g"), RULE)
    after = evaluate(LotData(key=KEY, values=np.array(FIRST + LATE), files=(FIRST_FILE, LATE_FILE), unit="g"), RULE)
    data = after.to_json()
    data["values"] = FIRST + LATE
    data["previous"] = {"verdict": before.verdict, "decided_at": "2026-12-01T21:05:00+00:00",
                        "reason": before.reason, "rule": before.rule, "rule_version": before.rule_version,
                        "n": before.n, "mean": before.mean, "p_value": before.p_value}
    data["why"] = f"14 late values from {LATE_FILE} reopened the lot"
    return data, before, after


def test_verdict_changed_notice_says_which_verdict_replaces_which_when_and_why():
    """Subject, text and HTML name the earlier and the new verdict, when each was decided and what reopened
    the lot; the numbers are those of scipy on the same values."""
    data, before, after = changed_payload()
    assert (before.verdict, after.verdict) == ("hold", "pass")            # the invented lot is built so
    r = render("verdict-changed", data)
    assert clean_header_text(r.subject) == "[lotwarden] verdict changed L2 OAT-500 lot C1: HOLD replaced by PASS"
    ref_before = stats.ttest_1samp(FIRST, 500.0)                           # reference: scipy.stats
    ref_after = stats.ttest_1samp(FIRST + LATE, 500.0)
    assert ref_before.pvalue < 1e-4 and 0.05 < ref_after.pvalue < 0.9995  # so the printed forms below hold
    text = r.text
    for needle in ("HOLD replaced by PASS",
                   "Earlier:    HOLD, decided 2026-12-01T21:05:00+00:00: " + before.reason,
                   f"(n = {len(FIRST)}, mean {np.mean(FIRST):.2f} g, p < 0.0001; rule oat-500 version {RULE.version})",
                   "Now:        PASS, decided 2026-12-01T22:40:00+00:00; it replaces the earlier verdict",
                   f"Reopened:   14 late values from {LATE_FILE} reopened the lot",
                   f"Lot size:   n = {len(FIRST) + len(LATE)}",
                   f"Mean:       {np.mean(FIRST + LATE):.2f} g against target 500.00 g",
                   f"p-value:    {ref_after.pvalue:.4f} against alpha 0.05",
                   f"Files:      {FIRST_FILE}, {LATE_FILE}",
                   "competent authority"):
        assert needle in text, needle
    html = r.html
    for needle in ("HOLD replaced by PASS", "2026-12-01T21:05:00+00:00", LATE_FILE, "replaces the earlier verdict",
                   f"{ref_after.pvalue:.4f}", "competent authority"):
        assert needle in html, needle


def test_verdict_changed_message_carries_the_chart_of_the_rejudged_lot():
    """The built message of a verdict-changed alert has its subject, both parts and the lot's PNG chart."""
    from monitor.alerts.alert import Alert

    data, _, _ = changed_payload()
    a = Alert(kind="verdict-changed", dedup_key="verdict-changed|L2|OAT-500|C1", created_at="2026-12-01T22:40:00+00:00",
              data=data, line="L2", product="OAT-500", lot="C1")
    ts = TemplateSet.load()
    msg = build_message([a], sender="lotwarden@brackenfield.example", recipients=("qa@brackenfield.example",),
                        now=1_796_165_000.0, folded=False, templates=ts, shipped=ts)
    assert msg["Subject"] == "[lotwarden] verdict changed L2 OAT-500 lot C1: HOLD replaced by PASS"
    pngs = [p for p in msg.walk() if p.get_content_type() == "image/png"]
    assert len(pngs) == 1 and pngs[0].get_content()[:8] == b"\x89PNG\r\n\x1a\n"   # PNG spec, section 5.2


def test_unjudged_lot_normality_line_says_not_assessed_once():
    """A lot no test ran on reads "Normality:  not assessed", not "not assessed, not assessed"."""
    v = unjudged(LotData(key=KEY, values=np.array(FIRST), unit="g"), "no rule for product OAT-500")
    r = render("review", v.to_json())
    assert "Normality:  not assessed\n" in r.text.replace("\r\n", "\n")
    assert "not assessed, not assessed" not in r.text and "not assessed, not assessed" not in r.html
    assert "None" not in r.text and "None" not in r.html
    assert "Test:       none ran" in r.text


def test_p_values_never_read_p_equals_less_than(hold_factory):
    """Tiny p-values read "p < 0.0001" next to the heads and normality, never "p = < 0.0001"."""
    data = hold_factory(normality={"test": "shapiro", "statistic": 0.7, "p_value": 1e-7, "passed": False,
                                   "note": ""},
                        heads=[{"head": "H4", "n": 10, "mean": 496.7, "sd": 0.4, "offset": -3.3, "p_value": 2e-9},
                               {"head": "H5", "n": 1, "mean": 500.1, "sd": None, "offset": 0.1, "p_value": None}])
    r = render("hold", data)
    assert "p = <" not in r.text and "p = <" not in r.html
    assert "H4: n = 10, mean 496.70, offset -3.30 g, p < 0.0001" in r.text
    assert "Normality:  Shapiro–Wilk, p < 0.0001: failed" in r.text
    assert "None" not in r.text


@pytest.mark.parametrize("p, alpha, shown", [
    (0.009962, 0.01, "0.00996"),            # a hold at alpha 0.01 must not read 0.0100
    (0.0100004, 0.01, "0.0100004"),         # a pass just above alpha must not read 0.0100 either
    (0.0312, 0.05, "0.0312"),
])
def test_p_value_is_printed_on_its_side_of_alpha(hold_factory, p, alpha, shown):
    """The notice's p-value keeps enough digits to show which side of alpha decided the verdict."""
    r = render("hold", hold_factory(p_value=p, alpha=alpha))
    assert f"p-value:    {shown} against alpha {alpha:g}" in r.text
    assert f"{shown} / {alpha:g}" in r.html


def test_generic_notices_leave_out_missing_values():
    """A rejected file without a line or key prints neither "line: None" nor "key: None"; present ones show."""
    r = render("file-rejected", {"file": "L2-jam.txt", "path": "drop/L2-jam.txt", "reason": "empty file",
                                 "line": None, "key": None}, line="", product="", lot="")
    assert "None" not in r.text and "None" not in r.html
    assert "reason: empty file" in r.text
    r2 = render("config-rejected", {"file": "rules/oat.toml", "line": 7, "key": "alpha", "message": "bad"},
                line="", product="", lot="")
    assert "line: 7" in r2.text and "key: alpha" in r2.text


def test_counts_agree_with_their_nouns(hold_factory):
    """One lot, one row, one alert: no "1 lot(s)", "1 rows" or "1 alerts" in subjects and bodies."""
    other = {"kind": "file-rejected", "dedup_key": "fr|1", "created_at": "2026-12-01T22:40:00+00:00", "line": "",
             "product": "", "lot": "", "data": {"path": "drop/x.csv", "reason": "empty file"}, "chart_cid": None}
    r = render("hold", hold_factory(excluded=1, excluded_by={"blank": 1, "not_a_number": 0, "not_finite": 0,
                                                             "dropped_value": 0}), extra=[other])
    assert clean_header_text(r.subject) == "[lotwarden] 2 alerts: 1 lot to hold on L2"
    assert "Excluded:   1 row of the lot without a usable value, left out (blank 1)" in r.text
    single = render("hold", hold_factory(excluded=3, excluded_by={"blank": 1, "not_a_number": 0, "not_finite": 0,
                                                                  "dropped_value": 2}))
    assert "Excluded:   3 rows of the lot without a usable value, left out (blank 1, dropped value 2)" in single.text
    assert "3 rows of the lot without a usable value" in single.html


def test_excluded_rows_of_a_real_lot_are_shown_per_reason():
    """A lot with NaN rows judged by the engine shows its exclusions from Verdict.to_json()."""
    lot = LotData(key=KEY, values=np.array([*FIRST, np.nan, np.nan]), unit="g",
                  excluded_by={"not_a_number": 1, "dropped_value": 1})
    r = render("hold", evaluate(lot, RULE).to_json())
    assert "Excluded:   2 rows of the lot without a usable value, left out (not a number 1, dropped value 1)" in r.text


def test_unit_assumed_is_said_only_when_true(hold_factory):
    """Values without a unit taken in the rule's unit are named in the notice; otherwise nothing is said."""
    r = render("hold", hold_factory(unit_assumed=True))
    assert "the values carried no unit; they were taken to be in the rule's unit (g)" in r.text
    assert "taken to be in the rule's unit (g)" in r.html
    r2 = render("hold", hold_factory(unit_assumed=False))
    assert "carried no unit" not in r2.text and "carried no unit" not in r2.html


def test_wilcoxon_method_and_location_wording(hold_factory):
    """A Wilcoxon verdict names the method, the zero differences dropped and that it tests location."""
    r = render("hold", hold_factory(test="wilcoxon", df=None,
                                    wilcoxon={"method": "exact", "zeros": 2, "n_used": 18}))
    assert "Test:       Wilcoxon signed-rank (two-sided)" in r.text
    assert ("Method:     exact; a test of location (the pseudo-median), not of the median; "
            "18 differences from target ranked, 2 zero differences dropped") in r.text
    assert "pseudo-median" in r.html and "2 zero differences dropped" in r.html
    r1 = render("hold", hold_factory(test="wilcoxon", df=None,
                                     wilcoxon={"method": "normal approximation", "zeros": 1, "n_used": 1}))
    assert "normal approximation" in r1.text and "1 difference from target ranked, 1 zero difference dropped" in r1.text
    rt = render("hold", hold_factory())
    assert "Method:" not in rt.text and "pseudo-median" not in rt.html


@pytest.mark.parametrize("passed, reason", [
    (True, "average-quantity screen met"),
    (False, "average-quantity screen fails: mean 497.8 g below the limit 498.3 g"),
])
def test_average_quantity_result_is_shown(hold_factory, passed, reason):
    """When a rule has a nominal quantity, the notice says whether the average-quantity screen passed and why."""
    aq = {"nominal": 500.0, "tne": 15.0, "n": 10, "mean": 497.4, "mean_limit": 498.3, "mean_ok": passed,
          "below_t1": 0, "below_t1_allowed": 0, "below_t2": 0, "passed": passed, "reason": reason}
    r = render("hold", hold_factory(average_quantity=aq))
    word = "passed" if passed else "failed"
    assert f"Average quantity: {word} — {reason}" in r.text
    assert f"<td>{word} — {reason}</td>" in r.html
    assert "Average quantity" not in render("hold", hold_factory(average_quantity=None)).text


@pytest.mark.parametrize("kind, key", [("file-rejected", "quarantined_to"), ("file-duplicate", "archived_to"),
                                       ("file-revised", "archived_to")])
def test_file_notices_say_where_the_file_now_lies(kind, key):
    """A file notice names the file in its subject and says where it lies now, not only the drop path."""
    where = "state/quarantine/2026-12-01/L2-jam-0700.txt" if key == "quarantined_to" else \
        "state/archive/2026-12-01/L2-jam-0700.txt"
    r = render(kind, {"file": "L2-jam-0700.txt", "path": "drop/L2-jam-0700.txt", key: where, "reason": "x"},
               line="", product="", lot="")
    assert clean_header_text(r.subject).endswith(": L2-jam-0700.txt")
    assert f"The file now lies at {where}" in r.text
    assert f"The file now lies at <code>{where}</code>" in r.html
