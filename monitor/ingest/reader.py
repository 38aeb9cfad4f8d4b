"""Read one checkweigher export (values or lot summaries) into an ``Export`` with bad-row accounting."""

from __future__ import annotations

from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from monitor.errors import ExportError
from monitor.ingest import convert
from monitor.ingest.frames import empty_frame, frame_of, repeat_text, str_array
from monitor.ingest.profile import CANONICAL_COLUMNS, DEFAULT_PROFILE, FeedProfile
from monitor.ingest.table import FRAME_TEXT, TEXT, RawTable, split_body
from monitor.ingest.text import Header, check_line_lengths, decode, decode_large, find_header
from monitor.units import ALLOWED as ALLOWED_UNITS
from monitor.units import conversion_factor

ROW_COLUMNS = ("source_line", "lot", "value", "timestamp", "product", "line", "head", "unit", "excluded")
SUMMARY_COLUMNS = ("source_line", "lot", "n", "mean", "sd", "product", "line", "unit", "timestamp", "problem")
# Why a row of a lot carries no usable value (the ``excluded`` column; monitor.lot.EXCLUSION_REASONS).
BLANK, NOT_A_NUMBER, NOT_FINITE, DROPPED, PROBLEM = 1, 2, 3, 4, 5
EXCLUDED_TEXT = ("", "blank", "not_a_number", "not_finite", "dropped_value")
_MAX_N = 2**53  # the largest n that float64 holds exactly
_GIVE_BACK_ROWS = 50_000
# From this many rows the independent column work (units, timestamps, frame columns) runs on worker threads:
# Arrow's compute functions let go of the GIL, so a large file's columns are converted side by side.
PARALLEL_ROWS = 200_000
# From this size the decode checks run in place, part of them on a worker thread (text.decode_large).
LARGE_FILE_BYTES = 1 << 20
ISO_PARTS = 4  # a large file's ISO timestamp check in this many parts (two workers and the main thread)
_POOL: list[ThreadPoolExecutor] = []


def _pool() -> ThreadPoolExecutor:
    """The reader's two worker threads, started on first use."""
    if not _POOL:
        _POOL.append(ThreadPoolExecutor(max_workers=2, thread_name_prefix="lotwarden-reader"))
    return _POOL[0]


@dataclass(frozen=True)
class BadRow:
    """A data row left out: its physical line, the export's column (None for the whole row), raw text, why."""

    line: int
    column: str | None
    value: str | None
    reason: str


@dataclass(frozen=True, eq=False)
class Export:
    """One export file, read: measurements (kind "values") or lot summaries (kind "summary").

    ``rows`` (ROW_COLUMNS) holds every data row that has a lot code and no problem outside its value: a row
    whose value is blank, not a number, not finite or one of the profile's ``drop_values`` is kept with value
    NaN and its reason in ``excluded`` ("" for a usable value). ``unit`` is "" when the value carries no unit
    (no unit column or a blank cell, and no profile ``unit``). ``summaries`` (SUMMARY_COLUMNS) likewise keeps
    a record whose n / mean / sd cannot be used, with the plain reason in ``problem`` ("" when fine), such
    numbers as NaN and n as 0. Excluded rows (but for drop_values, counted in ``dropped``) are bad rows too.
    """

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
        data: list[bytes] = [_load(Path(path))]
    except OSError as exc:
        raise ExportError(f"cannot read the file: {exc.strerror or exc}", path=str(path)) from None
    return _read(data, str(path), profile)


def _load(path: Path) -> bytes:
    """The file's bytes, read into memory (not memory-mapped: a map of a file that another program truncates
    while it is read kills the process with SIGBUS)."""
    with path.open("rb") as f:
        return f.read()


def read_export_bytes(data: bytes, *, name: str, profile: FeedProfile | None = None) -> Export:
    """Read an export from bytes already in memory; ``name`` is used in errors and ``Export.path``."""
    return _read([data], name, profile)


def _read(holder: list[bytes], name: str, profile: FeedProfile | None) -> Export:
    """Read the bytes in ``holder``, which it empties: once split, the file's bytes are let go (when no
    caller holds them too), so a large file and its parsed columns are not both kept while the frame is built.
    """
    prof = profile or DEFAULT_PROFILE
    data = holder.pop()
    buf = (decode_large(data, prof, name, _pool()) if len(data) >= LARGE_FILE_BYTES
           else decode(data, prof, name))
    del data
    check_line_lengths(buf, name)          # before anything copies a line out of the buffer
    header = find_header(buf, prof, name)
    index, kind = _resolve_columns(header, prof, name)
    # The value column may be parsed straight into numbers (threaded, in the parser) when no cell of it needs
    # its text: no 'no measurement' texts to compare and the decimal point that the parser reads.
    numbers = (index["value"],) if kind == "values" and prof.decimal == "." and not prof.drop_values else ()
    rows = _Rows(split_body(buf, header, name, numbers), header, index, kind, prof, name)
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
        self.excl = np.zeros(self.n, dtype=np.int8)       # > 0: kept without a usable value (BLANK ... PROBLEM)
        self.flagged = True                               # False once build found no row flagged at all
        self.iso: list[tuple[pa.ChunkedArray, Future[bool]]] = []  # a large file's ISO check, in parts
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

    def flag(self, mask: np.ndarray, canon: str, reason: str, excluded: int = 0) -> None:
        """Mark rows as bad with ``reason`` ("{v}" is replaced by the raw field) unless already bad.

        ``excluded`` > 0: a problem of the row's value only, so the row is kept (value NaN) with that reason.
        Otherwise the row is left out, and a 'no measurement' row (drop_values) with this problem becomes a
        bad row instead of a dropped one.
        """
        if not mask.any():
            return
        fresh = mask & ((self.code == 0) if excluded else ((self.code == 0) | (self.code == -2)))
        if fresh.any():
            self.reasons.append((canon, reason, self.columns[self.index[canon]]))
            self.code[fresh] = len(self.reasons)
            self.excl[fresh] = excluded

    def build(self) -> Export:
        prof = self.prof
        pool = _pool() if self.n >= PARALLEL_ROWS else None
        early: dict[str, Future[tuple[pa.ChunkedArray, np.ndarray]]] = {}
        # Pure conversions, started now (the units first: they are wanted first); their rows are flagged
        # below, in order. The ISO check runs in parts that the main thread takes over when it gets to them
        # before a worker has (see _timestamps), so no thread waits while work is queued.
        if pool is not None and "unit" in self.index:
            early["unit"] = pool.submit(convert.parse_units, self.columns[self.index["unit"]], prof.unit or "")
        stamp_text = self.text("timestamp")
        if pool is not None and stamp_text is not None:
            if prof.timestamp_format is None:  # the usual ISO column
                self.iso = [(part, pool.submit(convert.all_iso, part))
                            for part in convert.iso_parts(stamp_text, ISO_PARTS)]
            else:
                early["timestamp"] = pool.submit(convert.parse_timestamps, stamp_text, prof.timestamp_format)
        lot = self.text("lot")
        marker = np.zeros(self.n, dtype=bool)
        if prof.end_of_lot is not None:
            marker = pc.equal(lot, prof.end_of_lot).to_numpy(zero_copy_only=False)
        self.code[marker] = -1
        if convert.any_empty(lot):
            lot_empty = pc.equal(pc.binary_length(lot), 0).to_numpy(zero_copy_only=False)
            self.code[self._blank(lot_empty)] = -3
            self.flag(lot_empty, "lot", "empty lot code — every measurement needs its lot")
            del lot_empty
        main = "value" if self.kind == "values" else "mean"
        if prof.drop_values:
            dropped = pc.is_in(self.text(main), value_set=pa.array(prof.drop_values, TEXT)).to_numpy(
                zero_copy_only=False) & (self.code == 0)
            self.code[dropped] = -2
            del dropped
        values, status = self._parse(main)
        # Problems outside the measured numbers first: such a row is left out. The numbers are flagged
        # last, so a row flagged there has no other problem and is kept without a usable value.
        units = self._units(early.get("unit"))
        values = self._subtract_tare(values, units)
        stamps = self._timestamps(early.get("timestamp"))
        extra: dict[str, np.ndarray] = {}
        if self.kind == "values":
            self._flag_number(main, status)
        else:
            extra = self._summary_numbers(status)
        # The usual large file has no row flagged at all (no marker, blank, dropped or bad row): its counts
        # are known without a pass over the row codes each (excl > 0 only where a row is flagged).
        self.flagged = bool(self.code.any())
        if not self.flagged:
            self._check_budget(len(self.problems), self.n + len(self.problems), self.n, 0)
            bad_rows, markers = self._bad_rows(), self._markers(marker)
            del lot
            why = str_array(repeat_text("", self.n))
            self._release(keep=("lot", "product", "line", "head"))
            return self._export(self._frame(np.ones(self.n, dtype=bool), values, units, stamps, extra, why, pool),
                                bad_rows, 0, markers)
        dropped = self.code == -2
        self.excl[dropped] = DROPPED
        keep = (self.code == 0) | (self.excl > 0)
        values = np.where(dropped, np.nan, values) if dropped.any() else values
        good = int((self.code == 0).sum())
        bad_count = int((self.code > 0).sum()) + len(self.problems)
        # A row kept with its lot is listed in bad_rows and counted in its lot's `excluded_by`. A missed
        # measurement (blank or non-finite value) or an unusable summary record loses nothing, so it does not
        # use up the bad-row budget, which is for rows left out of every lot and for damage: text where a
        # number belongs (not_a_number) still counts, as a sign of a damaged or misread export. A summary
        # record kept this way is reported (a `review` lot naming its problem), so a file of such records is
        # not "without usable rows"; a values file is when no row has a usable value.
        free = (self.excl == BLANK) | (self.excl == NOT_FINITE) | (self.excl == PROBLEM)
        kept_bad = int(((self.code > 0) & free).sum())
        if self.kind == "summary":
            good += kept_bad
        data_rows = int((self.code >= 0).sum() + dropped.sum()) + len(self.problems)
        self._check_budget(bad_count, data_rows, good, int(dropped.sum()), kept=kept_bad)
        bad_rows, markers = self._bad_rows(), self._markers(marker)
        del lot
        why = self._why(keep)  # before the raw columns are let go: a summary's problem names its raw text
        self._release(keep=("lot", "product", "line", "head"))
        frame = self._frame(keep, values, units, stamps, extra, why, pool)
        return self._export(frame, bad_rows, int(dropped.sum()), markers)

    def _export(self, frame: pd.DataFrame, bad_rows: tuple[BadRow, ...], dropped: int,
                markers: tuple[tuple[int, str], ...]) -> Export:
        """The Export of this file around its frame (rows or summaries, by kind)."""
        rows, summaries = ((frame, empty_frame(SUMMARY_COLUMNS)) if self.kind == "values"
                           else (empty_frame(ROW_COLUMNS), frame))
        return Export(path=self.name, kind=self.kind, rows=rows, summaries=summaries,  # type: ignore[arg-type]
                      bad_rows=bad_rows, dropped=dropped, end_of_lot=markers,
                      density=self.prof.density, profile=self.prof.name, notes=tuple(self.notes))

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
                if col.type == pa.float64():  # a number: not blank
                    empty[:] = False
                    break
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

    def _parse(self, canon: str) -> tuple[np.ndarray, np.ndarray]:
        """Float64 values (NaN where unusable) and the convert status of each row of a number column."""
        col = self.columns[self.index[canon]]
        if col is not None and col.type == pa.float64():  # the parser read every cell as a finite number
            self._decimal_mark = self.prof.decimal
            return col.to_numpy(), np.zeros(len(col), dtype=np.int8)  # convert.OK
        return convert.parse_numbers(self.text(canon), self._decimal(self.text(canon)))

    def _is_blank(self, canon: str, status: np.ndarray) -> np.ndarray:
        """Rows whose (trimmed) cell of ``canon`` is empty: blank, as opposed to text that is not a number."""
        cand = status == convert.NOT_NUMBER
        if not cand.any():
            return cand
        return cand & pc.equal(pc.binary_length(self.text(canon)), 0).to_numpy(zero_copy_only=False)

    def _flag_number(self, canon: str, status: np.ndarray, summary: bool = False) -> None:
        """Flag blank, non-numeric and non-finite cells of a number column; the rows are kept (excluded)."""
        if (status == convert.OK).all():
            return
        mark = "decimal comma" if self._decimal_mark == "," else "decimal point"
        self.flag(self._is_blank(canon, status), canon, f"{canon} is blank — expected a number with a {mark}",
                  PROBLEM if summary else BLANK)
        self.flag(status == convert.NOT_NUMBER, canon,
                  f"{canon} '{{v}}' is not a number — expected digits with a {mark}",
                  PROBLEM if summary else NOT_A_NUMBER)
        self.flag(status == convert.NOT_FINITE, canon, f"{canon} '{{v}}' is not finite — must be a finite number",
                  PROBLEM if summary else NOT_FINITE)

    def _summary_numbers(self, mean_status: np.ndarray) -> dict[str, np.ndarray]:
        """n and sd of a summary export, and the flags of unusable n / mean / sd (such records are kept).

        A record of n = 1 whose sd is blank or not finite is a record with a problem (not judged): one unit
        has no spread, and judging a lot needs at least 2 units anyway.
        """
        n_raw, n_status = self._parse("n")
        ok = n_status == convert.OK
        whole = ok & (np.where(ok, n_raw, 0) >= 1) & (np.where(ok, n_raw, 0) <= _MAX_N)
        whole &= np.floor(np.where(whole, n_raw, 0)) == np.where(whole, n_raw, 0)
        n_val = np.where(whole, n_raw, 0).astype(np.int64)
        sd_val, sd_status = self._parse("sd")
        self._flag_number("mean", mean_status, summary=True)
        self.flag(self._is_blank("n", n_status), "n", f"n is blank — must be a whole number 1 to {_MAX_N}",
                  PROBLEM)
        self.flag(~whole, "n", f"n '{{v}}' is not a positive whole number — must be 1 to {_MAX_N}", PROBLEM)
        self.flag((n_val == 1) & (sd_status != convert.OK), "sd",
                  "sd '{v}' is undefined for a lot of one unit (n = 1) — a summary is judged with n >= 2 "
                  "and a finite sd >= 0", PROBLEM)
        self._flag_number("sd", sd_status, summary=True)
        self.flag(sd_val < 0, "sd", "sd '{v}' is negative — must be >= 0", PROBLEM)
        return {"n": n_val, "sd": sd_val}

    def _units(self, early: Future[tuple[pa.ChunkedArray, np.ndarray]] | None = None) -> pa.ChunkedArray:
        """Canonical unit per row; "" where the value carries no unit (no unit cell, no profile unit)."""
        if "unit" not in self.index:
            return repeat_text(self.prof.unit or "", self.n)
        # parse_units strips each distinct spelling itself: no need to trim a million cells first
        units, unknown = early.result() if early is not None else convert.parse_units(
            self.columns[self.index["unit"]], self.prof.unit or "")
        self.flag(unknown, "unit", f"unknown unit '{{v}}' — allowed: {ALLOWED_UNITS}")
        return units

    def _subtract_tare(self, values: np.ndarray, units: pa.ChunkedArray) -> np.ndarray:
        """Values less the tare: converted to each row's unit, or as it stands when no unit is declared."""
        if self.prof.tare == 0.0:
            return values
        if self.prof.unit is None:  # the tare is in the values' own (unstated) unit
            return values - self.prof.tare
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

    def _timestamps(self, early: Future[tuple[pa.ChunkedArray, np.ndarray]] | None = None) -> pa.ChunkedArray:
        t = self.text("timestamp")
        if t is None:
            return repeat_text("", self.n)
        try:
            if self.iso and all(convert.all_iso(part) if f.cancel() else f.result() for part, f in self.iso):
                stamps, bad = convert.iso_text(t)
            else:
                stamps, bad = early.result() if early is not None else convert.parse_timestamps(
                    t, self.prof.timestamp_format)
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
    def _check_budget(self, bad: int, data_rows: int, good: int, dropped: int, kept: int = 0) -> None:
        """``bad`` rows in all, ``kept`` of them kept with their lot at no cost to the budget."""
        allowed = self.prof.allowed_bad_rows(data_rows)
        line, what, how = self._first_bad()
        fix = f"fix the export, or raise max_bad_rows in profile {self.prof.name!r}"
        if bad - kept > allowed:
            line, what, how = self._first_bad(left_out=True)
            raise ExportError(f"{what}; {bad - kept} of {data_rows} rows bad, the profile allows {allowed}",
                              path=self.name, line=line, hint=f"{how}; {fix}" if how else fix)
        if good == 0:
            if bad:
                raise ExportError(f"no usable rows: {what}", path=self.name, line=line, hint=how or None)
            if dropped:
                raise ExportError(f"no usable rows: all {dropped} are 'no measurement' values "
                                  f"({', '.join(repr(v) for v in self.prof.drop_values)})",
                                  path=self.name, line=self.header.line)
            raise ExportError("no data rows after the header", path=self.name, line=self.header.line)

    def _first_bad(self, left_out: bool = False) -> tuple[int, str, str]:
        """Line, "what is wrong (column 'X')" and "what is allowed" of the first bad row (``left_out``: of
        the first row that counts against the bad-row budget)."""
        cands: list[tuple[int, str, str]] = [(p.line, p.reason, "") for p in self.problems]
        if self.flagged:
            free = (self.excl == BLANK) | (self.excl == NOT_FINITE) | (self.excl == PROBLEM)
            hit = np.flatnonzero((self.code > 0) & ~free if left_out else self.code > 0)
        else:
            hit = np.zeros(0, dtype=np.int64)
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
        found = [self._describe(int(i)) for i in np.flatnonzero(self.code > 0)] if self.flagged else []
        found += [BadRow(p.line, None, _short(p.text), p.reason) for p in self.problems]
        return tuple(sorted(found, key=lambda b: b.line))

    def _markers(self, marker: np.ndarray) -> tuple[tuple[int, str], ...]:
        """(line, lot it closes) of each end-of-lot marker: the lot of the nearest row above with a lot code."""
        lines = np.sort(np.concatenate([self.lines[marker], np.array(self.marker_lines, dtype=np.int64)]))
        if lines.size == 0:
            return ()
        lots = self.text("lot")
        assert lots is not None  # values exports always have a lot column
        carriers = np.flatnonzero(~marker & (pc.binary_length(lots).to_numpy(zero_copy_only=False) > 0))
        carrier_lines = self.lines[carriers]
        out = []
        for line in lines:
            k = int(np.searchsorted(carrier_lines, line)) - 1
            out.append((int(line), lots[int(carriers[k])].as_py() if k >= 0 else ""))
        return tuple(out)

    def _frame(self, good: np.ndarray, values: np.ndarray, units: pa.ChunkedArray, stamps: pa.ChunkedArray,
               extra: dict[str, np.ndarray], why: pd.api.extensions.ExtensionArray,
               pool: ThreadPoolExecutor | None = None) -> pd.DataFrame:
        """The kept rows (``good``) as the documented frame (ROW_COLUMNS or SUMMARY_COLUMNS), index 0..n-1.

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
        if pool is not None:  # side by side on the worker threads (a few new offsets buffers at once)
            arrays = [self.text(c) for c in kept] + [units, stamps]
            cols.update(zip([*kept, "unit", "timestamp"], pool.map(text, arrays), strict=False))
            del arrays
            kept = []
            self._release()
        while kept:
            canon = kept.pop(0)
            cols[canon] = text(self.text(canon))
            self._release(keep=tuple(kept))
        if "unit" not in cols:
            cols["unit"] = text(units)
            cols["timestamp"] = text(stamps)
        del units, stamps
        if self.kind == "values":
            cols["value"] = values if every else values[good]
            cols["excluded"] = why
            order: tuple[str, ...] = ROW_COLUMNS
        else:
            cols["mean"] = values if every else values[good]
            cols["n"] = extra["n"] if every else extra["n"][good]
            cols["sd"] = extra["sd"] if every else extra["sd"][good]
            cols["problem"] = why
            order = SUMMARY_COLUMNS
        return frame_of([cols[c] for c in order], order, int(good.sum()))

    def _why(self, keep: np.ndarray) -> pd.api.extensions.ExtensionArray:
        """The ``excluded`` (values) or ``problem`` (summaries) column of the kept rows: "" for a usable one."""
        excl = self.excl[keep]
        if not excl.any():
            return str_array(repeat_text("", int(excl.size)))
        if self.kind == "values":
            return str_array(pa.array(np.array(EXCLUDED_TEXT, dtype=object)[excl], FRAME_TEXT))
        text = np.full(excl.size, "", dtype=object)
        idx = np.flatnonzero(keep)
        for j in np.flatnonzero(excl):
            i = int(idx[j])
            if self.code[i] > 0:
                text[j] = self._describe(i).reason.partition(" — ")[0]
            else:  # a 'no measurement' value (drop_values) in the mean column
                raw = self.text("mean")[i].as_py()  # type: ignore[index]
                text[j] = f"mean '{_short(raw)}' is a 'no measurement' value (drop_values)"
        return str_array(pa.array(text, FRAME_TEXT))


def _short(text: str, limit: int = 80) -> str:
    """Raw text for a one-line message: control characters escaped, long text cut."""
    if not text.isprintable():
        text = "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)
    return text if len(text) <= limit else text[:limit - 1] + "…"
