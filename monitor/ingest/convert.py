"""Vectorised conversion of raw text columns: numbers, units and timestamps, with a status per row."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from monitor.ingest.frames import repeat_text
from monitor.ingest.table import FRAME_TEXT, TEXT
from monitor.units import canonical_unit

OK, NOT_NUMBER, NOT_FINITE = 0, 1, 2
# A plain decimal number (ASCII digits, optional sign and exponent); RE2 syntax, whole field.
_NUMBER = r"^[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?$"
_NON_FINITE = r"(?i)^[+-]?(inf|infinity|nan)$"
_ISO_SPACE = r"^([0-9]{4}-[0-9]{2}-[0-9]{2}) "
_SPELLING_ROWS = 10_000  # from this many cells a unit column is first checked for one spelling throughout
_ISO_DATE = r"^[0-9]{4}(-[0-9]{2}-[0-9]{2}|[0-9]{4})([T ]|$)"


def trim(arr: pa.ChunkedArray) -> pa.ChunkedArray:
    """Strip leading and trailing whitespace from every string."""
    return pc.utf8_trim_whitespace(arr)


def may_need_trim(text: pa.ChunkedArray) -> bool:
    """False when no cell can start or end with whitespace: all bytes are printable ASCII above space.

    Looks at the raw value bytes of each chunk (min/max reductions, no copies); every ASCII whitespace
    byte is below 0x21 and Unicode whitespace needs bytes >= 0x80.
    """
    for chunk in text.chunks:
        data = chunk.buffers()[2]
        if data is None or data.size == 0:
            continue
        b = np.frombuffer(data, dtype=np.uint8)
        if b.min() < 0x21 or b.max() > 0x7E:
            return True
    return False


def any_empty(text: pa.ChunkedArray) -> bool:
    """True when some cell is the empty string, read off the offsets (no length array of a million cells)."""
    for chunk in text.chunks:
        if len(chunk) == 0:
            continue
        if chunk.null_count or not (pa.types.is_large_string(chunk.type) or pa.types.is_string(chunk.type)):
            return True  # cannot tell from offsets: let the caller look properly
        kind = np.int64 if pa.types.is_large_string(chunk.type) else np.int32
        offs = np.frombuffer(chunk.buffers()[1], dtype=kind)[chunk.offset:chunk.offset + len(chunk) + 1]
        if (offs[1:] == offs[:-1]).any():
            return True
    return False


def parse_numbers(text: pa.ChunkedArray, decimal: str) -> tuple[np.ndarray, np.ndarray]:
    """Float64 values and a status per row (OK, NOT_NUMBER, NOT_FINITE) of trimmed number strings.

    With ``decimal=","`` the comma is the decimal mark and a "." makes the field not a number.
    """
    n = len(text)
    status = np.full(n, NOT_NUMBER, dtype=np.int8)
    if n == 0:
        return np.zeros(0, dtype=np.float64), status
    if decimal == ",":
        has_dot = pc.match_substring(text, ".")
        text = pc.if_else(has_dot, pa.scalar("x"), pc.replace_substring(text, ",", "."))
    try:  # fast path: Arrow's cast accepts exactly the plain numbers plus inf/infinity/nan (any case)
        values = pc.cast(text, pa.float64()).to_numpy(zero_copy_only=False)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        pass
    else:
        finite = np.isfinite(values)
        status[finite] = OK
        status[~finite] = NOT_FINITE
        return np.where(finite, values, np.nan), status
    plain = pc.match_substring_regex(text, _NUMBER).to_numpy(zero_copy_only=False)
    odd = pc.match_substring_regex(text, _NON_FINITE).to_numpy(zero_copy_only=False)
    ok_text = pc.if_else(pa.array(plain | odd), text, pa.scalar("0"))
    values = pc.cast(ok_text, pa.float64()).to_numpy(zero_copy_only=False)
    finite = np.isfinite(values)
    status[plain & finite] = OK
    status[(plain & ~finite) | odd] = NOT_FINITE
    values = np.where(status == OK, values, np.nan)
    return values, status


def parse_units(text: pa.ChunkedArray, default: str) -> tuple[pa.ChunkedArray, np.ndarray]:
    """Canonical unit per row (a blank cell means ``default``) and a mask of unknown units.

    ``text`` may be untrimmed: each distinct spelling is stripped once.
    """
    same = one_spelling(text) if len(text) >= _SPELLING_ROWS else None
    uniques = [same] if same is not None else pc.unique(text).to_pylist()
    table = {u: (canonical_unit(u) if u.strip() else default) for u in uniques}
    if len(uniques) == 1:  # the usual case: one unit for the whole file
        unit = table[uniques[0]]
        return repeat_text(unit or "", len(text)), np.full(len(text), unit is None)
    known = [u for u, c in table.items() if c is not None]
    good = pc.is_in(text, value_set=pa.array(known, TEXT)).to_numpy(zero_copy_only=False)
    index = pc.index_in(text, value_set=pa.array(known, TEXT))
    canon = pa.array([table[u] for u in known], TEXT)
    units = canon.take(pc.fill_null(index, 0)) if known else pa.repeat("", len(text))
    return units, ~good


def one_spelling(text: pa.ChunkedArray) -> str | None:
    """The text of every cell when all cells are the same, else None (also for no cells).

    Read off the raw buffers (offsets evenly spaced, data the one cell repeated): no hashing of a million
    cells for the usual unit column of one spelling.
    """
    first: bytes | None = None
    for chunk in text.chunks:
        if len(chunk) == 0:
            continue
        if chunk.null_count or (not pa.types.is_large_string(chunk.type) and not pa.types.is_string(chunk.type)):
            return None
        _, offs_buf, data = chunk.buffers()
        kind = np.int64 if pa.types.is_large_string(chunk.type) else np.int32
        offs = np.frombuffer(offs_buf, dtype=kind)[chunk.offset:chunk.offset + len(chunk) + 1]
        start, width = int(offs[0]), int(offs[1] - offs[0])
        cell = b"" if data is None else data[start:start + width].to_pybytes()
        if first is None:
            first = cell
        if cell != first or not np.array_equal(offs - start, np.arange(len(offs), dtype=kind) * width):
            return None
        if width and data[start:int(offs[-1])] != pa.py_buffer(cell * len(chunk)):
            return None
    return None if first is None else first.decode("utf-8")


def iso_parts(text: pa.ChunkedArray, parts: int) -> list[pa.ChunkedArray]:
    """``text`` cut into ``parts`` runs of whole chunks, each to be checked with ``all_iso`` on its own thread."""
    chunks = text.chunks
    step = -(-len(chunks) // parts) if chunks else 1
    return [pa.chunked_array(chunks[i:i + step], text.type) for i in range(0, len(chunks), step)]


def all_iso(text: pa.ChunkedArray) -> bool:
    """True when no cell is empty and every cell is ISO 8601 without a zone (see parse_timestamps)."""
    return len(text) > 0 and _all_iso(text)


def iso_text(text: pa.ChunkedArray) -> tuple[pa.ChunkedArray, np.ndarray]:
    """What parse_timestamps gives (without a format) for a column that ``all_iso`` accepted."""
    return _iso_t(text), np.zeros(len(text), bool)


def parse_timestamps(text: pa.ChunkedArray, fmt: str | None) -> tuple[pa.ChunkedArray, np.ndarray]:
    """ISO 8601 text per row ("" for an empty cell) and a mask of cells that are not timestamps.

    Without ``fmt``: ISO 8601 (the text is kept, a space between date and time becomes "T"); when no
    cell is ISO 8601, pandas' format inference is tried. With ``fmt``: strptime, rewritten as ISO 8601.
    """
    n = len(text)
    if n and fmt is None and _all_iso(text):  # the usual export: no cell empty (an empty cell fails the cast)
        return _iso_t(text), np.zeros(n, bool)
    empty = pc.equal(pc.binary_length(text), 0).to_numpy(zero_copy_only=False)
    if n == 0 or empty.all():
        return pa.repeat(pa.scalar("", FRAME_TEXT), n), np.zeros(n, dtype=bool)
    if fmt is not None:
        return _formatted(_to_datetime(_series(text), format=fmt), empty)
    filled = text if not empty.any() else pc.if_else(pa.array(empty), pa.scalar("2000-01-01"), text)
    if _all_iso(filled):  # ISO 8601 apart from empty cells
        return _iso_t(text), np.zeros(n, bool)
    iso = pc.replace_substring_regex(text, _ISO_SPACE, r"\1T")
    parsed = _to_datetime(_series(iso), format="ISO8601", utc=True)
    shaped = pc.match_substring_regex(iso, _ISO_DATE).to_numpy(zero_copy_only=False)
    bad = (parsed.isna().to_numpy() | ~shaped) & ~empty
    if bad.sum() == (~empty).sum():
        inferred = _inferred(_series(text))
        if inferred is not None:
            return _formatted(inferred, empty)
    return pc.if_else(pa.array(bad | empty), pa.scalar(""), iso), bad


def _all_iso(text: pa.ChunkedArray) -> bool:
    """True when Arrow's cast reads every cell: ISO 8601 without a zone ("YYYY-MM-DD[ T]hh:mm:ss[.f]").

    Chunk by chunk, so a large column never has a timestamp copy of itself at once.
    """
    try:
        for chunk in (text.chunks if isinstance(text, pa.ChunkedArray) else [text]):
            pc.cast(chunk, pa.timestamp("us"))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return False
    return True


def _iso_t(text: pa.ChunkedArray) -> pa.ChunkedArray:
    """ISO 8601 cells with "T" between date and time (the text itself when no cell has a space)."""
    spaced = may_need_trim(text)  # no byte below 0x21 anywhere: no space to turn into "T"
    return pc.replace_substring(text, " ", "T", max_replacements=1) if spaced else text


def _inferred(cells: pd.Series) -> pd.Series | None:
    """pandas' format inference, refusing to guess the day/month order.

    "01.12.2026" is 1 December or 12 January. If some cells can only be read one way ("13.12.2026"), the
    column is read that way; otherwise cells whose day-first and month-first readings differ become NaT.
    None when nothing could be read.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            month_first = pd.to_datetime(cells, errors="coerce", dayfirst=False)
            day_first = pd.to_datetime(cells, errors="coerce", dayfirst=True)
        except (ValueError, TypeError, OverflowError):
            return None
    if getattr(month_first.dt, "tz", None) is not None or getattr(day_first.dt, "tz", None) is not None:
        return None
    m_ok, d_ok = month_first.notna().to_numpy(), day_first.notna().to_numpy()
    if d_ok.sum() > m_ok.sum() and not (m_ok & ~d_ok).any():
        return day_first     # some cells read only day-first ("13.12.2026"): the column is day-first
    if m_ok.sum() > d_ok.sum() and not (d_ok & ~m_ok).any():
        return month_first
    agree = (month_first == day_first).to_numpy()
    if not agree.any():
        return None
    return month_first.where(agree)


def _to_datetime(cells: pd.Series, **options: object) -> pd.Series:
    """pd.to_datetime with unreadable cells as NaT; mixed zone offsets are read as UTC.

    Raises ValueError only when the format itself cannot be used.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return pd.to_datetime(cells, errors="coerce", **options)
        except (ValueError, TypeError, OverflowError):
            if options.get("utc"):
                raise ValueError("timestamps cannot be read with this format") from None
            return pd.to_datetime(cells, errors="coerce", utc=True, **options)


def _series(text: pa.ChunkedArray) -> pd.Series:
    return pd.Series(text.to_pylist(), dtype=object)


def _formatted(parsed: pd.Series, empty: np.ndarray) -> tuple[pa.ChunkedArray, np.ndarray]:
    """ISO 8601 strings of parsed timestamps (UTC with "Z" when they carry a zone)."""
    bad = parsed.isna().to_numpy() & ~empty
    zoned = getattr(parsed.dt, "tz", None) is not None
    if zoned:
        parsed = parsed.dt.tz_convert("UTC").dt.tz_localize(None)
    raw = parsed.to_numpy(dtype="datetime64[us]")
    frac = (raw.astype(np.int64) % 1_000_000 != 0) & ~np.isnat(raw)
    out = np.datetime_as_string(raw, unit="us" if frac.any() else "s").astype(object)
    if zoned:
        out = out + "Z"
    out[bad | empty] = ""
    return pa.array(out, TEXT), bad
