"""A line over the export line bound is refused with a plain error naming the file and line, read in place."""

from __future__ import annotations

import tracemalloc
from pathlib import Path

import pytest

from monitor.errors import ExportError
from monitor.ingest import read_export, read_export_bytes
from monitor.ingest.text import MAX_LINE_BYTES

HEADER = b"timestamp,line,product,lot,head,value,unit\n"
ROW = b"2026-12-02T07:00:%02d,L2,OAT-500,C0001,H1,500.%d,g\n"
MB = 1_000_000


def good_rows(n: int) -> bytes:
    return b"".join(ROW % (i, i % 10) for i in range(n))


def test_a_50_mb_single_line_file_gets_a_plain_error(tmp_path: Path) -> None:
    """50 MB without a line end: "line 1 is longer than ... bytes", the file named, no parser failure."""
    path = tmp_path / "dump.csv"
    path.write_bytes(b"x" * (50 * MB))
    with pytest.raises(ExportError) as err:
        read_export(path)
    assert err.value.path == str(path) and err.value.line == 1
    assert f"line 1 is longer than {MAX_LINE_BYTES:,} bytes" in err.value.message
    assert f"at most {MAX_LINE_BYTES:,} bytes" in err.value.message
    assert str(path) in str(err.value)


def test_a_long_line_after_good_rows_is_named_by_its_number(tmp_path: Path) -> None:
    """Header, three good rows, then a 2 MiB row: the error names line 5."""
    data = HEADER + good_rows(3) + b"2026-12-02T07:01:00,L2,OAT-500," + b"L" * (2 << 20) + b",H1,500.0,g\n"
    with pytest.raises(ExportError) as err:
        read_export_bytes(data, name="L2-long.csv")
    assert err.value.line == 5 and err.value.path == "L2-long.csv"
    assert "line 5 is longer than" in err.value.message


def test_reading_a_50_mb_line_allocates_no_copy_of_it() -> None:
    """The check runs on the bytes in place: the reader allocates well under 1 MB besides the file's bytes."""
    data = b"9" * (50 * MB)
    tracemalloc.start()
    try:
        with pytest.raises(ExportError):
            read_export_bytes(data, name="dump.csv")
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 1 * MB, peak


def test_a_file_read_from_disk_holds_its_bytes_once(tmp_path: Path) -> None:
    """From disk: the 50 MB are read once into bytes, and no str or copy of the line is made besides."""
    path = tmp_path / "dump.csv"
    path.write_bytes(b"x" * (50 * MB))
    tracemalloc.start()
    try:
        with pytest.raises(ExportError):
            read_export(path)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 51 * MB, peak


@pytest.mark.parametrize("bad_row", [False, True])   # True: a short row sends the body to the single-threaded parser
def test_a_line_of_exactly_the_bound_is_read(bad_row: bool) -> None:
    """A row of exactly MAX_LINE_BYTES bytes (a long lot code) is read; one byte more is refused."""
    prefix, suffix = b"2026-12-02T07:01:00,L2,OAT-500,", b",H1,500.5,g"
    code = b"K" * (MAX_LINE_BYTES - len(prefix) - len(suffix))
    row = prefix + code + suffix
    assert len(row) == MAX_LINE_BYTES
    rows = good_rows(40) + (b"2026-12-02T07:02:00,L2\n" if bad_row else b"")
    got = read_export_bytes(HEADER + rows + row + b"\n", name="L2-bound.csv")
    assert len(got.rows) == 41
    assert got.rows["lot"].iloc[-1] == code.decode() and got.rows["value"].iloc[-1] == 500.5
    assert [b.line for b in got.bad_rows] == ([42] if bad_row else [])
    over = prefix + b"K" + code + suffix
    with pytest.raises(ExportError) as err:
        read_export_bytes(HEADER + rows + over + b"\n", name="L2-bound.csv")
    assert err.value.line == 43 if bad_row else err.value.line == 42


def test_a_wide_field_in_a_bad_row_is_a_bad_row_not_a_crash() -> None:
    """A row of the wrong width holding a 200 kB field (above the csv module's default limit) is a bad row."""
    wide = b"2026-12-02T07:03:00,L2,OAT-500,C0001,H1,500.1,g,extra," + b"W" * 200_000 + b"\n"
    got = read_export_bytes(HEADER + good_rows(40) + wide, name="L2-wide.csv")
    assert len(got.rows) == 40
    assert [b.line for b in got.bad_rows] == [42]
    assert "too many fields" in got.bad_rows[0].reason
