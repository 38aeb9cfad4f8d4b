"""Judging stored lots again with candidate rules: the lot data, the verdicts now, then / now rows and the summary.

Pure (no I/O): ``monitor.commands.replay`` reads the state (``monitor.state.replaying``) and hands over what
it read. Lots are judged in batches per rule (``monitor.engine.evaluate_many``, the same verdicts as
``evaluate`` lot by lot) with the daemon's own steps around the engine (``monitor.daemon.judge``: no rule or
unconvertible units -> `review`, the lot's exclusion counts), and the drift charts of the candidate rules run
over the lots in the order they closed, each series from a fresh chart at the period's start.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from monitor import drift
from monitor.daemon import judge
from monitor.engine import evaluate, evaluate_many
from monitor.lot import LotData, LotKey, Verdict
from monitor.rulebook import Rule
from monitor.state.replaying import StoredLot, StoredSummary

TRANSITION = "{}->{}"


@dataclass(frozen=True)
class Then:
    """What the state says of a lot: its latest stored verdict."""

    key: LotKey
    verdict: str
    rule: str
    rule_version: str
    p_value: float | None
    decided_at: str


@dataclass(frozen=True)
class ToJudge:
    """A lot ready to be judged again: its data in the candidate rule's unit, a conversion problem (or None),
    and for a summary record the problem the reader found in it ("" when none)."""

    then: Then
    data: LotData
    rule: Rule | None
    problem: str | None = None
    summary_problem: str = ""


@dataclass(frozen=True)
class Row:
    """One lot's verdict then and now."""

    then: Then
    now: Verdict

    @property
    def changed(self) -> bool:
        return self.then.verdict != self.now.verdict

    def to_json(self) -> dict[str, Any]:
        k = self.then.key
        return {"line": k.line, "product": k.product, "lot": k.lot, "decided_at": self.then.decided_at,
                "then": self.then.verdict, "now": self.now.verdict, "changed": self.changed,
                "rule_then": self.then.rule, "rule_version_then": self.then.rule_version,
                "rule_now": self.now.rule, "rule_version_now": self.now.rule_version,
                "reason_now": self.now.reason, "p_value_then": _num(self.then.p_value),
                "p_value_now": _num(self.now.p_value)}


@dataclass(frozen=True)
class SignalSeen:
    """A drift signal as the replay reports it (one the daemon recorded, or one the replay's charts gave)."""

    line: str
    product: str
    head: str | None
    lot: str
    method: str
    direction: str
    statistic: float
    limit: float
    rule: str
    rule_version: str

    @classmethod
    def from_signal(cls, s: drift.DriftSignal) -> SignalSeen:
        """A signal of the replay's own charts (its lot: the last of the lots that built it)."""
        return cls(s.line, s.product, s.head, s.lots[-1], s.method, s.direction, s.statistic, s.limit, s.rule,
                   s.rule_version)

    def to_json(self) -> dict[str, Any]:
        return {"line": self.line, "product": self.product, "head": self.head, "lot": self.lot,
                "method": self.method, "direction": self.direction, "statistic": _num(self.statistic),
                "limit": _num(self.limit), "rule": self.rule, "rule_version": self.rule_version}


@dataclass(frozen=True)
class Summary:
    """The counts of a replay."""

    lots: int
    changed: int
    then: Mapping[str, int]
    now: Mapping[str, int]
    transitions: Mapping[str, int]
    drift_then: tuple[SignalSeen, ...] = ()
    drift_now: tuple[SignalSeen, ...] = ()
    skipped: int = 0          # judged lots whose rows are no longer in the state (not judged again)

    def to_json(self) -> dict[str, Any]:
        return {"lots": self.lots, "changed": self.changed, "skipped": self.skipped, "then": dict(self.then),
                "now": dict(self.now), "transitions": dict(self.transitions),
                "drift_signals_then": len(self.drift_then), "drift_signals_now": len(self.drift_now),
                "drift_then": [s.to_json() for s in self.drift_then],
                "drift_now": [s.to_json() for s in self.drift_now]}


@dataclass(frozen=True)
class Replay:
    """Every lot's row, in close order, and the summary."""

    rows: tuple[Row, ...]
    summary: Summary

    def to_json(self) -> dict[str, Any]:
        return {"lots": [r.to_json() for r in self.rows], "summary": self.summary.to_json()}


def _num(x: float | None) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


# --- lot data ----------------------------------------------------------------------------------------------
def values_lot(key: LotKey, stored: StoredLot, rule: Rule | None) -> tuple[LotData, str | None]:
    """The LotData ``judge.load_lot_values`` gives for these stored rows (converted row by row when the lot's
    (unit, density) pairs need different factors)."""
    values = stored.values
    per_row = False
    if stored.pair_of_row is not None:
        factor, problem, _assumed = judge.unit_factors(stored.pairs, rule)
        per_row = problem is None and len(stored.pairs) > 1 and any(f != 1.0 for f in factor.values())
        if per_row:
            table = np.array([*(factor[p] for p in stored.pairs), 1.0], dtype=np.float64)  # -1: excluded row
            values = values * table[stored.pair_of_row]
    return judge.lot_data(key, values, stored.heads, stored.pairs, stored.files, rule, converted=per_row,
                          excluded_by=stored.excluded_by)


def summary_lot(key: LotKey, s: StoredSummary, rule: Rule | None) -> tuple[LotData, str | None]:
    """The LotData of a stored summary record, as the daemon built it (an unusable n / mean / sd is NaN)."""
    mean = math.nan if s.mean is None else float(s.mean)
    sd = math.nan if s.sd is None else float(s.sd)
    return judge.summary_lot(key, s.n, mean, sd, s.unit, s.density, rule, s.file_path)


# --- judging -----------------------------------------------------------------------------------------------
def judge_all(items: Sequence[ToJudge]) -> list[Verdict]:
    """The verdict now of each lot, in the order given: lots of one rule judged in one batch."""
    out: list[Verdict | None] = [None] * len(items)
    batches: dict[str, list[int]] = {}
    for i, it in enumerate(items):
        if it.summary_problem:
            out[i] = judge.with_lot_facts(judge.unusable_summary(it.data, it.rule, it.summary_problem), it.data)
        elif it.rule is None or it.problem is not None:
            out[i] = judge.judge(it.data, it.rule, it.problem, evaluate)
        else:
            batches.setdefault(it.rule.name, []).append(i)
    for idx in batches.values():
        rule = items[idx[0]].rule
        assert rule is not None
        lots = [items[i].data for i in idx]
        try:
            got = evaluate_many(lots, rule)
        except Exception:  # one bad lot must not cost the batch: judge lot by lot, an engine failure -> review
            got = [judge.judge(lot, rule, None, evaluate) for lot in lots]
        for i, v in zip(idx, got, strict=True):
            out[i] = judge.with_lot_facts(v, items[i].data)
    return [v for v in out if v is not None]


def drift_now(verdicts: Sequence[Verdict], rules: Sequence[Rule | None]) -> list[SignalSeen]:
    """The signals the candidate rules' drift charts give over ``verdicts`` (close order), each series
    (line, product, head) from a fresh chart."""
    tracks: dict[tuple[str, str, str], drift.Track] = {}
    out: list[SignalSeen] = []
    for v, rule in zip(verdicts, rules, strict=True):
        if rule is None or rule.drift is None:
            continue
        k = v.key
        for head, z in drift.observations(v, rule):
            series = (k.line, k.product, head)
            track, signal = drift.advance(tracks.get(series), line=k.line, product=k.product, head=head,
                                          lot=k.lot, z=z, rule=rule)
            tracks[series] = track
            if signal is not None:
                out.append(SignalSeen.from_signal(signal))
    return out


# --- rows and summary --------------------------------------------------------------------------------------
def summarise(rows: Sequence[Row], then_signals: Sequence[SignalSeen], now_signals: Sequence[SignalSeen],
              skipped: int = 0) -> Summary:
    """Counts of verdicts then and now, of each change (then->now, changed lots only) and of drift signals."""
    then = dict.fromkeys(("hold", "review", "pass"), 0)
    now = dict.fromkeys(("hold", "review", "pass"), 0)
    moves: dict[str, int] = {}
    for r in rows:
        then[r.then.verdict] = then.get(r.then.verdict, 0) + 1
        now[r.now.verdict] = now.get(r.now.verdict, 0) + 1
        if r.changed:
            key = TRANSITION.format(r.then.verdict, r.now.verdict)
            moves[key] = moves.get(key, 0) + 1
    order = {v: i for i, v in enumerate(("hold", "review", "pass"))}
    transitions = dict(sorted(moves.items(), key=lambda kv: tuple(order.get(p, 9) for p in kv[0].split("->"))))
    return Summary(lots=len(rows), changed=sum(r.changed for r in rows), then=then, now=now,
                   transitions=transitions, drift_then=tuple(then_signals), drift_now=tuple(now_signals),
                   skipped=skipped)


def replay(items: Sequence[ToJudge], then_signals: Sequence[SignalSeen] = (), *, skipped: int = 0) -> Replay:
    """Judge ``items`` (close order) again, run the drift charts, and count."""
    verdicts = judge_all(items)
    rows = tuple(Row(it.then, v) for it, v in zip(items, verdicts, strict=True))
    now_signals = drift_now(verdicts, [it.rule for it in items])
    return Replay(rows=rows, summary=summarise(rows, then_signals, now_signals, skipped))


def counts_text(counts: Mapping[str, int]) -> str:
    """"hold 2  review 1  pass 3"."""
    return "  ".join(f"{v} {counts.get(v, 0)}" for v in ("hold", "review", "pass"))


def summary_lines(s: Summary) -> list[str]:
    """The summary block of the table output."""
    lines = [f"lots: {s.lots}  changed: {s.changed}" + (f"  not judged again (rows gone): {s.skipped}"
                                                        if s.skipped else ""),
             f"then: {counts_text(s.then)}",
             f"now:  {counts_text(s.now)}"]
    if s.transitions:
        lines.append("changes: " + "  ".join(f"{k} {n}" for k, n in s.transitions.items()))
    lines.append(f"drift signals: then {len(s.drift_then)}  now {len(s.drift_now)}")
    for label, signals in (("then", s.drift_then), ("now", s.drift_now)):
        for g in signals:
            lines.append(f"  {label}: {g.line} {g.product} {g.head or '(whole lot)'} at lot {g.lot}: {g.method}"
                         f" {g.direction}, {g.statistic:.3f} against limit {g.limit:.3f}")
    return lines
