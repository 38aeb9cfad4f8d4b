"""The rule-texts repository: every SQL statement on rule_texts (each rule version's full text, kept once).

A rule version is named by its content hash (the sha256 of its file's bytes); its text and validated values
are stored the first time a daemon loads it and never changed afterwards.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable
from typing import NamedTuple

from monitor.state.database import get_meta, set_meta


class RuleText(NamedTuple):
    """One stored rule version."""

    rule_hash: str
    rule: str
    version: str
    source: str
    text: str
    values_json: str
    first_seen_at: str


_COLUMNS = "rule_hash, rule, version, source, text, values_json, first_seen_at"


def remember(conn: sqlite3.Connection, row: RuleText) -> bool:
    """Store ``row`` unless its hash is stored already; True when it was new (inside a write transaction)."""
    cur = conn.execute(f"INSERT INTO rule_texts({_COLUMNS}) VALUES (?,?,?,?,?,?,?) ON CONFLICT(rule_hash) DO NOTHING",
                       tuple(row))
    return cur.rowcount == 1


def by_hash(conn: sqlite3.Connection, rule_hash: str) -> RuleText | None:
    """The stored version with this content hash, or None."""
    r = conn.execute(f"SELECT {_COLUMNS} FROM rule_texts WHERE rule_hash = ?", (rule_hash,)).fetchone()
    return None if r is None else RuleText(*r)


def by_hashes(conn: sqlite3.Connection, hashes: Iterable[str]) -> dict[str, RuleText]:
    """The stored versions among ``hashes``, by hash."""
    wanted = set(hashes)
    return {r.rule_hash: r for r in all_texts(conn) if r.rule_hash in wanted}


def latest_of(conn: sqlite3.Connection, rule: str) -> RuleText | None:
    """The version of rule ``rule`` stored last, or None."""
    r = conn.execute(f"SELECT {_COLUMNS} FROM rule_texts WHERE rule = ? ORDER BY first_seen_at DESC, rowid DESC"
                     " LIMIT 1", (rule,)).fetchone()
    return None if r is None else RuleText(*r)


def all_texts(conn: sqlite3.Connection) -> list[RuleText]:
    """Every stored rule version, in the order first seen."""
    return [RuleText(*r) for r in conn.execute(f"SELECT {_COLUMNS} FROM rule_texts ORDER BY first_seen_at, rowid")]


def _in_force_key(rule: str) -> str:
    return f"rule_in_force|{rule}"


def in_force(conn: sqlite3.Connection, rule: str) -> RuleText | None:
    """The version of rule ``rule`` a daemon loaded last (``set_in_force``); else the one stored last."""
    rule_hash = get_meta(conn, _in_force_key(rule))
    found = by_hash(conn, rule_hash) if rule_hash is not None else None
    return found if found is not None else latest_of(conn, rule)


def set_in_force(conn: sqlite3.Connection, rule: str, rule_hash: str) -> None:
    """Note that ``rule_hash`` is the version of ``rule`` now loaded (inside a write transaction)."""
    set_meta(conn, _in_force_key(rule), rule_hash)
