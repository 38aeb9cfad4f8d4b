"""The one lot model (monitor.lotmodel), pure: runs per line, openings, reopenings, end of input."""

from __future__ import annotations

import itertools

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.lot import LotKey
from monitor.lotmodel import (
    END_MARKER,
    END_OF_INPUT,
    NEXT_LOT,
    FileRows,
    Marker,
    count_runs,
    find_runs,
    markers_of,
    openings,
    plan_file,
    replay,
    runs_of_codes,
)

A = LotKey("L1", "OAT-500", "A")
B = LotKey("L1", "OAT-500", "B")
J = LotKey("L2", "JAM-340", "J")


def _file(keys: list[LotKey], markers: tuple[Marker, ...] = ()) -> FileRows:
    return FileRows(find_runs(keys), list(range(2, len(keys) + 2)), markers)


def test_interrupted_lot_is_reopened_and_counted_twice() -> None:
    """A x3, B x6, A x3: A opens, closes (next-lot), reopens; at the end A and B are closed (hand count)."""
    r = replay([_file([A] * 3 + [B] * 6 + [A] * 3)])
    assert r.runs == {A: 2, B: 1}
    assert r.closed_by == {A: (NEXT_LOT, END_OF_INPUT), B: (NEXT_LOT,)}


def test_a_lot_across_files_and_other_lines_is_one_run() -> None:
    """A lot carried on by the next file, with another line's rows between, opens once."""
    r = replay([_file([A, A, J]), _file([J, A, A])])
    assert r.runs == {A: 1, J: 1}
    assert r.closed_by == {A: (END_OF_INPUT,), J: (END_OF_INPUT,)}


def test_a_marker_inside_a_run_splits_it() -> None:
    """A marker between A's rows closes A (end-marker); the rows after it reopen A."""
    r = replay([_file([A] * 4, (Marker(3, lot="A"),))])
    assert r.runs == {A: 2} and r.closed_by == {A: (END_MARKER, END_OF_INPUT)}


def test_a_lot_open_before_counts_no_new_run() -> None:
    """A lot already open (a daemon's state) that the file carries on is not opened again."""
    plan = plan_file({"L1": A}, find_runs([A, B]), [2, 3])
    assert openings({"L1": A}, plan) == [B]
    assert replay([_file([A, B])], open_lots={"L1": A}).runs == {B: 1}


def test_markers_of_reader_pairs() -> None:
    """The reader's (source line, lot) pairs become markers; a blank lot names none."""
    assert markers_of(((4, "A"), (9, ""), 12)) == [Marker(4, lot="A"), Marker(9), Marker(12)]


def _per_line_runs(keys: list[LotKey]) -> dict[LotKey, int]:
    """Oracle written for this test: per line, count maximal stretches of one lot among that line's rows."""
    out: dict[LotKey, int] = {}
    last: dict[str, LotKey] = {}
    for k in keys:
        if last.get(k.line) != k:
            out[k] = out.get(k, 0) + 1
            last[k.line] = k
    return out


@settings(max_examples=300, deadline=None)
@given(st.lists(st.sampled_from([A, B, J, LotKey("L2", "JAM-340", "K")]), max_size=60),
       st.lists(st.integers(0, 60), max_size=4))
def test_runs_equal_per_line_stretches_however_files_are_cut(keys: list[LotKey], cuts: list[int]) -> None:
    """Without markers, a lot's runs are its stretches among its line's rows, wherever the files are cut
    (codes through runs_of_codes, as check and the daemon build them)."""
    bounds = sorted({0, len(keys), *(c for c in cuts if c <= len(keys))})
    distinct = list(dict.fromkeys(keys))
    codes = np.array([distinct.index(k) for k in keys], dtype=np.int64)
    files = [FileRows(runs_of_codes(codes[a:b], distinct), list(range(2, b - a + 2)))
             for a, b in itertools.pairwise(bounds)]
    assert dict(replay(files).runs) == _per_line_runs(keys)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(0, 5), max_size=80), st.lists(st.integers(0, 80), max_size=4))
def test_vectorised_count_equals_the_replay(codes: list[int], cuts: list[int]) -> None:
    """count_runs (check's fast path without markers) gives every lot the runs replay gives it."""
    keys = [A, B, J, LotKey("L2", "JAM-340", "K"), LotKey("", "OAT-500", "A"), LotKey("L1", "RYE-750", "A")]
    lines = sorted({k.line for k in keys})
    arr = np.array(codes, dtype=np.int64)
    bounds = sorted({0, len(codes), *(c for c in cuts if c <= len(codes))})
    files = [FileRows(runs_of_codes(arr[a:b], keys), list(range(2, b - a + 2))) for a, b in itertools.pairwise(bounds)]
    expected = replay(files).runs
    got = count_runs(arr, np.array([lines.index(k.line) for k in keys], dtype=np.int64))
    assert {keys[c]: int(n) for c, n in enumerate(got.tolist()) if n} == dict(expected)
