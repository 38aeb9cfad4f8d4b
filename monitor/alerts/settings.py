"""The `[alerts.*]` sections of the daemon config, validated into frozen settings.

Each channel's section is optional; a config with only `[alerts.log]` is valid.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from monitor.errors import ConfigError

SECURITY = ("none", "starttls", "tls")


@dataclass(frozen=True)
class LogSettings:
    """`[alerts.log]`: the JSON-lines alert log."""

    path: Path


@dataclass(frozen=True)
class EmailSettings:
    """`[alerts.email]`: SMTP delivery."""

    host: str
    port: int
    security: str
    sender: str
    recipients: tuple[str, ...]


@dataclass(frozen=True)
class AlertSettings:
    """All configured alert channels."""

    log: LogSettings | None = None
    email: EmailSettings | None = None

    @property
    def channels(self) -> tuple[str, ...]:
        """Names of the configured channels, in delivery order."""
        return tuple(name for name in ("log", "email") if getattr(self, name) is not None)


def parse_alerts(table: Mapping[str, Any], *, source: str, base_dir: Path) -> AlertSettings:
    """Validate the `[alerts]` table; relative paths are taken relative to ``base_dir``."""
    for key in table:
        if key not in ("log", "email"):
            raise ConfigError(f"unknown section [alerts.{key}]", path=source, key=f"alerts.{key}",
                              hint="allowed: [alerts.log], [alerts.email]")
    log = email = None
    if "log" in table:
        t = table["log"]
        if not isinstance(t.get("path"), str) or not t["path"]:
            raise ConfigError("missing or empty 'path'", path=source, key="alerts.log.path")
        p = Path(t["path"])
        log = LogSettings(path=p if p.is_absolute() else base_dir / p)
    if "email" in table:
        t = table["email"]
        for req in ("host", "sender", "recipients"):
            if req not in t:
                raise ConfigError(f"missing required key {req!r}", path=source, key=f"alerts.email.{req}")
        sec = t.get("security", "none")
        if sec not in SECURITY:
            raise ConfigError(f"security = {sec!r} — must be one of 'none', 'starttls', 'tls'", path=source,
                              key="alerts.email.security")
        rec = t["recipients"]
        if isinstance(rec, str):
            rec = [rec]
        email = EmailSettings(host=str(t["host"]), port=int(t.get("port", 25)), security=sec,
                              sender=str(t["sender"]), recipients=tuple(str(r) for r in rec))
    return AlertSettings(log=log, email=email)
