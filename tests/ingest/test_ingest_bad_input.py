"""Bad input: every bad-row class and every rejection names file, line, column and what is allowed."""

from __future__ import annotations

import codecs
from pathlib import Path

import numpy as np
import pytest

from monitor.errors import ExportError
from monitor.ingest import FeedProfile, read_export, read_export_bytes

LENIENT = FeedProfile(max_bad_rows=100)


def one_bad(data: bytes, profile: FeedProfile = LENIENT):
    exp = read_export_bytes(data, name="hall2.csv", profile=profile)
    assert len(exp.bad_rows) == 1, exp.bad_rows
    return exp, exp.bad_rows[0]


@pytest.mark.parametrize("data, line, column, value, fragment, excluded", [
    (b"lot,value\nA,1\nA,abc\n", 3, "value", "abc", "value 'abc' is not a number", "not_a_number"),
    (b"lot,value\nA,1\nA,1.2.3\n", 3, "value", "1.2.3", "is not a number", "not_a_number"),
    (b"lot,value\nA,1\nA,0x1F\n", 3, "value", "0x1F", "is not a number", "not_a_number"),
    (b"lot,value\nA,1\nA,\n", 3, "value", "", "value is blank", "blank"),
    (b"lot,value\nA,1\nA,inf\n", 3, "value", "inf", "is not finite", "not_finite"),
    (b"lot,value\nA,1\nA,-NaN\n", 3, "value", "-NaN", "is not finite", "not_finite"),
    (b"lot,value\nA,1\nA,1e999\n", 3, "value", "1e999", "is not finite", "not_finite"),
    (b"lot,value\nA,1\n  ,2\n", 3, "lot", "  ", "empty lot code", None),
    (b"lot,value,unit\nA,1,g\nA,2,lbs\n", 3, "unit", "lbs", "unknown unit 'lbs'", None),
])
def test_bad_rows_name_line_column_raw_value_and_reason(data: bytes, line: int, column: str, value: str,
                                                        fragment: str, excluded: str | None) -> None:
    """Each bad row carries its physical line, the export's column, the raw text and the reason.

    Changed by issue 7 (every measurement accounted for): a row of a lot whose only problem is its value is
    now kept in ``rows`` with value NaN and its reason in ``excluded`` (it is still a bad row); a blank value
    says "blank", no longer "not a number". Rows with other problems stay out, as before.
    """
    exp, bad = one_bad(data)
    assert (bad.line, bad.column, bad.value) == (line, column, value)
    assert fragment in bad.reason
    if excluded is None:
        assert len(exp.rows) == 1 and exp.rows["source_line"].tolist() == [2]
    else:
        assert exp.rows["source_line"].tolist() == [2, 3]
        assert exp.rows["excluded"].tolist() == ["", excluded]
        assert exp.rows["value"].tolist()[0] == 1.0 and np.isnan(exp.rows["value"].tolist()[1])


def test_allowed_forms_are_named_in_the_reason() -> None:
    """Unit and number reasons say what is allowed."""
    _, unit = one_bad(b"lot,value,unit\nA,1,g\nA,2,lbs\n")
    assert "allowed: mg, g, kg, oz, mL, L, fl oz" in unit.reason
    _, num = one_bad(b"lot;value\nA;1\nA;1.5\n", FeedProfile(decimal=",", max_bad_rows=5))
    assert "decimal comma" in num.reason


@pytest.mark.parametrize("row, fragment", [(b"A", "too few fields: 1, the header has 2"),
                                           (b"A,1,2", "too many fields: 3, the header has 2")])
def test_wrong_field_count(row: bytes, fragment: str) -> None:
    """Rows with too few or too many (non-empty) fields are bad rows with no column."""
    _, bad = one_bad(b"lot,value\nA,1\n" + row + b"\nA,3\n")
    assert (bad.line, bad.column) == (3, None) and bad.reason == fragment and bad.value == row.decode()


@pytest.mark.parametrize("row, column, fragment", [
    (b"J2,0,340,1", "n", "n '0' is not a positive whole number"),
    (b"J2,2.5,340,1", "n", "n '2.5' is not a positive whole number"),
    (b"J2,x,340,1", "n", "is not a positive whole number"),
    (b"J2,1e30,340,1", "n", "n '1e30' is not a positive whole number — must be 1 to 9007199254740992"),
    (b"J2,5,340,-0.1", "sd", "sd '-0.1' is negative"),
    (b"J2,5,abc,1", "mean", "mean 'abc' is not a number"),
])
def test_bad_summary_rows(row: bytes, column: str, fragment: str) -> None:
    """Summary rows need n a whole number >= 1, a numeric mean and sd >= 0.

    Changed by issue 7: such a record is no longer left out; it is kept in ``summaries`` with its reason
    in ``problem`` (the bad row's reason up to its " — what is allowed" part) and still counts as bad.
    """
    exp, bad = one_bad(b"lot,n,mean,sd\nJ1,20,341.2,1.5\n" + row + b"\n")
    assert (bad.line, bad.column) == (3, column) and fragment in bad.reason
    assert exp.summaries["lot"].tolist() == ["J1", "J2"]
    assert exp.summaries["problem"].tolist() == ["", bad.reason.partition(" — ")[0]]


def test_too_many_bad_rows_rejects_naming_first_bad_line_column_and_counts() -> None:
    """More bad rows than max_bad_rows: ExportError at the first bad line with counts and the allowance."""
    prof = FeedProfile(name="hall2", columns=(("lot", "Batch"), ("value", "Net wt")))
    rows = [f"B1,{500 + i * 0.1:.1f}" for i in range(40)]
    for i in (12, 15, 20, 21, 22, 30, 31, 32, 39):
        rows[i] = "B1,abc"
    data = ("Batch,Net wt\n" + "\n".join(rows) + "\n").encode()
    with pytest.raises(ExportError) as info:
        read_export_bytes(data, name="hall2.csv", profile=prof)
    err = info.value
    assert (err.path, err.line) == ("hall2.csv", 14)   # row index 12 sits on line 14 (header is line 1)
    assert str(err).startswith("hall2.csv:14: value 'abc' is not a number (column 'Net wt'); "
                               "9 of 40 rows bad, the profile allows 2")  # 40 x 0.05 = 2
    assert "max_bad_rows" in str(err)


def test_budget_boundary_is_inclusive() -> None:
    """Exactly max_bad_rows bad rows are accepted; one more is rejected."""
    good = [f"A,{i}" for i in range(38)]
    ok = ("lot,value\n" + "\n".join(good + ["A,x", "A,y"]) + "\n").encode()
    assert len(read_export_bytes(ok, name="ok.csv").bad_rows) == 2      # 40 rows x 0.05 = 2 allowed
    over = ("lot,value\n" + "\n".join(good + ["A,x", "A,y", "A,z"]) + "\n").encode()
    with pytest.raises(ExportError, match="3 of 41 rows bad, the profile allows 2"):
        read_export_bytes(over, name="over.csv")


@pytest.mark.parametrize("data, line, fragment", [
    (b"lot,value\n", 1, "no data rows after the header"),
    (b"lot,value\n\n\n", 1, "no data rows after the header"),
    # b"" and b"\n \n" ("no header" before issue 7) now say "empty file": test_ingest_accounting.py
    (b"lot;weight\nA;1\n", 1, "the header needs columns 'lot', 'value'"),
    (b"lot,value,value\nA,1,2\n", 1, "column 'value' appears 2 times"),
    (b"lot,value\nA,abc\n", 2, "value 'abc' is not a number (column 'value'); 1 of 1 rows bad"),
    (b"lot,value\nA,1\nA,\"2\nA,3\n", 3, "a quoted field starting on this line runs over 3 lines"),
    (b"lot,value,note\nA,1,\"a\nb\"\nA,2,x\n", 2, "runs over 2 lines"),
    (b"lot,value\nA,1\n\"A,2\nA,3\n", 3, "runs over"),
    (b"lot,value\nA,1\nA,\x002\n", 3, "NUL"),
    (b"lot,value\nA,1\nA,\xff\n", 3, "not valid utf-8"),
    (codecs.BOM_UTF16_LE + "lot,value\nA,1\n".encode("utf-16-le") + b"\x00\xd8", 3, "not valid utf-16"),
])
def test_rejections_name_file_and_line(data: bytes, line: int, fragment: str) -> None:
    """Unusable files raise ExportError with the file name, a line number and what is wrong."""
    with pytest.raises(ExportError) as info:
        read_export_bytes(data, name="drop/x.csv")
    err = info.value
    assert err.path == "drop/x.csv" and err.line == line, str(err)
    assert fragment in str(err)
    assert str(err).startswith(f"drop/x.csv:{line}: ")


def test_all_sentinels_is_no_usable_rows() -> None:
    """A file whose only values are sentinels is rejected, naming the sentinels."""
    with pytest.raises(ExportError, match="all 2 are 'no measurement' values \\('ERR'\\)"):
        read_export_bytes(b"lot,value\nA,ERR\nA,ERR\n", name="s.csv", profile=FeedProfile(drop_values=("ERR",)))


def test_mapped_column_missing_names_profile_key() -> None:
    """A column the profile maps but the header lacks names the profile key and the headers found."""
    prof = FeedProfile(name="hall2", columns=(("lot", "Batch"), ("value", "Net wt")))
    with pytest.raises(ExportError) as info:
        read_export_bytes(b"Batch,Gross wt\nB1,512\n", name="h.csv", profile=prof)
    msg = str(info.value)
    assert "column 'Net wt' (profiles.hall2.columns.value) is not in the header" in msg
    assert "'Batch', 'Gross wt'" in msg and info.value.line == 1


def test_preamble_longer_than_file() -> None:
    """skip_lines beyond the end of the file is an error naming the setting."""
    with pytest.raises(ExportError, match="skip_lines"):
        read_export_bytes(b"only\none\n", name="p.csv", profile=FeedProfile(skip_lines=5))


def test_utf8_error_hints_at_latin1_setting() -> None:
    """8-bit text without a profile saying so is rejected with a hint naming the encoding key."""
    with pytest.raises(ExportError) as info:
        read_export_bytes("lot,product,value\nJ1,Gelée,1\n".encode("latin-1"), name="l.csv")
    assert info.value.line == 2 and 'encoding = "latin-1"' in str(info.value)


def test_tare_on_volume_rows_without_density_is_a_bad_row() -> None:
    """A tare in g cannot be taken off a value in mL without a density: that row is bad, naming why."""
    prof = FeedProfile(unit="g", tare=20.0, max_bad_rows=5)
    exp, bad = one_bad(b"lot,value,unit\nA,520,g\nA,1010,mL\n", prof)
    assert (bad.line, bad.column) == (3, "unit") and "needs a density" in bad.reason


def test_missing_file_is_an_export_error(tmp_path: Path) -> None:
    """A file that cannot be read raises ExportError naming it."""
    with pytest.raises(ExportError) as info:
        read_export(tmp_path / "gone.csv")
    assert info.value.path == str(tmp_path / "gone.csv") and "cannot read" in str(info.value)


def test_unusable_timestamp_format_names_the_profile_key() -> None:
    """A timestamp_format strptime cannot use is an ExportError naming the profile key."""
    prof = FeedProfile(name="hall2", timestamp_format="%Q")
    with pytest.raises(ExportError) as info:
        read_export_bytes(b"lot,value,timestamp\nA,1,x\n", name="f.csv", profile=prof)
    assert info.value.key == "profiles.hall2.timestamp_format" and "'%Q' cannot be used" in str(info.value)


def test_unreadable_timestamp_keeps_its_measurement_and_is_noted() -> None:
    """Without timestamp_format, an unreadable timestamp costs no measurement: the cell is empty, a note says so."""
    exp = read_export_bytes(b"lot,value,timestamp\nA,1,2026-12-01T06:00:00\nA,2,yesterday\n", name="hall2.csv")
    assert exp.bad_rows == ()
    assert exp.rows["value"].tolist() == [float("1"), float("2")]  # reference: Python float()
    assert exp.rows["timestamp"].tolist() == ["2026-12-01T06:00:00", ""]
    assert len(exp.notes) == 1 and "'yesterday' on line 3" in exp.notes[0] and "timestamp_format" in exp.notes[0]


def test_timestamp_against_a_configured_format_is_a_bad_row() -> None:
    """With timestamp_format set, a cell that does not match it is a bad row naming line and column."""
    exp, bad = one_bad(b"lot,value,timestamp\nA,1,01.12.2026 06:00\nA,2,yesterday\n",
                       FeedProfile(timestamp_format="%d.%m.%Y %H:%M", max_bad_rows=5))
    assert (bad.line, bad.column, bad.value) == (3, "timestamp", "yesterday")
