"""Builds the report model from the record's lot entries and stored rule texts (pure: no I/O, no SQL)."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo

from monitor.period import parse_stored
from monitor.record import LotEntry, _finite
from monitor.report.model import (
    DISPOSITION_ACTIONS,
    Disposition,
    DriftMark,
    HeadOffset,
    LotRow,
    ProductSection,
    Report,
    RuleText,
)
from monitor.state.drift import SignalRow
from monitor.state.rule_texts import RuleText as StoredRuleText

NOT_STORED = "text not stored (the daemon that judged these lots did not keep this rule version's text)"


def _heads(payload: Mapping[str, Any]) -> tuple[HeadOffset, ...]:
    out = []
    for h in payload.get("heads") or ():
        if isinstance(h, Mapping) and isinstance(h.get("head"), str):
            try:
                n = int(h.get("n") or 0)
            except (TypeError, ValueError):
                n = 0
            out.append(HeadOffset(head=h["head"], n=n, offset=_finite(h.get("offset"))))
    return tuple(out)


def _screen(payload: Mapping[str, Any]) -> tuple[float | None, str | None]:
    """The nominal and the average-quantity screen's text (None, None: the rule has no nominal)."""
    aq = payload.get("average_quantity")
    if not isinstance(aq, Mapping):
        return None, None
    nominal = _finite(aq.get("nominal"))
    head = "met" if aq.get("passed") is True else "not met" if aq.get("passed") is False else "not judged"
    reason = str(aq.get("reason") or "")
    return nominal, f"{head}: {reason}" if reason else head


def lot_row(e: LotEntry, zone: ZoneInfo) -> LotRow:
    """One entry as a report row, times in ``zone``."""
    payload = e.payload
    nominal, screen = _screen(payload)
    disp = None
    if e.disposition is not None and e.disposition.action in DISPOSITION_ACTIONS:
        disp = Disposition(action=e.disposition.action, by=e.disposition.by, note=e.disposition.note,
                           at=parse_stored(e.disposition.at).astimezone(zone))
    return LotRow(
        lot=e.lot, decided_at=e.decided.astimezone(zone), n=e.n, mean=e.mean,
        target=e.target if e.target is not None else float("nan"), nominal=nominal, unit=e.unit,
        ci_low=_finite(payload.get("ci_low")), ci_high=_finite(payload.get("ci_high")),
        verdict=e.verdict if e.verdict in ("pass", "hold", "review") else "review", reason=e.reason,
        p_value=e.p_value, rule=e.rule, rule_version=e.rule_version, disposition=disp, heads=_heads(payload),
        giveaway=e.giveaway, screen=screen)


def build_report(items: Sequence[LotEntry], texts: Mapping[str, StoredRuleText], *, plant: str,
                 config_name: str, zone: str, start: datetime, end: datetime, generated_at: datetime,
                 signals: Sequence[SignalRow] = ()) -> Report:
    """The report of ``items`` (one section per line and product, in order of first appearance) with the rule
    versions in force, ``texts`` by rule hash (a version not stored shows NOT_STORED), and the period's drift
    ``signals`` under their line and product; times in ``zone``."""
    tz = ZoneInfo(zone)
    marks: dict[tuple[str, str], list[DriftMark]] = {}
    for sig in signals:
        try:
            at = parse_stored(sig.at)
        except ValueError:
            continue
        marks.setdefault((sig.line, sig.product), []).append(DriftMark(
            at=at.astimezone(tz), lot=sig.lot, head=sig.head or None, method=sig.method, direction=sig.direction,
            statistic=sig.statistic, limit=sig.limit, lots=len(sig.data.get("lots") or ())))
    groups: dict[tuple[str, str], list[LotEntry]] = {}
    for e in items:
        groups.setdefault((e.line, e.product), []).append(e)
    sections = []
    for (line, product), group in sorted(groups.items()):
        rules: dict[str, RuleText] = {}
        for e in group:
            if e.rule_hash in rules:
                continue
            stored = texts.get(e.rule_hash)
            rules[e.rule_hash] = RuleText(rule=e.rule, version=e.rule_version,
                                          text=stored.text if stored is not None and stored.text else NOT_STORED)
        sections.append(ProductSection(line=line, product=product, unit=group[0].unit,
                                       lots=tuple(lot_row(e, tz) for e in group), rules=tuple(rules.values()),
                                       drift=tuple(marks.get((line, product), ()))))
    return Report(plant=plant, config_name=config_name, period_start=start.astimezone(tz),
                  period_end=end.astimezone(tz), generated_at=generated_at.astimezone(tz),
                  sections=tuple(sections), zone=zone)
