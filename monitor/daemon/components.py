"""The daemon's composition root: its typed parts built from one config and rule set, and rebuilt on reload.

Two frozen records. :class:`Core` holds what lives as long as the process: the instance lock, the state
database and the intake (its pending archive moves and recent values outlast a reload). :class:`Components`
holds everything else made from one config — rules, name filter, settle tracker, folder observer, alert
dispatcher and the scheduler jobs the dispatcher added — plus the core. :func:`open_core` and :func:`build`
make them at start; :func:`rebuild` makes the next :class:`Components` for a reloaded config, reusing the
parts whose settings did not change. The run loop swaps the new record in on its own thread.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from apscheduler.schedulers.base import BaseScheduler

from monitor.alerts.dispatch import Dispatcher
from monitor.daemon.config import Config
from monitor.daemon.instance_lock import InstanceLock
from monitor.daemon.intake import Intake
from monitor.daemon.reminders import ReminderJob
from monitor.daemon.watcher import FolderWatcher, HintFn, NameFilter, SettleTracker
from monitor.errors import LotwardenError
from monitor.ingest.profile import FeedProfile, profile_for
from monitor.rulebook import Rule
from monitor.state.database import Database

log = logging.getLogger("lotwarden.daemon")


@dataclass(frozen=True)
class Core:
    """The parts that live as long as the daemon: one per state folder."""

    lock: InstanceLock
    store: Database
    intake: Intake

    def close(self) -> None:
        """Close the database and release the state folder (after the intake's last flush)."""
        try:
            self.store.close()
        except Exception:
            log.exception("close failed")
        self.lock.release()


@dataclass(frozen=True)
class MarkerLookup:
    """The marker suffix (e.g. ``.done``) the feed profile of an export waits for, or None."""

    profiles: tuple[FeedProfile, ...]

    def __call__(self, path: Path) -> str | None:
        try:
            prof = profile_for(path, self.profiles)
        except Exception:  # a profile lookup problem must not stop the watcher; intake reports it
            return None
        return prof.marker_suffix or None


@dataclass(frozen=True)
class Watching:
    """The drop folder's name filter, settle tracker and observer, made from ``config.watch`` and profiles."""

    names: NameFilter
    markers: MarkerLookup
    tracker: SettleTracker
    watcher: FolderWatcher


@dataclass(frozen=True)
class Components:
    """Everything the run loop uses, for one config and rule set."""

    config: Config
    rules: tuple[Rule, ...]
    core: Core
    watching: Watching
    dispatcher: Dispatcher | None
    dispatch_jobs: tuple[str, ...] = ()     # scheduler jobs of [alerts] (digest, reminders), removed with it


def open_core(config: Config, rules: Sequence[Rule]) -> Core:
    """Create the state folders, take the instance lock (a second daemon stops here), open the database and
    make the intake. What was opened is closed again if a later step fails."""
    for folder in (config.state.folder, config.state.archive, config.state.quarantine):
        Path(folder).mkdir(parents=True, exist_ok=True)
    lock = InstanceLock.acquire(config.state.folder)
    try:
        store = Database.open(config.state.folder)
    except BaseException:
        lock.release()
        raise
    try:
        intake = Intake(config, rules, store)
    except BaseException:
        store.close()
        lock.release()
        raise
    return Core(lock=lock, store=store, intake=intake)


def make_dispatcher(config: Config, store: Database) -> Dispatcher | None:
    """The alert dispatcher for ``config.alerts``; None (logged) when its settings cannot be used, so the
    alerts stay in the outbox until a config that works is loaded."""
    try:
        return Dispatcher(store.path, config.alerts)
    except LotwardenError as exc:
        log.error("alert delivery not started: %s", exc)
        return None


def schedule_dispatcher(dispatcher: Dispatcher | None, scheduler: BaseScheduler) -> tuple[str, ...]:
    """Start the dispatcher's delivery threads and add its jobs; return the ids of the jobs it added."""
    if dispatcher is None:
        return ()
    before = {j.id for j in scheduler.get_jobs()}
    dispatcher.schedule(scheduler)
    return tuple(str(j.id) for j in scheduler.get_jobs() if j.id not in before)


def schedule_reminders(config: Config, store: Database, dispatcher: Dispatcher | None,
                       scheduler: BaseScheduler) -> tuple[str, ...]:
    """Add the reminder job of open holds when ``[alerts] reminder_minutes`` > 0; return its job id."""
    minutes = config.alerts.reminder_minutes
    if minutes <= 0 or not config.alerts.channels:
        return ()
    job = ReminderJob(store, minutes, config.alerts.channels,
                      on_enqueued=dispatcher.kick if dispatcher is not None else None)
    return (job.schedule(scheduler),)


def unschedule(job_ids: Sequence[str], scheduler: BaseScheduler) -> None:
    for job_id in job_ids:
        try:
            scheduler.remove_job(job_id)
        except Exception:  # already gone (a job that ran its last time)
            log.debug("scheduler job %s already removed", job_id)


def make_watching(config: Config, on_hint: HintFn, carried: Sequence[Path] = ()) -> Watching:
    """Name filter, tracker and a started observer for ``config.watch``; ``carried``: paths a previous tracker
    still had pending (kept when the filter accepts them). The caller scans the folder next."""
    w = config.watch
    suffixes = tuple(s for s in (p.marker_suffix for p in config.profiles) if s)
    names = NameFilter(include=tuple(w.include), ignore=tuple(w.ignore), marker_suffixes=suffixes)
    markers = MarkerLookup(tuple(config.profiles))
    # mtimes are this machine's own only with native watching (polling is for shares with other clocks)
    tracker = SettleTracker(w.settle_seconds, marker_for=markers, trust_mtime=not w.polling)
    tracker.hint_many(p for p in carried if names.accepts(p.name))
    Path(w.folder).mkdir(parents=True, exist_ok=True)
    watcher = FolderWatcher(w.folder, w.polling, w.poll_interval, on_hint)
    watcher.start()   # observer first, then the caller's scan: nothing dropped in between is missed
    return Watching(names=names, markers=markers, tracker=tracker, watcher=watcher)


def build(config: Config, rules: Sequence[Rule], core: Core, scheduler: BaseScheduler,
          on_hint: HintFn) -> Components:
    """The daemon's parts at start: dispatcher (scheduled) and watching, around ``core``."""
    dispatcher = make_dispatcher(config, core.store)
    try:
        jobs = schedule_dispatcher(dispatcher, scheduler)
        jobs += schedule_reminders(config, core.store, dispatcher, scheduler)
        watching = make_watching(config, on_hint)
    except BaseException:
        if dispatcher is not None:
            dispatcher.close()
        raise
    return Components(config=config, rules=tuple(rules), core=core, watching=watching, dispatcher=dispatcher,
                      dispatch_jobs=jobs)


def rebuild(old: Components, config: Config, rules: Sequence[Rule], scheduler: BaseScheduler,
            on_hint: HintFn) -> Components:
    """The next parts for a reloaded config: watching made again when ``[watch]`` or the profiles changed, the
    dispatcher when ``[alerts]`` changed (else the one in force is kept); the intake is told the new config
    and rules. The caller swaps the result in and scans the folder when ``watching`` is new."""
    old.core.intake.set_rules(rules)
    old.core.intake.set_config(config)
    watching = old.watching
    if config.watch != old.config.watch or config.profiles != old.config.profiles:
        carried = watching.tracker.pending()
        watching.watcher.stop()
        watching = make_watching(config, on_hint, carried)
    dispatcher, jobs = old.dispatcher, old.dispatch_jobs
    if config.alerts != old.config.alerts:
        unschedule(jobs, scheduler)
        if dispatcher is not None:
            dispatcher.close()
        dispatcher = make_dispatcher(config, old.core.store)   # it checks the templates itself
        jobs = schedule_dispatcher(dispatcher, scheduler)
        jobs += schedule_reminders(config, old.core.store, dispatcher, scheduler)
    return Components(config=config, rules=tuple(rules), core=old.core, watching=watching,
                      dispatcher=dispatcher, dispatch_jobs=jobs)
