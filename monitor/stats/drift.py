"""Drift across lots: the tabular two-sided CUSUM and the EWMA chart, one step per lot statistic.

Both charts read one standardised location statistic per lot (the lot's t or z against target) and say
when the run of lots shows the mean creeping away, before any one lot fails its own test. After a signal
the chart restarts from zero.

CUSUM (NIST/SEMATECH e-Handbook of Statistical Methods, §6.3.2.3, tabular form)::

    S+_i = max(0, S+_{i-1} + z_i - k)      S-_i = max(0, S-_{i-1} - z_i - k)      S+_0 = S-_0 = 0

a signal when either exceeds ``h`` ("up" for S+, "down" for S-).

EWMA (e-Handbook §6.3.2.4)::

    E_i = lambda * z_i + (1 - lambda) * E_{i-1},   E_0 = 0
    limit_i = L * sqrt(lambda / (2 - lambda) * (1 - (1 - lambda)^(2 i)))

a signal when ``|E_i| > limit_i`` ("up" when E_i is above +limit_i, "down" when below -limit_i).

Examples
--------
>>> s = DriftState()
>>> for z in (1.2, 1.4, 1.6, 1.5, 1.3):
...     s, point = cusum_step(s, z, k=0.5, h=4.0)
>>> point.signal, round(point.statistic, 2)
('up', 4.5)
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

METHODS = ("cusum", "ewma")


@dataclass(frozen=True)
class DriftState:
    """A chart's state after ``i`` lots since its last restart: CUSUM's S+ (``upper``) and S- (``lower``),
    or the EWMA statistic (both ``upper`` and ``lower`` hold E)."""

    i: int = 0
    upper: float = 0.0
    lower: float = 0.0


@dataclass(frozen=True)
class DriftPoint:
    """One lot's step: its statistic ``z``, the chart after it (``upper``/``lower`` as in DriftState), the
    limit in force at this step (CUSUM: h; EWMA: the positive limit_i) and the signal ("up" | "down" | None).

    ``statistic`` and ``limit`` are the pair a signal is told by: CUSUM the larger of S+ and S- and h
    (both >= 0); EWMA E_i and the limit on its side (negative for "down")."""

    z: float
    upper: float
    lower: float
    limit: float
    signal: str | None
    statistic: float
    signed_limit: float


def cusum_step(state: DriftState, z: float, *, k: float, h: float) -> tuple[DriftState, DriftPoint]:
    """One step of the tabular CUSUM; a signal restarts the state at zero."""
    up = max(0.0, state.upper + z - k)
    down = max(0.0, state.lower - z - k)
    signal = "up" if up > h and up >= down else "down" if down > h else None
    statistic = up if (signal == "up" or (signal is None and up >= down)) else down
    point = DriftPoint(z=z, upper=up, lower=down, limit=h, signal=signal, statistic=statistic, signed_limit=h)
    if signal is not None:
        return DriftState(), point
    return DriftState(i=state.i + 1, upper=up, lower=down), point


def ewma_limit(i: int, *, lam: float, L: float) -> float:
    """The EWMA limit after ``i`` lots (i >= 1), for a statistic of unit variance (e-Handbook §6.3.2.4)."""
    return L * math.sqrt(lam / (2.0 - lam) * -math.expm1(2.0 * i * math.log1p(-lam))) if lam < 1.0 else L


def ewma_step(state: DriftState, z: float, *, lam: float, L: float) -> tuple[DriftState, DriftPoint]:
    """One step of the EWMA chart; a signal restarts the state at zero."""
    i = state.i + 1
    e = lam * z + (1.0 - lam) * state.upper
    limit = ewma_limit(i, lam=lam, L=L)
    signal = "up" if e > limit else "down" if e < -limit else None
    point = DriftPoint(z=z, upper=e, lower=e, limit=limit, signal=signal, statistic=e,
                       signed_limit=-limit if signal == "down" else limit)
    if signal is not None:
        return DriftState(), point
    return DriftState(i=i, upper=e, lower=e), point


def step(state: DriftState, z: float, *, method: str, k: float = 0.5, h: float = 5.0, lam: float = 0.2,
         L: float = 3.0) -> tuple[DriftState, DriftPoint]:
    """One step of the chart named by ``method`` ("cusum" | "ewma")."""
    if method == "cusum":
        return cusum_step(state, z, k=k, h=h)
    if method == "ewma":
        return ewma_step(state, z, lam=lam, L=L)
    raise ValueError(f"method must be one of {', '.join(METHODS)} (got {method!r})")


def run(z: Sequence[float], *, method: str, k: float = 0.5, h: float = 5.0, lam: float = 0.2, L: float = 3.0,
        state: DriftState | None = None) -> tuple[DriftState, list[DriftPoint]]:
    """Every step over ``z`` in order from ``state`` (default: a fresh chart); the final state and the points."""
    s = DriftState() if state is None else state
    points: list[DriftPoint] = []
    for x in z:
        s, p = step(s, float(x), method=method, k=k, h=h, lam=lam, L=L)
        points.append(p)
    return s, points
