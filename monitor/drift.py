"""Drift across lots, per line and product (and per filler head): what each closed lot adds, and the signal.

Pure: a :class:`Track` is one series since its last restart (its chart state, the lots that built it and
their points for the chart); :func:`advance` adds one lot's statistic and returns the new track and, when
the chart crosses its limit, a :class:`DriftSignal`. The daemon keeps tracks in the state database
(``monitor.state.drift``) and ``replay`` runs the same steps over stored lots. A track built under another
rule version restarts: its lots were judged against other settings.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

from monitor.lot import Verdict
from monitor.rulebook import DriftRule, Rule
from monitor.stats.drift import DriftState, step

LOT = ""                  # the head name of the series of whole lots
MAX_KEPT_LOTS = 2000      # lots (and chart points) kept per track; older ones are counted in ``earlier``


@dataclass(frozen=True)
class TrackPoint:
    """One lot on a track's chart."""

    lot: str
    z: float
    upper: float
    lower: float
    limit: float

    def to_json(self) -> dict[str, Any]:
        return {"lot": self.lot, "z": self.z, "upper": self.upper, "lower": self.lower, "limit": self.limit}


@dataclass(frozen=True)
class Track:
    """One series (a line's product, or one of its heads) since its last restart."""

    rule_hash: str
    method: str
    state: DriftState = field(default_factory=DriftState)
    points: tuple[TrackPoint, ...] = ()
    earlier: int = 0         # lots since the restart no longer kept in ``points``

    @property
    def lots(self) -> tuple[str, ...]:
        return tuple(p.lot for p in self.points)

    def to_json(self) -> dict[str, Any]:
        return {"rule_hash": self.rule_hash, "method": self.method, "i": self.state.i, "upper": self.state.upper,
                "lower": self.state.lower, "earlier": self.earlier, "points": [p.to_json() for p in self.points]}

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> Track:
        return cls(rule_hash=str(d["rule_hash"]), method=str(d["method"]),
                   state=DriftState(i=int(d["i"]), upper=float(d["upper"]), lower=float(d["lower"])),
                   points=tuple(TrackPoint(str(p["lot"]), float(p["z"]), float(p["upper"]), float(p["lower"]),
                                           float(p["limit"])) for p in d.get("points", ())),
                   earlier=int(d.get("earlier", 0)))


@dataclass(frozen=True)
class DriftSignal:
    """A chart crossed its limit: the ``drift`` alert's data."""

    line: str
    product: str
    head: str | None           # None: the series of whole lots
    method: str
    direction: str             # "up" | "down"
    statistic: float           # CUSUM: S+ or S- (>= 0); EWMA: E
    limit: float               # CUSUM: h; EWMA: the limit on the signal's side (negative for "down")
    lots: tuple[str, ...]      # lot codes since the last restart, oldest first (the last one signalled)
    points: tuple[TrackPoint, ...]
    earlier: int
    rule: str
    rule_version: str
    settings: Mapping[str, float]

    def to_json(self) -> dict[str, Any]:
        return {"method": self.method, "direction": self.direction, "statistic": self.statistic,
                "limit": self.limit, "lots": list(self.lots), "head": self.head, "earlier_lots": self.earlier,
                "points": [p.to_json() for p in self.points], "settings": dict(self.settings),
                "rule": self.rule, "rule_version": self.rule_version}


def settings_of(d: DriftRule) -> dict[str, float]:
    """The chart's own keys, as written in the rule file."""
    return {"k": d.k, "h": d.h} if d.method == "cusum" else {"lambda": d.lam, "L": d.L}


def _t(mean: float | None, sd: float | None, n: int, target: float, known_sd: float | None) -> float | None:
    s = known_sd if known_sd is not None else sd
    if mean is None or s is None or n < 2 or not (math.isfinite(mean) and math.isfinite(s)) or s <= 0:
        return None
    z = (mean - target) / (s / math.sqrt(n))
    return z if math.isfinite(z) else None


def lot_statistic(verdict: Verdict, rule: Rule) -> float | None:
    """The lot's location statistic against the rule's target: the t (or z) of its test; a lot judged by
    Wilcoxon adds the t (or z) of its own mean and sd; a lot without a test adds nothing (None)."""
    if verdict.test in ("t", "z"):
        s = verdict.statistic
        return float(s) if s is not None and math.isfinite(s) else None
    if verdict.test == "wilcoxon":
        return _t(verdict.mean, verdict.sd, verdict.n, rule.target, rule.known_sd)
    return None


def observations(verdict: Verdict, rule: Rule) -> list[tuple[str, float]]:
    """(series, statistic) pairs this verdict adds: ``LOT`` for the lot, then each head (with
    ``[drift] heads = true``) that has at least ``min_n`` values and a spread, in the verdict's head order."""
    if rule.drift is None:
        return []
    out: list[tuple[str, float]] = []
    z = lot_statistic(verdict, rule)
    if z is not None:
        out.append((LOT, z))
        if rule.drift.heads:
            for h in verdict.heads:
                if h.n >= rule.min_n:
                    hz = _t(h.mean, h.sd, h.n, rule.target, rule.known_sd)
                    if hz is not None:
                        out.append((h.head, hz))
    return out


def advance(track: Track | None, *, line: str, product: str, head: str, lot: str, z: float,
            rule: Rule) -> tuple[Track, DriftSignal | None]:
    """Add lot ``lot``'s statistic ``z`` to ``track`` (None, or one of another rule version or method:
    a fresh track). Returns the new track (fresh after a signal) and the signal, if any."""
    d = rule.drift
    if d is None:
        raise ValueError(f"rule {rule.name!r} has no [drift] table")
    if track is None or track.rule_hash != rule.content_hash or track.method != d.method:
        track = Track(rule_hash=rule.content_hash, method=d.method)
    state, p = step(track.state, z, method=d.method, k=d.k, h=d.h, lam=d.lam, L=d.L)
    point = TrackPoint(lot, p.z, p.upper, p.lower, p.limit)
    points = (*track.points, point)
    earlier = track.earlier
    if len(points) > MAX_KEPT_LOTS:
        earlier += len(points) - MAX_KEPT_LOTS
        points = points[-MAX_KEPT_LOTS:]
    if p.signal is None:
        return replace(track, state=state, points=points, earlier=earlier), None
    signal = DriftSignal(line=line, product=product, head=head or None, method=d.method, direction=p.signal,
                         statistic=p.statistic, limit=p.signed_limit, lots=tuple(q.lot for q in points),
                         points=points, earlier=earlier, rule=rule.name, rule_version=rule.version,
                         settings=settings_of(d))
    return Track(rule_hash=rule.content_hash, method=d.method), signal
