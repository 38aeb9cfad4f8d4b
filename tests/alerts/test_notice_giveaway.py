"""Hold, review and verdict-changed notices (text and HTML) carry the lot's giveaway line: per pack with its
sign, in all over the lot's packs, the cost when the rule has one, and "under-filled" when below."""

from __future__ import annotations

import math
import statistics
from typing import Any

import numpy as np

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.alerts.templates import CAUTION, TemplateSet, message_context
from monitor.engine import evaluate
from monitor.lot import LotData, LotKey
from monitor.rulebook import Rule

# Invented Brackenfield lots. OAT-500: nominal 500 g, filled to target 502 g, 0.0042 EUR per g.
OAT = Rule.adhoc(name="oat-500", target=502.0, nominal=500.0, cost_per_unit=0.0042, currency="EUR", unit="g")
OVER = [504.1, 503.6, 505.2, 504.8, 503.9, 504.4, 505.0, 503.7, 504.6, 504.2, 503.8, 505.1,
        504.3, 504.9, 503.5, 504.7, 504.0, 505.3, 503.4, 504.5, 504.1, 504.8, 503.9, 504.6]
UNDER = [498.9, 499.4, 498.6, 499.1, 498.8, 499.6, 498.7, 499.2, 499.0, 498.5]
# JAM-340 without a nominal or cost: giveaway against the target.
JAM = Rule.adhoc(name="jam-340", target=342.0, unit="g", min_n=5)
JAM_FIRST = [339.8, 340.1, 339.6, 340.4, 339.9, 340.2, 339.7]
JAM_LATE = [342.6, 341.8, 342.9, 342.1, 342.4, 341.7, 342.8, 342.3, 342.0, 342.5, 341.9, 342.7, 342.2, 342.4]
JAM_FIRST_FILE = "state/archive/2026-12-01/L3-jam-0600.csv"
JAM_LATE_FILE = "state/archive/2026-12-01/L3-jam-late-0700.csv"
AT = "2026-12-01T22:40:00+00:00"


def lot(line: str, product: str, name: str, values: list[float], files: tuple[str, ...] = ("x.csv",)) -> LotData:
    return LotData(key=LotKey(line, product, name), values=np.array(values), files=files, unit="g")


def verdict_alert(rule: Rule, data: LotData) -> Alert:
    v = evaluate(data, rule)
    return kinds.verdict_alert(v.verdict, line=data.key.line, product=data.key.product, lot=data.key.lot,
                               rule_version=v.rule_version, payload=v.to_json(), values=list(data.values), at=AT)


def render(alert: Alert) -> Any:
    items = [{"kind": alert.kind, "dedup_key": alert.dedup_key, "created_at": alert.created_at, "line": alert.line,
              "product": alert.product, "lot": alert.lot, "data": alert.data, "chart_cid": None}]
    return TemplateSet.load().render(alert.kind, message_context(items, folded=False, generated_at=AT))


def line_of(values: list[float], reference: str, ref: float, cost_per_unit: float | None = None,
            currency: str = "") -> str:
    """The giveaway sentence the notices must carry, from the written values (mean − reference per pack,
    sum of differences in all; common practice, no source), printed with 2 decimals and an explicit sign."""
    per_pack = statistics.fmean(values) - ref
    total = math.fsum(v - ref for v in values)
    head = (f"under-filled: {per_pack:+.2f} g per pack below" if per_pack < 0
            else f"{per_pack:+.2f} g per pack above")
    text = f"{head} the {reference} {ref:g} g, {total:+.2f} g over {len(values)} packs"
    if cost_per_unit is not None:
        text += f" (cost {total * cost_per_unit:+.2f} {currency})"
    return text


def test_hold_over_nominal_with_cost_in_text_and_html() -> None:
    alert = verdict_alert(OAT, lot("L1", "OAT-500", "A7", OVER))
    assert alert.kind == "hold"
    want = line_of(OVER, "nominal quantity", 500.0, 0.0042, "EUR")
    assert want.startswith("+") and "over 24 packs" in want
    r = render(alert)
    assert f"  Giveaway:   {want}\n" in r.text, r.text
    assert f"<tr><th>Giveaway</th><td>{want}</td></tr>" in r.html, r.html
    assert CAUTION in r.text


def test_under_filled_hold_says_so() -> None:
    alert = verdict_alert(OAT, lot("L1", "OAT-500", "A8", UNDER))
    assert alert.kind == "hold"
    want = line_of(UNDER, "nominal quantity", 500.0, 0.0042, "EUR")
    assert want.startswith("under-filled: -")
    r = render(alert)
    assert f"  Giveaway:   {want}\n" in r.text, r.text
    assert f"<td>{want}</td>" in r.html


def test_review_of_a_small_lot_shows_its_giveaway() -> None:
    values = [343.2, 341.8, 344.0]
    rule = JAM.replace(nominal=340.0, cost_per_unit=0.011, currency="GBP")
    alert = verdict_alert(rule, lot("L3", "JAM-340", "R7", values))
    assert alert.kind == "review"
    r = render(alert)
    assert f"  Giveaway:   {line_of(values, 'nominal quantity', 340.0, 0.011, 'GBP')}\n" in r.text, r.text


def test_verdict_changed_shows_the_new_giveaway_against_target_without_cost() -> None:
    first = lot("L3", "JAM-340", "C2", JAM_FIRST, (JAM_FIRST_FILE,))
    both = lot("L3", "JAM-340", "C2", JAM_FIRST + JAM_LATE, (JAM_FIRST_FILE, JAM_LATE_FILE))
    before, after = evaluate(first, JAM), evaluate(both, JAM)
    assert before.verdict == "hold" and after.verdict != "hold", (before.verdict, after.verdict)
    alert = kinds.verdict_changed(
        line="L3", product="JAM-340", lot="C2", previous_verdict_id=41, payload=after.to_json(),
        previous={"verdict": before.verdict, "decided_at": "2026-12-01T06:10:00+00:00", "reason": before.reason,
                  "rule": before.rule, "rule_version": before.rule_version, "n": before.n, "mean": before.mean,
                  "p_value": before.p_value},
        why=f"14 late values from {JAM_LATE_FILE} reopened the lot", values=JAM_FIRST + JAM_LATE, at=AT)
    want = line_of(JAM_FIRST + JAM_LATE, "target", 342.0)
    r = render(alert)
    assert f"  Giveaway:   {want}\n" in r.text and "(cost" not in r.text, r.text
    assert f"<td>{want}</td>" in r.html


def test_a_lot_without_a_mean_has_no_giveaway_line() -> None:
    data = dict(verdict_alert(OAT, lot("L1", "OAT-500", "A9", OVER)).data, giveaway=None)
    alert = Alert(kind="hold", dedup_key="hold|x", created_at=AT, data=data, line="L1", product="OAT-500", lot="A9")
    r = render(alert)
    assert "Giveaway" not in r.text and "Giveaway" not in r.html


def test_one_real_e_mail_carries_the_giveaway(deliver_one) -> None:
    """Through the dispatcher to a real aiosmtpd server on loopback: plain and HTML parts carry the line."""
    alert = verdict_alert(OAT, lot("L1", "OAT-500", "A7", OVER))
    m = deliver_one(alert, now=1_796_165_000.0, seed=3).message
    want = line_of(OVER, "nominal quantity", 500.0, 0.0042, "EUR")
    assert f"Giveaway:   {want}" in m.get_body(("plain",)).get_content()
    assert f"<td>{want}</td>" in m.get_body(("html",)).get_content()
