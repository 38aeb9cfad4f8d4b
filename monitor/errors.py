"""The project's error tree; every error an operator can cause is one of these.

    LotwardenError                 base; the CLI turns it into one line on stderr and exit 2
    ├── ConfigError                a config or rule file is wrong (path, key, value, allowed)
    │   └── RuleError              a rule file in particular
    ├── ExportError                an export file cannot be used (path, line, column)
    └── TemplateError              an alert template does not load or render

Subclasses carry their context as attributes; ``str()`` gives the operator's one-line message
"<where>: <what> (got <value>) — <allowed/hint>".
"""

from __future__ import annotations

from pathlib import Path


class LotwardenError(Exception):
    """Base of every error the operator can cause and fix."""

    def __init__(
        self,
        message: str,
        *,
        path: str | Path | None = None,
        line: int | None = None,
        key: str | None = None,
        hint: str | None = None,
    ) -> None:
        self.message = message
        self.path = None if path is None else str(path)
        self.line = line
        self.key = key
        self.hint = hint
        super().__init__(self.__str__())

    def where(self) -> str:
        parts: list[str] = []
        if self.path is not None:
            parts.append(self.path if self.line is None else f"{self.path}:{self.line}")
        if self.key is not None:
            parts.append(self.key)
        return ": ".join(parts)

    def __str__(self) -> str:
        where = self.where()
        text = f"{where}: {self.message}" if where else self.message
        if self.hint:
            text += f" — {self.hint}"
        return text


class ConfigError(LotwardenError):
    """A configuration file (daemon config, feed profile) is malformed or holds a value out of range."""


class RuleError(ConfigError):
    """A rule file is malformed, has an unknown key, or a value outside what is allowed."""


class ExportError(LotwardenError):
    """An export file cannot be read or has no usable rows / too many bad rows."""


class TemplateError(LotwardenError):
    """An alert template has a syntax error or fails to render."""
