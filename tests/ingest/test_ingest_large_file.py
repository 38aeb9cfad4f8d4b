"""A large export file (read with the in-place decode checks) reads as the same bytes do, errors naming the same lines."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.errors import ExportError
from monitor.ingest import read_export, read_export_bytes
from monitor.ingest.reader import LARGE_FILE_BYTES

HEADER = b"timestamp,line,product,lot,head,value,unit\n"


def body(rows: int) -> tuple[list[bytes], np.ndarray]:
    """Invented Brackenfield Foods L2 rows (OAT-500 bags) and their values, enough to pass the large-file size."""
    values = np.round(500.0 + (np.arange(rows) % 97) * 0.1, 1)
    lines = [f"2026-12-02T07:{i // 60 % 60:02d}:{i % 60:02d},L2,OAT-500,C{i // 500:05d},{i % 8 + 1},{v},g"
             .encode() for i, v in enumerate(values)]
    return lines, values


ROWS = LARGE_FILE_BYTES // 40 + 5000  # each row is about 50 bytes: the file is larger than LARGE_FILE_BYTES


def test_a_large_file_reads_as_its_bytes_do(tmp_path: Path) -> None:
    lines, values = body(ROWS)
    data = HEADER + b"\n".join(lines) + b"\n"
    path = tmp_path / "brackenfield-L2.csv"
    path.write_bytes(data)
    assert path.stat().st_size >= LARGE_FILE_BYTES
    got = read_export(path)
    pd.testing.assert_frame_equal(got.rows, read_export_bytes(data, name=str(path)).rows)
    assert len(got.rows) == ROWS and not got.bad_rows and got.notes == ()
    np.testing.assert_array_equal(got.rows["value"].to_numpy(), values)
    np.testing.assert_array_equal(got.rows["source_line"].to_numpy(), np.arange(2, ROWS + 2))
    assert got.rows["lot"].iloc[-1] == f"C{(ROWS - 1) // 500:05d}"


@pytest.mark.parametrize("damage", ["nul", "crlf", "cr", "utf-8", "bom"])
def test_a_large_file_that_needs_decoding_reads_as_its_bytes_do(tmp_path: Path, damage: str) -> None:
    """Files the in-place check cannot take (NUL, carriage returns, non-ASCII text, a BOM) go the bytes' way."""
    lines, _ = body(ROWS)
    sep = b"\r\n" if damage == "crlf" else b"\r" if damage == "cr" else b"\n"
    if damage == "nul":
        lines[1000] = lines[1000].replace(b",L2,", b",L\x002,")
    if damage == "utf-8":
        lines[1000] = lines[1000].replace(b"OAT-500", "OAT-500-Ä".encode())
    data = (b"\xef\xbb\xbf" if damage == "bom" else b"") + HEADER.replace(b"\n", sep) + sep.join(lines) + sep
    path = tmp_path / "brackenfield-L2.csv"
    path.write_bytes(data)
    if damage == "nul":
        with pytest.raises(ExportError) as mapped:
            read_export(path)
        with pytest.raises(ExportError) as plain:
            read_export_bytes(data, name=str(path))
        assert str(mapped.value) == str(plain.value)
        assert mapped.value.line == 1002  # header on line 1, row index 1000 on line 1002
        return
    got = read_export(path)
    pd.testing.assert_frame_equal(got.rows, read_export_bytes(data, name=str(path)).rows)
    assert len(got.rows) == ROWS
    np.testing.assert_array_equal(got.rows["source_line"].to_numpy(), np.arange(2, ROWS + 2))
    if damage == "utf-8":
        assert got.rows["product"].iloc[1000] == "OAT-500-Ä"
