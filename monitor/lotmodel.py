"""The one lot model, pure: rows in arrival order -> runs per line -> lots opened, closed and reopened.

Used by the daemon (``monitor.daemon.accumulate`` applies each file's ``LotPlan`` to the state store) and by
``lotwarden check`` (``replay`` folds the plans of the files it is given, in order, and closes what is still
open at the end of input), so both hold the same lots. The policy (documented in README's daemon section):

* Values accumulate per (line, product, lot) in arrival order; a line has at most one open lot.
* A row of another lot on the same line closes the line's open lot (``next-lot``); a file without a
  ``line`` column is one line, ``""``. Rows of other lines leave it open.
* An end-of-lot marker row closes the open lot of its line (``end-marker``); a marker on a line with no
  open lot changes nothing.
* A lot with no new values for its rule's ``idle_minutes`` is closed by the periodic job (``idle``);
  ``check`` has no clock and closes every lot still open after its last file (``end-of-input``).
* Values arriving for a lot that is already closed *reopen* it (``lot-reopened`` in the audit trail,
  ``late_values`` counted): nothing is dropped, and when the lot closes again it is judged once more
  over all its values, old and late. Each opening starts a *run* of the lot: ``runs`` 2 or more means
  other lots' rows (or a marker) came in between.
"""

from __future__ import annotations

from bisect import bisect_right
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from monitor.lot import LotKey

NEXT_LOT = "next-lot"
END_MARKER = "end-marker"
IDLE = "idle"
END_OF_INPUT = "end-of-input"


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


def markers_of(end_of_lot: Iterable[object]) -> list[Marker]:
    """Markers from a read export's ``end_of_lot``: (source line, lot code the marker ends) pairs, or bare
    source lines; a blank lot code means the marker names no lot."""
    out: list[Marker] = []
    for item in end_of_lot:
        if isinstance(item, (int, np.integer)):
            out.append(Marker(int(item)))
        elif isinstance(item, (tuple, list)) and item:
            lot = item[1] if len(item) > 1 else None
            out.append(Marker(int(item[0]), lot=None if lot in (None, "") else str(lot)))
    return out


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
    return [Segment(keys[c], a, b) for c, a, b in zip(firsts, starts, stops, strict=True)]


def plan_file(open_lots: Mapping[str, LotKey], runs: Sequence[Segment], source_lines: Sequence[int] | np.ndarray,
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
        if pending:
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


def openings(open_lots: Mapping[str, LotKey], plan: LotPlan) -> list[LotKey]:
    """The lots ``plan`` opens or reopens, once per opening, in order (``open_lots``: as given to ``plan_file``).

    A segment opens its lot when that lot is not the open one of its line at that step; a segment that
    carries on the open lot (the next file, rows after another line's rows) opens nothing."""
    open_now = dict(open_lots)
    out: list[LotKey] = []
    for step in plan.steps:
        line = step.key.line
        if isinstance(step, Closure):
            if open_now.get(line) == step.key:
                del open_now[line]
        elif open_now.get(line) != step.key:
            open_now[line] = step.key
            out.append(step.key)
    return out


def close_at_end(open_lots: Mapping[str, LotKey]) -> tuple[Closure, ...]:
    """Every lot still open when the input ends (``end-of-input``), one per line that has one."""
    return tuple(Closure(key, END_OF_INPUT, 0) for key in open_lots.values())


@dataclass(frozen=True)
class FileRows:
    """One file's part of the input: its rows' lot runs, their source lines and its end-of-lot markers."""

    runs: Sequence[Segment]
    source_lines: Sequence[int] | np.ndarray
    markers: Sequence[Marker] = ()


@dataclass(frozen=True)
class Replay:
    """What a sequence of files did to the lots, everything closed at the end: per lot, how many runs
    made it (1 + reopenings) and why it closed each time, in order."""

    runs: Mapping[LotKey, int]
    closed_by: Mapping[LotKey, tuple[str, ...]]


def replay(files: Iterable[FileRows], open_lots: Mapping[str, LotKey] | None = None) -> Replay:
    """Fold ``files`` (in arrival order) through ``plan_file`` as the daemon does, then close what is
    still open (``end-of-input``); lots open before the first file (``open_lots``) count no new run."""
    open_now: Mapping[str, LotKey] = dict(open_lots or {})
    runs: dict[LotKey, int] = {}
    closed: dict[LotKey, list[str]] = {}
    for f in files:
        plan = plan_file(open_now, f.runs, f.source_lines, f.markers)
        for key in openings(open_now, plan):
            runs[key] = runs.get(key, 0) + 1
        for c in plan.closures:
            closed.setdefault(c.key, []).append(c.reason)
        open_now = plan.open_after
    for c in close_at_end(open_now):
        closed.setdefault(c.key, []).append(c.reason)
    return Replay(runs, {k: tuple(v) for k, v in closed.items()})


def count_runs(codes: np.ndarray, line_of_code: np.ndarray) -> np.ndarray:
    """Runs per lot code, vectorised: what ``replay`` counts for rows in arrival order (all files one after
    another; ``codes[i]`` the lot of row i, ``line_of_code[c]`` a code for lot c's line) when no file has an
    end-of-lot marker and no lot is open before. A lot's runs are then its stretches among its line's rows:
    the runs of equal codes, grouped by line in arrival order, each change of lot within a line opening one.
    """
    k = int(line_of_code.shape[0])
    if codes.shape[0] == 0:
        return np.zeros(k, dtype=np.int64)
    run_code = codes[np.flatnonzero(np.concatenate(([True], codes[1:] != codes[:-1])))]
    run_line = line_of_code[run_code]
    order = np.argsort(run_line, kind="stable")          # each line's runs together, in arrival order
    c, ln = run_code[order], run_line[order]
    opens = np.concatenate(([True], (c[1:] != c[:-1]) | (ln[1:] != ln[:-1])))
    return np.bincount(c[opens], minlength=k).astype(np.int64)


def idle_lots(open_lots: Iterable[tuple[LotKey, float]], now: float,
              idle_seconds_for: Callable[[LotKey], float]) -> list[LotKey]:
    """Open lots (key, unix time of the newest value) with no new value for their idle time at ``now``."""
    return [key for key, last in open_lots if now - last >= idle_seconds_for(key)]
