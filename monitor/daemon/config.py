"""The daemon config file (`lotwarden.toml`) validated into frozen settings; unknown keys are errors."""

from __future__ import annotations

import fnmatch
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from monitor.alerts.settings import AlertSettings, parse_alerts
from monitor.errors import ConfigError
from monitor.ingest.profile import FeedProfile
from monitor.keys import (
    ALERTS,
    ALERTS_COMMAND,
    ALERTS_DIGEST,
    ALERTS_EMAIL,
    ALERTS_LOG,
    CONFIG,
    DEFAULT_IGNORE,
    DEFAULT_INCLUDE,
    PROFILE,
    STATE,
    WATCH,
    Section,
    read,
)
from monitor.names import is_export_name
from monitor.rulebook import Rule, load_rules
from monitor.tomlfile import read_toml

__all__ = ["CONFIG_KEYS", "DEFAULT_IGNORE", "DEFAULT_INCLUDE", "Config", "StateSettings", "WatchSettings",
           "load_config", "load_rule_set", "parse_config", "parse_profiles"]


def _flat(sections: tuple[tuple[str, Section], ...]) -> dict[str, tuple[Any, str]]:
    out: dict[str, tuple[Any, str]] = {}
    for prefix, section in sections:
        out.update({prefix + k: v for k, v in section.table().items()})
    return out


# Every key of the config file, dotted -> (default, doc), None = required or not set: a flat view of the
# declarations in monitor.keys, for older callers.
CONFIG_KEYS: dict[str, tuple[Any, str]] = _flat((
    ("", CONFIG), ("watch.", WATCH), ("state.", STATE), ("profiles.<name>.", PROFILE), ("alerts.", ALERTS),
    ("alerts.log.", ALERTS_LOG), ("alerts.email.", ALERTS_EMAIL), ("alerts.command.", ALERTS_COMMAND),
    ("alerts.digest.", ALERTS_DIGEST)))


@dataclass(frozen=True)
class WatchSettings:
    """`[watch]`: the drop folder and how finished files are recognised."""

    folder: Path
    settle_seconds: float = WATCH.default("settle_seconds", float)
    polling: bool = WATCH.default("polling", bool)
    poll_interval: float = WATCH.default("poll_interval", float)
    rescan_seconds: float = WATCH.default("rescan_seconds", float)
    include: tuple[str, ...] = WATCH.default("include", tuple)
    ignore: tuple[str, ...] = WATCH.default("ignore", tuple)

    def accepts(self, name: str) -> bool:
        """True if a file called ``name`` (a bare name, not a path) is one to take: an export name
        (:func:`monitor.names.is_export_name`) that no ``ignore`` and some ``include`` pattern matches."""
        if not is_export_name(name):
            return False
        if any(fnmatch.fnmatchcase(name, pat) for pat in self.ignore):
            return False
        return any(fnmatch.fnmatchcase(name, pat) for pat in self.include)


@dataclass(frozen=True)
class StateSettings:
    """`[state]`: the state database folder, the archive and the quarantine."""

    folder: Path
    archive: Path
    quarantine: Path


@dataclass(frozen=True)
class Config:
    """The whole daemon config. ``content_hash`` is the SHA-256 of the file's bytes (audit records)."""

    source: Path
    content_hash: str
    rules_dir: Path
    watch: WatchSettings
    state: StateSettings
    alerts: AlertSettings
    profiles: tuple[FeedProfile, ...] = ()
    timezone: str = "UTC"
    plant: str = ""

    @property
    def version(self) -> str:
        """Short content hash naming this version of the config in audit records."""
        return self.content_hash[:12]


def load_config(path: str | Path) -> Config:
    """Read and validate the config file; any problem raises ConfigError naming the file and key path."""
    p = Path(path)
    table, digest = read_toml(p, what="config file")
    return parse_config(table, source=p, content_hash=digest)


def parse_config(table: Mapping[str, Any], *, source: Path, content_hash: str = "") -> Config:
    """Validate a parsed config table; relative paths are taken relative to ``source``'s folder."""
    src = str(source)
    base = Path(source).resolve().parent
    top = read(CONFIG, table, source=src, base=base)
    watch = WatchSettings(**read(WATCH, top["watch"], source=src, base=base))
    st = read(STATE, top["state"], source=src, base=base)
    state = StateSettings(folder=st["folder"], archive=st["archive"] or st["folder"] / "archive",
                          quarantine=st["quarantine"] or st["folder"] / "quarantine")
    for key, folder in (("archive", state.archive), ("quarantine", state.quarantine)):
        if _same(folder, watch.folder):
            raise ConfigError(f"state.{key} is the drop folder itself", path=src, key=f"state.{key}",
                              hint="use a folder of its own so processed files are not taken again")
    alerts = parse_alerts(top["alerts"], source=src, base_dir=base)
    profiles = parse_profiles(top["profiles"], source=src)
    zone = top["timezone"] or (alerts.digest.timezone if alerts.digest is not None else "UTC")
    return Config(source=Path(source), content_hash=content_hash, rules_dir=top["rules_dir"], watch=watch,
                  state=state, alerts=alerts, profiles=profiles, timezone=zone,
                  plant=top["plant"] or base.name or Path(source).stem)


def parse_profiles(table: Mapping[str, Any], *, source: str) -> tuple[FeedProfile, ...]:
    """The `[profiles.<name>]` tables as the reader's FeedProfile values, in file order (first match wins)."""
    out: list[FeedProfile] = []
    for name, sub in table.items():
        if not isinstance(sub, dict):
            raise ConfigError(f"profiles.{name} must be a table: [profiles.{name}]", path=source,
                              key=f"profiles.{name}")
        out.append(FeedProfile.from_toml(sub, source=source, name=name))
    return tuple(out)


def load_rule_set(config: Config) -> list[Rule]:
    """Every rule in the config's ``rules_dir``; a bad rule file raises RuleError naming file and key."""
    return load_rules(config.rules_dir)


# ---------------------------------------------------------------------------------------------
def _same(a: Path, b: Path) -> bool:
    return Path(a).resolve() == Path(b).resolve()
