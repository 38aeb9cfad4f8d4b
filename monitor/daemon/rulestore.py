"""Rule texts kept in the state database: every rule version's text stored once, a changed rule's values told.

A rule version is named by its content hash. Each time a daemon loads its rules (start-up and reload) every
rule's text is stored unless that hash is stored already; when the rule's latest stored version has another
hash and other values, a ``rule-changed`` alert lists the keys whose values differ. "Latest" is the version
loaded last (kept in the database), so going back to an earlier version is told too. A comment-only edit changes
the hash but not the values: its text is stored, nothing is told.
"""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.rulebook import Rule
from monitor.state import outbox, rule_texts
from monitor.state.database import Database

_MISSING: Any = None   # a key absent from one side compares (and is told) as null


def flat_values(values: Mapping[str, Any]) -> dict[str, Any]:
    """``Rule.values()`` with nested tables flattened to dotted keys ("normality.alpha"), in key order."""
    out: dict[str, Any] = {}
    for key, value in values.items():
        if isinstance(value, Mapping):
            for sub, v in value.items():
                out[f"{key}.{sub}"] = v
        else:
            out[key] = value
    return out


def value_changes(old: Mapping[str, Any], new: Mapping[str, Any]) -> list[dict[str, Any]]:
    """One {key, old, new} per key whose value differs, in the new values' key order (keys only in ``old``
    after them, in their own order); nested tables compared by dotted key."""
    a, b = flat_values(old), flat_values(new)
    keys = list(b) + [k for k in a if k not in b]
    return [{"key": k, "old": a.get(k, _MISSING), "new": b.get(k, _MISSING)}
            for k in keys if a.get(k, _MISSING) != b.get(k, _MISSING)]


def _as_stored(values: Mapping[str, Any]) -> dict[str, Any]:
    """The values as they read back from JSON (tuples become lists), in their own key order, so both sides
    of a comparison are alike."""
    loaded: dict[str, Any] = json.loads(json.dumps(dict(values)))
    return loaded


def remember_rules(conn: sqlite3.Connection, rules: Iterable[Rule], at: str) -> list[Alert]:
    """Store each rule's text once (inside the caller's write transaction) and return one ``rule-changed``
    alert per rule whose latest stored version had another hash and other values."""
    alerts: list[Alert] = []
    for rule in rules:
        values = rule.values()
        previous = rule_texts.in_force(conn, rule.name)   # looked up before this version is stored
        rule_texts.remember(conn, rule_texts.RuleText(
            rule_hash=rule.content_hash, rule=rule.name, version=rule.version, source=rule.source or "",
            text=rule.text, values_json=json.dumps(values, sort_keys=True), first_seen_at=at))
        rule_texts.set_in_force(conn, rule.name, rule.content_hash)
        if previous is None or previous.rule_hash == rule.content_hash:
            continue
        changes = value_changes(json.loads(previous.values_json), _as_stored(values))
        if changes:
            alerts.append(kinds.rule_changed(rule=rule.name, file=rule.source or "", old_version=previous.version,
                                             new_version=rule.version, changes=changes, at=at))
    return alerts


def store_rule_texts(store: Database, rules: Sequence[Rule], channels: Sequence[str], at: str) -> list[Alert]:
    """``remember_rules`` in one write transaction on ``store`` with its alerts put in the outbox for
    ``channels`` in the same transaction; returns the alerts (new or not)."""
    with store.write() as conn:
        alerts = remember_rules(conn, rules, at)
        for alert in alerts:
            outbox.enqueue(conn, alert, channels)
    return alerts
