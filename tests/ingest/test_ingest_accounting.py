"""Issue 7 for the reader: no assumed unit, every row of a lot accounted for, empty and binary files named.

Expected numbers come from Python's float() of the raw text (an independent parser), expected lines from
where the test itself put each row, expected reasons from monitor.lot.EXCLUSION_REASONS (the shared contract).
"""

from __future__ import annotations

import codecs
import csv
import io
import math

import numpy as np
import pandas as pd
import pytest

from monitor.errors import ExportError
from monitor.ingest import PROFILE_KEYS, FeedProfile, read_export_bytes
from monitor.ingest.reader import ROW_COLUMNS, SUMMARY_COLUMNS
from monitor.ingest.table import FAST_PATH_MAX_BYTES
from monitor.lot import EXCLUSION_REASONS

LENIENT = FeedProfile(max_bad_rows=100)


# -- 1. units are never silently assumed ----------------------------------------------------------
def test_no_unit_column_and_no_profile_unit_means_no_unit() -> None:
    """Without a unit column and without a profile unit, every row's unit is "" (it used to read as "g")."""
    assert FeedProfile().unit is None and PROFILE_KEYS["unit"][0] is None
    assert "judging rule's unit" in PROFILE_KEYS["unit"][1]
    exp = read_export_bytes(b"lot,value\nC1,1010.5\nC1,1011\n", name="c.csv")
    assert exp.rows["unit"].tolist() == ["", ""]
    assert exp.rows["value"].tolist() == [float("1010.5"), float("1011")]  # reference: Python float()


def test_blank_unit_cell_is_no_unit_unless_the_profile_declares_one() -> None:
    """A blank unit cell carries no unit; with a profile unit it means that unit."""
    data = b"lot,value,unit\nA,1,g\nA,2,\nA,3,  \n"
    assert read_export_bytes(data, name="u.csv").rows["unit"].tolist() == ["g", "", ""]
    declared = read_export_bytes(data, name="u.csv", profile=FeedProfile(unit="mL"))
    assert declared.rows["unit"].tolist() == ["g", "mL", "mL"]


def test_tare_without_a_declared_unit_is_subtracted_as_it_stands() -> None:
    """No profile unit: the tare is in the values' own unit and is taken off each value unconverted."""
    exp = read_export_bytes(b"lot,value,unit\nA,512.75,g\nA,0.75,kg\nA,40.5,\n", name="t.csv",
                            profile=FeedProfile(tare=12.5))
    want = [float("512.75") - 12.5, float("0.75") - 12.5, float("40.5") - 12.5]  # Python float() minus tare
    assert exp.rows["value"].tolist() == pytest.approx(want, abs=1e-12)
    assert exp.bad_rows == ()


def test_tare_with_a_declared_unit_still_converts() -> None:
    """A profile unit makes the tare convertible: 12.5 g off a kg row is 0.0125 kg (SI: 1 kg = 1000 g)."""
    exp = read_export_bytes(b"lot,value,unit\nA,0.75,kg\nA,40.5,\n", name="t.csv",
                            profile=FeedProfile(unit="g", tare=12.5))
    assert exp.rows["unit"].tolist() == ["kg", "g"]
    assert exp.rows["value"].tolist() == pytest.approx([float("0.75") - 0.0125, float("40.5") - 12.5], abs=1e-12)


# -- 2. every measurement accounted for -----------------------------------------------------------
def test_rows_without_a_usable_value_are_kept_with_their_reason() -> None:
    """Blank, non-number, non-finite and drop_values rows of a lot are kept as NaN with the reason; rows
    with a problem elsewhere (lot code, unit, field count, timestamp format) stay out."""
    lines = [
        "lot,value,unit,timestamp",
        "A,500.5,g,01.12.2026 06:00",       # 2 good
        "A,,g,01.12.2026 06:01",            # 3 blank
        "A, \t ,g,01.12.2026 06:02",        # 4 blank (whitespace only)
        "A,abc,g,01.12.2026 06:03",         # 5 not a number
        "A,NaN,g,01.12.2026 06:04",         # 6 not finite
        "A,-inf,g,01.12.2026 06:05",        # 7 not finite
        "A,1e999,g,01.12.2026 06:06",       # 8 not finite (overflows float64)
        "A,ERR,g,01.12.2026 06:07",         # 9 drop value
        "A,-9999,g,01.12.2026 06:08",       # 10 drop value
        ",501,g,01.12.2026 06:09",          # 11 empty lot code: out
        "A,abc,lbs,01.12.2026 06:10",       # 12 unknown unit (and a bad value): out
        "A,502",                            # 13 too few fields: out
        "A,,g,yesterday",                   # 14 timestamp not matching the format (and blank): out
        "END,,,",                           # 15 end-of-lot marker
        "B,499.25,g,01.12.2026 06:11",      # 16 good
    ]
    prof = FeedProfile(drop_values=("ERR", "-9999"), end_of_lot="END", timestamp_format="%d.%m.%Y %H:%M",
                       max_bad_rows=100)
    exp = read_export_bytes(("\n".join(lines) + "\n").encode(), name="hall2.csv", profile=prof)
    assert list(exp.rows.columns) == list(ROW_COLUMNS) and "excluded" in ROW_COLUMNS
    assert exp.rows["source_line"].tolist() == [2, 3, 4, 5, 6, 7, 8, 9, 10, 16]
    assert exp.rows["excluded"].tolist() == ["", "blank", "blank", "not_a_number", "not_finite", "not_finite",
                                             "not_finite", "dropped_value", "dropped_value", ""]
    assert set(exp.rows["excluded"]) - {""} <= set(EXCLUSION_REASONS)
    values = exp.rows["value"].tolist()
    assert [values[0], values[-1]] == [float("500.5"), float("499.25")]   # reference: Python float()
    assert all(math.isnan(v) for v in values[1:-1])
    assert exp.dropped == 2
    # value problems are still bad rows (drop values are not); so are the rows left out
    assert [b.line for b in exp.bad_rows] == [3, 4, 5, 6, 7, 8, 11, 12, 13, 14]
    assert [b.column for b in exp.bad_rows[:6]] == ["value"] * 6
    assert exp.bad_rows[0].reason.startswith("value is blank") and "not a number" in exp.bad_rows[2].reason
    assert exp.end_of_lot == ((15, "A"),)


def test_missed_measurements_do_not_use_up_the_bad_row_budget() -> None:
    """Blank and non-finite values (missed measurements) are listed as bad rows and kept with their lot but
    do not count against max_bad_rows; text where a number belongs (damage) and rows left out of every lot
    (empty lot code) do: with 1 allowed, 4 missed measurements pass, 2 damaged values reject the file."""
    good = [f"A,{500 + i}" for i in range(18)]
    kept = read_export_bytes(("lot,value\n" + "\n".join(good + ["A,", "A, ", "A,x", "A,nan", "A,inf"]) + "\n"
                              ).encode(), name="b.csv", profile=FeedProfile(max_bad_rows=1))
    assert kept.rows["excluded"].tolist().count("") == 18
    assert sorted(kept.rows["excluded"].tolist())[-5:] == ["blank", "blank", "not_a_number", "not_finite",
                                                           "not_finite"]
    assert len(kept.bad_rows) == 5
    with pytest.raises(ExportError, match="2 of 20 rows bad, the profile allows 1") as info:
        read_export_bytes(("lot,value\n" + "\n".join(good + ["A,x", "A,y"]) + "\n").encode(), name="b.csv",
                          profile=FeedProfile(max_bad_rows=1))
    assert info.value.line == 20 and "not a number" in str(info.value)
    with pytest.raises(ExportError, match="2 of 21 rows bad, the profile allows 1") as info:
        read_export_bytes(("lot,value\n" + "\n".join(good + ["A,", ",501", ",502"]) + "\n").encode(),
                          name="b.csv", profile=FeedProfile(max_bad_rows=1))
    assert info.value.line == 21 and "empty lot code" in str(info.value)


def test_no_usable_value_still_rejects_the_file() -> None:
    """Rows kept without a usable value do not make a file usable: no usable rows is still an error."""
    with pytest.raises(ExportError, match="no usable rows: value is blank"):
        read_export_bytes(b"lot,value\nA,\nA,nan\n", name="n.csv", profile=LENIENT)
    with pytest.raises(ExportError, match="no usable rows: all 2 are 'no measurement' values"):
        read_export_bytes(b"lot,value\nA,ERR\nA,ERR\n", name="n.csv", profile=FeedProfile(drop_values=("ERR",)))


def test_a_drop_value_row_with_a_bad_unit_is_a_bad_row_not_a_dropped_one() -> None:
    """A 'no measurement' row whose unit is unknown is left out as a bad row (its unit cannot be shown)."""
    exp = read_export_bytes(b"lot,value,unit\nA,1,g\nA,ERR,lbs\n", name="d.csv",
                            profile=FeedProfile(drop_values=("ERR",), max_bad_rows=5))
    assert exp.rows["source_line"].tolist() == [2] and exp.dropped == 0
    assert [(b.line, b.column) for b in exp.bad_rows] == [(3, "unit")]


def big_export(rows: int, bad: dict[int, str] | None = None) -> tuple[bytes, list[list[str]]]:
    """Invented Brackenfield L1 OAT-500 rows (``bad`` replaces the value text of some rows) and the fields."""
    rng = np.random.default_rng(20261202)
    fields = [[f"2026-12-01T06:{i // 60 % 60:02d}:{i % 60:02d}", "L1", "OAT-500", f"B{i // 500:05d}",
               str(i % 8 + 1), f"{v:.2f}", "g"] for i, v in enumerate(rng.normal(502.0, 2.0, rows))]
    for i, text in (bad or {}).items():
        fields[i][5] = text
    body = "".join(",".join(f) + "\n" for f in fields)
    return ("timestamp,line,product,lot,head,value,unit\n" + body).encode(), fields


@pytest.mark.parametrize("bad", [{}, {1234: "", 40_000: "nan", 59_999: "n/a"}, {7: "inf"}])
def test_large_files_keep_lines_values_and_reasons_on_every_parser_path(bad: dict[int, str]) -> None:
    """A file past the small-file path (multi-threaded parser; text parse when a value is bad): every row
    keeps its line, its value equals float() of its text and a bad value keeps its raw text and reason."""
    data, _fields = big_export(60_000, bad)
    assert len(data) > 4 * FAST_PATH_MAX_BYTES
    exp = read_export_bytes(data, name="l1.csv", profile=FeedProfile(max_bad_rows=10))
    assert exp.rows["source_line"].tolist() == list(range(2, 60_002))  # row i sits on line i + 2
    parsed = list(csv.reader(io.StringIO(data.decode())))[1:]           # reference: Python's csv module
    assert exp.rows["lot"].tolist() == [r[3] for r in parsed]
    got = exp.rows["value"].to_numpy()
    for i, r in enumerate(parsed):
        if i not in bad:
            assert got[i] == float(r[5]), i                             # reference: Python float()
    want = {"": "blank", "nan": "not_finite", "inf": "not_finite", "n/a": "not_a_number"}
    assert {i: exp.rows["excluded"].iat[i] for i in bad} == {i: want[t] for i, t in bad.items()}
    assert all(math.isnan(got[i]) for i in bad)
    assert [(b.line, b.value) for b in exp.bad_rows] == [(i + 2, t) for i, t in sorted(bad.items())]
    assert (exp.rows["excluded"] == "").sum() == 60_000 - len(bad)


# -- 2b. summary records that cannot be used --------------------------------------------------------
def test_unusable_summary_records_are_kept_with_a_plain_problem() -> None:
    """Records with a lot code but an unusable n / mean / sd are kept: problem says why, numbers that
    cannot be read are NaN, an unusable n is 0; each is still a bad row."""
    data = (b"lot,n,mean,sd\n"
            b"J1,20,341.2,1.5\n"      # 2 fine
            b"J2,1,340.5,nan\n"       # 3 n = 1, sd nan: one unit has no sd
            b"J3,1,340.5,\n"          # 4 n = 1, sd blank
            b"J4,1,340.5,0\n"         # 5 n = 1 with sd 0: usable (the engine decides what n = 1 gets)
            b"J5,5,340,-0.1\n"        # 6 negative sd
            b"J6,2.5,340,1\n"         # 7 n not whole
            b"J7,x,340,1\n"           # 8 n not a number
            b"J8,5,,1\n"              # 9 mean blank
            b"J9,5,abc,1\n")          # 10 mean not a number
    exp = read_export_bytes(data, name="sum.csv", profile=LENIENT)
    s = exp.summaries
    assert list(s.columns) == list(SUMMARY_COLUMNS) and "problem" in SUMMARY_COLUMNS
    assert s["lot"].tolist() == [f"J{i}" for i in range(1, 10)]
    problems = s["problem"].tolist()
    assert problems[0] == "" and problems[3] == ""
    assert "undefined for a lot of one unit (n = 1)" in problems[1] and problems[1].startswith("sd 'nan'")
    assert "undefined for a lot of one unit" in problems[2]
    assert problems[4] == "sd '-0.1' is negative"
    assert problems[5] == "n '2.5' is not a positive whole number" and problems[6] == "n 'x' is not a positive whole number"
    assert problems[7] == "mean is blank" and problems[8] == "mean 'abc' is not a number"
    assert s["n"].tolist() == [20, 1, 1, 1, 5, 0, 0, 5, 5]
    mean, sd = s["mean"].tolist(), s["sd"].tolist()
    assert math.isnan(mean[7]) and math.isnan(mean[8]) and mean[0] == float("341.2")  # reference: float()
    assert math.isnan(sd[1]) and math.isnan(sd[2]) and sd[3] == 0.0 and sd[4] == float("-0.1")
    assert [b.line for b in exp.bad_rows] == [3, 4, 6, 7, 8, 9, 10]


def test_summary_with_a_drop_value_mean_is_kept_and_counted_as_dropped() -> None:
    """A summary whose mean is a 'no measurement' value is kept with its problem, counted in dropped."""
    exp = read_export_bytes(b"lot,n,mean,sd\nJ1,20,341.2,1.5\nJ2,20,-9999,1\n", name="s.csv",
                            profile=FeedProfile(drop_values=("-9999",), max_bad_rows=0))
    assert exp.dropped == 1 and exp.bad_rows == ()
    assert exp.summaries["problem"].tolist() == ["", "mean '-9999' is a 'no measurement' value (drop_values)"]
    assert math.isnan(exp.summaries["mean"].tolist()[1])


def test_summary_with_another_problem_stays_out() -> None:
    """A summary record with an unknown unit is left out, as before (its numbers cannot be put in a unit)."""
    exp = read_export_bytes(b"lot,n,mean,sd,unit\nJ1,20,341.2,1.5,g\nJ2,20,340,1,lbs\n", name="s.csv",
                            profile=LENIENT)
    assert exp.summaries["lot"].tolist() == ["J1"] and [b.column for b in exp.bad_rows] == ["unit"]


# -- 4. empty and binary files ---------------------------------------------------------------------
@pytest.mark.parametrize("data", [b"", b"\n", b"  \r\n\t\n", codecs.BOM_UTF8, codecs.BOM_UTF8 + b"\r\n",
                                  codecs.BOM_UTF16_LE, codecs.BOM_UTF16_LE + " \n".encode("utf-16-le"),
                                  "\u00a0\n".encode()])
def test_empty_file_says_empty_file(data: bytes) -> None:
    """A file of 0 bytes, whitespace or a byte-order mark only is "empty file", naming the file."""
    with pytest.raises(ExportError) as info:
        read_export_bytes(data, name="drop/x.csv")
    assert str(info.value).startswith("drop/x.csv: empty file") and info.value.path == "drop/x.csv"


@pytest.mark.parametrize("data, found, line", [
    (b"lot,value\nA,\x00\x01\x02\n", "NUL byte at offset 12", 2),
    # PNG signature (ISO/IEC 15948, 5.2): 89 50 4E 47 0D 0A 1A 0A
    (b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", "NUL byte at offset 8; it looks like a PNG image", 3),
    # ZIP local file header signature "PK\x03\x04" (PKWARE APPNOTE.TXT, 4.3.7)
    (b"PK\x03\x04\x14\x00\x06\x00", "NUL byte at offset 5; it looks like a ZIP archive", 1),
    (b"\xe2\x82\x01\xfe\xff rows", "control byte 0x01 at offset 2", 1),
])
def test_binary_file_says_it_is_not_a_text_file(data: bytes, found: str, line: int) -> None:
    """Binary data is "not a text file" naming what was found, never a hint to set an 8-bit encoding."""
    with pytest.raises(ExportError) as info:
        read_export_bytes(data, name="drop/x.bin")
    msg = str(info.value)
    assert f"not a text file: {found}" in msg and info.value.line == line, msg
    assert "latin-1" not in msg and "cp1252" not in msg


def test_utf16_without_bom_is_not_text_but_says_how_to_read_it() -> None:
    """UTF-16 text without a BOM has a NUL after every ASCII character: refused, with the encoding hint."""
    with pytest.raises(ExportError) as info:
        read_export_bytes("lot,value\nA,1\n".encode("utf-16-le"), name="u.csv")
    assert "not a text file: NUL byte at offset 1" in str(info.value) and "utf-16-le" in str(info.value)


def test_eight_bit_text_still_gets_the_encoding_hint() -> None:
    """8-bit text (no control bytes) is not binary: the latin-1 hint stays for it."""
    with pytest.raises(ExportError) as info:
        read_export_bytes("lot,product,value\nJ1,Gelée,1\n".encode("latin-1"), name="l.csv")
    assert info.value.line == 2 and 'encoding = "latin-1"' in str(info.value)
    assert "not a text file" not in str(info.value)


# -- 5. the large-file path (worker threads) gives what the one-thread path gives -------------------
@pytest.mark.parametrize("lines, profile", [
    (["lot,value,unit,timestamp", "A,1,g,2026-12-01T06:00:00", "A,,kg,2026-12-01 06:00:01", "B,2,,"],
     FeedProfile(max_bad_rows=5)),
    (["lot,value,unit,timestamp", "A,1,g,2026-12-01T06:00:00", "A,2,G,yesterday", "B,3,lbs,2026-12-01T06:00:02"],
     FeedProfile(max_bad_rows=5)),
    (["lot,value,timestamp", "A,1,01.12.2026 06:00", "A,2,02.12.2026 06:00", "A,3,bad"],
     FeedProfile(timestamp_format="%d.%m.%Y %H:%M", max_bad_rows=5)),
    (["lot,n,mean,sd,unit,timestamp", "J1,20,341.2,1.5,g,2026-12-01T06:00:00", "J2,1,340,nan,g,2026-12-01T07:00:00"],
     FeedProfile(max_bad_rows=5)),
])
def test_worker_thread_path_equals_the_one_thread_path(lines: list[str], profile: FeedProfile,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    """With the large-file threshold at 0 (units, timestamps, frame columns on worker threads) an export
    reads exactly as with the threshold out of reach (reference: the one-thread path, the same bytes)."""
    from monitor.ingest import reader
    data = ("\n".join(lines) + "\n").encode()
    monkeypatch.setattr(reader, "PARALLEL_ROWS", 10**12)
    ref = read_export_bytes(data, name="p.csv", profile=profile)
    monkeypatch.setattr(reader, "PARALLEL_ROWS", 0)
    got = read_export_bytes(data, name="p.csv", profile=profile)
    for frame in ("rows", "summaries"):
        pd.testing.assert_frame_equal(getattr(got, frame), getattr(ref, frame), check_exact=True)
    assert (got.bad_rows, got.notes, got.dropped) == (ref.bad_rows, ref.notes, ref.dropped)
