"""Renders the reference tables of every config, profile and rule key from the tables that validate them.

README.md carries the output between ``<!-- keys:begin -->`` and ``<!-- keys:end -->``; a test fails when
the two differ, so a key can't be added without being documented. Refresh with ``python -m monitor.keysdoc``.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any, Mapping

BEGIN, END = "<!-- keys:begin -->", "<!-- keys:end -->"


def _default(value: Any) -> str:
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (tuple, list)):
        return "[" + ", ".join(f'"{v}"' for v in value) + "]" if value else "[]"
    if isinstance(value, str):
        return f'"{value}"' if value else '""'
    if isinstance(value, dict):
        return "{}"
    return f"{value:g}" if isinstance(value, float) else str(value)


def _table(title: str, keys: Mapping[str, tuple[Any, str]], prefix: str = "") -> list[str]:
    out = [f"**{title}**", "", "| key | default | meaning |", "|---|---|---|"]
    for key, (default, doc) in keys.items():
        doc = doc.replace("|", "\\|")
        d = _default(default)
        d = d if d == "—" else f"`{d}`"
        out.append(f"| `{prefix}{key}` | {d} | {doc} |")
    return out + [""]


def render() -> str:
    from monitor.alerts.settings import ROUTE_KEYS
    from monitor.daemon.config import CONFIG_KEYS
    from monitor.rulebook import NORMALITY_KEYS, RULE_KEYS

    lines = _table("Daemon config (`config/lotwarden.toml`)", CONFIG_KEYS)
    lines += _table("E-mail routes (`[[alerts.email.route]]`)", ROUTE_KEYS, "alerts.email.route.")
    lines += _table("Rule files (`rules/*.toml`)", RULE_KEYS)
    lines += _table("Rule files, `[normality]` table", NORMALITY_KEYS, "normality.")
    return "\n".join(lines).rstrip() + "\n"


def splice(readme: str) -> str:
    """``readme`` with the keys section replaced by the current rendering."""
    head, _, rest = readme.partition(BEGIN)
    _, _, tail = rest.partition(END)
    return f"{head}{BEGIN}\n{render()}{END}{tail}"


if __name__ == "__main__":  # pragma: no cover
    path = Path(sys.argv[1] if len(sys.argv) > 1 else "README.md")
    path.write_text(splice(path.read_text(encoding="utf-8")), encoding="utf-8")
