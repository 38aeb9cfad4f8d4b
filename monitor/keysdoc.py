"""Renders README's reference of every config, profile, rule and alert key from their declarations in monitor.keys.

README.md carries the output between ``<!-- keys:begin -->`` and ``<!-- keys:end -->``; a test fails when
the two differ, so a key can't be added without being documented. Refresh with ``python -m monitor.keysdoc``.
"""

from __future__ import annotations

import sys
from pathlib import Path

from monitor.keys import SECTIONS, TYPES, Derived, Key, Required, Section

BEGIN, END = "<!-- keys:begin -->", "<!-- keys:end -->"


def _value(value: object) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (tuple, list)):
        return "[" + ", ".join(f'"{v}"' for v in value) + "]" if value else "[]"
    if isinstance(value, str):
        return f'"{value}"' if value else '""'
    if isinstance(value, dict):
        return "{}"
    return f"{value:g}" if isinstance(value, float) else str(value)


def default_text(key: Key) -> str:
    """The default as the reference shows it: required, — (not set), a derived rule, or the value."""
    d = key.default
    if isinstance(d, Required):
        return "required"
    if isinstance(d, Derived):
        return f"`{d.text}`"
    if d is None:
        return "—"
    if key.type == "table":
        return "`{}`"
    return f"`{_value(d)}`"


def type_text(key: Key) -> str:
    return "path" if key.path else TYPES[key.type]


def section_lines(section: Section) -> list[str]:
    """One section as a Markdown table: key path, type, default, meaning."""
    out = [f"**{section.title}**", "", "| key | type | default | meaning |", "|---|---|---|---|"]
    for key in section.keys:
        doc = key.doc.replace("|", "\\|")
        out.append(f"| `{section.prefix}{key.name}` | {type_text(key)} | {default_text(key)} | {doc} |")
    out.append("")
    return out


def render(sections: tuple[Section, ...] = SECTIONS) -> str:
    """The whole key reference, one table per section."""
    lines: list[str] = []
    for section in sections:
        lines += section_lines(section)
    return "\n".join(lines).rstrip() + "\n"


def splice(readme: str) -> str:
    """``readme`` with the keys section replaced by the current rendering."""
    head, _, rest = readme.partition(BEGIN)
    _, _, tail = rest.partition(END)
    return f"{head}{BEGIN}\n{render()}{END}{tail}"


if __name__ == "__main__":  # pragma: no cover
    path = Path(sys.argv[1] if len(sys.argv) > 1 else "README.md")
    path.write_text(splice(path.read_text(encoding="utf-8")), encoding="utf-8")
