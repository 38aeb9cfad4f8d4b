"""Reading well-formed exports: encodings, delimiters, preambles, mappings, units, tare, sentinels, summaries.

Expected numbers come from Python's own float() of the raw text (an independent parser); expected line
numbers come from where the test itself put each row.
"""

from __future__ import annotations

import codecs
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.ingest import Export, FeedProfile, read_export, read_export_bytes
from monitor.ingest.reader import ROW_COLUMNS, SUMMARY_COLUMNS


def write(tmp_path: Path, name: str, data: bytes) -> Path:
    p = tmp_path / name
    p.write_bytes(data)
    return p


def values_of(exp: Export) -> list[float]:
    return exp.rows["value"].tolist()


def test_canonical_file_reads_every_column(tmp_path: Path) -> None:
    """A canonical CSV: rows keep file order, lot codes keep leading zeros, text fields are stripped."""
    text = ("timestamp,line,product,lot,head,value,unit\n"
            "2026-12-01T06:00:00,L1,OAT-500,000731,1,502.13,g\n"
            "2026-12-01T06:00:01, L1 ,OAT-500, 000731 ,2, 499.87 ,g\n"
            "2026-12-01T06:00:02,L1,OAT-500,000732,3,501.4,g\n")
    exp = read_export(write(tmp_path, "brackenfield-L1.csv", text.encode()))
    assert exp.kind == "values" and exp.path.endswith("brackenfield-L1.csv") and exp.profile == "default"
    assert list(exp.rows.columns) == list(ROW_COLUMNS)
    assert list(exp.summaries.columns) == list(SUMMARY_COLUMNS) and exp.summaries.empty
    assert exp.rows["lot"].tolist() == ["000731", "000731", "000732"]
    assert exp.rows["line"].tolist() == ["L1", "L1", "L1"]
    assert exp.rows["head"].tolist() == ["1", "2", "3"]
    assert values_of(exp) == [float("502.13"), float(" 499.87 "), float("501.4")]  # Python float(), independent
    assert exp.rows["source_line"].tolist() == [2, 3, 4]
    assert exp.rows["timestamp"].tolist()[0] == "2026-12-01T06:00:00"
    assert exp.rows["value"].dtype == np.float64 and exp.rows["source_line"].dtype == np.int64
    assert exp.bad_rows == () and exp.dropped == 0 and exp.end_of_lot == () and exp.density is None


def test_read_export_bytes_equals_reading_the_file(tmp_path: Path) -> None:
    """The bytes entry point gives the same result as reading the file; name becomes the path."""
    data = b"lot,value\nA1,1.25\nA1,2.5\n"
    a = read_export(write(tmp_path, "x.csv", data))
    b = read_export_bytes(data, name=str(tmp_path / "x.csv"))
    pd.testing.assert_frame_equal(a.rows, b.rows)
    assert a.path == b.path


def test_semicolon_decimal_comma_preamble_latin1(tmp_path: Path) -> None:
    """';' + decimal comma + 3 preamble lines + Latin-1 product names, mapped headers, CRLF endings."""
    prof = FeedProfile(name="hall2", delimiter=";", decimal=",", encoding="latin-1", skip_lines=3,
                       columns=(("lot", "Charge"), ("value", "Nettogewicht"), ("product", "Artikel")))
    text = ("Brackenfield Foods – Halle 2\r\n"
            "Linie L2\r\n"
            "\r\n"
            "Charge;Artikel;Nettogewicht\r\n"
            "0042;Confiture abricot é;340,5\r\n"
            "0042;Confiture abricot é;339,75\r\n")
    exp = read_export(write(tmp_path, "hall2_0101.csv", text.replace("–", "-").encode("latin-1")), prof)
    assert exp.profile == "hall2"
    assert exp.rows["product"].tolist() == ["Confiture abricot é"] * 2
    assert values_of(exp) == [float("340.5"), float("339.75")]  # float() of the text with '.' for ','
    assert exp.rows["source_line"].tolist() == [5, 6]


def test_latin1_only_when_the_profile_says_so(tmp_path: Path) -> None:
    """With encoding "cp1252" a UTF-8 file still reads as UTF-8; 8-bit text falls back to the named codec."""
    prof = FeedProfile(encoding="cp1252")
    utf8 = read_export_bytes("lot,product,value\nJ1,Gelée,1\n".encode("utf-8"), name="a.csv", profile=prof)
    eight = read_export_bytes("lot,product,value\nJ1,Gelée €,1\n".encode("cp1252"), name="b.csv", profile=prof)
    assert utf8.rows["product"].tolist() == ["Gelée"]
    assert eight.rows["product"].tolist() == ["Gelée €"]


@pytest.mark.parametrize("codec", ["utf-16", "utf-16-le", "utf-16-be"])
def test_utf16_with_bom(codec: str, tmp_path: Path) -> None:
    """UTF-16 (either byte order) is recognised by its BOM."""
    text = "lot,product,value\r\nJ7,Jam 340 g ä,341.5\r\nJ7,Jam 340 g ä,339.25\r\n"
    bom = {"utf-16": b"", "utf-16-le": codecs.BOM_UTF16_LE, "utf-16-be": codecs.BOM_UTF16_BE}[codec]
    exp = read_export(write(tmp_path, "u16.csv", bom + text.encode(codec)))
    assert exp.rows["product"].tolist() == ["Jam 340 g ä"] * 2
    assert values_of(exp) == [341.5, 339.25]
    assert exp.rows["source_line"].tolist() == [2, 3]


def test_utf8_bom(tmp_path: Path) -> None:
    """A UTF-8 BOM does not end up in the first header name."""
    exp = read_export(write(tmp_path, "bom.csv", codecs.BOM_UTF8 + b"Lot,Value\nA,1.5\n"))
    assert values_of(exp) == [1.5] and exp.rows["source_line"].tolist() == [2]


def test_tab_delimited_sniffed(tmp_path: Path) -> None:
    """Tabs are sniffed from the header line."""
    exp = read_export(write(tmp_path, "t.tsv", b"lot\tvalue\tproduct\nA\t1.5\tJUICE-1L\nA\t2\tJUICE-1L\n"))
    assert values_of(exp) == [1.5, 2.0] and exp.rows["product"].tolist() == ["JUICE-1L"] * 2


def test_column_mapping_and_case_insensitive_headers(tmp_path: Path) -> None:
    """Mapped headers are found case-insensitively after trimming; unmapped canonical names too."""
    prof = FeedProfile(columns=(("lot", "Batch"), ("value", "Net wt")))
    exp = read_export(write(tmp_path, "m.csv", b" BATCH ,net WT, Head \nB9,500.5,3\n"), prof)
    assert exp.rows["lot"].tolist() == ["B9"] and values_of(exp) == [500.5] and exp.rows["head"].tolist() == ["3"]


def test_header_prefix_finds_the_header_after_a_preamble() -> None:
    """header_prefix: the header is the first line starting with that text; lines count from the file top."""
    prof = FeedProfile(header_prefix="Lot;")
    data = b"Report\nLot count: 3\n\nLot;Value\nA;1\nA;2\n"
    exp = read_export_bytes(data, name="p.csv", profile=prof)
    assert exp.rows["source_line"].tolist() == [5, 6]


def test_unit_column_values_are_canonicalised() -> None:
    """Unit spellings are canonicalised (monitor.units); an empty unit cell means the profile's unit."""
    data = b"lot,value,unit\nA,1,G\nA,2, grams \nA,0.5,KG\nA,3,\nA,4,fl.oz\n"
    exp = read_export_bytes(data, name="u.csv", profile=FeedProfile(unit="g"))
    assert exp.rows["unit"].tolist() == ["g", "g", "kg", "g", "fl oz"]
    assert values_of(exp) == [1.0, 2.0, 0.5, 3.0, 4.0]  # values stay in their own unit


def test_profile_unit_used_without_unit_column_and_density_passed_on() -> None:
    """Without a unit column every row has the profile's unit; density comes from the profile."""
    exp = read_export_bytes(b"lot,value\nC1,1010\n", name="j.csv", profile=FeedProfile(unit="mL", density=1.04))
    assert exp.rows["unit"].tolist() == ["mL"] and exp.density == 1.04


def test_tare_is_subtracted_in_each_rows_unit() -> None:
    """Tare (in the profile's unit) is subtracted; a kg row gets the tare converted (1 kg = 1000 g, SI)."""
    prof = FeedProfile(unit="g", tare=12.5)
    exp = read_export_bytes(b"lot,value,unit\nA,512.75,g\nA,0.51275,kg\n", name="t.csv", profile=prof)
    got = values_of(exp)
    assert got[0] == pytest.approx(float("512.75") - 12.5, abs=1e-12)
    assert got[1] == pytest.approx(float("0.51275") - 12.5 / 1000, abs=1e-12)  # SI: 1 kg = 1000 g


def test_sentinels_are_dropped_and_counted_not_bad() -> None:
    """drop_values rows are counted in `dropped`, not reported as bad, and kept as NaN marked "dropped_value".

    Changed by issue 7: they used to leave no row; now every row of a lot is accounted for in ``rows``.
    """
    prof = FeedProfile(drop_values=("-9999", "ERR"), max_bad_rows=0)
    exp = read_export_bytes(b"lot,value\nA,1\nA,-9999\nA, ERR \nA,2\n", name="s.csv", profile=prof)
    assert exp.dropped == 2 and exp.bad_rows == ()
    assert exp.rows["source_line"].tolist() == [2, 3, 4, 5]
    assert exp.rows["excluded"].tolist() == ["", "dropped_value", "dropped_value", ""]
    got = values_of(exp)
    assert [got[0], got[3]] == [1.0, 2.0] and np.isnan(got[1]) and np.isnan(got[2])


def test_end_of_lot_markers_name_the_lot_they_close() -> None:
    """end_of_lot rows are not measurements; each marker records its line and the lot it closes."""
    prof = FeedProfile(end_of_lot="END")
    data = b"lot,value\nA,1\nA,2\nEND,\nB,3\n END ,\n"
    exp = read_export_bytes(data, name="e.csv", profile=prof)
    assert exp.end_of_lot == ((4, "A"), (6, "B"))
    assert exp.rows["lot"].tolist() == ["A", "A", "B"] and exp.bad_rows == ()


def test_summary_file() -> None:
    """A file with lot, n, mean, sd is kind "summary"; rows is empty with the documented columns."""
    data = (b"lot,product,n,mean,sd,unit,timestamp\n"
            b"J-0101,JAM-340,20,341.35,1.62,g,2026-12-01 14:00:00\n"
            b"J-0102,JAM-340,20.0,339.9,0,g,\n")
    exp = read_export_bytes(data, name="sum.csv")
    assert exp.kind == "summary" and exp.rows.empty and list(exp.rows.columns) == list(ROW_COLUMNS)
    s = exp.summaries
    assert list(s.columns) == list(SUMMARY_COLUMNS)
    assert s["n"].tolist() == [20, 20] and s["n"].dtype == np.int64
    assert s["mean"].tolist() == [float("341.35"), float("339.9")] and s["sd"].tolist() == [1.62, 0.0]
    assert s["timestamp"].tolist() == ["2026-12-01T14:00:00", ""]
    assert s["source_line"].tolist() == [2, 3]


def test_summary_tare_shifts_the_mean_only() -> None:
    """Tare moves a lot's mean; its sd is unchanged (subtracting a constant)."""
    exp = read_export_bytes(b"lot,n,mean,sd\nJ1,5,352.5,2.25\n", name="s.csv", profile=FeedProfile(tare=12.5))
    assert exp.summaries["mean"].tolist() == [float("352.5") - 12.5] and exp.summaries["sd"].tolist() == [2.25]


def test_line_numbers_with_bom_crlf_blank_lines_and_preamble() -> None:
    """source_line is the physical line in the file, whatever comes before the row."""
    lines = ["export v2", "", "lot,value,product", "A,1,OAT-500", "", ",,", "A,2,\"OAT 500\"", "A,3,x",
             "   ", "A,4,\"y\"\"z\"", ""]
    data = codecs.BOM_UTF8 + "\r\n".join(lines).encode()
    exp = read_export_bytes(data, name="l.csv", profile=FeedProfile(skip_lines=1))
    # expected lines: where the test put rows "A,1" ... "A,4" (1-based, counted by hand)
    assert exp.rows["source_line"].tolist() == [4, 7, 8, 10]
    assert values_of(exp) == [1.0, 2.0, 3.0, 4.0]
    assert exp.rows["product"].tolist() == ["OAT-500", "OAT 500", "x", 'y"z']


def test_lone_cr_line_endings() -> None:
    """Old-Mac CR-only line endings count as line breaks."""
    exp = read_export_bytes(b"lot,value\rA,1\r\rA,2\r", name="cr.csv")
    assert exp.rows["source_line"].tolist() == [2, 4]


def test_trailing_empty_fields_are_tolerated() -> None:
    """A data row with extra empty trailing fields is read; its line number is kept in order."""
    exp = read_export_bytes(b"lot,value\nA,1,,\nA,2\nA,3,\n", name="t.csv")
    assert values_of(exp) == [1.0, 2.0, 3.0] and exp.rows["source_line"].tolist() == [2, 3, 4]


def test_timestamps_iso_and_profile_format() -> None:
    """ISO 8601 timestamps are kept (space becomes T); a strptime format is rewritten as ISO 8601."""
    iso = read_export_bytes(b"lot,value,timestamp\nA,1,2026-12-01 06:00:01\nA,2,2026-12-01T06:00:02.5\n",
                            name="i.csv")
    assert iso.rows["timestamp"].tolist() == ["2026-12-01T06:00:01", "2026-12-01T06:00:02.5"]
    prof = FeedProfile(timestamp_format="%d.%m.%Y %H:%M:%S")
    fmt = read_export_bytes(b"lot,value,timestamp\nA,1,01.12.2026 06:00:01\nA,2,\n", name="f.csv", profile=prof)
    assert fmt.rows["timestamp"].tolist() == ["2026-12-01T06:00:01", ""]


def test_non_ascii_lot_codes_and_quoted_delimiters() -> None:
    """Quoted fields may hold the delimiter; lot codes are text, never numbers."""
    exp = read_export_bytes('lot,product,value\n"0012,3",Gelée,1e2\n1E5,"a,b",-.5\n'.encode(), name="q.csv")
    assert exp.rows["lot"].tolist() == ["0012,3", "1E5"]
    assert values_of(exp) == [float("1e2"), float("-.5")]


def test_decimal_comma_file_sniffs_semicolon() -> None:
    """With a decimal comma and delimiter "auto", "," is never taken as the field separator."""
    prof = FeedProfile(decimal=",")
    exp = read_export_bytes(b"lot;value\nA;1,5\nA;2,25\n", name="d.csv", profile=prof)
    assert values_of(exp) == [float("1.5"), float("2.25")]


def test_timestamps_with_zone_offsets_and_inferred_formats() -> None:
    """ISO 8601 with offsets is kept as written; a non-ISO column is read by pandas' inference."""
    zoned = read_export_bytes(b"lot,value,timestamp\nA,1,2026-12-01T06:00:01+01:00\nA,2,2026-12-01T05:00:02Z\n",
                              name="z.csv")
    assert zoned.rows["timestamp"].tolist() == ["2026-12-01T06:00:01+01:00", "2026-12-01T05:00:02Z"]
    named = read_export_bytes(b"lot,value,timestamp\nA,1,Dec 1 2026 06:00:01\nA,2,Dec 13 2026 06:00:02\n",
                              name="n.csv")
    assert named.rows["timestamp"].tolist() == ["2026-12-01T06:00:01", "2026-12-13T06:00:02"]


def test_ambiguous_day_month_order_is_refused_not_guessed() -> None:
    """"01.12.2026" may be 1 December or 12 January: without timestamp_format it is never guessed; the
    measurements stay, without a time, and a note asks for timestamp_format."""
    data = b"lot,value,timestamp\nA,1,01.12.2026 06:00:01\nA,2,02.12.2026 06:00:02\nA,3,\n"
    exp = read_export_bytes(data, name="a.csv", profile=FeedProfile(max_bad_rows=5))
    assert exp.bad_rows == () and exp.rows["source_line"].tolist() == [2, 3, 4]
    assert exp.rows["timestamp"].tolist() == ["", "", ""]
    assert "timestamp_format" in exp.notes[0] and "line 2" in exp.notes[0]
    fixed = read_export_bytes(data, name="a.csv", profile=FeedProfile(timestamp_format="%d.%m.%Y %H:%M:%S"))
    assert fixed.rows["timestamp"].tolist() == ["2026-12-01T06:00:01", "2026-12-02T06:00:02", ""]


def test_day_first_column_is_recognised_from_an_unambiguous_cell() -> None:
    """A cell that reads only day-first ("13.12.2026") settles the order for the whole column."""
    data = b"lot,value,timestamp\nA,1,01.12.2026 06:00:01\nA,2,13.12.2026 06:00:02\n"
    exp = read_export_bytes(data, name="d.csv")
    assert exp.rows["timestamp"].tolist() == ["2026-12-01T06:00:01", "2026-12-13T06:00:02"]


def test_slash_dates_are_not_passed_off_as_iso() -> None:
    """A date with "/" is never returned as if it were ISO 8601 text."""
    exp = read_export_bytes(b"lot,value,timestamp\nA,1,2026/12/01 06:00\nA,2,2026-12-01 06:00\n", name="s.csv",
                            profile=FeedProfile(max_bad_rows=5))
    assert all("/" not in t for t in exp.rows["timestamp"].tolist())


@pytest.mark.parametrize("pad", [" ", "\t", "\x0b", "\x0c", "\u00a0", "\u2003"])
def test_whitespace_around_fields_is_stripped(pad: str) -> None:
    """ASCII and Unicode whitespace around any field is stripped, as Python's str.strip() does."""
    raw = f"{pad}512.5{pad}"
    data = f"lot;value;unit\n{pad}A7{pad};{raw};{pad}g\nA7;1;g\n".encode()
    exp = read_export_bytes(data, name="w.csv")
    assert exp.rows["lot"].tolist() == ["A7", "A7"] and exp.rows["unit"].tolist() == ["g", "g"]
    assert values_of(exp)[0] == float(raw.strip())  # str.strip() + float(): the independent reference


def test_marker_alone_on_a_line_is_a_marker_not_a_short_row() -> None:
    """A line holding only the end-of-lot text (no delimiters) closes the lot above it."""
    exp = read_export_bytes(b"lot,value\nA,1\nEND\nB,3\n END \n", name="m.csv", profile=FeedProfile(end_of_lot="END"))
    assert exp.end_of_lot == ((3, "A"), (5, "B")) and exp.bad_rows == ()


def test_zoned_timestamps_with_a_format_become_utc() -> None:
    """With %z in timestamp_format, times are rewritten in UTC with "Z" (06:00 at +01:00 is 05:00 UTC)."""
    prof = FeedProfile(timestamp_format="%d.%m.%Y %H:%M %z")
    data = b"lot,value,timestamp\nA,1,01.12.2026 06:00 +0100\nA,2,01.12.2026 06:00 +0200\n"
    exp = read_export_bytes(data, name="z.csv", profile=prof)
    # UTC = local time - offset (ISO 8601 offset convention)
    assert exp.rows["timestamp"].tolist() == ["2026-12-01T05:00:00Z", "2026-12-01T04:00:00Z"]


def test_explicit_encoding_without_bom() -> None:
    """An explicit codec name reads a file that has no BOM (here UTF-16 little-endian)."""
    data = "lot,product,value\nJ1,Gelée,340.5\n".encode("utf-16-le")
    exp = read_export_bytes(data, name="le.csv", profile=FeedProfile(encoding="utf-16-le"))
    assert exp.rows["product"].tolist() == ["Gelée"] and values_of(exp) == [340.5]


def test_line_numbers_and_values_across_parser_blocks() -> None:
    """Over a multi-megabyte file (several parser blocks) every row keeps its own line and its value.

    The file mixes good rows, blank lines, short rows, sentinels and non-numbers at seeded random places;
    expected lines come from where the test put each row, expected values from Python's float().
    """
    rng = np.random.default_rng(20261201)
    lines = ["Brackenfield Foods L3 JUICE-1L", "lot;value;head"]
    good: dict[int, float] = {}
    bad: list[int] = []
    kinds = rng.choice(["good", "blank", "short", "sentinel", "text"], p=[0.96, 0.01, 0.01, 0.01, 0.01],
                       size=120_000)
    fills = rng.normal(1012.0, 3.0, size=120_000)
    for i, kind in enumerate(kinds.tolist()):
        raw = f"{fills[i]:.3f}"
        if kind == "good":
            lines.append(f"L3-{i // 1000:04d};{raw};{i % 6 + 1}")
            good[len(lines)] = float(raw)          # Python float() of the written text
        elif kind == "blank":
            lines.append("")
        elif kind == "short":
            lines.append(f"L3-{i // 1000:04d}")
            bad.append(len(lines))
        elif kind == "sentinel":
            lines.append(f"L3-{i // 1000:04d};-9999;1")
        else:
            lines.append(f"L3-{i // 1000:04d};n/a;1")
            bad.append(len(lines))
    data = ("\r\n".join(lines) + "\r\n").encode()
    assert len(data) > 2_000_000            # pyarrow parses in 1 MB blocks by default
    prof = FeedProfile(skip_lines=1, drop_values=("-9999",), max_bad_rows=0.05, unit="mL")
    exp = read_export_bytes(data, name="l3.csv", profile=prof)
    usable = exp.rows[exp.rows["excluded"] == ""]  # issue 7: sentinel and text rows are kept, excluded
    assert dict(zip(usable["source_line"].tolist(), usable["value"].tolist())) == good
    assert [b.line for b in exp.bad_rows] == bad
    assert exp.dropped == sum(1 for ln in lines if ln.endswith(";-9999;1"))


def test_semicolon_file_with_decimal_commas_needs_no_profile() -> None:
    """A ";"-separated file whose values have commas and no points is read with a decimal comma, and says so."""
    exp = read_export_bytes(b"lot;value\nA;500,25\nA;499,5\nA;501\n", name="w.csv")
    assert exp.rows["value"].tolist() == [float("500.25"), float("499.5"), float("501")]  # reference: float()
    assert exp.bad_rows == () and "decimal comma" in exp.notes[0]


def test_points_and_commas_mixed_are_not_guessed() -> None:
    """With both marks in the column the profile's decimal point stands and comma cells are bad rows."""
    exp = read_export_bytes(b"lot;value\nA;500.25\nA;499,5\nA;501\n", name="w.csv", profile=FeedProfile(max_bad_rows=5))
    assert [b.line for b in exp.bad_rows] == [3] and exp.notes == ()
