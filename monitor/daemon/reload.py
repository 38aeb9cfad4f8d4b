"""Reloading config, rules and templates: fingerprints, the seen-twice decision, last-good fallback and rejections.

A reload check stats the config file, the rule files and the operator templates. A changed picture is loaded
only once two checks in a row see it unchanged (an editor may still be writing). A removed rule file is
refused until SIGHUP. A bad config, rule file or template set keeps the last good one in force and raises a
config-rejected alert.
"""

from __future__ import annotations

import hashlib
import logging
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Protocol

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.daemon.components import Components
from monitor.daemon.config import Config, load_config, load_rule_set
from monitor.daemon.rulestore import store_rule_texts
from monitor.errors import LotwardenError
from monitor.rulebook import Rule

log = logging.getLogger("lotwarden.daemon")


@dataclass(frozen=True)
class Fingerprint:
    """What the reload check compares: (name, size, mtime_ns) of the config, every rule file and every
    operator template file."""

    stats: tuple[tuple[str, int, int], ...]
    rule_names: frozenset[str] = field(default_factory=frozenset)
    templates: tuple[tuple[str, int, int], ...] = ()


def _stat_all(paths: list[Path]) -> list[tuple[str, int, int]]:
    out: list[tuple[str, int, int]] = []
    for p in paths:
        try:
            st = p.stat()
        except OSError:   # missing (mid-edit) files are simply absent from the picture
            continue
        out.append((str(p), int(st.st_size), int(st.st_mtime_ns)))
    return out


def _listing(folder: Path | None, suffixes: tuple[str, ...]) -> list[Path]:
    if folder is None:
        return []
    try:
        return sorted(p for p in Path(folder).iterdir() if p.suffix in suffixes and not p.name.startswith("."))
    except OSError:
        return []


def take_fingerprint(config_path: Path, rules_dir: Path, templates_dir: Path | None = None) -> Fingerprint:
    """Stat the config file, the ``*.toml`` files of ``rules_dir`` and the operator templates."""
    rules = _stat_all(_listing(rules_dir, (".toml",)))
    return Fingerprint(tuple(_stat_all([config_path]) + rules), frozenset(Path(n).name for n, _, _ in rules),
                       tuple(_stat_all(_listing(templates_dir, (".txt", ".html")))))


def content_hash(paths: list[Path]) -> str:
    """SHA-256 over the names and bytes of ``paths`` (unreadable files hash their error)."""
    h = hashlib.sha256()
    for p in paths:
        h.update(str(p).encode() + b"\0")
        try:
            h.update(p.read_bytes())
        except OSError as exc:
            h.update(f"<{exc.__class__.__name__}>".encode())
        h.update(b"\0")
    return h.hexdigest()


@dataclass(frozen=True)
class ReloadStep:
    """What one reload check decided: ``action`` is ``"none"`` (nothing changed), ``"wait"`` (changed since
    the last check), ``"refuse-removal"`` (rule files in ``missing`` were removed) or ``"reload"``."""

    action: str
    missing: tuple[str, ...] = ()


def decide_reload(fp: Fingerprint, applied: Fingerprint | None, seen: Fingerprint | None,
                  forced: bool) -> ReloadStep:
    """The seen-twice rule: reload a changed picture once two checks agree on it; ``forced`` (SIGHUP) reloads
    at once and accepts removed rule files."""
    if forced:
        return ReloadStep("reload")
    if fp == applied:
        return ReloadStep("none")
    if fp != seen:   # still changing: wait for one more check with the same picture
        return ReloadStep("wait")
    if applied is not None and not fp.rule_names >= applied.rule_names:
        return ReloadStep("refuse-removal", tuple(sorted(applied.rule_names - fp.rule_names)))
    return ReloadStep("reload")


def kept_rules(old: Sequence[Rule], loaded: Sequence[Rule]) -> list[Rule]:
    """Rules in force whose files are gone and that no loaded rule replaces (same name): they stay."""
    names = {r.name for r in loaded}
    return [r for r in old if r.name not in names and r.source and not Path(r.source).exists()]


def fingerprint_of(config_path: Path, config: Config) -> Fingerprint:
    """The reload check's picture for the config at ``config_path`` (its rules and operator templates)."""
    return take_fingerprint(config_path, config.rules_dir, config.alerts.templates)


def utc_now_iso() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


class ReloadHost(Protocol):
    """What the reload needs of the daemon: the parts in force, building and swapping in the next ones
    (loop thread), and recording what happened."""

    @property
    def components(self) -> Components: ...

    def rebuild(self, config: Config, rules: Sequence[Rule]) -> Components: ...

    def swap(self, parts: Components) -> None: ...

    def store_alert(self, alert: Alert) -> bool: ...

    def audit(self, event: str, **detail: object) -> None: ...

    def event(self, kind: str, details: dict[str, object]) -> None: ...


class Reloader:
    """The reload check and the reload, run on the loop thread: it remembers the picture in force
    (``applied``), the one seen at the last check (``seen``) and when the version in force became good."""

    def __init__(self, config_path: Path, host: ReloadHost, applied: Fingerprint) -> None:
        self.config_path = config_path
        self.host = host
        self.applied: Fingerprint = applied
        self.seen: Fingerprint = applied
        self.good_since = ""          # when the config and rules in force were loaded by a reload
        self.checks = 0               # reload checks done (tests wait on it instead of sleeping)

    def check(self, forced: bool) -> None:
        """One reload check (``forced``: SIGHUP — reload now and accept removed rule files)."""
        parts = self.host.components
        fp = fingerprint_of(self.config_path, parts.config)
        step = decide_reload(fp, self.applied, self.seen, forced)
        if step.action in ("none", "wait"):
            self.seen = fp
        else:
            if step.action == "refuse-removal":
                self._reject(LotwardenError(
                    "rule file removed; keeping its last good version (send SIGHUP to accept a removal)",
                    path=Path(parts.config.rules_dir) / step.missing[0], key="rules_dir"))
            self._reload(fp, forced)
        self.checks += 1

    def _reload(self, fp: Fingerprint, forced: bool) -> None:
        old = self.host.components
        try:
            config = load_config(self.config_path)
            rules = load_rule_set(config)
        except LotwardenError as exc:
            self._reject(exc)
            self.applied = self.seen = fp   # do not re-try the same bad picture every check
            return
        if not forced:   # a rule whose file is gone stays in force until SIGHUP confirms the removal
            rules = rules + kept_rules(old.rules, rules)
        old_fp = self.applied
        new = self.host.rebuild(config, rules)
        self.host.swap(new)
        self.applied = self.seen = fingerprint_of(self.config_path, config)
        if new.dispatcher is not None and new.dispatcher is old.dispatcher \
                and self.applied.templates != old_fp.templates:
            self._reload_templates(new)
        self.good_since = datetime.now(UTC).isoformat()
        self._remember_rules(new)
        self.host.audit("config-reloaded", config_version=config.version, rules={r.name: r.version for r in rules})
        log.info("reloaded: config version %s, %d rules (%s)", config.version, len(rules),
                 ", ".join(f"{r.name}@{r.version}" for r in rules))
        self.host.event("reloaded", {"rules": len(rules)})

    def _remember_rules(self, parts: Components) -> None:
        """Store the texts of the rules now in force; a rule whose values changed is told (rule-changed)."""
        try:
            told = store_rule_texts(parts.core.store, parts.rules, parts.config.alerts.channels, utc_now_iso())
        except Exception:   # the reload itself stands; the texts are stored at the next reload or start
            log.exception("could not store the rule texts")
            return
        for alert in told:
            log.info("rule %s changed: %s", alert.data["rule"], ", ".join(c["key"] for c in alert.data["changes"]))
        if told and parts.dispatcher is not None:   # tell now rather than at the next drain tick
            parts.dispatcher.kick()

    def _reload_templates(self, parts: Components) -> None:
        """New operator templates: checked first; a bad set leaves the one in force (config-rejected)."""
        assert parts.dispatcher is not None
        try:
            parts.dispatcher.reload_templates(parts.config.alerts.templates)
        except LotwardenError as exc:
            self._reject(exc)
            return
        log.info("reloaded operator templates from %s", parts.config.alerts.templates)

    def _reject(self, exc: LotwardenError) -> None:
        """Keep the last good config: log, audit and alert (config-rejected) the bad file."""
        bad = Path(exc.path) if exc.path else self.config_path
        digest = content_hash([bad])
        log.error("config rejected, keeping the last good version: %s", exc)
        self.host.audit("config-rejected", file=str(bad), key=exc.key, message=str(exc), content_sha256=digest)
        # the same bad edit made again after a good version was in force is a new alert
        self.host.store_alert(kinds.config_rejected(file=str(bad), key=exc.key, line=exc.line, message=str(exc),
                                                    content_sha256=digest, in_force_since=str(self.good_since),
                                                    at=utc_now_iso()))
        self.host.event("config-rejected", {"error": str(exc)})
