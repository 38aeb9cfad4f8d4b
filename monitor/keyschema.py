"""The machinery of the key schema: a frozen Key and Section, small checks, and the one reader of a TOML table.

:func:`read` validates a parsed table against a :class:`Section`: unknown keys are errors, required keys must
be there, each value is type-checked and run through its key's check, ``path`` keys get ``~`` expanded and are
taken relative to the config's folder, and absent keys take the declared default. Errors name the file, the
key path, the value seen and what is allowed. The declarations themselves live in :mod:`monitor.keys`.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any, TypeVar

from monitor.errors import ConfigError

T = TypeVar("T")

TYPES = {   # key type -> how the reference names it
    "bool": "true/false", "number": "number", "integer": "whole number", "string": "string",
    "strings": "list of strings", "table": "table", "tables": "array of tables",
    "count or share": "whole number or fraction",   # no type check of its own: the key's check does it all
}


class Invalid(ValueError):
    """Raised by a check: ``text`` says what is allowed ("must be > 0"); ``whole`` = the text is the whole
    message (else it follows "<key> = <value> — "); ``sub`` names a key inside the value (columns.lot)."""

    def __init__(self, text: str, *, hint: str | None = None, sub: str | None = None, whole: bool = False) -> None:
        super().__init__(text)
        self.text, self.hint, self.sub, self.whole = text, hint, sub, whole


@dataclass(frozen=True)
class Required:
    """The default of a key that must be given."""


@dataclass(frozen=True)
class Derived:
    """The default of a key computed from other keys by the section's owner; ``text`` documents it."""

    text: str


REQUIRED = Required()
EMPTY: Mapping[str, Any] = MappingProxyType({})   # the default of an optional table: read-only, shared
Check = Callable[[Any], Any]   # a TOML value (already type-checked) -> the setting's value; raises Invalid


@dataclass(frozen=True)
class Range:
    """A number (or, with ``whole``, a whole number) between bounds; open bounds exclude the limit."""

    lo: float | None = None
    hi: float | None = None
    lo_open: bool = False
    hi_open: bool = False
    whole: bool = False

    @property
    def phrase(self) -> str:
        lead = "a whole number " if self.whole else ""
        if self.hi is None:
            return f"{lead}{'>' if self.lo_open else '>='} {self.lo:g}"
        if self.lo is None:
            return f"{lead}{'<' if self.hi_open else '<='} {self.hi:g}"
        return (f"{lead}in {'(' if self.lo_open else '['}{self.lo:g}, {self.hi:g}"
                f"{')' if self.hi_open else ']'}")

    def __call__(self, v: Any) -> Any:
        ok_lo = self.lo is None or (v > self.lo if self.lo_open else v >= self.lo)
        ok_hi = self.hi is None or (v < self.hi if self.hi_open else v <= self.hi)
        if not (ok_lo and ok_hi):
            raise Invalid(f"must be {self.phrase}")
        return v


@dataclass(frozen=True)
class Text:
    """A string: ``non_empty``, ``solid`` (not only spaces), ``plain`` (no control characters), ``strip``ped
    on return."""

    non_empty: bool = True
    solid: bool = False
    plain: bool = False
    strip: bool = False

    @property
    def phrase(self) -> str:
        return ("a non-empty string" if self.non_empty else "a string") + (
            " without control characters" if self.plain else "")

    def __call__(self, v: str) -> str:
        if ((self.non_empty and v == "") or (self.solid and not v.strip())
                or (self.plain and any(ord(c) < 32 or ord(c) == 127 for c in v))):
            raise Invalid(f"must be {self.phrase}")
        return v.strip() if self.strip else v


@dataclass(frozen=True)
class Texts:
    """A list of non-empty strings (a bare string counts as a list of one unless ``single`` is False);
    ``solid``: no item only spaces; ``strip``: items stripped on return."""

    phrase: str = "a list of non-empty strings"
    at_least_one: bool = False
    solid: bool = False
    strip: bool = False
    forbid: str = ""
    single: bool = True
    hint: str | None = None

    def __call__(self, v: tuple[str, ...]) -> tuple[str, ...]:
        if ((self.at_least_one and not v) or not all(x.strip() if self.solid else x for x in v)
                or any(c in x for x in v for c in self.forbid)):
            raise Invalid(f"must be {self.phrase}", hint=self.hint)
        return tuple(x.strip() for x in v) if self.strip else v


@dataclass(frozen=True)
class OneOf:
    """One of a few words; ``choices`` may be a function (for lists owned by a module loaded late)."""

    choices: tuple[str, ...] | Callable[[], tuple[str, ...]]

    def allowed(self) -> tuple[str, ...]:
        return self.choices if isinstance(self.choices, tuple) else self.choices()

    def __call__(self, v: Any) -> str:
        allowed = self.allowed()
        if v not in allowed:
            raise Invalid("must be one of " + ", ".join(repr(a) for a in allowed))
        return str(v)


@dataclass(frozen=True)
class Key:
    """One key of a TOML table: its ``type`` (see TYPES), ``default`` (REQUIRED, Derived, None = not set,
    or the setting's value), ``check``, one-line ``doc``, and ``path`` (a file or folder: ``~`` expanded,
    relative to the config's folder)."""

    name: str
    type: str
    default: object
    check: Check | None
    doc: str
    path: bool = False

    def __post_init__(self) -> None:
        if self.type not in TYPES:
            raise ValueError(f"key {self.name!r}: unknown type {self.type!r}")
        if not self.doc.strip() or "\n" in self.doc:
            raise ValueError(f"key {self.name!r} needs a one-line doc")
        if self.path and self.type != "string":
            raise ValueError(f"key {self.name!r}: a path key is a string")


@dataclass(frozen=True)
class Section:
    """One TOML table's keys; ``where`` names it in the reference and in key paths (``watch``, ``rule``)."""

    where: str
    title: str
    keys: tuple[Key, ...]
    prefix: str = ""

    def __getitem__(self, name: str) -> Key:
        for k in self.keys:
            if k.name == name:
                return k
        raise KeyError(name)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(k.name for k in self.keys)

    def default(self, name: str, kind: type[T]) -> T:
        """The declared default of ``name``, typed for a dataclass field."""
        value = self[name].default
        if not isinstance(value, kind):
            raise TypeError(f"{self.where}.{name}: default {value!r} is not a {kind.__name__}")
        return value

    def table(self) -> dict[str, tuple[Any, str]]:
        """``{name: (default, doc)}``: the shape of the older per-module key tables (None = required)."""
        return {k.name: (shown_default(k), k.doc) for k in self.keys}


def shown_default(key: Key) -> object:
    """The default as the reference shows it: None for required or unset, the rule's text for derived."""
    d = key.default
    if isinstance(d, Required):
        return None
    if isinstance(d, Derived):
        return d.text
    return d


def read(section: Section, table: object, *, source: str, prefix: str | None = None, base: Path | None = None,
         error: type[ConfigError] = ConfigError) -> dict[str, Any]:
    """Validate ``table`` against ``section``; every key's value (given, or its default; Derived -> None).

    ``prefix`` starts each key path in errors (default: the section's own); ``base`` is the folder relative
    paths are taken from (default: the working folder).
    """
    pre = section.prefix if prefix is None else prefix
    if not isinstance(table, Mapping):
        where = pre.rstrip(".") or section.where
        raise error(f"{where} must be a table: [{where}]", path=source, key=where)
    for k in table:
        if k not in section.names:
            raise error(f"unknown key {k!r}", path=source, key=f"{pre}{k}",
                        hint="allowed keys: " + ", ".join(section.names))
    out: dict[str, Any] = {}
    for key in section.keys:
        if key.name not in table:
            if isinstance(key.default, Required):
                if key.type == "table":
                    raise error(f"missing section [{pre}{key.name}]", path=source, key=f"{pre}{key.name}")
                raise error(f"missing required key {key.name!r}", path=source, key=f"{pre}{key.name}",
                            hint=key.doc)
            out[key.name] = None if isinstance(key.default, Derived) else key.default
            continue
        value = table[key.name]
        where = f"{pre}{key.name}"
        if key.type == "table" and not isinstance(value, Mapping):
            raise error(f"{where} must be a table: [{where}]", path=source, key=where)
        if key.type == "tables" and not (isinstance(value, list) and all(isinstance(x, Mapping) for x in value)):
            raise error(f"{key.name} must be written as [[{where}]] tables", path=source, key=where)
        try:
            out[key.name] = convert(key, value, base)
        except Invalid as exc:
            name = key.name if exc.sub is None else f"{key.name}.{exc.sub}"
            text = exc.text if exc.whole else f"{key.name} = {value!r} — {exc.text}"
            raise error(text, path=source, key=f"{pre}{name}", hint=exc.hint) from None
    return out


def convert(key: Key, v: Any, base: Path | None = None) -> Any:
    """One TOML value as ``key``'s setting (type, then path handling, then the check); raises Invalid."""
    t, check = key.type, key.check
    if t == "bool":
        if not isinstance(v, bool):
            raise Invalid("must be true or false")
    elif t == "number":
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise Invalid("must be a finite number")
        v = float(v)
    elif t == "integer":
        if isinstance(v, bool) or not isinstance(v, int):
            raise Invalid("must be " + (check.phrase if isinstance(check, Range) else "a whole number"))
    elif t == "string":
        if not isinstance(v, str):
            if isinstance(check, OneOf):
                check(v)
            raise Invalid("must be " + ("a non-empty path string" if key.path else
                                        check.phrase if isinstance(check, Text) else "a string"))
        if key.path:
            if not v.strip() or "\x00" in v:
                raise Invalid("must be a non-empty path string")
            return _path(v, base)
    elif t == "strings":
        single = not isinstance(check, Texts) or check.single
        if isinstance(v, str) and single:
            v = [v]
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            raise Invalid("must be " + (check.phrase if isinstance(check, Texts) else "a list of strings"),
                          hint=check.hint if isinstance(check, Texts) else None)
        v = tuple(v)
    return check(v) if check is not None else v


def _path(v: str, base: Path | None) -> Path:
    p = Path(v).expanduser()
    if not p.is_absolute() and base is not None:
        p = base / p
    return Path(os.path.normpath(p))
