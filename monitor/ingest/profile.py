"""Feed profiles: how one family of export files is laid out, validated from `[profiles.<name>]` tables."""

from __future__ import annotations

import fnmatch
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import PurePath
from typing import Any

from monitor.errors import ConfigError
from monitor.keys import CANONICAL_COLUMNS, DELIMITERS, PROFILE, read

__all__ = ["CANONICAL_COLUMNS", "DEFAULT_PROFILE", "DELIMITERS", "FALLBACK_ENCODINGS", "PROFILE_KEYS", "FeedProfile",
           "profile_for"]

FALLBACK_ENCODINGS = ("latin-1", "cp1252")
# Every key of a profile, with its default and doc, is declared in monitor.keys (PROFILE); this is its
# {key: (default, doc)} view for older callers.
PROFILE_KEYS: dict[str, tuple[Any, str]] = PROFILE.table()


@dataclass(frozen=True)
class FeedProfile:
    """How to read one family of export files. Build with ``FeedProfile.from_toml`` or use DEFAULT_PROFILE."""

    name: str = "default"
    match: tuple[str, ...] = PROFILE.default("match", tuple)
    delimiter: str = PROFILE.default("delimiter", str)
    decimal: str = PROFILE.default("decimal", str)
    encoding: str = PROFILE.default("encoding", str)
    skip_lines: int = PROFILE.default("skip_lines", int)
    header_prefix: str = PROFILE.default("header_prefix", str)
    columns: tuple[tuple[str, str], ...] = PROFILE.default("columns", tuple)
    unit: str | None = None  # None: no unit declared (values carry none; see monitor.units.factor_to_rule_unit)
    tare: float = PROFILE.default("tare", float)
    density: float | None = None
    drop_values: tuple[str, ...] = PROFILE.default("drop_values", tuple)
    max_bad_rows: float = PROFILE.default("max_bad_rows", float)
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
        return math.floor(self.max_bad_rows * data_rows + 1e-9)

    @classmethod
    def from_toml(cls, table: Mapping[str, Any], *, source: str, name: str) -> FeedProfile:
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
    values = read(PROFILE, table, source=source, prefix=f"profiles.{name}.")
    if values["decimal"] == "," and values["delimiter"] == ",":
        raise ConfigError("decimal = ',' needs another delimiter than ','", path=source,
                          key=f"profiles.{name}.decimal", hint='use delimiter = ";"')
    return FeedProfile(name=name, source=source, **values)
