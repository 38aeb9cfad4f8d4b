"""Read one checkweigher export (values or lot summaries) into an ``Export`` with bad-row accounting."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from monitor.errors import ExportError
from monitor.ingest import convert
from monitor.ingest.profile import CANONICAL_COLUMNS, DEFAULT_PROFILE, FeedProfile
from monitor.ingest.frames import empty_frame, frame_of, repeat_text, str_array
from monitor.ingest.table import TEXT, RawTable, split_body
from monitor.ingest.text import Header, decode, find_header
from monitor.units import ALLOWED as ALLOWED_UNITS
from monitor.units import conversion_factor

ROW_COLUMNS = ("source_line", "lot", "value", "timestamp", "product", "line", "head", "unit")
SUMMARY_COLUMNS = ("source_line", "lot", "n", "mean", "sd", "product", "line", "unit", "timestamp")
_MAX_N = 2**53  # the largest n that float64 holds exactly
_GIVE_BACK_ROWS = 50_000


@dataclass(frozen=True)
class BadRow:
    """A data row left out: its physical line, the export's column (None for the whole row), raw text, why."""

    line: int
    column: str | None
    value: str | None
    reason: str


@dataclass(frozen=True, eq=False)
class Export:
    """One export file, read: measurements (kind "values") or lot summaries (kind "summary")."""

    path: str
    kind: Literal["values", "summary"]
    rows: pd.DataFrame
    summaries: pd.DataFrame
    bad_rows: tuple[BadRow, ...] = ()
    dropped: int = 0
    end_of_lot: tuple[tuple[int, str], ...] = ()
    density: float | None = None
    profile: str = "default"
    notes: tuple[str, ...] = ()     # things the operator should know that cost no measurement


def read_export(path: str | Path, profile: FeedProfile | None = None) -> Export:
    """Read an export file; raises ExportError (path, line, column, what is allowed) when it is unusable."""
    try:
        data = [Path(path).read_bytes()]
    except OSError as exc:
        raise ExportError(f"cannot read the file: {exc.strerror or exc}", path=str(path)) from None
    return _read(data, str(path), profile)


def read_export_bytes(data: bytes, *, name: str, profile: FeedProfile | None = None) -> Export:
    """Read an export from bytes already in memory; ``name`` is used in errors and ``Export.path``."""
    return _read([data], name, profile)


def _read(holder: list[bytes], name: str, profile: FeedProfile | None) -> Export:
    """Read the bytes in ``holder``, which it empties: once split, the file's bytes are let go (when no
    caller holds them too), so a large file and its parsed columns are not both kept while the frame is built.
    """
    prof = profile or DEFAULT_PROFILE
    buf = decode(holder.pop(), prof, name)
    header = find_header(buf, prof, name)
    index, kind = _resolve_columns(header, prof, name)
    rows = _Rows(split_body(buf, header, name), header, index, kind, prof, name)
    del buf
    _give_back(rows.n)
    return rows.build()


def _give_back(rows: int) -> None:
    """After a large file's buffers are freed, ask Arrow's allocator to return the free pages to the system.

    Without this, mimalloc keeps freed parse buffers resident and the next allocations of another size
    raise the peak; for small files it is skipped (nothing worth returning).
    """
    if rows >= _GIVE_BACK_ROWS:
        pa.default_memory_pool().release_unused()


def _resolve_columns(header: Header, prof: FeedProfile, name: str) -> tuple[dict[str, int], str]:
    """Canonical column name -> field index in the header; and the kind of export."""
    positions: dict[str, list[int]] = {}
    for i, h in enumerate(header.names):
        positions.setdefault(h.casefold(), []).append(i)
    mapped = dict(prof.columns)
    found = ", ".join(repr(h) for h in header.names) or "nothing"
    index: dict[str, int] = {}
    for canon in CANONICAL_COLUMNS:
        wanted = prof.column_for(canon)
        hits = positions.get(wanted.casefold(), [])
        if len(hits) > 1:
            raise ExportError(f"column {wanted!r} appears {len(hits)} times in the header (fields "
                              f"{', '.join(str(h + 1) for h in hits)})", path=name, line=header.line,
                              hint="each column the reader uses must appear once")
        if hits:
            index[canon] = hits[0]
        elif canon in mapped:
            raise ExportError(f"column {wanted!r} (profiles.{prof.name}.columns.{canon}) is not in the "
                              f"header; found {found}", path=name, line=header.line,
                              hint="fix the column mapping in the feed profile")
    used: dict[int, str] = {}
    for canon, i in index.items():
        if i in used:
            raise ExportError(f"columns {used[i]!r} and {canon!r} both read header field {header.names[i]!r}",
                              path=name, line=header.line, hint="fix the column mapping in the feed profile")
        used[i] = canon
    if "lot" in index and "value" in index:
        return index, "values"
    if "lot" in index and all(k in index for k in ("n", "mean", "sd")):
        return index, "summary"
    need = ", ".join(repr(prof.column_for(c)) for c in ("lot", "value"))
    alt = ", ".join(repr(prof.column_for(c)) for c in ("lot", "n", "mean", "sd"))
    raise ExportError(f"the header needs columns {need} (or {alt} for lot summaries); found {found}",
                      path=name, line=header.line,
                      hint="map the export's headers with [profiles.NAME.columns], or set skip_lines / "
                           "header_prefix if the header is not the first line")


class _Rows:
    """Builds an Export from the raw table; one instance per file (holds the bad-row bookkeeping)."""

    def __init__(self, raw: RawTable, header: Header, index: dict[str, int], kind: str, prof: FeedProfile,
                 name: str) -> None:
        self.header, self.index, self.kind, self.prof, self.name = header, index, kind, prof, name
        # The raw columns, each let go (None) once nothing more is read from it: see _release.
        self.columns: list[pa.ChunkedArray | None] = list(raw.columns)
        self.lines = raw.lines
        self.clean = raw.clean
        self.n = raw.size
        self.code = np.zeros(self.n, dtype=np.int16)      # 0 = good; else 1 + index into self.reasons
        self.reasons: list[tuple[str, str, pa.ChunkedArray]] = []  # (canonical column, reason template, raw text)
        self.trimmed: dict[str, pa.ChunkedArray] = {}
        # A line holding only the end-of-lot text (no delimiters) is a marker, not a row with too few fields.
        eol = prof.end_of_lot
        self.problems = tuple(p for p in raw.problems if eol is None or p.text.strip() != eol)
        self.notes: list[str] = []
        self._decimal_mark: str | None = None
        self.marker_lines = tuple(p.line for p in raw.problems if eol is not None and p.text.strip() == eol)

    def text(self, canon: str) -> pa.ChunkedArray | None:
        if canon not in self.index:
            return None
        if canon not in self.trimmed:
            col = self.columns[self.index[canon]]
            assert col is not None, f"column {canon} read after release"
            self.trimmed[canon] = convert.trim(col) if not self.clean and convert.may_need_trim(col) else col
        return self.trimmed[canon]

    def flag(self, mask: np.ndarray, canon: str, reason: str) -> None:
        """Mark rows as bad with ``reason`` ("{v}" is replaced by the raw field) unless already bad."""
        fresh = mask & (self.code == 0)
        if fresh.any():
            self.reasons.append((canon, reason, self.columns[self.index[canon]]))  # type: ignore[arg-type]
            self.code[fresh] = len(self.reasons)

    def build(self) -> Export:
        prof = self.prof
        lot = self.text("lot")
        marker = np.zeros(self.n, dtype=bool)
        if prof.end_of_lot is not None:
            marker = pc.equal(lot, prof.end_of_lot).to_numpy(zero_copy_only=False)
        self.code[marker] = -1
        lot_empty = pc.equal(pc.binary_length(lot), 0).to_numpy(zero_copy_only=False)
        self.code[self._blank(lot_empty)] = -3
        self.flag(lot_empty, "lot", "empty lot code — every measurement needs its lot")
        del lot_empty
        main = "value" if self.kind == "values" else "mean"
        dropped = np.zeros(self.n, dtype=bool)
        if prof.drop_values:
            dropped = pc.is_in(self.text(main), value_set=pa.array(prof.drop_values, TEXT)).to_numpy(
                zero_copy_only=False) & (self.code == 0)
            self.code[dropped] = -2
        values = self._number(main)
        units = self._units()
        values = self._subtract_tare(values, units)
        stamps = self._timestamps()
        extra: dict[str, np.ndarray] = {}
        if self.kind == "summary":
            n_val = self._number("n", integer=True)
            sd_val = self._number("sd")
            self.flag(sd_val < 0, "sd", "sd '{v}' is negative — must be >= 0")
            extra = {"n": n_val, "sd": sd_val}
        good = self.code == 0
        bad_count = int((self.code > 0).sum()) + len(self.problems)
        data_rows = int((self.code >= 0).sum() + (self.code == -2).sum()) + len(self.problems)
        self._check_budget(bad_count, data_rows, int(good.sum()), int(dropped.sum()))
        bad_rows, markers = self._bad_rows(), self._markers(marker)
        del lot
        self._release(keep=("lot", "product", "line", "head"))
        frame = self._frame(good, values, units, stamps, extra)
        rows, summaries = (frame, empty_frame(SUMMARY_COLUMNS)) if self.kind == "values" else (empty_frame(ROW_COLUMNS), frame)
        return Export(path=self.name, kind=self.kind, rows=rows, summaries=summaries,  # type: ignore[arg-type]
                      bad_rows=bad_rows, dropped=int(dropped.sum()), end_of_lot=markers,
                      density=prof.density, profile=prof.name, notes=tuple(self.notes))

    def _release(self, keep: tuple[str, ...] = ()) -> None:
        """Let go of every raw column except those of ``keep`` (a large file's text need not outlive its use)."""
        kept = {self.index[c] for c in keep if c in self.index}
        for i in range(len(self.columns)):
            if i not in kept:
                self.columns[i] = None
        for canon in list(self.trimmed):
            if canon not in keep:
                del self.trimmed[canon]
        _give_back(self.n)

    def _blank(self, lot_empty: np.ndarray) -> np.ndarray:
        """Rows whose every field is empty or whitespace (empty lines, lines of delimiters only)."""
        blank = np.zeros(self.n, dtype=bool)
        cand = np.flatnonzero(lot_empty)
        if cand.size:
            take = pa.array(cand)
            empty = np.ones(cand.size, dtype=bool)
            for col in self.columns:
                assert col is not None
                empty &= pc.equal(pc.binary_length(convert.trim(col.take(take))), 0).to_numpy(zero_copy_only=False)
            blank[cand[empty]] = True
        return blank

    # -- conversions ------------------------------------------------------------------------------
    def _decimal(self, text: pa.ChunkedArray) -> str:
        """The decimal mark: the profile's, except that a file split by ";" or tab whose number column has
        commas and no point at all is read with a decimal comma (a note says so)."""
        if self._decimal_mark is None:
            self._decimal_mark = self.prof.decimal
            if (self.prof.decimal == "." and self.header.delimiter in (";", "\t") and len(text)
                    and pc.any(pc.match_substring(text, ",")).as_py()
                    and not pc.any(pc.match_substring(text, ".")).as_py()):
                self._decimal_mark = ","
                self.notes.append("numbers read with a decimal comma (the file has commas and no decimal points);"
                                  " set decimal in a feed profile to make this explicit")
        return self._decimal_mark

    def _number(self, canon: str, integer: bool = False) -> np.ndarray:
        decimal = self._decimal(self.text(canon))
        values, status = convert.parse_numbers(self.text(canon), decimal)
        if integer:
            ok = status == convert.OK
            whole = ok & (np.where(ok, values, 0) >= 1) & (np.where(ok, values, 0) <= _MAX_N)
            whole &= np.floor(np.where(whole, values, 0)) == np.where(whole, values, 0)
            self.flag(~whole, canon, f"{canon} '{{v}}' is not a positive whole number — must be 1 to {_MAX_N}")
            return np.where(whole, values, 0).astype(np.int64)
        mark = "decimal comma" if decimal == "," else "decimal point"
        self.flag(status == convert.NOT_NUMBER, canon,
                  f"{canon} '{{v}}' is not a number — expected digits with a {mark}")
        self.flag(status == convert.NOT_FINITE, canon, f"{canon} '{{v}}' is not finite — must be a finite number")
        return values

    def _units(self) -> pa.ChunkedArray:
        if "unit" not in self.index:
            return repeat_text(self.prof.unit, self.n)
        # parse_units strips each distinct spelling itself: no need to trim a million cells first
        units, unknown = convert.parse_units(self.columns[self.index["unit"]], self.prof.unit)  # type: ignore[arg-type]
        self.flag(unknown, "unit", f"unknown unit '{{v}}' — allowed: {ALLOWED_UNITS}")
        return units

    def _subtract_tare(self, values: np.ndarray, units: pa.ChunkedArray) -> np.ndarray:
        if self.prof.tare == 0.0:
            return values
        out = values.copy()
        units_np = units.to_numpy(zero_copy_only=False)
        for u in pc.unique(units).to_pylist():
            rows = units_np == u
            try:
                out[rows] = values[rows] - self.prof.tare * conversion_factor(self.prof.unit, u, self.prof.density)
            except ValueError:
                self.flag(rows, "unit", f"unit '{{v}}': the tare is in {self.prof.unit} and needs a density "
                                        "to be subtracted")
        return out

    def _timestamps(self) -> pa.ChunkedArray:
        t = self.text("timestamp")
        if t is None:
            return repeat_text("", self.n)
        try:
            stamps, bad = convert.parse_timestamps(t, self.prof.timestamp_format)
        except ValueError as exc:
            raise ExportError(f"timestamp_format {self.prof.timestamp_format!r} cannot be used: {exc}",
                              path=self.name, line=self.header.line, key=f"profiles.{self.prof.name}.timestamp_format",
                              hint="use strptime directives such as %d.%m.%Y %H:%M:%S") from None
        if self.prof.timestamp_format:
            self.flag(bad, "timestamp", f"timestamp '{{v}}' does not match {self.prof.timestamp_format!r} — "
                                        "fix the row or timestamp_format in the feed profile")
        elif bad.any():
            # Without a timestamp_format a timestamp is a courtesy: one that cannot be read unambiguously never
            # costs its measurement. The cell is left empty and the operator is told (the file is archived).
            rows = np.flatnonzero(bad & (self.code == 0))
            if rows.size:
                first = int(rows[0])
                self.notes.append(
                    f"{rows.size} timestamp(s) not ISO 8601 and not readable unambiguously, first "
                    f"{_short(str(t[first].as_py()))!r} on line {int(self.lines[first])}; the measurements are kept "
                    "without a time — set timestamp_format in the feed profile")
        return stamps

    # -- results ----------------------------------------------------------------------------------
    def _check_budget(self, bad: int, data_rows: int, good: int, dropped: int) -> None:
        allowed = self.prof.allowed_bad_rows(data_rows)
        line, what, how = self._first_bad()
        fix = f"fix the export, or raise max_bad_rows in profile {self.prof.name!r}"
        if bad > allowed:
            raise ExportError(f"{what}; {bad} of {data_rows} rows bad, the profile allows {allowed}",
                              path=self.name, line=line, hint=f"{how}; {fix}" if how else fix)
        if good == 0:
            if bad:
                raise ExportError(f"no usable rows: {what}", path=self.name, line=line, hint=how or None)
            if dropped:
                raise ExportError(f"no usable rows: all {dropped} are 'no measurement' values "
                                  f"({', '.join(repr(v) for v in self.prof.drop_values)})",
                                  path=self.name, line=self.header.line)
            raise ExportError("no data rows after the header", path=self.name, line=self.header.line)

    def _first_bad(self) -> tuple[int, str, str]:
        """Line, "what is wrong (column 'X')" and "what is allowed" of the first bad row."""
        cands: list[tuple[int, str, str]] = [(p.line, p.reason, "") for p in self.problems]
        hit = np.flatnonzero(self.code > 0)
        if hit.size:
            row = self._describe(int(hit[0]))
            what, _, how = row.reason.partition(" — ")
            cands.append((row.line, f"{what} (column {row.column!r})", how))
        return min(cands) if cands else (self.header.line, "", "")

    def _describe(self, i: int) -> BadRow:
        canon, template, raw = self.reasons[self.code[i] - 1]
        value = raw[i].as_py()
        return BadRow(int(self.lines[i]), self.header.names[self.index[canon]], value,
                      template.replace("{v}", _short(value.strip())))

    def _bad_rows(self) -> tuple[BadRow, ...]:
        found = [self._describe(int(i)) for i in np.flatnonzero(self.code > 0)]
        found += [BadRow(p.line, None, _short(p.text), p.reason) for p in self.problems]
        return tuple(sorted(found, key=lambda b: b.line))

    def _markers(self, marker: np.ndarray) -> tuple[tuple[int, str], ...]:
        """(line, lot it closes) of each end-of-lot marker: the lot of the nearest row above with a lot code."""
        lines = np.sort(np.concatenate([self.lines[marker], np.array(self.marker_lines, dtype=np.int64)]))
        if lines.size == 0:
            return ()
        lots = self.text("lot")
        carriers = np.flatnonzero(~marker & (pc.binary_length(lots).to_numpy(zero_copy_only=False) > 0))
        carrier_lines = self.lines[carriers]
        out = []
        for line in lines:
            k = int(np.searchsorted(carrier_lines, line)) - 1
            out.append((int(line), lots[int(carriers[k])].as_py() if k >= 0 else ""))
        return tuple(out)

    def _frame(self, good: np.ndarray, values: np.ndarray, units: pa.ChunkedArray, stamps: pa.ChunkedArray,
               extra: dict[str, np.ndarray]) -> pd.DataFrame:
        """The good rows as the documented frame (ROW_COLUMNS or SUMMARY_COLUMNS), index 0..n-1.

        Text columns become pandas "str" arrays over the Arrow data already in hand (no copy when every row
        is good); each raw column is let go as soon as its frame column exists.
        """
        every = bool(good.all())
        mask = None if every else pa.array(good)

        def text(arr: pa.ChunkedArray | None) -> pd.api.extensions.ExtensionArray:
            if arr is None:
                return str_array(repeat_text("", len(values) if every else int(good.sum())))
            return str_array(arr if mask is None else arr.filter(mask))

        cols: dict[str, object] = {"source_line": self.lines if every else self.lines[good]}
        kept = ["lot", "product", "line", "head"]
        while kept:
            canon = kept.pop(0)
            cols[canon] = text(self.text(canon))
            self._release(keep=tuple(kept))
        cols["unit"] = text(units)
        del units
        cols["timestamp"] = text(stamps)
        del stamps
        if self.kind == "values":
            cols["value"] = values if every else values[good]
            order = ROW_COLUMNS
        else:
            cols["mean"] = values if every else values[good]
            cols["n"] = extra["n"] if every else extra["n"][good]
            cols["sd"] = extra["sd"] if every else extra["sd"][good]
            order = SUMMARY_COLUMNS
        return frame_of([cols[c] for c in order], order, int(good.sum()))


def _short(text: str, limit: int = 80) -> str:
    """Raw text for a one-line message: control characters escaped, long text cut."""
    if not text.isprintable():
        text = "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)
    return text if len(text) <= limit else text[:limit - 1] + "…"
