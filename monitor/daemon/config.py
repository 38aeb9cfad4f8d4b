"""The daemon config file (`lotwarden.toml`) validated into frozen settings; unknown keys are errors."""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from monitor.alerts.settings import ALERTS_KEYS, SECTION_KEYS, AlertSettings, parse_alerts
from monitor.errors import ConfigError
from monitor.ingest.profile import PROFILE_KEYS, FeedProfile
from monitor.rulebook import Rule, load_rules
from monitor.tomlfile import read_toml

DEFAULT_INCLUDE = ("*.csv", "*.txt", "*.tsv")
DEFAULT_IGNORE = (".*", "*.tmp", "*.part", "~*", "*.swp", "*.reason.txt")

# Every key of the config file: dotted key -> (default, one-line doc). None as default = required
# (or, for optional sections, no default). Feeds validation messages and the documentation test.
CONFIG_KEYS: dict[str, tuple[Any, str]] = {
    "rules_dir": (None, "folder of rule files (*.toml), relative to this config file (required)"),
    "watch.folder": (None, "drop folder the checkweigher writes its exports into (required)"),
    "watch.settle_seconds": (5.0, "a file counts as finished when size and mtime stay unchanged this long (>= 0)"),
    "watch.polling": (False, "true: poll the folder (network shares) instead of native file events"),
    "watch.poll_interval": (2.0, "seconds between looks of the polling observer (> 0)"),
    "watch.rescan_seconds": (60.0, "seconds between full rescans that catch dropped events (> 0)"),
    "watch.include": (DEFAULT_INCLUDE, "file-name patterns taken from the drop folder (list of globs)"),
    "watch.ignore": (DEFAULT_IGNORE, "file-name patterns never taken, checked before include (list of globs)"),
    "state.folder": (None, "folder of the state database lotwarden.db (required; local disk, not a share)"),
    "state.archive": ("<state.folder>/archive", "where processed files move, in dated subfolders YYYY-MM-DD"),
    "state.quarantine": ("<state.folder>/quarantine", "where rejected files move, with <name>.reason.txt"),
    "profiles.<name>": ({}, "a feed profile: how one weigher's exports are read; first matching profile wins"),
}
CONFIG_KEYS.update({f"profiles.<name>.{k}": v for k, v in PROFILE_KEYS.items()})
# The [alerts] keys come from the alert settings' own tables, so this table follows their changes.
CONFIG_KEYS.update({f"alerts.{k}": v for k, v in ALERTS_KEYS.items()})
for _section_name, _keys in SECTION_KEYS.items():
    CONFIG_KEYS.update({f"alerts.{_section_name}.{k}": v for k, v in _keys.items()})

_TOP = ("rules_dir", "watch", "state", "alerts", "profiles")
_WATCH = ("folder", "settle_seconds", "polling", "poll_interval", "rescan_seconds", "include", "ignore")
_STATE = ("folder", "archive", "quarantine")


@dataclass(frozen=True)
class WatchSettings:
    """`[watch]`: the drop folder and how finished files are recognised."""

    folder: Path
    settle_seconds: float = 5.0
    polling: bool = False
    poll_interval: float = 2.0
    rescan_seconds: float = 60.0
    include: tuple[str, ...] = DEFAULT_INCLUDE
    ignore: tuple[str, ...] = DEFAULT_IGNORE

    def accepts(self, name: str) -> bool:
        """True if a file called ``name`` (a bare name, not a path) is one to take."""
        import fnmatch

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
    _unknown(table, _TOP, src, "")
    rules_dir = _path(table, "rules_dir", src, "rules_dir", base, required=True)
    watch_t = _section(table, "watch", src, required=True)
    _unknown(watch_t, _WATCH, src, "watch.")
    watch = WatchSettings(
        folder=_path(watch_t, "folder", src, "watch.folder", base, required=True),
        settle_seconds=_number(watch_t, "settle_seconds", src, 5.0, lo=0.0, lo_open=False),
        polling=_bool(watch_t, "polling", src, False),
        poll_interval=_number(watch_t, "poll_interval", src, 2.0, lo=0.0, lo_open=True),
        rescan_seconds=_number(watch_t, "rescan_seconds", src, 60.0, lo=0.0, lo_open=True),
        include=_patterns(watch_t, "include", src, DEFAULT_INCLUDE),
        ignore=_patterns(watch_t, "ignore", src, DEFAULT_IGNORE),
    )
    state_t = _section(table, "state", src, required=True)
    _unknown(state_t, _STATE, src, "state.")
    folder = _path(state_t, "folder", src, "state.folder", base, required=True)
    state = StateSettings(
        folder=folder,
        archive=_path(state_t, "archive", src, "state.archive", base) or folder / "archive",
        quarantine=_path(state_t, "quarantine", src, "state.quarantine", base) or folder / "quarantine",
    )
    for key in ("archive", "quarantine"):
        if _same(getattr(state, key), watch.folder):
            raise ConfigError(f"state.{key} is the drop folder itself", path=src, key=f"state.{key}",
                              hint="use a folder of its own so processed files are not taken again")
    alerts = parse_alerts(_section(table, "alerts", src), source=src, base_dir=base)
    profiles = parse_profiles(_section(table, "profiles", src), source=src)
    return Config(source=Path(source), content_hash=content_hash, rules_dir=rules_dir, watch=watch, state=state,
                  alerts=alerts, profiles=profiles)


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
def _unknown(table: Mapping[str, Any], known: tuple[str, ...], source: str, prefix: str) -> None:
    for k in table:
        if k not in known:
            raise ConfigError(f"unknown key {k!r}", path=source, key=prefix + k,
                              hint="allowed keys: " + ", ".join(known))


def _section(table: Mapping[str, Any], key: str, source: str, required: bool = False) -> Mapping[str, Any]:
    if key not in table:
        if required:
            raise ConfigError(f"missing section [{key}]", path=source, key=key)
        return {}
    v = table[key]
    if not isinstance(v, dict):
        raise ConfigError(f"{key} must be a table: [{key}]", path=source, key=key)
    return v


def _path(table: Mapping[str, Any], key: str, source: str, keypath: str, base: Path,
          required: bool = False) -> Path | None:
    if key not in table:
        if required:
            raise ConfigError(f"missing required key {key!r}", path=source, key=keypath,
                              hint=CONFIG_KEYS[keypath][1])
        return None
    v = table[key]
    if not isinstance(v, str) or not v.strip() or "\x00" in v:
        raise ConfigError(f"{key} = {v!r} — must be a non-empty path string", path=source, key=keypath)
    p = Path(v).expanduser()
    return Path(os.path.normpath(p if p.is_absolute() else base / p))


def _number(table: Mapping[str, Any], key: str, source: str, default: float, *, lo: float,
            lo_open: bool) -> float:
    if key not in table:
        return default
    v = table[key]
    keypath = f"watch.{key}"
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise ConfigError(f"{key} = {v!r} — must be a finite number", path=source, key=keypath)
    if (v <= lo) if lo_open else (v < lo):
        rel = ">" if lo_open else ">="
        raise ConfigError(f"{key} = {v!r} — must be {rel} {lo:g}", path=source, key=keypath)
    return float(v)


def _bool(table: Mapping[str, Any], key: str, source: str, default: bool) -> bool:
    if key not in table:
        return default
    v = table[key]
    if not isinstance(v, bool):
        raise ConfigError(f"{key} = {v!r} — must be true or false", path=source, key=f"watch.{key}")
    return v


def _patterns(table: Mapping[str, Any], key: str, source: str, default: tuple[str, ...]) -> tuple[str, ...]:
    if key not in table:
        return default
    v = table[key]
    if isinstance(v, str):
        v = [v]
    if not isinstance(v, list) or not all(isinstance(s, str) and s.strip() and "/" not in s for s in v):
        raise ConfigError(f"{key} = {v!r} — must be a list of file-name patterns such as \"*.csv\"",
                          path=source, key=f"watch.{key}", hint="patterns match the bare file name, no '/'")
    return tuple(s.strip() for s in v)


def _same(a: Path, b: Path) -> bool:
    return Path(a).resolve() == Path(b).resolve()
