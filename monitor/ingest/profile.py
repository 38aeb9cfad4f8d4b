"""Feed profiles: how one family of export files is laid out, validated from `[profiles.<name>]` tables."""

from __future__ import annotations

import codecs
import fnmatch
import math
from dataclasses import dataclass
from pathlib import PurePath
from typing import Any, Mapping, Sequence

from monitor.errors import ConfigError
from monitor.units import ALLOWED as ALLOWED_UNITS
from monitor.units import canonical_unit

CANONICAL_COLUMNS = ("lot", "value", "timestamp", "product", "line", "head", "unit", "n", "mean", "sd")
DELIMITERS = {",": ",", ";": ";", "\t": "\t", "tab": "\t", "auto": "auto"}
DECIMALS = (".", ",")
FALLBACK_ENCODINGS = ("latin-1", "cp1252")

# One table of every key: (default, one-line doc). Feeds validation, `--help` and the docs.
PROFILE_KEYS: dict[str, tuple[Any, str]] = {
    "match": ((), "file-name glob patterns (fnmatch on the name only) that select this profile"),
    "delimiter": ("auto", 'field separator: "," ";" "\\t" or "auto" (sniffed from the header line)'),
    "decimal": (".", 'decimal mark of numbers: "." or ","'),
    "encoding": ("auto", 'text encoding: "auto" (UTF-8 with/without BOM, UTF-16 by BOM), "latin-1"/"cp1252" '
                         "(used when the file is not UTF-8), or any other Python codec name"),
    "skip_lines": (0, "lines before the header to skip (whole number >= 0)"),
    "header_prefix": ("", "the header is the first line (after skip_lines) starting with this text"),
    "columns": ({}, "table mapping canonical names (" + ", ".join(CANONICAL_COLUMNS) + ") to the export's headers"),
    "unit": (None, (f"unit of the values when the file has no unit column (or a blank unit cell): {ALLOWED_UNITS}; "
                    "default none: values carry no unit, are taken to be in the judging rule's unit, and each lot "
                    "says so")),
    "tare": (0.0, ("subtracted from every value (gross -> net), in `unit` (converted to each row's unit), or as "
                   "it stands when no unit is declared (finite number >= 0)")),
    "density": (None, "product density in g/mL, for converting weighed mass to a volume unit later (> 0)"),
    "drop_values": ((), 'raw values meaning "no measurement" (e.g. ["-9999", "ERR"]): dropped and counted'),
    "max_bad_rows": (0.05, "bad rows tolerated: a whole number, or a fraction in [0, 1) of the data rows"),
    "end_of_lot": (None, 'raw text in the lot column marking the end of a lot (e.g. "END")'),
    "marker_suffix": (None, 'the file is taken only once "<name><suffix>" exists (e.g. ".done")'),
    "timestamp_format": (None, "strptime format of the timestamp column (default: ISO 8601, then inference)"),
}


@dataclass(frozen=True)
class FeedProfile:
    """How to read one family of export files. Build with ``FeedProfile.from_toml`` or use DEFAULT_PROFILE."""

    name: str = "default"
    match: tuple[str, ...] = ()
    delimiter: str = "auto"
    decimal: str = "."
    encoding: str = "auto"
    skip_lines: int = 0
    header_prefix: str = ""
    columns: tuple[tuple[str, str], ...] = ()
    unit: str | None = None  # None: no unit declared (values carry none; see monitor.units.factor_to_rule_unit)
    tare: float = 0.0
    density: float | None = None
    drop_values: tuple[str, ...] = ()
    max_bad_rows: float = 0.05
    end_of_lot: str | None = None
    marker_suffix: str | None = None
    timestamp_format: str | None = None
    source: str | None = None

    def matches(self, filename: str) -> bool:
        """True if one of the ``match`` patterns fits the file name (the last path part only)."""
        name = PurePath(filename).name
        return any(fnmatch.fnmatch(name, p) for p in self.match)

    def column_for(self, canonical: str) -> str:
        """The export's header text for a canonical column name (the name itself when not mapped)."""
        return dict(self.columns).get(canonical, canonical)

    def allowed_bad_rows(self, data_rows: int) -> int:
        """How many bad rows a file with ``data_rows`` data rows may have."""
        if self.max_bad_rows >= 1:
            return int(self.max_bad_rows)
        return int(math.floor(self.max_bad_rows * data_rows + 1e-9))

    @classmethod
    def from_toml(cls, table: Mapping[str, Any], *, source: str, name: str) -> "FeedProfile":
        """Validate a parsed `[profiles.<name>]` table; errors name ``source`` and `profiles.<name>.<key>`."""
        return _parse(table, source, name)


DEFAULT_PROFILE = FeedProfile()


def profile_for(path: str | PurePath, profiles: Sequence[FeedProfile]) -> FeedProfile:
    """The first profile whose ``match`` fits the file name, else DEFAULT_PROFILE."""
    for p in profiles:
        if p.matches(str(path)):
            return p
    return DEFAULT_PROFILE


# ---------------------------------------------------------------------------------------------
def _parse(table: Mapping[str, Any], source: str, name: str) -> FeedProfile:
    prefix = f"profiles.{name}."

    def fail(key: str, message: str, hint: str | None = None) -> ConfigError:
        return ConfigError(message, path=source, key=prefix + key, hint=hint)

    if not isinstance(table, Mapping):
        raise ConfigError("must be a table: [profiles.NAME]", path=source, key=f"profiles.{name}")
    for k in table:
        if k not in PROFILE_KEYS:
            raise fail(str(k), f"unknown key {k!r}", hint="allowed keys: " + ", ".join(sorted(PROFILE_KEYS)))

    def text(key: str, *, empty_ok: bool = False) -> str:
        v = table[key]
        if not isinstance(v, str) or (not empty_ok and v == ""):
            raise fail(key, f"{key} = {v!r} — must be a non-empty string")
        return v

    def text_list(key: str) -> tuple[str, ...]:
        v = table[key]
        if isinstance(v, str):
            v = [v]
        if not isinstance(v, list) or not all(isinstance(x, str) and x != "" for x in v):
            raise fail(key, f"{key} = {v!r} — must be a list of non-empty strings")
        return tuple(v)

    def number(key: str) -> float:
        v = table[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise fail(key, f"{key} = {v!r} — must be a finite number")
        return float(v)

    values: dict[str, Any] = {"name": name, "source": source}
    if "match" in table:
        values["match"] = text_list("match")
    if "delimiter" in table:
        v = table["delimiter"]
        if v not in DELIMITERS:
            raise fail("delimiter", f"delimiter = {v!r} — must be one of ',', ';', '\\t' (or \"tab\"), 'auto'")
        values["delimiter"] = DELIMITERS[v]
    if "decimal" in table:
        v = table["decimal"]
        if v not in DECIMALS:
            raise fail("decimal", f"decimal = {v!r} — must be '.' or ','")
        values["decimal"] = v
    if "encoding" in table:
        values["encoding"] = _encoding(text("encoding"), fail)
    if "skip_lines" in table:
        v = table["skip_lines"]
        if isinstance(v, bool) or not isinstance(v, int) or v < 0:
            raise fail("skip_lines", f"skip_lines = {v!r} — must be a whole number >= 0")
        values["skip_lines"] = v
    if "header_prefix" in table:
        values["header_prefix"] = text("header_prefix")
    if "columns" in table:
        cols = table["columns"]
        if not isinstance(cols, Mapping):
            raise fail("columns", "columns must be a table, e.g. { lot = \"Batch\", value = \"Net wt\" }")
        pairs = []
        for k, v in cols.items():
            if k not in CANONICAL_COLUMNS:
                raise fail(f"columns.{k}", f"unknown column name {k!r}",
                           hint="allowed: " + ", ".join(CANONICAL_COLUMNS))
            if not isinstance(v, str) or not v.strip():
                raise fail(f"columns.{k}", f"columns.{k} = {v!r} — must be the export's header text")
            pairs.append((k, v.strip()))
        seen: dict[str, str] = {}
        for k, v in pairs:
            if v.casefold() in seen:
                raise fail(f"columns.{k}", f"columns.{k} and columns.{seen[v.casefold()]} both name {v!r}",
                           hint="each canonical column needs its own header")
            seen[v.casefold()] = k
        values["columns"] = tuple(pairs)
    if "unit" in table:
        u = canonical_unit(text("unit"))
        if u is None:
            raise fail("unit", f"unit = {table['unit']!r} — must be one of {ALLOWED_UNITS}")
        values["unit"] = u
    if "tare" in table:
        v = number("tare")
        if v < 0:
            raise fail("tare", f"tare = {v:g} — must be >= 0")
        values["tare"] = v
    if "density" in table:
        v = number("density")
        if not v > 0:
            raise fail("density", f"density = {v:g} — must be > 0 (g/mL)")
        values["density"] = v
    if "drop_values" in table:
        values["drop_values"] = tuple(x.strip() for x in text_list("drop_values"))
    if "max_bad_rows" in table:
        v = table["max_bad_rows"]
        ok = not isinstance(v, bool) and ((isinstance(v, int) and v >= 0)
                                          or (isinstance(v, float) and 0 <= v < 1))
        if not ok:
            raise fail("max_bad_rows", f"max_bad_rows = {v!r} — must be a whole number >= 0 "
                                       "or a fraction in [0, 1)")
        values["max_bad_rows"] = float(v)
    if "end_of_lot" in table:
        values["end_of_lot"] = text("end_of_lot").strip() or None
        if values["end_of_lot"] is None:
            raise fail("end_of_lot", "end_of_lot must not be blank")
    if "marker_suffix" in table:
        v = text("marker_suffix")
        if "/" in v or "\\" in v or "\x00" in v:
            raise fail("marker_suffix", f"marker_suffix = {v!r} — must not contain path separators")
        values["marker_suffix"] = v
    if "timestamp_format" in table:
        v = text("timestamp_format")
        if "%" not in v:
            raise fail("timestamp_format", f"timestamp_format = {v!r} — must be a strptime format "
                                           "such as \"%d.%m.%Y %H:%M:%S\"")
        values["timestamp_format"] = v
    if values.get("decimal") == "," and values.get("delimiter") == ",":
        raise fail("decimal", "decimal = ',' needs another delimiter than ','", hint='use delimiter = ";"')
    return FeedProfile(**values)


def _encoding(v: str, fail: Any) -> str:
    low = v.strip().lower()
    if low == "auto":
        return "auto"
    if low in ("latin-1", "latin1", "iso-8859-1", "iso8859-1"):
        return "latin-1"
    if low in ("cp1252", "windows-1252"):
        return "cp1252"
    try:
        info = codecs.lookup(low)
    except LookupError:
        raise fail("encoding", f"encoding = {v!r} — not a known text encoding",
                   hint='use "auto", "latin-1", "cp1252" or a Python codec name such as "utf-16"') from None
    if not getattr(info, "_is_text_encoding", True):
        raise fail("encoding", f"encoding = {v!r} — not a text encoding")
    return info.name
