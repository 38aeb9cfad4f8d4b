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
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from monitor.errors import ConfigError

SECURITY = ("none", "starttls", "tls")
CHANNELS = ("log", "email", "command")

# One table per section: key -> (default, one-line doc). None as default = required or "not set".
ALERTS_KEYS: dict[str, tuple[Any, str]] = {
    "templates": (None, "folder of operator templates; a file there with a shipped template's name wins"),
    "group_window_seconds": (60.0, "e-mail: alerts to the same recipients within this many seconds go in one message"),
    "group_max": (50, "e-mail: at most this many alerts listed in one message (integer >= 1)"),
    "hourly_cap": (12, "e-mail: at most this many messages per recipient per rolling hour; the rest are folded"
                       " into one summary when a slot frees (integer >= 1)"),
    "reminder_minutes": (240.0, "e-mail: a lot already notified as held is notified again only after this long"),
    "drain_seconds": (5.0, "how often the outbox is drained (seconds, > 0)"),
}
LOG_KEYS: dict[str, tuple[Any, str]] = {
    "path": (None, "JSON-lines file, one Alert.to_json() object per line, fsynced per write (required)"),
    "retry_max_seconds": (60.0, "cap of the retry backoff when the file cannot be written"),
}
EMAIL_KEYS: dict[str, tuple[Any, str]] = {
    "host": (None, "SMTP server host name (required)"),
    "port": (25, "SMTP server port"),
    "security": ("none", 'transport security: "none", "starttls" or "tls" (implicit TLS)'),
    "sender": (None, "From address (required)"),
    "recipients": (None, "default recipient address or list of addresses (required)"),
    "username": (None, "login name; needs password_env or password_file"),
    "password_env": (None, "name of the environment variable holding the login password"),
    "password_file": (None, "file holding the login password (first line; keep it mode 0600)"),
    "ca_file": (None, "PEM file of CA certificates to trust for starttls/tls (default: system store)"),
    "timeout": (20.0, "seconds to wait for the server on connect and each command (> 0)"),
    "retry_first_seconds": (2.0, "first retry delay after a connection error or 4xx reply (> 0)"),
    "retry_max_seconds": (60.0, "cap of the jittered exponential retry delay (> 0)"),
    "route": ((), ("[[alerts.email.route]] tables: lines / products (globs) / kinds select alerts; a route's"
                   " recipients receive them in addition to `recipients` (or instead, with replace_default)")),
}
ROUTE_KEYS: dict[str, tuple[Any, str]] = {
    "lines": (("*",), "line names this route selects (glob patterns allowed)"),
    "products": (("*",), "product codes this route selects (glob patterns allowed)"),
    "kinds": (("*",), ("alert kinds this route selects; a verdict-changed alert is also selected by the kind"
                       " of the verdict it replaces (hold, review)")),
    "recipients": (None, "addresses that receive the selected alerts (required)"),
    "replace_default": (False, ("true: the selected alerts go to this route's recipients instead of the"
                                " default `recipients`; false: in addition to them")),
}
COMMAND_KEYS: dict[str, tuple[Any, str]] = {
    "argv": (None, "program and arguments (list of strings, no shell); the alert JSON arrives on stdin (required)"),
    "timeout": (30.0, "seconds before the command is killed and retried (> 0)"),
    "retry_first_seconds": (2.0, "first retry delay after a timeout or exit code 75 (> 0)"),
    "retry_max_seconds": (60.0, "cap of the retry delay (> 0)"),
}
DIGEST_KEYS: dict[str, tuple[Any, str]] = {
    "cron": ("0 6 * * *", "when the daily digest is sent: five-field crontab (minute hour day month weekday)"),
    "timezone": ("UTC", 'IANA time zone of `cron`, e.g. "Europe/Berlin"'),
    "catch_up_hours": (12.0, "a digest missed while the daemon was down is sent at start if at most this late"),
}
SECTION_KEYS = {"log": LOG_KEYS, "email": EMAIL_KEYS, "command": COMMAND_KEYS, "digest": DIGEST_KEYS}

_ADDRESS = re.compile(r"^[A-Za-z0-9.!#$%&'*+/=?^_`{|}~-]+@[A-Za-z0-9](?:[A-Za-z0-9.-]*[A-Za-z0-9])?$")


@dataclass(frozen=True)
class LogSettings:
    """`[alerts.log]`: the JSON-lines alert log."""

    path: Path
    retry_max_seconds: float = 60.0


@dataclass(frozen=True)
class Route:
    """One `[[alerts.email.route]]`: which alerts go to which extra (or, with replace_default, other) recipients."""

    recipients: tuple[str, ...]
    lines: tuple[str, ...] = ("*",)
    products: tuple[str, ...] = ("*",)
    kinds: tuple[str, ...] = ("*",)
    replace_default: bool = False

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
    timeout: float = 20.0
    retry_first_seconds: float = 2.0
    retry_max_seconds: float = 60.0
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
    timeout: float = 30.0
    retry_first_seconds: float = 2.0
    retry_max_seconds: float = 60.0


@dataclass(frozen=True)
class DigestSettings:
    """`[alerts.digest]`: the daily summary's schedule."""

    cron: str = "0 6 * * *"
    timezone: str = "UTC"
    catch_up_hours: float = 12.0


@dataclass(frozen=True)
class AlertSettings:
    """All configured alert channels and the e-mail pacing knobs."""

    log: LogSettings | None = None
    email: EmailSettings | None = None
    command: CommandSettings | None = None
    digest: DigestSettings | None = None
    templates: Path | None = None
    group_window_seconds: float = 60.0
    group_max: int = 50
    hourly_cap: int = 12
    reminder_minutes: float = 240.0
    drain_seconds: float = 5.0

    @property
    def channels(self) -> tuple[str, ...]:
        """Names of the configured channels, in delivery order."""
        return tuple(name for name in CHANNELS if getattr(self, name) is not None)


def parse_alerts(table: Mapping[str, Any], *, source: str, base_dir: Path) -> AlertSettings:
    """Validate the `[alerts]` table; relative paths are taken relative to ``base_dir``."""
    p = _Parser(source, base_dir)
    if not isinstance(table, Mapping):
        raise ConfigError("[alerts] must be a table", path=source, key="alerts")
    for key, value in table.items():
        if key in SECTION_KEYS:
            if not isinstance(value, Mapping):
                raise ConfigError(f"[alerts.{key}] must be a table", path=source, key=f"alerts.{key}")
        elif key not in ALERTS_KEYS:
            raise ConfigError(f"unknown key or section {key!r}", path=source, key=f"alerts.{key}",
                              hint="allowed: [alerts.log], [alerts.email], [alerts.command], [alerts.digest], "
                                   + ", ".join(ALERTS_KEYS))
    log = email = command = digest = None
    if "log" in table:
        t = table["log"]
        p.unknown(t, LOG_KEYS, "alerts.log")
        log_path = p.path(t, "path", "alerts.log", required=True)
        assert log_path is not None                     # required=True raises instead of returning None
        log = LogSettings(path=log_path,
                          retry_max_seconds=p.positive(t, "retry_max_seconds", "alerts.log", LOG_KEYS))
    if "email" in table:
        email = p.email(table["email"])
    if "command" in table:
        t = table["command"]
        p.unknown(t, COMMAND_KEYS, "alerts.command")
        argv = t.get("argv")
        if (not isinstance(argv, list) or not argv or not all(isinstance(a, str) and a for a in argv)
                or any("\0" in a for a in argv)):
            raise ConfigError(f"argv = {argv!r} — must be a non-empty list of non-empty strings",
                              path=source, key="alerts.command.argv",
                              hint='e.g. argv = ["/usr/local/bin/page-qa", "--line-alert"]; no shell is used')
        command = CommandSettings(argv=tuple(argv),
                                  timeout=p.positive(t, "timeout", "alerts.command", COMMAND_KEYS),
                                  retry_first_seconds=p.positive(t, "retry_first_seconds", "alerts.command",
                                                                 COMMAND_KEYS),
                                  retry_max_seconds=p.positive(t, "retry_max_seconds", "alerts.command",
                                                               COMMAND_KEYS))
    if "digest" in table:
        digest = p.digest(table["digest"])
    tpl = p.path(table, "templates", "alerts", required=False)
    group_max = p.integer(table, "group_max", "alerts", ALERTS_KEYS)
    cap = p.integer(table, "hourly_cap", "alerts", ALERTS_KEYS)
    return AlertSettings(log=log, email=email, command=command, digest=digest, templates=tpl,
                         group_window_seconds=p.non_negative(table, "group_window_seconds", "alerts", ALERTS_KEYS),
                         group_max=group_max, hourly_cap=cap,
                         reminder_minutes=p.non_negative(table, "reminder_minutes", "alerts", ALERTS_KEYS),
                         drain_seconds=p.positive(table, "drain_seconds", "alerts", ALERTS_KEYS))


@dataclass(frozen=True)
class _Parser:
    source: str
    base_dir: Path

    def fail(self, key: str, message: str, hint: str | None = None) -> ConfigError:
        return ConfigError(message, path=self.source, key=key, hint=hint)

    def unknown(self, t: Mapping[str, Any], known: Mapping[str, Any], prefix: str) -> None:
        for k in t:
            if k not in known:
                raise self.fail(f"{prefix}.{k}", f"unknown key {k!r}", hint="allowed: " + ", ".join(known))

    def number(self, t: Mapping[str, Any], key: str, prefix: str, keys: Mapping[str, tuple[Any, str]]) -> float:
        v = t.get(key, keys[key][0])
        if isinstance(v, bool) or not isinstance(v, (int, float)) or v != v or v in (float("inf"), float("-inf")):
            raise self.fail(f"{prefix}.{key}", f"{key} = {v!r} — must be a finite number", hint=keys[key][1])
        return float(v)

    def positive(self, t: Mapping[str, Any], key: str, prefix: str, keys: Mapping[str, tuple[Any, str]]) -> float:
        v = self.number(t, key, prefix, keys)
        if v <= 0:
            raise self.fail(f"{prefix}.{key}", f"{key} = {v:g} — must be > 0", hint=keys[key][1])
        return v

    def non_negative(self, t: Mapping[str, Any], key: str, prefix: str,
                     keys: Mapping[str, tuple[Any, str]]) -> float:
        v = self.number(t, key, prefix, keys)
        if v < 0:
            raise self.fail(f"{prefix}.{key}", f"{key} = {v:g} — must be >= 0", hint=keys[key][1])
        return v

    def integer(self, t: Mapping[str, Any], key: str, prefix: str, keys: Mapping[str, tuple[Any, str]]) -> int:
        v = t.get(key, keys[key][0])
        if isinstance(v, bool) or not isinstance(v, int) or v < 1:
            raise self.fail(f"{prefix}.{key}", f"{key} = {v!r} — must be an integer >= 1", hint=keys[key][1])
        return v

    def string(self, t: Mapping[str, Any], key: str, prefix: str, *, required: bool) -> str | None:
        if key not in t:
            if required:
                raise self.fail(f"{prefix}.{key}", f"missing required key {key!r}")
            return None
        v = t[key]
        if not isinstance(v, str) or not v.strip() or any(ord(c) < 32 or ord(c) == 127 for c in v):
            raise self.fail(f"{prefix}.{key}", f"{key} = {v!r} — must be a non-empty string without control"
                                               " characters")
        return v

    def path(self, t: Mapping[str, Any], key: str, prefix: str, *, required: bool) -> Path | None:
        if key not in t and not required:
            return None
        if not isinstance(t.get(key), str) or not t[key]:
            raise self.fail(f"{prefix}.{key}", f"missing or empty {key!r}", hint="a file or folder path")
        p = Path(t[key])
        return p if p.is_absolute() else self.base_dir / p

    def addresses(self, v: Any, key: str) -> tuple[str, ...]:
        if isinstance(v, str):
            v = [v]
        if not isinstance(v, list) or not v:
            raise self.fail(key, f"{key.rsplit('.', 1)[-1]} = {v!r} — must be an address or a non-empty list")
        for a in v:
            if not isinstance(a, str) or not _ADDRESS.match(a):
                raise self.fail(key, f"{a!r} is not a plain e-mail address",
                                hint="write name@example.com only (no display name, no spaces or line breaks)")
        return tuple(v)

    def email(self, t: Mapping[str, Any]) -> EmailSettings:
        pre = "alerts.email"
        if "password" in t:
            raise self.fail(f"{pre}.password", "a password must never be written in the config file",
                            hint="set password_env = \"NAME\" (an environment variable) or password_file = "
                                 "\"path\" (a file readable only by the daemon's user)")
        self.unknown(t, EMAIL_KEYS, pre)
        host = self.string(t, "host", pre, required=True)
        sender = self.string(t, "sender", pre, required=True)
        self.addresses(sender, f"{pre}.sender")
        if "recipients" not in t:
            raise self.fail(f"{pre}.recipients", "missing required key 'recipients'")
        recipients = self.addresses(t["recipients"], f"{pre}.recipients")
        sec = t.get("security", "none")
        if sec not in SECURITY:
            raise self.fail(f"{pre}.security", f"security = {sec!r} — must be one of 'none', 'starttls', 'tls'")
        port = t.get("port", 465 if sec == "tls" else EMAIL_KEYS["port"][0])
        if isinstance(port, bool) or not isinstance(port, int) or not 1 <= port <= 65535:
            raise self.fail(f"{pre}.port", f"port = {port!r} — must be an integer in [1, 65535]")
        username = self.string(t, "username", pre, required=False)
        penv = self.string(t, "password_env", pre, required=False)
        pfile = self.path(t, "password_file", pre, required=False)
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
        routes_raw = t.get("route", [])
        if not isinstance(routes_raw, list) or not all(isinstance(r, Mapping) for r in routes_raw):
            raise self.fail(f"{pre}.route", "route must be written as [[alerts.email.route]] tables")
        routes = tuple(self.route(r, f"{pre}.route[{i}]") for i, r in enumerate(routes_raw))
        return EmailSettings(
            host=host or "", port=port, security=sec, sender=sender or "", recipients=recipients,
            username=username, password_env=penv, password_file=pfile,
            ca_file=self.path(t, "ca_file", pre, required=False),
            timeout=self.positive(t, "timeout", pre, EMAIL_KEYS),
            retry_first_seconds=self.positive(t, "retry_first_seconds", pre, EMAIL_KEYS),
            retry_max_seconds=self.positive(t, "retry_max_seconds", pre, EMAIL_KEYS), routes=routes)

    def route(self, t: Mapping[str, Any], pre: str) -> Route:
        from monitor.alerts.alert import ALERT_KINDS

        self.unknown(t, ROUTE_KEYS, pre)
        if "recipients" not in t:
            raise self.fail(f"{pre}.recipients", "missing required key 'recipients'")
        sel: dict[str, tuple[str, ...]] = {}
        for key in ("lines", "products", "kinds"):
            v = t.get(key, ["*"])
            if isinstance(v, str):
                v = [v]
            if not isinstance(v, list) or not v or not all(isinstance(x, str) and x for x in v):
                raise self.fail(f"{pre}.{key}", f"{key} = {v!r} — must be a non-empty list of names or globs")
            sel[key] = tuple(v)
        for k in sel["kinds"]:
            if k != "*" and k not in ALERT_KINDS:
                raise self.fail(f"{pre}.kinds", f"unknown alert kind {k!r}", hint="allowed: " + ", ".join(ALERT_KINDS))
        replace = t.get("replace_default", ROUTE_KEYS["replace_default"][0])
        if not isinstance(replace, bool):
            raise self.fail(f"{pre}.replace_default", f"replace_default = {replace!r} — must be true or false",
                            hint=ROUTE_KEYS["replace_default"][1])
        return Route(recipients=self.addresses(t["recipients"], f"{pre}.recipients"), replace_default=replace,
                     **sel)

    def digest(self, t: Mapping[str, Any]) -> DigestSettings:
        from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

        from apscheduler.triggers.cron import CronTrigger

        pre = "alerts.digest"
        self.unknown(t, DIGEST_KEYS, pre)
        tz = t.get("timezone", DIGEST_KEYS["timezone"][0])
        try:
            zone = ZoneInfo(tz)
        except (ZoneInfoNotFoundError, ValueError, TypeError):
            raise self.fail(f"{pre}.timezone", f"timezone = {tz!r} — not a known IANA time zone",
                            hint='e.g. "Europe/Berlin" or "UTC"') from None
        cron = t.get("cron", DIGEST_KEYS["cron"][0])
        try:
            if not isinstance(cron, str):
                raise ValueError("not a string")
            CronTrigger.from_crontab(cron, timezone=zone)
        except ValueError as exc:
            raise self.fail(f"{pre}.cron", f"cron = {cron!r} — {exc}",
                            hint='five fields: minute hour day month weekday, e.g. "0 6 * * *"') from None
        return DigestSettings(cron=cron, timezone=tz,
                              catch_up_hours=self.non_negative(t, "catch_up_hours", pre, DIGEST_KEYS))
