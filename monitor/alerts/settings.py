"""The `[alerts.*]` sections of the daemon config, validated into frozen settings.

Each channel's section is optional; a config with only `[alerts.log]` is valid. Every key is listed
with its default and a one-line doc in the ``*_KEYS`` tables below (they feed validation and the docs).
Unknown keys are errors. A password never sits in the config: ``password_env`` names an environment
variable, ``password_file`` a file; the secret is read only when a connection is opened.
"""

from __future__ import annotations

import fnmatch
import logging
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from monitor.errors import ConfigError
from monitor.keys import (
    ALERTS,
    ALERTS_COMMAND,
    ALERTS_DIGEST,
    ALERTS_EMAIL,
    ALERTS_EMAIL_ROUTE,
    ALERTS_LOG,
    Invalid,
    Section,
    convert,
    read,
)

SECURITY = ("none", "starttls", "tls")
CHANNELS = ("log", "email", "command")

# Every key of the [alerts.*] sections is declared in monitor.keys; these are the {key: (default, doc)}
# views for older callers (ALERTS_KEYS without the channel sections, which SECTION_KEYS lists).
SECTION_KEYS: dict[str, dict[str, tuple[Any, str]]] = {
    "log": ALERTS_LOG.table(), "email": ALERTS_EMAIL.table(), "command": ALERTS_COMMAND.table(),
    "digest": ALERTS_DIGEST.table()}
ALERTS_KEYS: dict[str, tuple[Any, str]] = {k: v for k, v in ALERTS.table().items() if k not in SECTION_KEYS}
LOG_KEYS, EMAIL_KEYS = SECTION_KEYS["log"], SECTION_KEYS["email"]
COMMAND_KEYS, DIGEST_KEYS = SECTION_KEYS["command"], SECTION_KEYS["digest"]
ROUTE_KEYS: dict[str, tuple[Any, str]] = ALERTS_EMAIL_ROUTE.table()


@dataclass(frozen=True)
class LogSettings:
    """`[alerts.log]`: the JSON-lines alert log."""

    path: Path
    retry_max_seconds: float = ALERTS_LOG.default("retry_max_seconds", float)


@dataclass(frozen=True)
class Route:
    """One `[[alerts.email.route]]`: which alerts go to which extra (or, with replace_default, other) recipients."""

    recipients: tuple[str, ...]
    lines: tuple[str, ...] = ALERTS_EMAIL_ROUTE.default("lines", tuple)
    products: tuple[str, ...] = ALERTS_EMAIL_ROUTE.default("products", tuple)
    kinds: tuple[str, ...] = ALERTS_EMAIL_ROUTE.default("kinds", tuple)
    replace_default: bool = ALERTS_EMAIL_ROUTE.default("replace_default", bool)

    def selects(self, kind: str, line: str, product: str, previous: str | None = None) -> bool:
        """True when the alert's kind (or, for verdict-changed, the replaced verdict ``previous``), line and
        product all match this route."""
        kinds = (kind,) if previous is None else (kind, previous)
        return (any(fnmatch.fnmatchcase(k, pat) for k in kinds for pat in self.kinds)
                and any(fnmatch.fnmatchcase(line, p) for p in self.lines)
                and any(fnmatch.fnmatchcase(product, p) for p in self.products))


@dataclass(frozen=True)
class EmailSettings:
    """`[alerts.email]`: SMTP delivery. Holds where the password is, never the password."""

    host: str
    port: int
    security: str
    sender: str
    recipients: tuple[str, ...]
    username: str | None = None
    password_env: str | None = None
    password_file: Path | None = None
    ca_file: Path | None = None
    timeout: float = ALERTS_EMAIL.default("timeout", float)
    deadline_seconds: float = ALERTS_EMAIL.default("deadline_seconds", float)
    retry_first_seconds: float = ALERTS_EMAIL.default("retry_first_seconds", float)
    retry_max_seconds: float = ALERTS_EMAIL.default("retry_max_seconds", float)
    routes: tuple[Route, ...] = ()

    def recipients_for(self, kind: str, line: str, product: str, previous: str | None = None) -> tuple[str, ...]:
        """Recipients of one alert: the default list plus every matching route's; a matching route with
        ``replace_default`` drops the default list. ``previous`` is the replaced verdict of a verdict-changed
        alert (routes for that verdict's kind select it too)."""
        found: set[str] = set()
        keep_default = True
        for route in self.routes:
            if route.selects(kind, line, product, previous):
                found.update(route.recipients)
                keep_default = keep_default and not route.replace_default
        if keep_default:
            found.update(self.recipients)
        return tuple(sorted(found))

    def read_password(self) -> str | None:
        """The login password from the environment or the password file (raises ConfigError if missing)."""
        if self.password_env is not None:
            value = os.environ.get(self.password_env)
            if value is None:
                raise ConfigError(f"environment variable {self.password_env} is not set",
                                  key="alerts.email.password_env", hint="export it before starting the daemon")
            return value
        if self.password_file is not None:
            try:
                if self.password_file.stat().st_mode & 0o077:
                    logging.getLogger("monitor.alerts").warning(
                        "%s: password file is readable by group or others; chmod 600 it", self.password_file)
                text = self.password_file.read_text(encoding="utf-8")
            except OSError as exc:
                raise ConfigError(f"cannot read password file: {exc.strerror or type(exc).__name__}",
                                  path=self.password_file, key="alerts.email.password_file") from None
            return text.splitlines()[0] if text else ""
        return None


@dataclass(frozen=True)
class CommandSettings:
    """`[alerts.command]`: a program run once per alert with the alert JSON on stdin."""

    argv: tuple[str, ...]
    timeout: float = ALERTS_COMMAND.default("timeout", float)
    retry_first_seconds: float = ALERTS_COMMAND.default("retry_first_seconds", float)
    retry_max_seconds: float = ALERTS_COMMAND.default("retry_max_seconds", float)


@dataclass(frozen=True)
class DigestSettings:
    """`[alerts.digest]`: the daily summary's schedule."""

    cron: str = ALERTS_DIGEST.default("cron", str)
    timezone: str = ALERTS_DIGEST.default("timezone", str)
    catch_up_hours: float = ALERTS_DIGEST.default("catch_up_hours", float)


@dataclass(frozen=True)
class AlertSettings:
    """All configured alert channels and the e-mail pacing knobs."""

    log: LogSettings | None = None
    email: EmailSettings | None = None
    command: CommandSettings | None = None
    digest: DigestSettings | None = None
    templates: Path | None = None
    group_window_seconds: float = ALERTS.default("group_window_seconds", float)
    group_max: int = ALERTS.default("group_max", int)
    hourly_cap: int = ALERTS.default("hourly_cap", int)
    reminder_minutes: float = ALERTS.default("reminder_minutes", float)
    drain_seconds: float = ALERTS.default("drain_seconds", float)

    @property
    def channels(self) -> tuple[str, ...]:
        """Names of the configured channels, in delivery order."""
        return tuple(name for name in CHANNELS if getattr(self, name) is not None)


def parse_alerts(table: Mapping[str, Any], *, source: str, base_dir: Path) -> AlertSettings:
    """Validate the `[alerts]` table; relative paths are taken relative to ``base_dir``."""
    p = _Parser(source, base_dir)
    top = p.read(ALERTS, table)
    log = email = command = digest = None
    if top["log"] is not None:
        log = LogSettings(**p.read(ALERTS_LOG, top["log"]))
    if top["email"] is not None:
        email = p.email(top["email"])
    if top["command"] is not None:
        command = CommandSettings(**p.read(ALERTS_COMMAND, top["command"]))
    if top["digest"] is not None:
        digest = p.digest(top["digest"])
    return AlertSettings(log=log, email=email, command=command, digest=digest, **{
        k: v for k, v in top.items() if k not in ("log", "email", "command", "digest")})


@dataclass(frozen=True)
class _Parser:
    source: str
    base_dir: Path

    def fail(self, key: str, message: str, hint: str | None = None) -> ConfigError:
        return ConfigError(message, path=self.source, key=key, hint=hint)

    def read(self, section: Section, table: object, prefix: str | None = None) -> dict[str, Any]:
        return read(section, table, source=self.source, prefix=prefix, base=self.base_dir)

    def email(self, t: Mapping[str, Any]) -> EmailSettings:
        pre = "alerts.email"
        if "password" in t:
            raise self.fail(f"{pre}.password", "a password must never be written in the config file",
                            hint="set password_env = \"NAME\" (an environment variable) or password_file = "
                                 "\"path\" (a file readable only by the daemon's user)")
        v = self.read(ALERTS_EMAIL, t)
        try:
            convert(ALERTS_EMAIL["recipients"], v["sender"])      # the sender is one plain address too
        except Invalid as exc:
            raise self.fail(f"{pre}.sender", exc.text, hint=exc.hint) from None
        if "port" not in t and v["security"] == "tls":
            v["port"] = 465
        username, penv, pfile = v["username"], v["password_env"], v["password_file"]
        if penv is not None and pfile is not None:
            raise self.fail(f"{pre}.password_env", "password_env and password_file are both set",
                            hint="keep one of them")
        if (penv is not None or pfile is not None) and username is None:
            raise self.fail(f"{pre}.username", "a password source is set but no username",
                            hint="add username = \"...\" or remove password_env / password_file")
        if username is not None and penv is None and pfile is None:
            raise self.fail(f"{pre}.username", "username is set but no password source",
                            hint="add password_env = \"NAME\" or password_file = \"path\"")
        if penv is not None and not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", penv):
            raise self.fail(f"{pre}.password_env", f"password_env = {penv!r} — must be an environment variable"
                                                   " name (letters, digits, underscore)")
        routes = tuple(self.route(r, f"{pre}.route[{i}].") for i, r in enumerate(v.pop("route")))
        return EmailSettings(routes=routes, **v)

    def route(self, t: Mapping[str, Any], pre: str) -> Route:
        from monitor.alerts.alert import ALERT_KINDS

        v = self.read(ALERTS_EMAIL_ROUTE, t, prefix=pre)
        for k in v["kinds"]:
            if k != "*" and k not in ALERT_KINDS:
                raise self.fail(f"{pre}kinds", f"unknown alert kind {k!r}", hint="allowed: " + ", ".join(ALERT_KINDS))
        return Route(**v)

    def digest(self, t: Mapping[str, Any]) -> DigestSettings:
        from zoneinfo import ZoneInfo

        from apscheduler.triggers.cron import CronTrigger

        v = self.read(ALERTS_DIGEST, t)
        try:
            CronTrigger.from_crontab(v["cron"], timezone=ZoneInfo(v["timezone"]))
        except ValueError as exc:
            raise self.fail("alerts.digest.cron", f"cron = {v['cron']!r} — {exc}",
                            hint='five fields: minute hour day month weekday, e.g. "0 6 * * *"') from None
        return DigestSettings(**v)
