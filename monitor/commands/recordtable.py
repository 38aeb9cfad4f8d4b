"""Plain-text tables, CSV rows and cell formats that the `lots` and `show` commands share."""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Mapping, Sequence
from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo

from monitor.alerts.templates import fmt_p
from monitor.period import parse_stored
from monitor.record import LOT_KEYS, LotEntry

DASH = "—"
# the CSV columns of ``lotwarden lots --format csv``: LOT_KEYS with giveaway and disposition flattened
GIVEAWAY_COLUMNS = ("giveaway_per_pack", "giveaway_total", "giveaway_cost", "giveaway_currency")
DISPOSITION_COLUMNS = ("disposition_action", "disposition_by", "disposition_note", "disposition_at")
_FLAT = {"giveaway": GIVEAWAY_COLUMNS, "disposition": DISPOSITION_COLUMNS}
CSV_COLUMNS: tuple[str, ...] = tuple(c for key in LOT_KEYS for c in _FLAT.get(key, (key,)))


def _finite(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(float(value))


def fmt_num(value: Any, digits: int = 2) -> str:
    """A number with ``digits`` decimals, or a dash when missing."""
    return f"{float(value):.{digits}f}" if _finite(value) else DASH


def fmt_target(value: Any) -> str:
    """A target or nominal as written in a rule (502, 502.5), or a dash."""
    return f"{float(value):g}" if _finite(value) else DASH


def fmt_signed(value: Any, digits: int = 2) -> str:
    return f"{float(value):+.{digits}f}" if _finite(value) else DASH


def fmt_pvalue(value: Any) -> str:
    return fmt_p(value)


def local_time(stored: str | None, zone: str, *, seconds: bool = False) -> str:
    """A stored ISO time shown in time zone ``zone`` ("2026-12-01 06:30"), or a dash; unreadable text as is."""
    if not stored:
        return DASH
    try:
        moment: datetime = parse_stored(stored).astimezone(ZoneInfo(zone))
    except ValueError:
        return stored
    return moment.strftime("%Y-%m-%d %H:%M:%S" if seconds else "%Y-%m-%d %H:%M")


def table(headers: Sequence[str], rows: Sequence[Sequence[str]], *, right: Sequence[int] = ()) -> list[str]:
    """Lines of a plain-text table: a header, a rule of dashes, one line per row; the columns ``right``
    aligned right (numbers), the others left. Cell text is put on one line (newlines become spaces)."""
    cells = [[_one_line(c) for c in r] for r in rows]
    widths = [max([len(h), *(len(r[i]) for r in cells)]) for i, h in enumerate(headers)]

    def fmt(values: Sequence[str]) -> str:
        parts = [v.rjust(w) if i in right else v.ljust(w) for i, (v, w) in enumerate(zip(values, widths, strict=True))]
        return "  ".join(parts).rstrip()

    return [fmt(headers), "  ".join("-" * w for w in widths), *(fmt(r) for r in cells)]


def _one_line(text: str) -> str:
    return " ".join(str(text).split()) if ("\n" in str(text) or "\r" in str(text)) else str(text)


def _no_nan(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, Mapping):
        return {k: _no_nan(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_no_nan(v) for v in value]
    return value


def to_json_text(value: Any) -> str:
    """Indented, valid JSON with a final newline (a NaN or infinity a stored payload might hold becomes null)."""
    return json.dumps(_no_nan(value), indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def _csv_cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)      # shortest text that reads back as the same float
    return str(value)


def csv_row(item: Mapping[str, Any]) -> dict[str, str]:
    """One lot's JSON object (``LotEntry.to_json()``) flattened to the CSV columns."""
    out: dict[str, str] = {}
    for key in LOT_KEYS:
        if key in ("giveaway", "disposition"):
            nested = item.get(key) or {}
            cols = GIVEAWAY_COLUMNS if key == "giveaway" else DISPOSITION_COLUMNS
            for col in cols:
                out[col] = _csv_cell(nested.get(col[len(key) + 1:]))
        else:
            out[key] = _csv_cell(item.get(key))
    return out


def lots_csv(items: Sequence[LotEntry]) -> str:
    """The CSV text of ``lotwarden lots --format csv``: a header row of CSV_COLUMNS, one row per lot."""
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(CSV_COLUMNS), quoting=csv.QUOTE_MINIMAL, lineterminator="\n")
    writer.writeheader()
    for e in items:
        writer.writerow(csv_row(e.to_json()))
    return buf.getvalue()


def disposition_cell(e: LotEntry) -> str:
    """"release by Ann Lee", "open" for a hold/review nobody has disposed of yet, else a dash."""
    if e.disposition is not None:
        return f"{e.disposition.action} by {e.disposition.by}"
    return "open" if e.is_open else DASH


def with_unit(text: str, unit: str) -> str:
    return text if text == DASH or not unit else f"{text} {unit}"


LOT_HEADERS = ("line", "product", "lot", "decided", "verdict", "n", "mean", "target", "p", "giveaway/pack",
               "disposition")
LOT_RIGHT = (5, 6, 7, 8, 9)


def lot_cells(e: LotEntry, zone: str) -> list[str]:
    """The table cells of one lot (LOT_HEADERS)."""
    per_pack = e.giveaway.per_pack if e.giveaway is not None else None
    return [e.line or DASH, e.product or DASH, e.lot, local_time(e.decided_at, zone), e.verdict, str(e.n),
            with_unit(fmt_num(e.mean), e.unit), with_unit(fmt_target(e.target), e.unit), fmt_pvalue(e.p_value),
            with_unit(fmt_signed(per_pack), e.unit), disposition_cell(e)]


def counts_line(items: Sequence[LotEntry]) -> str:
    """"lots: 5  holds: 2  reviews: 1  open: 3" (open = holds and reviews nobody has disposed of yet)."""
    holds = sum(e.verdict == "hold" for e in items)
    reviews = sum(e.verdict == "review" for e in items)
    still_open = sum(e.is_open for e in items)
    return f"lots: {len(items)}  holds: {holds}  reviews: {reviews}  open: {still_open}"
