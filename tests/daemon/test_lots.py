"""Lot closing policy, pure: which lots a file's rows and markers close, and which stay open."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.lot import LotKey
from monitor.lotmodel import END_MARKER, NEXT_LOT, Closure, Marker, Segment, find_runs, idle_lots, plan_file

A = LotKey("L1", "OAT-500", "OAT-24A101")
B = LotKey("L1", "OAT-500", "OAT-24A102")
J = LotKey("L2", "JAM-340", "J-5524")


def test_runs_of_equal_keys() -> None:
    """Consecutive equal keys form one run; a key seen again later is a new run."""
    assert find_runs([A, A, B, B, B, A]) == [Segment(A, 0, 2), Segment(B, 2, 5), Segment(A, 5, 6)]
    assert find_runs([]) == []


def test_a_new_lot_on_the_same_line_closes_the_open_one() -> None:
    """Rows of lot B after lot A on line L1 close A (next-lot) where B's rows begin."""
    keys = [A, A, B]
    plan = plan_file({}, find_runs(keys), [2, 3, 4])
    assert plan.steps == (Segment(A, 0, 2), Closure(A, NEXT_LOT, 2), Segment(B, 2, 3))
    assert plan.open_after == {"L1": B}


def test_open_lot_from_an_earlier_file_continues_or_closes() -> None:
    """A lot open before the file continues when the file carries on with it, and closes when it does not."""
    same = plan_file({"L1": A}, find_runs([A, A]), [2, 3])
    assert same.closures == () and same.open_after == {"L1": A}
    other = plan_file({"L1": A}, find_runs([B]), [2])
    assert other.closures == (Closure(A, NEXT_LOT, 0),)


def test_lines_are_independent() -> None:
    """A row of line L2 does not close the open lot of line L1."""
    plan = plan_file({"L1": A}, find_runs([J, J]), [2, 3])
    assert plan.closures == () and plan.open_after == {"L1": A, "L2": J}


def test_end_marker_closes_its_lot() -> None:
    """An end-of-lot row after lot A's rows closes A; the next lot opens without a next-lot closure."""
    plan = plan_file({}, find_runs([A, A, B]), [2, 3, 5], [Marker(4, lot=A.lot)])
    assert plan.steps == (Segment(A, 0, 2), Closure(A, END_MARKER, 2), Segment(B, 2, 3))
    assert plan.open_after == {"L1": B}


def test_end_marker_at_the_end_and_in_a_later_file() -> None:
    """A marker as the last row closes the lot; a marker alone in a later file closes the lot still open."""
    plan = plan_file({}, find_runs([A, A]), [2, 3], [Marker(4, lot=A.lot)])
    assert plan.closures == (Closure(A, END_MARKER, 2),) and plan.open_after == {}
    later = plan_file({"L1": A, "L2": J}, [], [], [Marker(2, lot=A.lot)])
    assert later.closures == (Closure(A, END_MARKER, 0),) and later.open_after == {"L2": J}


def test_marker_for_a_lot_not_open_changes_nothing() -> None:
    """A marker naming a lot that is not open closes nothing (nothing to judge, nothing lost)."""
    plan = plan_file({"L1": A}, [], [], [Marker(2, lot="OTHER")])
    assert plan.closures == () and plan.open_after == {"L1": A}


def test_marker_inside_a_run_splits_it() -> None:
    """Rows of the same lot after its marker reopen it: closure between the two segments."""
    plan = plan_file({}, find_runs([A, A, A]), [2, 3, 5], [Marker(4, lot=A.lot)])
    assert plan.steps == (Segment(A, 0, 2), Closure(A, END_MARKER, 2), Segment(A, 2, 3))
    assert plan.open_after == {"L1": A}


def test_idle_lots_by_their_own_idle_time() -> None:
    """A lot is idle when now - last value >= its idle seconds (boundary included)."""
    idle = {"OAT-500": 1200.0, "JAM-340": 600.0}
    got = idle_lots([(A, 1000.0), (J, 1000.0)], 1600.0, lambda k: idle[k.product])
    assert got == [J]
    assert idle_lots([(A, 1000.0)], 2200.0, lambda k: idle[k.product]) == [A]


keys_st = st.lists(st.sampled_from([A, B, J, LotKey("", "", "X1")]), max_size=40)


@settings(max_examples=150, deadline=None)
@given(keys_st, st.lists(st.integers(0, 45), max_size=4))
def test_every_row_is_in_exactly_one_segment(keys: list[LotKey], marker_lines: list[int]) -> None:
    """Segments cover every row once and in order; at most one lot is open per line afterwards."""
    src = [2 * i + 2 for i in range(len(keys))]  # markers may fall between rows (odd lines)
    markers = [Marker(2 * m + 1, lot=None) for m in marker_lines]
    plan = plan_file({}, find_runs(keys), src, markers)
    covered = [i for s in plan.segments for i in range(s.start, s.stop)]
    assert covered == list(range(len(keys)))
    for s in plan.segments:
        assert all(keys[i] == s.key for i in range(s.start, s.stop))
    for line, key in plan.open_after.items():
        assert key.line == line


@settings(max_examples=100, deadline=None)
@given(keys_st)
def test_runs_from_codes_match_groupby(keys: list[LotKey]) -> None:
    """runs_of_codes over numeric codes gives the same runs as itertools.groupby over the keys."""
    import itertools

    import numpy as np

    from monitor.lotmodel import runs_of_codes

    distinct = list(dict.fromkeys(keys))
    codes = np.array([distinct.index(k) for k in keys], dtype=np.int64)
    expected, pos = [], 0
    for key, group in itertools.groupby(keys):  # reference: the standard library's grouping of equal neighbours
        size = len(list(group))
        expected.append(Segment(key, pos, pos + size))
        pos += size
    assert runs_of_codes(codes, distinct) == expected


@settings(max_examples=100, deadline=None)
@given(keys_st, st.lists(st.integers(0, 45), max_size=4))
def test_markers_split_runs_with_array_source_lines(keys: list[LotKey], marker_lines: list[int]) -> None:
    """With numpy source lines a marker between rows r and r+1 of one lot ends a segment exactly at r+1."""
    import numpy as np

    src = np.array([2 * i + 2 for i in range(len(keys))], dtype=np.int64)
    markers = [Marker(2 * m + 1, lot=None) for m in marker_lines]
    plan = plan_file({}, find_runs(keys), src, markers)
    covered = [i for s in plan.segments for i in range(s.start, s.stop)]
    assert covered == list(range(len(keys)))
    # a marker on line 2m+1 falls between rows m-1 and m: no segment may span that gap
    cuts = {m for m in marker_lines if 0 < m < len(keys)}
    for s in plan.segments:
        assert not any(s.start < c < s.stop for c in cuts)
