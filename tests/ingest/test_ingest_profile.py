"""Feed profiles: validation of `[profiles.<name>]` tables and choosing a profile for a file."""

from __future__ import annotations

import dataclasses
import tomllib

import pytest

from monitor.errors import ConfigError
from monitor.ingest import DEFAULT_PROFILE, PROFILE_KEYS, FeedProfile, profile_for

HALL2 = """
[profiles.hall2]
match = ["hall2_*.csv", "H2-*.txt"]
delimiter = ";"
decimal = ","
encoding = "cp1252"
skip_lines = 3
columns = { lot = "Batch", value = "Net wt", product = "Article" }
unit = "KG"
tare = 0.012
density = 1.04
drop_values = ["-9999", "ERR"]
max_bad_rows = 3
end_of_lot = "END"
marker_suffix = ".done"
timestamp_format = "%d.%m.%Y %H:%M:%S"
"""


def parse(text: str, name: str = "hall2") -> FeedProfile:
    return FeedProfile.from_toml(tomllib.loads(text)["profiles"][name], source="config/lotwarden.toml", name=name)


def test_full_table_parses_into_frozen_profile() -> None:
    """Every documented key is read; the profile is frozen."""
    p = parse(HALL2)
    assert p.match == ("hall2_*.csv", "H2-*.txt")
    assert (p.delimiter, p.decimal, p.encoding, p.skip_lines) == (";", ",", "cp1252", 3)
    assert p.column_for("lot") == "Batch" and p.column_for("value") == "Net wt" and p.column_for("head") == "head"
    assert p.unit == "kg" and p.tare == 0.012 and p.density == 1.04
    assert p.drop_values == ("-9999", "ERR") and p.max_bad_rows == 3
    assert (p.end_of_lot, p.marker_suffix, p.timestamp_format) == ("END", ".done", "%d.%m.%Y %H:%M:%S")
    assert p.name == "hall2" and p.source == "config/lotwarden.toml"
    with pytest.raises(dataclasses.FrozenInstanceError):
        p.tare = 1.0  # type: ignore[misc]


def test_every_key_is_documented_and_every_field_has_a_key() -> None:
    """PROFILE_KEYS documents each key with a one-line doc; each profile setting is a key."""
    fields = {f.name for f in dataclasses.fields(FeedProfile)} - {"name", "source"}
    assert fields == set(PROFILE_KEYS)
    for key, (_default, doc) in PROFILE_KEYS.items():
        assert isinstance(doc, str) and doc and "\n" not in doc, key


def test_defaults_match_the_documented_table() -> None:
    """An empty table gives the defaults that PROFILE_KEYS documents."""
    p = FeedProfile.from_toml({}, source="c.toml", name="plain")
    for key, (default, _doc) in PROFILE_KEYS.items():
        got = getattr(p, key)
        assert got == (tuple(default.items()) if isinstance(default, dict) else default), key


@pytest.mark.parametrize("key, value, fragment", [
    ("colour", "red", "unknown key 'colour'"),
    ("delimiter", "|", "must be one of"),
    ("decimal", ";", "must be '.' or ','"),
    ("encoding", "klingon-8", "not a known text encoding"),
    ("skip_lines", -1, "whole number >= 0"),
    ("skip_lines", 1.5, "whole number >= 0"),
    ("unit", "lbs", "must be one of"),
    ("tare", -0.5, "must be >= 0"),
    ("tare", "12", "finite number"),
    ("density", 0, "must be > 0"),
    ("drop_values", [1, 2], "list of non-empty strings"),
    ("max_bad_rows", 1.5, "fraction in [0, 1)"),
    ("max_bad_rows", -2, "whole number >= 0"),
    ("max_bad_rows", True, "whole number >= 0"),
    ("match", [""], "list of non-empty strings"),
    ("marker_suffix", "../x", "path separators"),
    ("timestamp_format", "dd.mm.yyyy", "strptime format"),
    ("columns", {"weight": "Net wt"}, "unknown column name 'weight'"),
    ("columns", {"lot": ""}, "header text"),
    ("columns", "lot=Batch", "must be a table"),
    ("columns", {"lot": "Batch", "value": "batch"}, "both name 'batch'"),
])
def test_bad_values_name_source_key_path_and_what_is_allowed(key: str, value: object, fragment: str) -> None:
    """A wrong key or value raises ConfigError naming the file, `profiles.<name>.<key>` and what is allowed."""
    with pytest.raises(ConfigError) as info:
        FeedProfile.from_toml({key: value}, source="config/lotwarden.toml", name="hall2")
    err = info.value
    assert err.path == "config/lotwarden.toml"
    assert err.key is not None and err.key.startswith(f"profiles.hall2.{key}")
    assert fragment in str(err)


def test_tab_can_be_written_as_word_or_escape() -> None:
    """delimiter = "\\t" and delimiter = "tab" both mean a tab."""
    assert parse('[profiles.t]\ndelimiter = "\\t"', "t").delimiter == "\t"
    assert parse('[profiles.t]\ndelimiter = "tab"', "t").delimiter == "\t"


def test_max_bad_rows_fraction_and_count() -> None:
    """A fraction allows floor(fraction x data rows); a whole number allows that many."""
    frac = FeedProfile(max_bad_rows=0.05)
    assert frac.allowed_bad_rows(40) == 2      # 40 x 0.05 = 2 exactly (arithmetic)
    assert frac.allowed_bad_rows(39) == 1      # 1.95 rounds down
    assert FeedProfile(max_bad_rows=7).allowed_bad_rows(3) == 7


def test_profile_for_matches_the_file_name_only_first_wins() -> None:
    """Patterns fit the file name, never the folder; the first matching profile wins; else the default."""
    a = FeedProfile(name="a", match=("hall2_*.csv",))
    b = FeedProfile(name="b", match=("*.csv",))
    assert profile_for("/drop/hall2_0101.csv", [a, b]) is a
    assert profile_for("/drop/hall2_x/line1.csv", [a, b]) is b
    assert profile_for("/hall2_dir/export.txt", [a, b]) is DEFAULT_PROFILE
    assert profile_for("x.csv", [b, a]) is b


def test_decimal_comma_with_comma_delimiter_is_refused() -> None:
    """decimal = "," with delimiter = "," cannot be read unambiguously."""
    with pytest.raises(ConfigError, match="another delimiter"):
        FeedProfile.from_toml({"decimal": ",", "delimiter": ","}, source="c.toml", name="x")
