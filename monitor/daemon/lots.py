"""When lots close: pure functions from the open lots and one file's rows to segments and closures.

The policy (documented in README's daemon section):

* Values accumulate per (line, product, lot) in arrival order; a line has at most one open lot.
* A row of another lot on the same line closes the line's open lot (``next-lot``); a file without a
  ``line`` column is one line, ``""``.
* An end-of-lot marker row closes the open lot of its line (``end-marker``); a marker on a line with no
  open lot changes nothing.
* A lot with no new values for its rule's ``idle_minutes`` is closed by the periodic job (``idle``).
* Values arriving for a lot that is already closed *reopen* it (``lot-reopened`` in the audit trail,
  ``late_values`` counted): nothing is dropped, and when the lot closes again it is judged once more
  over all its values, old and late, giving a new verdict row. Alert dedup keys keep an unchanged
  hold/review from being sent twice; a changed verdict is a new alert.
"""

from __future__ import annotations

from bisect import bisect_right
from dataclasses import dataclass
from typing import Callable, Iterable, Mapping, Sequence

import numpy as np

from monitor.lot import LotKey

NEXT_LOT = "next-lot"
END_MARKER = "end-marker"
IDLE = "idle"


@dataclass(frozen=True)
class Segment:
    """Rows ``start:stop`` (positions in the file's rows) that belong to one lot, in file order."""

    key: LotKey
    start: int
    stop: int


@dataclass(frozen=True)
class Closure:
    """A lot that closes once the rows before position ``at`` have been stored."""

    key: LotKey
    reason: str
    at: int


@dataclass(frozen=True)
class Marker:
    """An end-of-lot marker row: its source line, the lot code it ends and the production line it names
    (None where the export does not say; then the lot code, or else the line of the rows before it, decides)."""

    source_line: int
    lot: str | None = None
    line: str | None = None


Step = Segment | Closure


@dataclass(frozen=True)
class LotPlan:
    """What one file does to the lots, in order, and which lot is open on each line afterwards."""

    steps: tuple[Step, ...]
    open_after: Mapping[str, LotKey]

    @property
    def closures(self) -> tuple[Closure, ...]:
        return tuple(s for s in self.steps if isinstance(s, Closure))

    @property
    def segments(self) -> tuple[Segment, ...]:
        return tuple(s for s in self.steps if isinstance(s, Segment))


def find_runs(keys: Sequence[LotKey]) -> list[Segment]:
    """Consecutive runs of equal lot keys, as segments."""
    runs: list[Segment] = []
    start = 0
    for i in range(1, len(keys) + 1):
        if i == len(keys) or keys[i] != keys[start]:
            if i > start:
                runs.append(Segment(keys[start], start, i))
            start = i
    return runs


def runs_of_codes(codes: np.ndarray, keys: Sequence[LotKey]) -> list[Segment]:
    """Consecutive runs of equal codes (``keys[code]`` is the code's lot), as segments; one per run, not per row."""
    n = len(codes)
    if n == 0:
        return []
    bounds = (np.flatnonzero(codes[1:] != codes[:-1]) + 1).tolist()
    starts, stops = [0, *bounds], [*bounds, n]
    firsts = codes[starts].tolist()
    return [Segment(keys[c], a, b) for c, a, b in zip(firsts, starts, stops)]


def plan_file(open_lots: Mapping[str, LotKey], runs: Sequence[Segment], source_lines: Sequence[int],
              markers: Iterable[Marker] = ()) -> LotPlan:
    """Plan one file: ``open_lots`` maps line -> open lot before the file; ``runs`` from ``find_runs``.

    ``source_lines[i]`` is the file line of row ``i`` (rising with ``i``, as in a file), used to place markers
    between rows; a list or a numpy array.
    """
    open_now = dict(open_lots)
    steps: list[Step] = []
    pending = sorted(markers, key=lambda m: m.source_line)
    mi = 0
    last_line: str | None = None

    def take_markers_before(limit: float, position: int) -> None:
        nonlocal mi
        while mi < len(pending) and pending[mi].source_line < limit:
            m = pending[mi]
            mi += 1
            line = _marker_line(m, open_now, last_line)
            key = open_now.pop(line, None) if line is not None else None
            if key is not None:
                steps.append(Closure(key, END_MARKER, position))

    for run in runs:
        take_markers_before(source_lines[run.start], run.start)
        line = run.key.line
        current = open_now.get(line)
        if current is not None and current != run.key:
            steps.append(Closure(current, NEXT_LOT, run.start))
        open_now[line] = run.key
        last_line = line
        # markers inside a run split it: rows before the marker, closure, rows after reopen the lot
        # (source lines rise with the row position, so the first row after a marker is found by bisection)
        start = run.start
        while mi < len(pending):
            i = bisect_right(source_lines, pending[mi].source_line, start + 1, run.stop)
            if i >= run.stop:
                break
            steps.append(Segment(run.key, start, i))
            start = i
            take_markers_before(source_lines[i], i)
            open_now[line] = run.key
        steps.append(Segment(run.key, start, run.stop))
    end = len(source_lines)
    take_markers_before(float("inf"), end)
    return LotPlan(tuple(steps), open_now)


def _marker_line(m: Marker, open_now: Mapping[str, LotKey], last_line: str | None) -> str | None:
    """The line whose open lot a marker closes, or None when no open lot fits it."""
    if m.line is not None:
        key = open_now.get(m.line)
        return m.line if key is not None and (not m.lot or key.lot == m.lot) else None
    if not m.lot:
        return last_line if last_line is not None else ("" if "" in open_now else None)
    if last_line is not None and last_line in open_now and open_now[last_line].lot == m.lot:
        return last_line
    for line, key in open_now.items():
        if key.lot == m.lot:
            return line
    return None


def idle_lots(open_lots: Iterable[tuple[LotKey, float]], now: float,
              idle_seconds_for: Callable[[LotKey], float]) -> list[LotKey]:
    """Open lots (key, unix time of the newest value) with no new value for their idle time at ``now``."""
    return [key for key, last in open_lots if now - last >= idle_seconds_for(key)]
