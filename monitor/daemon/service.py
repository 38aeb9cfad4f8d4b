"""The run loop: owns the daemon's parts (built by :mod:`monitor.daemon.components`) and drives them.

One thread (the caller of :meth:`Daemon.run`) owns the state store and the intake: it takes finished files
from the settle tracker and processes them one at a time, closes idle lots and reloads config and rules
(a reload builds the next :class:`~monitor.daemon.components.Components` and swaps it in on this thread).
Scheduler jobs and observer callbacks only post hints and requests and wake that thread.

Log setup lives in :mod:`monitor.daemon.logsetup`, the reload check in :mod:`monitor.daemon.reload` and the
signal handlers in :mod:`monitor.daemon.signals`; their public names stay importable from here.
"""

from __future__ import annotations

import concurrent.futures
import logging
import os
import queue
import sys
import threading
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import TextIO, TypeVar

from apscheduler.events import EVENT_JOB_ERROR, EVENT_JOB_MISSED, JobExecutionEvent
from apscheduler.schedulers.background import BackgroundScheduler

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.daemon import archive, components, rulestore
from monitor.daemon.aftertake import ChangedFile
from monitor.daemon.components import Components, Core
from monitor.daemon.config import Config, load_config, load_rule_set
from monitor.daemon.faultlog import FaultEvent
from monitor.daemon.faults import Cleared
from monitor.daemon.intake import FileOutcome
from monitor.daemon.logsetup import LogSetup, OneLineFormatter
from monitor.daemon.reload import (
    Fingerprint,
    Reloader,
    ReloadStep,
    content_hash,
    decide_reload,
    fingerprint_of,
    take_fingerprint,
)
from monitor.daemon.schedlog import SkippedOncePerHour
from monitor.daemon.signals import SignalHandling
from monitor.daemon.watcher import scan
from monitor.errors import LotwardenError
from monitor.lot import Verdict
from monitor.rulebook import Rule
from monitor.state import outbox

__all__ = ["Daemon", "Fingerprint", "LogSetup", "OneLineFormatter", "ReloadStep", "content_hash",
           "decide_reload", "take_fingerprint", "utc_now_iso"]   # re-exported for callers of this module

log = logging.getLogger("lotwarden.daemon")

IDLE_CHECK_SECONDS = 30.0
SUPERVISE_SECONDS = 5.0
RELOAD_CHECK_SECONDS = 2.0
STOP_DRAIN_SECONDS = 2.0                    # scheduler shutdown, and the channels' last pass, each
BATCH_FILES = 32                            # files handed to intake per commit when a backlog is finished
PAUSE_ENV = "LOTWARDEN_PAUSE_AFTER_FILES"   # test hook: stop taking files after n (crash tests)

EventFn = Callable[[str, dict[str, object]], None]
T = TypeVar("T")


def utc_now_iso() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


# --------------------------------------------------------------------------------------------- daemon
class Daemon:
    """The unattended service. ``run()`` blocks until ``stop()`` (or SIGTERM/SIGINT) and returns 0,
    or returns 2 when config or rules are bad at start-up."""

    def __init__(self, config_path: str | Path, *, on_event: EventFn | None = None,
                 log_stream: TextIO | None = None, configure_log: bool = True) -> None:
        self.config_path = Path(config_path)
        self.on_event = on_event
        self.log_stream = log_stream
        self.configure_log = configure_log
        self.ready = threading.Event()        # set once watching and the first scan is done
        self.stopped = threading.Event()
        self.files_done = 0
        self.passes = 0                       # loop passes completed (tests wait on these instead of sleeping)
        self.scans = 0                        # folder scans completed
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._reload_requested = False        # SIGHUP: reload whatever is on disk, accept removals
        self._reload_check_due = False
        self._idle_due = False
        self._edges_due = False               # supervision tick: files changed after take, fault alerts
        self._fault_events: list[FaultEvent] = []   # fault events whose alert is not stored yet
        self._config: Config | None = None    # the config in force (the last good one)
        self._core: Core | None = None
        self._parts: Components | None = None
        self._scheduler: BackgroundScheduler | None = None
        self._reloader: Reloader | None = None
        self._skipped_filter: SkippedOncePerHour | None = None
        self._started_at = utc_now_iso()
        self._pause_after = int(os.environ.get(PAUSE_ENV, "0") or 0)
        self.idle_check_seconds = IDLE_CHECK_SECONDS       # job intervals; tests may shorten them
        self.supervise_seconds = SUPERVISE_SECONDS
        self.reload_check_seconds = RELOAD_CHECK_SECONDS
        self._signals = SignalHandling(self.stop, self.request_reload)
        self._calls: queue.SimpleQueue[Callable[[], None]] = queue.SimpleQueue()

    # ------------------------------------------------------------------ control from other threads
    def stop(self) -> None:
        """Ask the run loop to finish the file in hand and exit."""
        self._stop.set()
        self._wake.set()

    def request_reload(self) -> None:
        """Reload config and rules now (what SIGHUP does)."""
        self._reload_requested = True
        self._wake.set()

    def call_soon(self, fn: Callable[[Daemon], T]) -> concurrent.futures.Future[T]:
        """Run ``fn(daemon)`` on the loop thread (which owns intake and store); returns its future."""
        fut: concurrent.futures.Future[T] = concurrent.futures.Future()

        def call() -> None:
            if not fut.set_running_or_notify_cancel():
                return
            try:
                fut.set_result(fn(self))
            except BaseException as exc:  # handed to the caller through the future
                fut.set_exception(exc)

        self._calls.put(call)
        self._wake.set()
        return fut

    def close_all_lots(self) -> list[Verdict] | None:
        """Close and judge every open lot now (loop thread only; use via ``call_soon``)."""
        return self._close_idle(idle_seconds_override=0)

    def check_reload(self, forced: bool) -> None:
        """One reload check now (loop thread only; use via ``call_soon``); ``forced`` is what SIGHUP does."""
        if self._reloader is not None:
            self._reloader.check(forced)

    @property
    def config(self) -> Config | None:
        """The config in force (the last good one)."""
        return self._config

    @property
    def components(self) -> Components:
        """The parts in force (only while running)."""
        if self._parts is None:
            raise RuntimeError("the daemon is not running")
        return self._parts

    @property
    def reload_checks(self) -> int:
        """Reload checks done so far."""
        return 0 if self._reloader is None else self._reloader.checks

    @property
    def store_path(self) -> Path | None:
        return None if self._core is None else self._core.store.path

    # ------------------------------------------------------------------ run
    def run(self) -> int:
        logs = LogSetup(self.log_stream) if self.configure_log else None
        old_signals = self._signals.install()
        try:
            return self._run()
        finally:
            self._signals.restore(old_signals)
            if logs is not None:
                logs.undo()
            self.stopped.set()

    def _run(self) -> int:
        try:
            config = load_config(self.config_path)
            rules = load_rule_set(config)
        except LotwardenError as exc:
            log.error("cannot start: %s", exc)
            print(f"lotwarden: {exc}", file=sys.stderr)
            return 2
        self._config = config
        try:
            self._open(config, rules)
        except LotwardenError as exc:
            log.error("cannot start: %s", exc)
            print(f"lotwarden: {exc}", file=sys.stderr)
            self._shutdown()
            return 2
        except Exception as exc:  # state folder unwritable, not a local disk, ...: say so, let systemd retry
            log.exception("cannot start: %s", exc)
            self._shutdown()
            return 1
        try:
            self._loop()
        finally:
            self._shutdown()
        return 0

    # ------------------------------------------------------------------ start-up
    def _open(self, config: Config, rules: list[Rule]) -> None:
        """Build the parts (the composition root's functions), recover, say so, scan."""
        self._core = core = components.open_core(config, rules)   # a second daemon on this folder stops here
        for alert in rulestore.store_rule_texts(core.store, rules, config.alerts.channels, utc_now_iso()):
            log.warning("rule %s changed while the daemon was down: %s", alert.data.get("rule"),
                        ", ".join(f"{c['key']} {c['old']!r} -> {c['new']!r}" for c in alert.data.get("changes", [])))
        core.intake.changed_alert = _changed_alert
        for outcome in core.intake.recover():
            log.warning("recovered after an unclean stop: %s", outcome.describe())
        self._store_alert(kinds.daemon_started(started_at=self._started_at, config=str(self.config_path),
                                               rules=[r.name for r in rules]))
        self._scheduler = self._start_scheduler(config)
        self._parts = parts = components.build(config, rules, core, self._scheduler, self._on_hint)
        self._reloader = Reloader(self.config_path, self, fingerprint_of(self.config_path, config))
        self._rescan()
        log.info("started: config %s (version %s), %d rules, %d profiles, channels %s, watching %s (%s, "
                 "settle %gs)", self.config_path, config.version, len(rules),
                 len(config.profiles), ",".join(config.alerts.channels) or "none", config.watch.folder,
                 parts.watching.watcher.kind, config.watch.settle_seconds)
        self._event("started", {"config": str(self.config_path), "rules": len(rules)})
        self.ready.set()

    def _start_scheduler(self, config: Config) -> BackgroundScheduler:
        # a job still busy at its next run time is skipped with a warning each time: said once per job per hour
        self._skipped_filter = SkippedOncePerHour().install()
        sched = BackgroundScheduler(timezone=UTC, job_defaults={
            "coalesce": True, "max_instances": 1, "misfire_grace_time": 300})
        sched.add_listener(self._on_job_event, EVENT_JOB_ERROR | EVENT_JOB_MISSED)
        sched.add_job(self._request_rescan, "interval", seconds=config.watch.rescan_seconds, id="rescan")
        sched.add_job(self._request_idle, "interval", seconds=self.idle_check_seconds, id="close-idle")
        sched.add_job(self._supervise, "interval", seconds=self.supervise_seconds, id="supervise")
        sched.add_job(self._request_reload_check, "interval", seconds=self.reload_check_seconds, id="reload-check")
        sched.start()
        return sched

    # ------------------------------------------------------------------ reload (the Reloader's host)
    def rebuild(self, config: Config, rules: Sequence[Rule]) -> Components:
        """The next parts for a reloaded config (loop thread)."""
        assert self._scheduler is not None
        return components.rebuild(self.components, config, rules, self._scheduler, self._on_hint)

    def swap(self, parts: Components) -> None:
        """Put ``parts`` in force (loop thread); a new observer gets its first scan."""
        old, self._parts, self._config = self._parts, parts, parts.config
        if old is None or parts.watching is not old.watching:
            self._rescan()

    def store_alert(self, alert: Alert) -> bool:
        """Store one daemon alert in the outbox in its own write transaction and wake the channels."""
        return self._store_alert(alert)

    def audit(self, event: str, **detail: object) -> None:
        """One audit record in a transaction of its own; a failure is logged."""
        if self._core is None:
            return
        try:
            self._core.store.record_event(datetime.now(UTC), event, **detail)
        except Exception:
            log.exception("could not write the %s audit record", event)

    def event(self, kind: str, details: dict[str, object]) -> None:
        self._event(kind, details)

    # ------------------------------------------------------------------ callbacks (other threads)
    def _on_hint(self, path: Path, moved: bool) -> None:
        parts = self._parts
        if parts is None:
            return
        target = parts.watching.names.export_for(path)
        if target is not None:
            parts.watching.tracker.hint(target, moved)
            self._wake.set()

    def _on_job_event(self, event: JobExecutionEvent) -> None:
        if event.exception is not None:
            log.error("scheduled job %s failed: %r", event.job_id, event.exception)
        else:
            log.warning("scheduled job %s missed its run time", event.job_id)

    def _request_rescan(self) -> None:
        self._rescan()

    def _request_idle(self) -> None:
        self._idle_due = True
        self._wake.set()

    def _request_reload_check(self) -> None:
        self._reload_check_due = True
        self._wake.set()

    def _supervise(self) -> None:
        parts = self._parts
        if parts is None:
            return
        self._edges_due = True   # the loop thread looks at taken files and fault events
        self._wake.set()
        w = parts.watching.watcher
        if not self._stop.is_set() and not w.is_alive():
            log.error("folder observer on %s died; restarting it and rescanning", w.folder)
            try:
                w.restart()
            except OSError as exc:   # e.g. the share is gone: keep trying at every supervision tick
                log.error("cannot watch %s: %s; retrying in %gs", w.folder, exc, self.supervise_seconds)
                return
            self._rescan()

    def _rescan(self) -> None:
        parts = self._parts
        if parts is None:
            return
        found = scan(Path(parts.config.watch.folder), parts.watching.names)
        if found:
            parts.watching.tracker.hint_many(found)
            self._wake.set()
        self.scans += 1

    # ------------------------------------------------------------------ the loop (owner thread)
    def _loop(self) -> None:
        ready: list[Path] = []     # finished, in arrival order, not yet handed to intake
        while not self._stop.is_set():
            self._wake.clear()
            self._signals.log_arrived()
            if self._reload_requested or self._reload_check_due:
                forced, self._reload_requested, self._reload_check_due = self._reload_requested, False, False
                self.check_reload(forced)
            if self._idle_due:
                self._idle_due = False
                self._close_idle()
            if self._edges_due:
                self._edges_due = False
                self._check_edges()
            self._run_calls()
            tracker = self.components.watching.tracker    # after a reload: the tracker now in force
            if not self._paused():
                known = set(ready)
                ready += [p for p in tracker.look() if p not in known]
                if ready:          # one batch per turn, so reloads, idle closing and stop are not held up
                    n = min(BATCH_FILES, self._pause_after - self.files_done if self._pause_after else BATCH_FILES)
                    batch, ready = ready[:n], ready[n:]
                    self._process(batch)
            self.passes += 1
            if ready and not self._paused():
                continue
            pending = len(tracker)
            if not pending:
                self._flush_intake()
            settle = self.components.config.watch.settle_seconds
            timeout = min(0.25, max(0.05, settle / 5)) if pending and not self._paused() else 5.0
            self._wake.wait(timeout)
        # files still in ``ready`` stay in the drop folder: the next start's scan takes them

    def _run_calls(self) -> None:
        while True:
            try:
                call = self._calls.get_nowait()
            except queue.Empty:
                return
            call()

    def _kick_drain(self) -> None:
        """Wake the channels' delivery threads so a new alert goes out now, not at the next tick."""
        parts = self._parts
        if parts is not None and parts.dispatcher is not None:
            parts.dispatcher.kick()

    def _paused(self) -> bool:
        return bool(self._pause_after) and self.files_done >= self._pause_after

    def _process(self, paths: list[Path]) -> None:
        """Hand finished files to intake, in arrival order: one commit for a backlog."""
        parts = self.components
        intake = parts.core.intake
        for path in paths:
            self._event("file-finished", {"path": str(path)})
        try:
            outcomes = intake.process_batch(paths) if len(paths) > 1 else [intake.process(p) for p in paths]
        except Exception:  # intake never raises for bad data; anything else is a bug we survive
            log.exception("processing %s failed unexpectedly; left in the drop folder for a retry",
                          ", ".join(p.name for p in paths))
            for p in paths:
                parts.watching.tracker.hint(p)  # retried after the settle time; intake's dedup keeps it exactly once
            return
        self.files_done += len(outcomes)
        kick = False
        for path, outcome in zip(paths, outcomes, strict=False):
            noisy = outcome.status in ("rejected", "duplicate", "unreadable", "vanished", "ignored")
            if outcome.status == "waiting":   # a fault keeps it in the drop folder: the fault is logged once per step
                log.debug("%s", outcome.describe())
            else:
                (log.warning if noisy else log.info)("%s", outcome.describe())
            kick = kick or bool(outcome.alerts)
            self._move_marker(parts, path, outcome)
            self._event("file-processed", {"path": str(path), "outcome": outcome})
        if kick:   # new alerts: deliver now rather than at the next drain tick
            self._kick_drain()
        if self._paused():
            log.warning("%s=%d reached: taking no more files", PAUSE_ENV, self._pause_after)

    def _flush_intake(self) -> None:
        if self._core is None:
            return
        try:
            self._core.intake.flush()
        except Exception:
            log.exception("recording archive moves failed; recover() finds them at the next start")

    def _move_marker(self, parts: Components, path: Path, outcome: FileOutcome) -> None:
        """Move the profile's marker file next to where its export went (nothing is deleted)."""
        suffix = parts.watching.markers(path)
        if not suffix:
            return
        marker = Path(str(path) + suffix)
        if not marker.exists() or not outcome.moved_to:
            return
        try:
            archive.move_beside(marker, Path(outcome.moved_to))  # never overwrites
        except OSError as exc:
            log.warning("cannot move marker %s: %s", marker, exc)

    def _close_idle(self, idle_seconds_override: float | None = None) -> list[Verdict] | None:
        try:
            result = self.components.core.intake.close_idle(idle_seconds_override=idle_seconds_override)
        except Exception:
            log.exception("closing idle lots failed; will try again")
            return None
        if result:
            log.info("lots closed: %s", ", ".join(
                f"{v.verdict} {v.key.line or '-'}/{v.key.product or '-'}/{v.key.lot}" for v in result))
            self._kick_drain()
            self._event("lots-closed", {"result": result})
        return result

    def _check_edges(self) -> None:
        """Archived files that changed after they were taken (recorded with their alert by intake), and the
        alerts of faults that have lasted or cleared; an alert that cannot be stored (the database is the
        fault) is kept and tried again at the next tick; intake has logged the fault meanwhile."""
        intake = self.components.core.intake
        try:
            if intake.check_taken():
                self._kick_drain()
            self._fault_events += intake.fault_alerts()
        except Exception:
            log.exception("checking taken files failed; will try again")
        kept: list[FaultEvent] = []
        for ev in self._fault_events:
            if not self._store_alert(_fault_alert(ev, utc_now_iso()), quiet=True):
                kept.append(ev)
        self._fault_events = kept

    # ------------------------------------------------------------------ alerts and records
    def _store_alert(self, alert: Alert, *, quiet: bool = False) -> bool:
        if self._core is None or self._config is None:
            return False
        try:
            with self._core.store.write() as conn:
                new = outbox.enqueue(conn, alert, self._config.alerts.channels)
        except Exception as exc:
            if quiet:   # the caller keeps the alert and tries again; the fault itself is logged by intake
                log.debug("could not store the %s alert yet: %s", alert.kind, exc)
            else:
                log.exception("could not store the %s alert", alert.kind)
            return False
        self._kick_drain()
        return new

    def _event(self, kind: str, details: dict[str, object]) -> None:
        if self.on_event is not None:
            try:
                self.on_event(kind, details)
            except Exception:
                log.exception("event callback failed")

    # ------------------------------------------------------------------ shutdown
    def _shutdown(self) -> None:
        """Stop observer and scheduler, record the stop, drain the outbox briefly, close the database."""
        self._signals.log_arrived()
        log.info("stopping: %d files processed", self.files_done)
        self._run_calls()
        self._flush_intake()
        parts = self._parts
        if parts is not None:
            parts.watching.watcher.stop()
        sched, self._scheduler = self._scheduler, None
        if sched is not None:
            _bounded(lambda: sched.shutdown(wait=True), STOP_DRAIN_SECONDS, "scheduler shutdown")
        if self._skipped_filter is not None:
            self._skipped_filter.remove()
            self._skipped_filter = None
        if self._core is not None:
            self._store_alert(kinds.daemon_stopped(started_at=self._started_at, stopped_at=utc_now_iso(),
                                                   files=self.files_done))
        dispatcher = parts.dispatcher if parts is not None else None
        if dispatcher is not None:
            # each channel makes a last pass (a stuck mail server is cut short); unsent alerts stay queued
            _bounded(lambda: dispatcher.stop(STOP_DRAIN_SECONDS), STOP_DRAIN_SECONDS + 2.0, "final outbox drain")
            try:
                dispatcher.close()
            except Exception:
                log.exception("close failed")
        if self._core is not None:
            self._core.close()
        self._parts = None
        self._core = None
        self._event("stopped", {"files": self.files_done})
        log.info("stopped")


def _changed_alert(change: ChangedFile, at: str) -> Alert:
    """The alert stored with the audit record of a file changed after it was taken."""
    return kinds.file_changed_after_take(file_id=change.file_id, detail=change.detail(), at=at)


def _fault_alert(ev: FaultEvent, at: str) -> Alert:
    """``fault-persisting`` for a fault that has lasted, ``fault-cleared`` for one told before that has gone."""
    if isinstance(ev, Cleared):
        return kinds.fault_cleared(key=ev.key, message=ev.message, attempts=ev.attempts,
                                   lasted_seconds=ev.lasted_seconds, first_at=ev.first_at, at=at)
    return kinds.fault_persisting(key=ev.key, message=ev.message, attempts=ev.attempts,
                                  lasting_seconds=ev.lasting_seconds, first_at=ev.first_at, at=at)


def _bounded(fn: Callable[[], object], seconds: float, what: str) -> None:
    """Run ``fn`` in a helper thread and wait at most ``seconds`` for it."""
    def guarded() -> None:
        try:
            fn()
        except Exception:
            log.exception("%s failed", what)

    th = threading.Thread(target=guarded, name=f"lotwarden-{what}", daemon=True)
    th.start()
    th.join(seconds)
    if th.is_alive():
        log.warning("%s did not finish within %gs; going on", what, seconds)
