"""The run loop: wires config, rules, state store, intake, watcher, scheduler and dispatcher.

One thread (the caller of :meth:`Daemon.run`) owns the state store and the intake: it takes finished files
from the settle tracker and processes them one at a time, closes idle lots and reloads config and rules.
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
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, TextIO

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.daemon.instance_lock import InstanceLock
from monitor.daemon.logsetup import LogSetup, OneLineFormatter  # noqa: F401  (re-exported)
from monitor.daemon.reload import Fingerprint, Reloading, ReloadStep, content_hash, decide_reload, take_fingerprint  # noqa: F401  (re-exported for callers of this module)
from monitor.daemon.schedlog import SkippedOncePerHour
from monitor.daemon.signals import SignalHandling
from monitor.daemon.watcher import FolderWatcher, NameFilter, SettleTracker, scan
from monitor.errors import LotwardenError

log = logging.getLogger("lotwarden.daemon")

IDLE_CHECK_SECONDS = 30.0
SUPERVISE_SECONDS = 5.0
RELOAD_CHECK_SECONDS = 2.0
STOP_DRAIN_SECONDS = 2.0                    # scheduler shutdown, and the channels' last pass, each
BATCH_FILES = 32                            # files handed to intake per commit when a backlog is finished
PAUSE_ENV = "LOTWARDEN_PAUSE_AFTER_FILES"   # test hook: stop taking files after n (crash tests)

EventFn = Callable[[str, dict[str, Any]], None]


def utc_now_iso() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


# --------------------------------------------------------------------------------------------- daemon
class Daemon(Reloading, SignalHandling):
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
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._reload_requested = False        # SIGHUP: reload whatever is on disk, accept removals
        self._reload_check_due = False
        self._idle_due = False
        self._config: Any = None
        self._rules: list[Any] = []
        self._store: Any = None
        self._lock: InstanceLock | None = None
        self._intake: Any = None
        self._dispatcher: Any = None
        self._scheduler: Any = None
        self._watcher: FolderWatcher | None = None
        self._tracker: SettleTracker | None = None
        self._names = NameFilter()
        self._applied_fp: Fingerprint | None = None
        self._seen_fp: Fingerprint | None = None
        self._dispatch_jobs: list[str] = []
        self._skipped_filter: SkippedOncePerHour | None = None
        self._started_at = utc_now_iso()
        self._pause_after = int(os.environ.get(PAUSE_ENV, "0") or 0)
        self.idle_check_seconds = IDLE_CHECK_SECONDS       # job intervals; tests may shorten them
        self.supervise_seconds = SUPERVISE_SECONDS
        self.reload_check_seconds = RELOAD_CHECK_SECONDS
        self._signals: list[str] = []
        self._calls: queue.SimpleQueue[tuple[Callable[[], Any], concurrent.futures.Future[Any]]] = \
            queue.SimpleQueue()

    # ------------------------------------------------------------------ control from other threads
    def stop(self) -> None:
        """Ask the run loop to finish the file in hand and exit."""
        self._stop.set()
        self._wake.set()

    def request_reload(self) -> None:
        """Reload config and rules now (what SIGHUP does)."""
        self._reload_requested = True
        self._wake.set()

    def call_soon(self, fn: Callable[[Daemon], Any]) -> concurrent.futures.Future[Any]:
        """Run ``fn(daemon)`` on the loop thread (which owns intake and store); returns its future."""
        fut: concurrent.futures.Future[Any] = concurrent.futures.Future()
        self._calls.put((lambda: fn(self), fut))
        self._wake.set()
        return fut

    def close_all_lots(self) -> Any:
        """Close and judge every open lot now (loop thread only; use via ``call_soon``)."""
        return self._close_idle(idle_seconds_override=0)

    @property
    def config(self) -> Any:
        """The config in force (the last good one)."""
        return self._config

    @property
    def store_path(self) -> Path | None:
        return None if self._store is None else Path(self._store.path)

    # ------------------------------------------------------------------ run
    def run(self) -> int:
        logs = LogSetup(self.log_stream) if self.configure_log else None
        old_signals = self._install_signals()
        try:
            return self._run()
        finally:
            self._restore_signals(old_signals)
            if logs is not None:
                logs.undo()
            self.stopped.set()

    def _run(self) -> int:
        from monitor.daemon.config import load_config

        try:
            config = load_config(self.config_path)
            rules = self._load_rules(config)
        except LotwardenError as exc:
            log.error("cannot start: %s", exc)
            print(f"lotwarden: {exc}", file=sys.stderr)
            return 2
        self._config, self._rules = config, rules
        self._applied_fp = self._seen_fp = self._fingerprint(config)
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
    def _load_rules(self, config: Any) -> list[Any]:
        from monitor.rulebook import load_rules

        return load_rules(config.rules_dir)

    def _open(self, config: Any, rules: list[Any]) -> None:
        from monitor.daemon.intake import Intake
        from monitor.daemon.store import Store

        for folder in (config.state.folder, config.state.archive, config.state.quarantine):
            Path(folder).mkdir(parents=True, exist_ok=True)
        self._lock = InstanceLock.acquire(config.state.folder)   # a second daemon on this folder stops here
        self._store = Store.open(config.state.folder)
        self._intake = Intake(config, rules, self._store)
        recovered = self._intake.recover()
        for outcome in recovered or ():
            describe = getattr(outcome, "describe", None)
            log.warning("recovered after an unclean stop: %s", describe() if callable(describe) else outcome)
        self._store_alert(kinds.daemon_started(started_at=self._started_at, config=str(self.config_path),
                                               rules=[r.name for r in rules]))
        self._dispatcher = self._make_dispatcher(config)
        self._apply_watch(config)
        self._start_scheduler(config)
        log.info("started: config %s (version %s), %d rules, %d profiles, channels %s, watching %s (%s, "
                 "settle %gs)", self.config_path, getattr(config, "version", "?"), len(rules),
                 len(config.profiles), ",".join(config.alerts.channels) or "none", config.watch.folder,
                 self._watcher.kind if self._watcher else "?", config.watch.settle_seconds)
        self._event("started", {"config": str(self.config_path), "rules": len(rules)})
        self.ready.set()

    def _make_dispatcher(self, config: Any) -> Any:
        try:
            from monitor.alerts.dispatch import Dispatcher
        except ImportError:
            log.warning("alert dispatcher not installed: alerts stay in the outbox until it is")
            return None
        try:
            return Dispatcher(self._store_db_path(), config.alerts)
        except LotwardenError as exc:
            log.error("alert delivery not started: %s", exc)
            return None

    def _store_db_path(self) -> Path:
        path = getattr(self._store, "path", None) or getattr(self._store, "db_path", None)
        return Path(path) if path is not None else Path(self._config.state.folder) / "lotwarden.db"

    def _marker_for(self, path: Path) -> str | None:
        try:
            from monitor.ingest.profile import profile_for
        except ImportError:
            return None
        try:
            prof = profile_for(path, self._config.profiles)
        except Exception:  # a profile lookup problem must not stop the watcher; intake reports it
            return None
        return getattr(prof, "marker_suffix", None) or None

    def _apply_watch(self, config: Any) -> None:
        """(Re)build name filter, tracker and observer from ``config.watch``; then scan."""
        w = config.watch
        suffixes = tuple(s for s in (getattr(p, "marker_suffix", None) for p in config.profiles) if s)
        self._names = NameFilter(include=tuple(w.include), ignore=tuple(w.ignore), marker_suffixes=suffixes)
        old = self._tracker.pending() if self._tracker else []
        # mtimes are this machine's own only with native watching (polling is for shares with other clocks)
        self._tracker = SettleTracker(w.settle_seconds, marker_for=self._marker_for, trust_mtime=not w.polling)
        self._tracker.hint_many(p for p in old if self._names.accepts(p.name))
        if self._watcher is not None:
            self._watcher.stop()
        Path(w.folder).mkdir(parents=True, exist_ok=True)
        self._watcher = FolderWatcher(w.folder, w.polling, w.poll_interval, self._on_hint)
        self._watcher.start()   # observer first, then scan: nothing dropped in between is missed
        self._rescan()

    def _start_scheduler(self, config: Any) -> None:
        from apscheduler.events import EVENT_JOB_ERROR, EVENT_JOB_MISSED
        from apscheduler.schedulers.background import BackgroundScheduler

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
        self._scheduler = sched
        self._schedule_dispatcher()

    def _schedule_dispatcher(self) -> None:
        if self._dispatcher is None or self._scheduler is None:
            return
        before = {j.id for j in self._scheduler.get_jobs()}
        self._dispatcher.schedule(self._scheduler)
        self._dispatch_jobs = [j.id for j in self._scheduler.get_jobs() if j.id not in before]

    # ------------------------------------------------------------------ callbacks (other threads)
    def _on_hint(self, path: Path, moved: bool) -> None:
        target = self._names.export_for(path)
        if target is not None and self._tracker is not None:
            self._tracker.hint(target, moved)
            self._wake.set()

    def _on_job_event(self, event: Any) -> None:
        if getattr(event, "exception", None) is not None:
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
        w = self._watcher
        if w is not None and not self._stop.is_set() and not w.is_alive():
            log.error("folder observer on %s died; restarting it and rescanning", w.folder)
            try:
                w.restart()
            except OSError as exc:   # e.g. the share is gone: keep trying at every supervision tick
                log.error("cannot watch %s: %s; retrying in %gs", w.folder, exc, self.supervise_seconds)
                return
            self._rescan()

    def _rescan(self) -> None:
        if self._tracker is None or self._config is None:
            return
        found = scan(Path(self._config.watch.folder), self._names)
        if found:
            self._tracker.hint_many(found)
            self._wake.set()

    # ------------------------------------------------------------------ the loop (owner thread)
    def _loop(self) -> None:
        assert self._tracker is not None
        ready: list[Path] = []     # finished, in arrival order, not yet handed to intake
        while not self._stop.is_set():
            self._wake.clear()
            self._log_signals()
            if self._reload_requested or self._reload_check_due:
                forced, self._reload_requested, self._reload_check_due = self._reload_requested, False, False
                self._check_reload(forced)
            if self._idle_due:
                self._idle_due = False
                self._close_idle()
            self._run_calls()
            if not self._paused():
                known = set(ready)
                ready += [p for p in self._tracker.look() if p not in known]
                if ready:          # one batch per turn, so reloads, idle closing and stop are not held up
                    n = min(BATCH_FILES, self._pause_after - self.files_done if self._pause_after else BATCH_FILES)
                    batch, ready = ready[:n], ready[n:]
                    self._process(batch)
            if ready and not self._paused():
                continue
            pending = len(self._tracker)
            if not pending:
                self._flush_intake()
            settle = self._config.watch.settle_seconds
            timeout = min(0.25, max(0.05, settle / 5)) if pending and not self._paused() else 5.0
            self._wake.wait(timeout)
        # files still in ``ready`` stay in the drop folder: the next start's scan takes them

    def _run_calls(self) -> None:
        while True:
            try:
                fn, fut = self._calls.get_nowait()
            except queue.Empty:
                return
            if not fut.set_running_or_notify_cancel():
                continue
            try:
                fut.set_result(fn())
            except BaseException as exc:  # handed to the caller through the future
                fut.set_exception(exc)

    def _kick_drain(self) -> None:
        """Wake the channels' delivery threads so a new alert goes out now, not at the next tick."""
        kick = getattr(self._dispatcher, "kick", None)
        if callable(kick):
            kick()

    def _paused(self) -> bool:
        return bool(self._pause_after) and self.files_done >= self._pause_after

    def _process(self, paths: list[Path]) -> None:
        """Hand finished files to intake, in arrival order: one commit for a backlog when intake offers it."""
        for path in paths:
            self._event("file-finished", {"path": str(path)})
        batch = getattr(self._intake, "process_batch", None)
        try:
            outcomes = list(batch(paths)) if batch is not None and len(paths) > 1 else \
                [self._intake.process(p) for p in paths]
        except Exception:  # intake never raises for bad data; anything else is a bug we survive
            log.exception("processing %s failed unexpectedly; left in the drop folder for a retry",
                          ", ".join(p.name for p in paths))
            assert self._tracker is not None
            for p in paths:
                self._tracker.hint(p)  # retried after the settle time; intake's dedup keeps it exactly once
            return
        self.files_done += len(outcomes)
        kick = False
        for path, outcome in zip(paths, outcomes, strict=False):
            describe = getattr(outcome, "describe", None)
            text = describe() if callable(describe) else repr(outcome)
            status = getattr(outcome, "status", "")
            noisy = status in ("rejected", "duplicate", "unreadable", "vanished", "ignored")
            (log.warning if noisy else log.info)("%s", text)
            kick = kick or bool(getattr(outcome, "alerts", True))
            self._move_marker(path, outcome)
            self._event("file-processed", {"path": str(path), "outcome": outcome})
        if kick:   # new alerts: deliver now rather than at the next drain tick
            self._kick_drain()
        if self._paused():
            log.warning("%s=%d reached: taking no more files", PAUSE_ENV, self._pause_after)

    def _flush_intake(self) -> None:
        flush = getattr(self._intake, "flush", None)
        if flush is None:
            return
        try:
            flush()
        except Exception:
            log.exception("recording archive moves failed; recover() finds them at the next start")

    def _move_marker(self, path: Path, outcome: Any) -> None:
        """Move the profile's marker file next to where its export went (nothing is deleted)."""
        suffix = self._marker_for(path)
        if not suffix:
            return
        marker = Path(str(path) + suffix)
        dest_of_export = getattr(outcome, "archived_path", None) or getattr(outcome, "moved_to", None)
        if not marker.exists() or not dest_of_export:
            return
        from monitor.daemon.archive import free_name, move_file

        try:
            move_file(marker, free_name(Path(dest_of_export).parent, marker.name))   # never overwrites
        except OSError as exc:
            log.warning("cannot move marker %s: %s", marker, exc)

    def _close_idle(self, idle_seconds_override: float | None = None) -> Any:
        try:
            result = self._intake.close_idle(idle_seconds_override=idle_seconds_override)
        except Exception:
            log.exception("closing idle lots failed; will try again")
            return None
        if result:
            log.info("lots closed: %s", ", ".join(
                f"{v.verdict} {v.key.line or '-'}/{v.key.product or '-'}/{v.key.lot}" for v in result))
            self._kick_drain()
            self._event("lots-closed", {"result": result})
        return result

    # ------------------------------------------------------------------ alerts
    def _emit_alert(self, kind: str, dedup_key: str, data: dict[str, Any]) -> bool:
        """Store one daemon alert built by hand (kept for callers not yet on ``monitor.alerts.kinds``)."""
        return self._store_alert(Alert(kind=kind, dedup_key=dedup_key, created_at=utc_now_iso(), data=data))

    def _store_alert(self, alert: Alert) -> bool:
        """Store one daemon alert in the outbox in its own write transaction and wake the channels."""
        from monitor.state.outbox import enqueue

        try:
            with self._store.write() as conn:
                new = enqueue(conn, alert, self._config.alerts.channels)
        except Exception:
            log.exception("could not store the %s alert", alert.kind)
            return False
        self._kick_drain()
        return new

    def _audit(self, event: str, **detail: Any) -> None:
        try:
            self._store.record_event(datetime.now(UTC), event, **detail)
        except Exception:
            log.exception("could not write the %s audit record", event)

    def _event(self, kind: str, details: dict[str, Any]) -> None:
        if self.on_event is not None:
            try:
                self.on_event(kind, details)
            except Exception:
                log.exception("event callback failed")

    # ------------------------------------------------------------------ shutdown
    def _shutdown(self) -> None:
        """Stop observer and scheduler, record the stop, drain the outbox briefly, close the database."""
        self._log_signals()
        log.info("stopping: %d files processed", self.files_done)
        self._run_calls()
        if self._intake is not None:
            self._flush_intake()
        if self._watcher is not None:
            self._watcher.stop()
        sched, self._scheduler = self._scheduler, None
        if sched is not None:
            _bounded(lambda: sched.shutdown(wait=True), STOP_DRAIN_SECONDS, "scheduler shutdown")
        if self._skipped_filter is not None:
            self._skipped_filter.remove()
            self._skipped_filter = None
        if self._store is not None:
            self._store_alert(kinds.daemon_stopped(started_at=self._started_at, stopped_at=utc_now_iso(),
                                                   files=self.files_done))
        if self._dispatcher is not None:
            # each channel makes a last pass (a stuck mail server is cut short); unsent alerts stay queued
            d = self._dispatcher
            stop = getattr(d, "stop", None)
            if callable(stop):
                _bounded(lambda: stop(STOP_DRAIN_SECONDS), STOP_DRAIN_SECONDS + 2.0, "final outbox drain")
            else:
                _bounded(lambda: d.drain(flush=True), STOP_DRAIN_SECONDS, "final outbox drain")
        self._close_quietly()
        self._event("stopped", {"files": self.files_done})
        log.info("stopped")

    def _close_quietly(self) -> None:
        for obj in (self._dispatcher, self._store):
            if obj is not None:
                try:
                    obj.close()
                except Exception:
                    log.exception("close failed")
        self._dispatcher = self._store = None
        if self._lock is not None:
            self._lock.release()
            self._lock = None


def _bounded(fn: Callable[[], Any], seconds: float, what: str) -> None:
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
