"""Reading one TOML file (config or rule) with errors that name the file and say what to fix."""

from __future__ import annotations

import hashlib
import tomllib
from pathlib import Path
from typing import Any

from monitor.errors import ConfigError


def read_toml(path: str | Path, *, what: str = "config file",
              error: type[ConfigError] = ConfigError) -> tuple[dict[str, Any], str]:
    """The parsed table and the SHA-256 of the file's bytes; unreadable, non-UTF-8 or bad TOML raises ``error``."""
    table, digest, _text = read_toml_text(path, what=what, error=error)
    return table, digest


def read_toml_text(path: str | Path, *, what: str = "config file",
                   error: type[ConfigError] = ConfigError) -> tuple[dict[str, Any], str, str]:
    """``read_toml`` and the file's text as read (one read of the bytes: hash, table and text agree)."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise error(f"cannot read {what}: {exc.strerror or exc}", path=p) from None
    try:
        text = raw.decode("utf-8-sig")
        table = tomllib.loads(text)
    except UnicodeDecodeError:
        raise error("not UTF-8 text", path=p, hint=f"save the {what} as UTF-8") from None
    except tomllib.TOMLDecodeError as exc:
        raise error(f"TOML syntax error: {exc}", path=p) from None
    return table, hashlib.sha256(raw).hexdigest(), text
