"""The export body split into raw text columns by pyarrow's CSV parser, each row with its physical line."""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

from monitor.errors import ExportError
from monitor.ingest.text import MAX_LINE_BYTES, Header, Text

# The parser writes text columns as large_string, pandas' "str" storage: the columns an Export keeps need no
# cast (measured: parsing into large_string costs less than parsing into string and casting the kept ones).
TEXT = pa.string()  # the type of text the reader builds itself (value sets, summaries' reasons)
FRAME_TEXT = pa.large_string()
_UNCLEAN = re.compile(rb"[^\x21-\x7e\n]")  # a byte that may be (part of) whitespace around a field
# Bodies up to this size without any quote character are split in Python: pyarrow's CSV reader costs more
# to set up (~0.4 ms) than such a file takes to split. Measured on a canonical export, the two cross near
# 25 KiB (~500 rows). A row of another width sends the body to pyarrow.
FAST_PATH_MAX_BYTES = 16 * 1024
_AGAIN = (0, "")  # what _parse gives when the threaded parser stopped on a cell (parse again as text)
_BLOCK_BYTES = 4 << 20  # the threaded parser's block: measured faster than 1 MiB blocks on a 50 MB export
# The single-threaded parser's block: a row must fit in one block, and a line may be MAX_LINE_BYTES long.
_SINGLE_BLOCK_BYTES = max(1 << 20, 2 * (MAX_LINE_BYTES + 1))


@dataclass(frozen=True)
class RawProblem:
    """A row the parser could not split into the header's fields."""

    line: int
    text: str
    reason: str


@dataclass(frozen=True, eq=False)
class RawTable:
    """Body rows as untrimmed string columns (one per header field) with their line numbers."""

    columns: tuple[pa.ChunkedArray, ...]
    lines: np.ndarray
    problems: tuple[RawProblem, ...]
    quoted: bool = False
    clean: bool = False  # True: no cell has a byte outside 0x21..0x7E, so none needs trimming

    @property
    def size(self) -> int:
        return int(self.lines.shape[0])


def split_body(buf: Text, header: Header, name: str, numbers: tuple[int, ...] = ()) -> RawTable:
    """Parse ``buf[header.body_start:]`` into ``len(header.names)`` string columns.

    Rows of the header's width are kept as they are (blank ones too: the caller drops them). A line of
    whitespace is left out; a row with too few fields, or too many non-empty ones, becomes a RawProblem;
    trailing empty extra fields are ignored. The fields of ``numbers`` may come back as float64 columns:
    when the threaded parser reads every one of their cells as a finite number (anything else, and they
    are text like the rest).
    """
    width = len(header.names)
    names = [f"c{i}" for i in range(width)]
    body = memoryview(buf)[header.body_start:]
    if len(body) == 0:
        return RawTable(tuple(pa.chunked_array([], TEXT) for _ in names), np.zeros(0, np.int64), ())
    quoted = buf.find(b'"', header.body_start) >= 0
    small = _split_small(body, width, header) if len(body) <= FAST_PATH_MAX_BYTES and not quoted else None
    if small is not None:
        return small
    # The clean path: Arrow's multi-threaded parser. Its record numbers give each row's line as long as every
    # record has the header's width; a record of another width (which the threaded parser cannot number)
    # sends the body to the single-threaded parser, which numbers the rows it cannot split.
    typed = {names[i]: pa.float64() for i in numbers}
    invalid: list[tuple[int, str]] = [_AGAIN]
    if typed:
        table, invalid = _parse(body, names, header, name, threads=True, quoted=quoted, typed=typed)
        if not invalid and not all(pc.all(pc.is_finite(table.column(c))).as_py() is not False for c in typed):
            invalid = [_AGAIN]  # "nan" or "inf" in a number column: its text is needed for the bad row
    if invalid == [_AGAIN]:
        table, invalid = _parse(body, names, header, name, threads=True, quoted=quoted)
    if invalid:
        table, invalid = _parse(body, names, header, name, threads=False, quoted=quoted)
    # Chunked columns as the parser made them: combining would copy every column once more.
    columns = [table.column(c) if table.num_rows else pa.chunked_array([], TEXT) for c in names]
    n_valid = table.num_rows
    if any(num is None for num, _ in invalid):  # cannot happen single-threaded; never guess a line
        raise ExportError("cannot number the rows of this file", path=name)
    total = n_valid + len(invalid)
    if invalid:
        inv_num = np.array([num for num, _ in invalid], dtype=np.int64)
        valid_rec: np.ndarray | slice = np.setdiff1d(np.arange(1, total + 1, dtype=np.int64), inv_num,
                                                     assume_unique=True)
    else:
        valid_rec = slice(1, None)  # every record: no index array for a million rows
    # Record k sits on line header.line + k as long as no record before it spans lines; the first one that
    # does makes the file rejected (a missing closing quote swallows every row up to the next quote).
    first_line = header.line + np.arange(total + 1, dtype=np.int64)
    if quoted:
        extra = np.zeros(total + 1, dtype=np.int64)
        if n_valid:
            extra[valid_rec] = np.sum([pc.count_substring(c, "\n").to_numpy(zero_copy_only=False)
                                       for c in columns if c.type != pa.float64()], axis=0)
        for num, text in invalid:
            extra[num] = text.count("\n")
        if extra.any():
            k = int(np.flatnonzero(extra)[0])
            raise ExportError(f"a quoted field starting on this line runs over {int(extra[k]) + 1} lines; line "
                              "breaks inside fields are not accepted, since a missing closing quote would "
                              "swallow the rows after it", path=name, line=int(first_line[k]),
                              hint='check the quote characters (") in this row')
    lines = first_line[valid_rec]

    problems: list[RawProblem] = []
    recovered: list[tuple[int, list[str]]] = []
    for num, text in invalid:
        line = int(first_line[num])
        fields = next(csv.reader([text], delimiter=header.delimiter, strict=False), [])
        if all(not f.strip() for f in fields):
            continue
        if len(fields) > width and all(not f.strip() for f in fields[width:]):
            recovered.append((line, fields[:width]))
        elif len(fields) < width:
            problems.append(RawProblem(line, text, f"too few fields: {len(fields)}, the header has {width}"))
        else:
            problems.append(RawProblem(line, text, f"too many fields: {len(fields)}, the header has {width}"))
    if recovered:
        columns = [pa.chunked_array([*col.chunks, pa.array([f[i] for _, f in recovered], col.type)],
                                    col.type) for i, col in enumerate(columns)]
        lines = np.concatenate([lines, np.array([ln for ln, _ in recovered], dtype=np.int64)])
        order = pa.array(np.argsort(lines, kind="stable"))
        lines = lines[order.to_numpy()]
        columns = [c.take(order) for c in columns]
    return RawTable(tuple(columns), lines, tuple(problems), quoted)


def _split_small(body: memoryview, width: int, header: Header) -> RawTable | None:
    """The body (which has no quote character) split on the delimiter when every line has ``width`` fields.

    Gives what pyarrow gives for such a body (no quoting, no escapes, "\\n" the only line end after
    decoding); None when the body needs pyarrow's rules (quotes, blank lines, rows of another width).
    """
    if width < 2:
        return None
    text = str(body, "utf-8")
    rows = text.split("\n")
    if rows[-1] == "":
        rows.pop()
    delim = header.delimiter
    expect = width - 1
    if not rows or text.count(delim) != expect * len(rows):
        return None
    fields = [r.split(delim) for r in rows]
    if any(len(f) != width for f in fields):
        return None
    columns = tuple(pa.chunked_array([pa.array(col, FRAME_TEXT)], FRAME_TEXT) for col in zip(*fields, strict=True))
    lines = np.arange(header.line + 1, header.line + 1 + len(rows), dtype=np.int64)
    clean = delim != "\t" and _UNCLEAN.search(body) is None  # "," and ";" lie inside 0x21..0x7E
    return RawTable(columns, lines, (), False, clean)


def _parse(body: memoryview, names: list[str], header: Header, name: str, *, threads: bool,
           quoted: bool, typed: dict[str, pa.DataType] | None = None) -> tuple[pa.Table, list[tuple[int, str]]]:
    """pyarrow's CSV parser, every field as a string; rows of the wrong width are collected, not parsed.

    Only single-threaded does pyarrow number the rows it hands to the invalid-row handler; threaded, the
    first such row stops the parse (the caller then parses single-threaded). Without a quote character in
    the body no field can span lines, so the parser need not look for line breaks inside fields.
    """
    invalid: list[tuple[int, str]] = []

    def on_invalid(row: pacsv.InvalidRow) -> str:
        invalid.append((row.number, row.text))
        return "skip" if not threads else "error"

    try:
        table = pacsv.read_csv(
            pa.BufferReader(pa.py_buffer(body)),
            read_options=pacsv.ReadOptions(column_names=names, use_threads=threads,
                                           block_size=_BLOCK_BYTES if threads else _SINGLE_BLOCK_BYTES),
            parse_options=pacsv.ParseOptions(delimiter=header.delimiter, quote_char='"', double_quote=True,
                                             escape_char=False, newlines_in_values=quoted,
                                             ignore_empty_lines=False, invalid_row_handler=on_invalid),
            convert_options=pacsv.ConvertOptions(column_types={c: FRAME_TEXT for c in names} | (typed or {}),
                                                 strings_can_be_null=False, quoted_strings_can_be_null=False,
                                                 null_values=[], check_utf8=False),
        )
    except (pa.ArrowException, ValueError) as exc:
        if threads:  # a row of another width (it cannot number), a cell not a number, other trouble
            return pa.table({c: pa.array([], FRAME_TEXT) for c in names}), invalid if invalid else [_AGAIN]
        raise ExportError(f"cannot split the file into fields: {exc}", path=name, line=header.line + 1) from None
    return table, invalid
