"""Property tests: any bytes or CSV-like shape gives an Export or an ExportError, never another exception.

Generated files are built line by line by the test, so the expected line of every row is known by
construction; accepted numbers are checked against Python's float() of the raw text (an independent parser).
"""

from __future__ import annotations

import codecs
import os

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.errors import ExportError
from monitor.ingest import Export, FeedProfile, read_export_bytes

# LOTWARDEN_FUZZ_EXAMPLES raises the example count for a longer hunt (the default keeps the suite fast).
FUZZ = settings(max_examples=int(os.environ.get("LOTWARDEN_FUZZ_EXAMPLES", "150")), deadline=None, suppress_health_check=[HealthCheck.too_slow])


def read_or_error(data: bytes, profile: FeedProfile | None = None) -> Export | ExportError:
    try:
        return read_export_bytes(data, name="fuzz.csv", profile=profile)
    except ExportError as exc:
        assert str(exc).startswith("fuzz.csv"), str(exc)
        assert "\n" not in str(exc) and "\r" not in str(exc), "messages are one line"
        return exc


PROFILES = st.builds(
    FeedProfile,
    delimiter=st.sampled_from(["auto", ",", ";", "\t"]),
    decimal=st.sampled_from([".", ","]),
    encoding=st.sampled_from(["auto", "latin-1", "cp1252", "utf-16-le"]),
    skip_lines=st.integers(0, 3),
    drop_values=st.sampled_from([(), ("-9999", "ERR")]),
    max_bad_rows=st.sampled_from([0.0, 0.05, 0.5, 1000.0]),
    end_of_lot=st.sampled_from([None, "END"]),
    timestamp_format=st.sampled_from([None, "%d.%m.%Y %H:%M:%S"]),
    tare=st.sampled_from([0.0, 12.5]),
    unit=st.sampled_from(["g", "mL"]),
)


@FUZZ
@given(data=st.binary(max_size=400), profile=PROFILES)
def test_random_bytes_give_export_or_export_error(data: bytes, profile: FeedProfile) -> None:
    """Arbitrary bytes never raise anything but ExportError."""
    read_or_error(data, profile)


@FUZZ
@given(body=st.binary(max_size=300), bom=st.sampled_from([b"", codecs.BOM_UTF8, codecs.BOM_UTF16_LE]))
def test_random_bytes_after_a_valid_header(body: bytes, bom: bytes) -> None:
    """A valid header followed by garbage: an Export or an ExportError."""
    read_or_error(bom + b"lot,value,unit,timestamp\n" + body)


FIELD = st.lists(st.sampled_from(list('AB01 .,;\t"-eE+\r\n\x00éx:') + ["inf", "nan", "END", "ERR", "g", "kg", "mL",
                                                                         "2026-12-01", "01.12.2026", " 06:00"]),
                max_size=6).map("".join)


@FUZZ
@given(
    header=st.lists(st.sampled_from(["lot", "value", "unit", "head", "LOT", " Value ", "n", "mean", "sd",
                                     "timestamp", "x", ""]), min_size=0, max_size=6),
    rows=st.lists(st.lists(FIELD, max_size=7), max_size=12),
    delim=st.sampled_from([",", ";", "\t"]),
    newline=st.sampled_from(["\n", "\r\n", "\r"]),
    profile=PROFILES,
)
def test_random_csv_shapes(header: list[str], rows: list[list[str]], delim: str, newline: str,
                           profile: FeedProfile) -> None:
    """Random headers, delimiters, quotes, blank lines and odd fields: an Export or an ExportError."""
    text = newline.join([delim.join(header)] + [delim.join(r) for r in rows])
    enc = "utf-16-le" if profile.encoding == "utf-16-le" else "utf-8"
    result = read_or_error(text.encode(enc, errors="replace"), profile)
    if isinstance(result, Export):
        frame = result.rows if result.kind == "values" else result.summaries
        assert len(frame) > 0
        assert frame["source_line"].is_monotonic_increasing


NUMBER = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False, width=64).map(repr),
    st.decimals(allow_nan=False, allow_infinity=False, places=3).map(str),
    st.integers(-10**20, 10**20).map(str),
    st.from_regex(r"\A[+-]?[0-9]{0,4}\.?[0-9]{0,4}([eE][+-]?[0-9]{1,3})?\Z"),
)


@FUZZ
@given(
    cells=st.lists(st.tuples(st.from_regex(r"\A[A-Z0-9]{1,6}\Z"), NUMBER, st.sampled_from(["", " ", "\t"])),
                   min_size=1, max_size=25),
    blank_after=st.sets(st.integers(0, 24), max_size=5),
    preamble=st.integers(0, 3),
    comma=st.booleans(),
)
def test_values_equal_python_float_and_lines_match_construction(cells: list[tuple[str, str, str]],
                                                               blank_after: set[int], preamble: int,
                                                               comma: bool) -> None:
    """Every accepted value equals float() of its raw text; every rejected one is a bad row on its own line."""
    delim, decimal = (";", ",") if comma else (",", ".")
    lines = [f"preamble {i}" for i in range(preamble)] + [f"lot{delim}value"]
    expected: dict[int, float | None] = {}
    for i, (lot, raw, pad) in enumerate(cells):
        shown = raw.replace(".", ",") if comma else raw
        lines.append(f"{lot}{delim}{pad}{shown}{pad}")
        try:
            want: float | None = float(raw)     # Python's own parser: the independent reference
        except ValueError:
            want = None
        if want is not None and (raw.strip() == "" or want != want or want in (float("inf"), float("-inf"))):
            want = None
        expected[len(lines)] = want             # 1-based line number of the row just added
        if i in blank_after:
            lines.append("")
    data = ("\n".join(lines) + "\n").encode()
    prof = FeedProfile(delimiter=delim, decimal=decimal, skip_lines=preamble, max_bad_rows=1000)
    result = read_or_error(data, prof)
    good = {ln: v for ln, v in expected.items() if v is not None}
    if not good:
        assert isinstance(result, ExportError)
        return
    assert isinstance(result, Export), str(result)
    # Issue 7: rows whose value is unusable are kept (NaN, reason in ``excluded``); compare the usable ones
    usable = result.rows[result.rows["excluded"] == ""]
    got = dict(zip(usable["source_line"].tolist(), usable["value"].tolist()))
    assert got == good
    kept_bad = result.rows[result.rows["excluded"] != ""]
    assert sorted(kept_bad["source_line"].tolist()) == sorted(ln for ln, v in expected.items() if v is None)
    assert sorted(b.line for b in result.bad_rows) == sorted(ln for ln, v in expected.items() if v is None)


# Explicit examples found while fuzzing (each once failed or was worth pinning).
@pytest.mark.parametrize("data", [
    b"",
    b"\xff\xfe",                      # a UTF-16 BOM and nothing else
    b"\xff\xfe\x00",                  # UTF-16 truncated mid code unit
    b"\xef\xbb\xbf",                  # a UTF-8 BOM and nothing else
    b'lot,value\n"',                  # a lone quote at the end
    b'lot,value\nA,1\n"',
    b"lot,value\n\x00",
    b"lot,value\r\r\r",
    b'"lot","value"\n"A","1"\n',
    b"lot,value\nA,1e308\nA,1e309\n",
    b"lot,lot,value\nA,B,1\n",
    b"lot,value\nEND,\n",
    b";;;\n,,,\n",
    b"lot\tvalue,unit\nA\t1,g\n",
    b"lot,n,mean,sd\nA,1e30,1,1\nA,-inf,1,1\nA,nan,nan,-0\n",
])
def test_pinned_examples(data: bytes) -> None:
    """Inputs that once tripped the reader or sit on an edge: an Export or an ExportError."""
    read_or_error(data, FeedProfile(end_of_lot="END"))
