"""The small-file paths (Python split, pandas' array constructor) and the general ones give identical Exports.

Reference for every comparison here: pyarrow.csv.read_csv, the general path, reading the same bytes; the
canonical file is also checked against Python's standard csv module and float().
"""

from __future__ import annotations

import csv
import io
from contextlib import contextmanager
from typing import Iterator

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.errors import ExportError
from monitor.ingest import Export, FeedProfile, read_export_bytes
from monitor.ingest import frames, table
from monitor.ingest.profile import DEFAULT_PROFILE
from monitor.ingest.text import decode, find_header

FUZZ = settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@contextmanager
def general_path_only() -> Iterator[None]:
    """Every body goes to pyarrow's parser, and every frame to the dict constructor, while inside."""
    saved = table.FAST_PATH_MAX_BYTES, frames.SMALL_FRAME_ROWS
    table.FAST_PATH_MAX_BYTES, frames.SMALL_FRAME_ROWS = 0, -1
    try:
        yield
    finally:
        table.FAST_PATH_MAX_BYTES, frames.SMALL_FRAME_ROWS = saved


def outcome(data: bytes, profile: FeedProfile | None) -> Export | ExportError:
    try:
        return read_export_bytes(data, name="drop/L1.csv", profile=profile)
    except ExportError as exc:
        return exc


def assert_same(data: bytes, profile: FeedProfile | None = None) -> Export | ExportError:
    """Read ``data`` by both paths and assert the results are identical (frames, dtypes, bad rows, errors)."""
    fast = outcome(data, profile)
    with general_path_only():
        ref = outcome(data, profile)        # reference: pyarrow.csv.read_csv splits the body
    assert type(fast) is type(ref), (fast, ref)
    if isinstance(ref, ExportError):
        assert isinstance(fast, ExportError)
        assert (str(fast), fast.path, fast.line, fast.key) == (str(ref), ref.path, ref.line, ref.key)
        return fast
    assert isinstance(fast, Export)
    for field in ("path", "kind", "bad_rows", "dropped", "end_of_lot", "density", "profile"):
        assert getattr(fast, field) == getattr(ref, field), field
    for frame in ("rows", "summaries"):
        pd.testing.assert_frame_equal(getattr(fast, frame), getattr(ref, frame), check_exact=True)
        assert list(getattr(fast, frame).dtypes) == list(getattr(ref, frame).dtypes)
    return fast


def brackenfield(rows: int, seed: int = 20261201) -> bytes:
    """Invented demo data: line L1, OAT-500 bags, one lot, four filler heads."""
    rng = np.random.default_rng(seed)
    vals = rng.normal(500.0, 2.0, rows)
    body = "".join(f"2026-11-30T06:{j // 60 % 60:02d}:{j % 60:02d},L1,OAT-500,OAT-000017,H{j % 4 + 1},{v:.1f},g\n"
                   for j, v in enumerate(vals))
    return ("timestamp,line,product,lot,head,value,unit\n" + body).encode()


def test_small_canonical_file_takes_the_fast_path() -> None:
    """A small clean canonical body is split without pyarrow (so the comparisons below compare two paths)."""
    buf = decode(brackenfield(100), DEFAULT_PROFILE, "x.csv")
    header = find_header(buf, DEFAULT_PROFILE, "x.csv")
    fast = table.split_body(buf, header, "x.csv")
    with general_path_only():
        ref = table.split_body(buf, header, "x.csv")
    assert fast.clean and not ref.clean  # only the Python split sets ``clean``: two different paths
    assert [c.to_pylist() for c in fast.columns] == [c.to_pylist() for c in ref.columns]
    assert fast.lines.tolist() == ref.lines.tolist() == list(range(2, 102))


def test_canonical_file_matches_python_csv_and_float() -> None:
    """Values, lots and lines of a 100-row file equal Python's csv module + float() of the same text."""
    data = brackenfield(100)
    exp = assert_same(data)
    assert isinstance(exp, Export)
    parsed = list(csv.reader(io.StringIO(data.decode())))   # reference: Python's standard csv module
    assert exp.rows["value"].tolist() == [float(r[5]) for r in parsed[1:]]
    assert exp.rows["lot"].tolist() == [r[3] for r in parsed[1:]]
    assert exp.rows["timestamp"].tolist() == [r[0] for r in parsed[1:]]
    assert exp.rows["source_line"].tolist() == list(range(2, 102))  # line 1 is the header, by construction


@pytest.mark.parametrize("data", [
    b"lot,value\nA,1\nA,2",                    # no newline at the end
    b"lot,value\nA,1\n\nA,2\n",                # a blank line
    b"lot,value\nA,1\nA,2\n\n",                # blank line at the end
    b"lot,value\nA,1,\nA,2\n",                 # a trailing empty extra field
    b"lot,value\nA,1,x\nA,2\n",                # too many fields
    b"lot,value,unit\nA,1\nA,2,g\n",           # too few fields
    b"lot,value\n , \nA,2\n",                  # a row of whitespace fields
    b"lot;value\nA;1,5\nB;2,25\n",             # semicolons, decimal comma
    b"lot\tvalue\nA\t 1 \nB\t2\n",             # tabs, padded value
    b"lot,value\nA,1\r\nA,2\rA,3\n",           # mixed line ends (normalised before splitting)
    "lot,value\nÄ-1,1\nB\u2028,2\nC\x85,3\n".encode(),  # non-ASCII and Unicode line separators inside fields
    b"lot,value\nEND,\nA,1\nEND,\n",
    b"value\n1\n2\n",                          # one column only
    b"lot,n,mean,sd\nA,10,500.1,2.0\nB,5,499.5,1.5\n",
])
def test_edge_bodies_read_the_same_both_ways(data: bytes) -> None:
    """Bodies on the fast path's edges give the same Export or error by both paths."""
    prof = FeedProfile(end_of_lot="END", decimal="," if b";" in data else ".", max_bad_rows=5)
    assert_same(data, prof)


PROFILES = st.builds(
    FeedProfile,
    delimiter=st.sampled_from(["auto", ",", ";", "\t"]),
    decimal=st.sampled_from([".", ","]),
    skip_lines=st.integers(0, 2),
    drop_values=st.sampled_from([(), ("-9999", "ERR")]),
    max_bad_rows=st.sampled_from([0.0, 0.5, 1000.0]),
    end_of_lot=st.sampled_from([None, "END"]),
    timestamp_format=st.sampled_from([None, "%d.%m.%Y %H:%M:%S"]),
    tare=st.sampled_from([0.0, 12.5]),
)
FIELD = st.lists(st.sampled_from(list('AB01 .,;\t"-eE+\r\n\x00éx:') + ["inf", "nan", "END", "ERR", "g", "kg", "mL",
                                                                         "2026-12-01", "01.12.2026", " 06:00"]),
                max_size=6).map("".join)


@FUZZ
@given(
    header=st.lists(st.sampled_from(["lot", "value", "unit", "head", "n", "mean", "sd", "timestamp", "x", ""]),
                    min_size=1, max_size=6),
    rows=st.lists(st.lists(FIELD, min_size=1, max_size=7), max_size=12),
    delim=st.sampled_from([",", ";", "\t"]),
    newline=st.sampled_from(["\n", "\r\n"]),
    profile=PROFILES,
)
def test_random_csv_shapes_read_the_same_both_ways(header: list[str], rows: list[list[str]], delim: str,
                                                   newline: str, profile: FeedProfile) -> None:
    """The reader fuzz shapes: identical Export or identical error by both paths."""
    text = newline.join([delim.join(header)] + [delim.join(r) for r in rows]) + newline
    assert_same(text.encode("utf-8"), profile)


@FUZZ
@given(
    cells=st.lists(st.tuples(st.from_regex(r"\A[A-Z0-9]{1,6}\Z"),
                             st.floats(allow_nan=False, allow_infinity=False).map(repr),
                             st.sampled_from(["", " "])), min_size=1, max_size=30),
    unit=st.sampled_from(["g", "kg", " g", "mL", "oz"]),
)
def test_clean_shapes_read_the_same_both_ways(cells: list[tuple[str, str, str]], unit: str) -> None:
    """Clean files of the canonical shape (the ones the fast path takes): identical Exports."""
    body = "".join(f"{lot},{pad}{v}{pad},{unit},2026-12-01T06:00:{i % 60:02d}\n" for i, (lot, v, pad) in enumerate(cells))
    assert_same(("lot,value,unit,timestamp\n" + body).encode())


def test_frames_share_no_mutable_parts() -> None:
    """Renaming one Export's index or columns, or adding a column, leaves the next Export untouched."""
    data = brackenfield(20)
    first = read_export_bytes(data, name="a.csv")
    for frame in (first.rows, first.summaries):
        frame.columns.name = "renamed"
        frame.index.name = "renamed"
        frame["extra"] = 1.0
    second = read_export_bytes(data, name="b.csv")
    for frame in (second.rows, second.summaries):
        assert frame.columns.name is None and frame.index.name is None
        assert "extra" not in frame.columns
