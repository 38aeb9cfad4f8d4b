"""Reloading config, rules and templates: fingerprints, the seen-twice decision, last-good fallback and rejections.

A reload check stats the config file, the rule files and the operator templates. A changed picture is loaded
only once two checks in a row see it unchanged (an editor may still be writing). A removed rule file is
refused until SIGHUP. A bad config, rule file or template set keeps the last good one in force and raises a
config-rejected alert.
"""

from __future__ import annotations

import hashlib
import logging
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

from monitor.errors import LotwardenError

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


def kept_rules(old: list[Any], loaded: list[Any]) -> list[Any]:
    """Rules in force whose files are gone and that no loaded rule replaces (same name): they stay."""
    names = {r.name for r in loaded}
    return [r for r in old if r.name not in names and getattr(r, "source", None)
            and not Path(r.source).exists()]


class Reloading:
    """Mixin for the daemon: the reload check and reload on the loop thread.

    The host class provides ``config_path``, ``_config``, ``_rules``, ``_intake``, ``_dispatcher``,
    ``_scheduler``, ``_dispatch_jobs``, ``_applied_fp``, ``_seen_fp`` and the methods ``_load_rules``,
    ``_apply_watch``, ``_make_dispatcher``, ``_schedule_dispatcher``, ``_audit``, ``_emit_alert``, ``_event``.
    """

    config_path: Path
    _config: Any
    _rules: list[Any]
    _intake: Any
    _dispatcher: Any
    _scheduler: Any
    _dispatch_jobs: list[str]
    _applied_fp: Fingerprint | None
    _seen_fp: Fingerprint | None
    _load_rules: Callable[[Any], list[Any]]
    _apply_watch: Callable[[Any], None]
    _make_dispatcher: Callable[[Any], Any]
    _schedule_dispatcher: Callable[[], None]
    _audit: Callable[..., None]
    _emit_alert: Callable[[str, str, dict[str, Any]], bool]
    _event: Callable[[str, dict[str, Any]], None]
    _good_since: str = ""          # when the config and rules in force were loaded (start or last reload)

    def _fingerprint(self, config: Any) -> Fingerprint:
        return take_fingerprint(self.config_path, config.rules_dir, getattr(config.alerts, "templates", None))

    def _check_reload(self, forced: bool) -> None:
        fp = self._fingerprint(self._config)
        step = decide_reload(fp, self._applied_fp, self._seen_fp, forced)
        if step.action in ("none", "wait"):
            self._seen_fp = fp
            return
        if step.action == "refuse-removal":
            self._reject(LotwardenError(
                "rule file removed; keeping its last good version (send SIGHUP to accept a removal)",
                path=Path(self._config.rules_dir) / step.missing[0], key="rules_dir"), fp)
        self._reload(fp, forced)

    def _reload(self, fp: Fingerprint, forced: bool = False) -> None:
        from monitor.daemon.config import load_config

        try:
            config = load_config(self.config_path)
            rules = self._load_rules(config)
        except LotwardenError as exc:
            self._reject(exc, fp)
            self._applied_fp = self._seen_fp = fp   # do not re-try the same bad picture every check
            return
        if not forced:   # a rule whose file is gone stays in force until SIGHUP confirms the removal
            rules = rules + kept_rules(self._rules, rules)
        old, old_fp = self._config, self._applied_fp
        self._config, self._rules = config, rules
        self._applied_fp = self._seen_fp = self._fingerprint(config)
        self._intake.set_rules(rules)
        if hasattr(self._intake, "set_config"):
            self._intake.set_config(config)
        if config.watch != old.watch or config.profiles != old.profiles:
            self._apply_watch(config)
        if config.alerts != old.alerts and self._scheduler is not None:
            for job_id in self._dispatch_jobs:
                try:
                    self._scheduler.remove_job(job_id)
                except Exception:
                    pass
            if self._dispatcher is not None:
                self._dispatcher.close()
            self._dispatcher = self._make_dispatcher(config)   # it checks the templates itself
            self._schedule_dispatcher()
        elif old_fp is not None and self._applied_fp.templates != old_fp.templates:
            self._reload_templates(config)
        self._good_since = datetime.now(timezone.utc).isoformat()
        self._audit("config-reloaded", config_version=getattr(config, "version", ""),
                    rules={r.name: r.version for r in rules})
        log.info("reloaded: config version %s, %d rules (%s)", getattr(config, "version", "?"), len(rules),
                 ", ".join(f"{r.name}@{r.version}" for r in rules))
        self._event("reloaded", {"rules": len(rules)})

    def _reload_templates(self, config: Any) -> None:
        """New operator templates: checked first; a bad set leaves the one in force (config-rejected)."""
        reload = getattr(self._dispatcher, "reload_templates", None)
        if reload is None:
            return
        try:
            reload(getattr(config.alerts, "templates", None))
        except LotwardenError as exc:
            self._reject(exc, self._applied_fp)  # type: ignore[arg-type]  # set by _reload just before
            return
        log.info("reloaded operator templates from %s", config.alerts.templates)

    def _reject(self, exc: LotwardenError, fp: Fingerprint) -> None:
        """Keep the last good config: log, audit and alert (config-rejected) the bad file."""
        bad = Path(exc.path) if exc.path else self.config_path
        digest = content_hash([bad])
        log.error("config rejected, keeping the last good version: %s", exc)
        self._audit("config-rejected", file=str(bad), key=exc.key, message=str(exc), content_sha256=digest)
        # the same bad edit made again after a good version was in force is a new alert
        self._emit_alert("config-rejected", f"config-rejected|{bad}|{digest[:16]}|{self._good_since}",
                         {"file": str(bad), "key": exc.key, "line": exc.line, "message": str(exc),
                          "content_sha256": digest})
        self._event("config-rejected", {"error": str(exc)})
