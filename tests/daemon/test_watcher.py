"""Watcher: name filter, settle tracker (pure, with a fake stat and clock), real watchdog observers."""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path
from types import SimpleNamespace

import pytest

from monitor.daemon.watcher import FolderWatcher, NameFilter, SettleTracker, scan
from monitor.polling import wait_until as wait_for


@pytest.fixture(autouse=True)
def _no_leaked_threads():
    before = set(threading.enumerate())
    yield
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline:
        extra = [t for t in threading.enumerate() if t not in before and t.is_alive()]
        if not extra:
            return
        time.sleep(0.05)
    pytest.fail(f"threads left running: {extra}")




# --- name filter ---------------------------------------------------------------------------------
class TestNameFilter:
    def test_include_and_ignore_match_the_name_not_the_path(self):
        """Patterns are matched against the bare file name (watchdog 7 would match full paths)."""
        f = NameFilter(include=("*.csv",), ignore=("*-draft.csv",))
        assert f.accepts("L1_OAT-500_0001.csv")
        assert f.accepts("EXPORT.CSV")
        assert not f.accepts("notes.txt")
        assert not f.accepts("L1-draft.csv")

    def test_hidden_temp_reason_and_marker_names_are_never_exports(self):
        """Hidden, temporary, quarantine reason and marker names are skipped."""
        f = NameFilter(marker_suffixes=(".done",))
        for name in (".L1.csv", "L1.csv.tmp", "L1.csv.part", "~L1.csv", "L1.csv~", "bad.csv.reason.txt",
                     "L1.csv.done"):
            assert not f.accepts(name), name
        assert f.accepts("L1.csv")

    def test_a_marker_hint_points_at_its_data_file(self):
        """An event on ``x.csv.done`` concerns ``x.csv``."""
        f = NameFilter(include=("*.csv",), marker_suffixes=(".done",))
        assert f.export_for(Path("/d/x.csv.done")) == Path("/d/x.csv")
        assert f.export_for(Path("/d/x.csv")) == Path("/d/x.csv")
        assert f.export_for(Path("/d/x.txt.done")) is None
        assert f.export_for(Path("/d/.x.csv")) is None

    def test_scan_lists_matching_regular_files_only(self, tmp_path):
        """A scan lists the folder's matching files, not subfolders or ignored names."""
        (tmp_path / "archive").mkdir()
        (tmp_path / "archive" / "old.csv").write_text("x")
        (tmp_path / "a.csv").write_text("x")
        (tmp_path / "b.csv.tmp").write_text("x")
        (tmp_path / ".c.csv").write_text("x")
        assert scan(tmp_path, NameFilter(include=("*.csv",))) == [tmp_path / "a.csv"]

    def test_scan_of_a_missing_folder_is_empty(self, tmp_path):
        """A missing drop folder is logged, not a crash."""
        assert scan(tmp_path / "nope", NameFilter()) == []


# --- settle tracker with a fake file system -----------------------------------------------------
class FakeFS:
    def __init__(self):
        self.now = 0.0
        self.files: dict[str, tuple[int, int, int]] = {}

    def stat(self, path: str):
        if path not in self.files:
            raise FileNotFoundError(path)
        size, mtime_ns, ino = self.files[path]
        return SimpleNamespace(st_size=size, st_mtime_ns=mtime_ns, st_ino=ino)

    def clock(self) -> float:
        return self.now


class TestSettleTracker:
    def make(self, settle=2.0, marker_for=None):
        fs = FakeFS()
        return fs, SettleTracker(settle, stat=fs.stat, clock=fs.clock, marker_for=marker_for)

    def test_unchanged_across_settle_time_is_finished(self):
        """Two looks with the same size/mtime/inode spanning settle_seconds → finished."""
        fs, t = self.make(settle=2.0)
        fs.files["/d/a.csv"] = (100, 1, 7)
        t.hint(Path("/d/a.csv"))
        assert t.look() == []
        fs.now = 1.0
        assert t.look() == []           # stable, but not for settle_seconds yet
        fs.now = 2.0
        assert t.look() == [Path("/d/a.csv")]
        assert len(t) == 0              # taken once, then forgotten
        fs.now = 5.0
        assert t.look() == []

    def test_growing_file_is_not_finished(self):
        """Each change of size or mtime restarts the settle clock."""
        fs, t = self.make(settle=2.0)
        t.hint(Path("/d/a.csv"))
        for i in range(10):
            fs.files["/d/a.csv"] = (100 * (i + 1), i, 7)
            fs.now = float(i)
            assert t.look() == []
        fs.now = 10.0
        assert t.look() == []
        fs.now = 11.0
        assert t.look() == [Path("/d/a.csv")]

    def test_same_size_new_mtime_or_inode_restarts(self):
        """A rewrite of the same size (new mtime) or a replaced file (new inode) is not yet settled."""
        fs, t = self.make(settle=1.0)
        fs.files["/d/a.csv"] = (100, 1, 7)
        t.hint(Path("/d/a.csv"))
        t.look()
        fs.now, fs.files["/d/a.csv"] = 1.0, (100, 2, 7)
        assert t.look() == []
        fs.now, fs.files["/d/a.csv"] = 2.0, (100, 2, 8)
        assert t.look() == []
        fs.now = 3.0
        assert t.look() == [Path("/d/a.csv")]

    def test_renamed_into_folder_is_taken_after_one_look(self):
        """A moved-to hint means the writer finished: one successful look is enough."""
        fs, t = self.make(settle=60.0)
        fs.files["/d/a.csv"] = (100, 1, 7)
        t.hint(Path("/d/a.csv"), moved=True)
        assert t.look() == [Path("/d/a.csv")]

    def test_changed_after_rename_settles_normally(self):
        """If a renamed file changes again, it falls back to the settle rule."""
        fs, t = self.make(settle=5.0)
        fs.files["/d/a.csv"] = (100, 1, 7)
        t.hint(Path("/d/a.csv"))
        assert t.look() == []
        fs.files["/d/a.csv"] = (200, 2, 7)
        t.hint(Path("/d/a.csv"), moved=True)
        fs.now = 1.0
        assert t.look() == []
        fs.now = 2.0
        assert t.look() == []
        fs.now = 6.0
        assert t.look() == [Path("/d/a.csv")]

    def test_vanished_candidate_is_dropped(self):
        """A candidate that disappears (renamed by its writer) leaves the list quietly."""
        fs, t = self.make()
        t.hint(Path("/d/a.csv"))
        assert t.look() == []
        assert len(t) == 0

    def test_marker_file_is_the_signal(self):
        """With a marker suffix, the file is finished when its marker exists, however fresh."""
        fs, t = self.make(settle=100.0, marker_for=lambda p: ".ok")
        fs.files["/d/a.csv"] = (100, 1, 7)
        t.hint(Path("/d/a.csv"))
        fs.now = 500.0
        assert t.look() == []  # stable for ages, but no marker
        fs.files["/d/a.csv.ok"] = (0, 1, 9)
        assert t.look() == [Path("/d/a.csv")]

    def test_trusted_mtime_counts_as_the_start_of_the_unchanged_span(self):
        """On a local disk an old mtime shortens the wait, but a second look is still needed."""
        fs = FakeFS()
        wall = {"t": 1000.0}
        t = SettleTracker(2.0, stat=fs.stat, clock=fs.clock, trust_mtime=True, wall_clock=lambda: wall["t"])
        fs.files["/d/a.csv"] = (100, int(997.0 * 1e9), 7)      # last written 3 s ago (wall clock)
        t.hint(Path("/d/a.csv"))
        assert t.look() == []                                   # one look is never enough
        fs.now, wall["t"] = 0.1, 1000.1
        assert t.look() == [Path("/d/a.csv")]

    def test_fresh_or_future_mtime_gets_no_credit(self):
        """A just-written file, or one with an mtime in the future, waits the full settle time."""
        for mtime in (999.5, 1005.0):
            fs = FakeFS()
            wall = {"t": 1000.0}
            t = SettleTracker(2.0, stat=fs.stat, clock=fs.clock, trust_mtime=True, wall_clock=lambda: wall["t"])
            fs.files["/d/a.csv"] = (100, int(mtime * 1e9), 7)
            t.hint(Path("/d/a.csv"))
            t.look()
            fs.now, wall["t"] = 1.0, 1001.0
            if mtime < 1000.0:
                assert t.look() == []                           # 1.5 s unchanged so far: not yet
                fs.now, wall["t"] = 1.6, 1001.6
                assert t.look() == [Path("/d/a.csv")]           # 2.1 s since the mtime
            else:
                assert t.look() == []
                fs.now = 2.0
                assert t.look() == [Path("/d/a.csv")]           # two looks 2 s apart, as without trust

    def test_hint_again_keeps_one_candidate(self):
        """Repeated hints for one path make one candidate and one finished result."""
        fs, t = self.make(settle=0.0)
        fs.files["/d/a.csv"] = (1, 1, 1)
        for _ in range(5):
            t.hint(Path("/d/a.csv"))
        t.look()
        assert t.look() == [Path("/d/a.csv")]
        assert t.look() == []


# --- real observers ------------------------------------------------------------------------------
def collect_hints():
    seen: list[tuple[Path, bool]] = []
    lock = threading.Lock()

    def on_hint(path: Path, moved: bool) -> None:
        with lock:
            seen.append((path, moved))

    return seen, on_hint


@pytest.mark.parametrize("polling", [False, True], ids=["native", "polling"])
def test_real_observer_hints_created_and_renamed_files(tmp_path, polling):
    """Both observers report a written file and a temp file renamed into place (created == moved-to)."""
    seen, on_hint = collect_hints()
    w = FolderWatcher(tmp_path, polling=polling, poll_interval=0.1, on_hint=on_hint)
    w.start()
    try:
        assert w.is_alive()
        (tmp_path / "a.csv").write_text("lot,value\nA,1\n")
        tmp = tmp_path / "b.csv.tmp"
        tmp.write_text("lot,value\nB,1\n")
        os.rename(tmp, tmp_path / "b.csv")
        assert wait_for(lambda: {tmp_path / "a.csv", tmp_path / "b.csv"} <= {p for p, _ in seen})
        if not polling:
            assert (tmp_path / "b.csv", True) in seen  # native inotify reports the rename as moved-to
    finally:
        w.stop()
    assert not w.is_alive()


def test_observer_survives_a_failing_hint_callback(tmp_path):
    """An exception in the callback is logged; the observer thread keeps running."""
    calls: list[Path] = []

    def on_hint(path: Path, moved: bool) -> None:
        calls.append(path)
        raise RuntimeError("boom")

    w = FolderWatcher(tmp_path, polling=False, poll_interval=0.1, on_hint=on_hint)
    w.start()
    try:
        (tmp_path / "a.csv").write_text("x")
        assert wait_for(lambda: calls)
        (tmp_path / "b.csv").write_text("x")
        assert wait_for(lambda: tmp_path / "b.csv" in calls)
        assert w.is_alive()
    finally:
        w.stop()


def test_dead_observer_is_detected_and_restarted(tmp_path):
    """After the observer thread dies, is_alive() is False and restart() brings hints back."""
    seen, on_hint = collect_hints()
    w = FolderWatcher(tmp_path, polling=False, poll_interval=0.1, on_hint=on_hint)
    w.start()
    try:
        w._observer.stop()        # simulate a dead observer thread
        w._observer.join(5)
        assert not w.is_alive()
        w.restart()
        assert w.is_alive()
        (tmp_path / "late.csv").write_text("x")
        assert wait_for(lambda: tmp_path / "late.csv" in {p for p, _ in seen})
    finally:
        w.stop()


def test_removed_folder_counts_as_dead_and_restart_recovers(tmp_path):
    """If the watched folder is removed, the emitter stops: is_alive() says so; restart() works once it is back."""
    folder = tmp_path / "drop"
    folder.mkdir()
    seen, on_hint = collect_hints()
    w = FolderWatcher(folder, polling=False, poll_interval=0.1, on_hint=on_hint)
    w.start()
    try:
        folder.rmdir()
        assert wait_for(lambda: not w.is_alive())
        with pytest.raises(OSError):
            w.restart()                      # still missing: the caller logs and retries later
        folder.mkdir()
        w.restart()
        assert w.is_alive()
        (folder / "back.csv").write_text("x")
        assert wait_for(lambda: folder / "back.csv" in {p for p, _ in seen})
    finally:
        w.stop()


@pytest.mark.parametrize("polling", [False, True], ids=["native", "polling"])
def test_slowly_written_file_is_taken_once_when_finished(tmp_path, polling):
    """A file written in chunks over longer than settle_seconds is taken once, after its last byte."""
    settle = 0.4
    tracker = SettleTracker(settle)
    names = NameFilter(include=("*.csv",))

    def on_hint(path: Path, moved: bool) -> None:
        target = names.export_for(path)
        if target is not None:
            tracker.hint(target, moved)

    w = FolderWatcher(tmp_path, polling=polling, poll_interval=0.1, on_hint=on_hint)
    target = tmp_path / "slow.csv"
    chunks = [f"A,{500 + i}.0\n".encode() for i in range(8)]
    done_writing = threading.Event()
    finished_at: dict[str, float] = {}

    def writer():
        with open(target, "wb") as fh:
            fh.write(b"lot,value\n")
            fh.flush()
            for c in chunks:
                time.sleep(0.15)   # pauses shorter than settle, total longer than settle
                fh.write(c)
                fh.flush()
        finished_at["t"] = time.monotonic()
        done_writing.set()

    w.start()
    taken: list[tuple[Path, int, float]] = []
    th = threading.Thread(target=writer)
    try:
        th.start()
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and not (taken and done_writing.is_set()):
            for p in tracker.look():
                taken.append((p, p.stat().st_size, time.monotonic()))
            time.sleep(0.03)
        # keep looking a little longer: it must not be taken again
        end = time.monotonic() + settle * 2
        while time.monotonic() < end:
            for p in tracker.look():
                taken.append((p, p.stat().st_size, time.monotonic()))
            time.sleep(0.03)
    finally:
        th.join()
        w.stop()
    assert [p for p, _, _ in taken] == [target]
    assert taken[0][1] == len(b"lot,value\n") + sum(len(c) for c in chunks)
    assert taken[0][2] >= finished_at["t"] + settle * 0.9
