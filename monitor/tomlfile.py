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
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise error(f"cannot read {what}: {exc.strerror or exc}", path=p) from None
    try:
        table = tomllib.loads(raw.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise error("not UTF-8 text", path=p, hint=f"save the {what} as UTF-8") from None
    except tomllib.TOMLDecodeError as exc:
        raise error(f"TOML syntax error: {exc}", path=p) from None
    return table, hashlib.sha256(raw).hexdigest()
