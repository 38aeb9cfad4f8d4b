"""Settle tracker export order: finished files come out in name order and wait (bounded) for smaller names."""

from __future__ import annotations

import logging
import os
from pathlib import Path
from types import SimpleNamespace
from typing import cast

import pytest

from monitor.daemon.watcher import SettleTracker, hold_limit


class FakeFS:
    """A table of (size, mtime_ns, inode) per path and a settable clock: the tracker's only inputs."""

    def __init__(self) -> None:
        self.now = 0.0
        self.files: dict[str, tuple[int, int, int]] = {}

    def stat(self, path: str) -> os.stat_result:
        if path not in self.files:
            raise FileNotFoundError(path)
        size, mtime_ns, ino = self.files[path]
        return cast(os.stat_result, SimpleNamespace(st_size=size, st_mtime_ns=mtime_ns, st_ino=ino))

    def clock(self) -> float:
        return self.now


def test_finished_files_come_out_sorted_by_name() -> None:
    """Files renamed in together, hinted in any order, are handed out in name order."""
    fs = FakeFS()
    t = SettleTracker(2.0, stat=fs.stat, clock=fs.clock)
    for name in ("L1-0003.csv", "L1-0001.csv", "L1-0002.csv"):
        fs.files[f"/d/{name}"] = (10, 1, hash(name) % 1000)
        t.hint(Path(f"/d/{name}"), moved=True)
    assert [p.name for p in t.look()] == ["L1-0001.csv", "L1-0002.csv", "L1-0003.csv"]


def test_a_renamed_file_waits_for_a_smaller_name_still_being_written() -> None:
    """0002 is renamed in (finished at once) while 0001 still grows: 0002 waits, then both come in order."""
    fs = FakeFS()
    t = SettleTracker(2.0, stat=fs.stat, clock=fs.clock)
    fs.files["/d/L1-0001.csv"] = (100, 1, 1)
    t.hint(Path("/d/L1-0001.csv"))
    assert t.look() == []
    fs.files["/d/L1-0002.csv"] = (500, 2, 2)
    t.hint(Path("/d/L1-0002.csv"), moved=True)
    for i in range(1, 6):                       # 0001 grows every second: never settled meanwhile
        fs.now = float(i)
        fs.files["/d/L1-0001.csv"] = (100 + 10 * i, 1 + i, 1)
        assert t.look() == []
    fs.now = 6.0
    assert t.look() == []                       # 0001 unchanged for 1 s of 2
    fs.now = 7.5
    assert [p.name for p in t.look()] == ["L1-0001.csv", "L1-0002.csv"]
    assert len(t) == 0


def test_a_larger_name_still_being_written_holds_nothing_back() -> None:
    """Only smaller names hold a file: 0001 finished goes on while 0002 is being written."""
    fs = FakeFS()
    t = SettleTracker(2.0, stat=fs.stat, clock=fs.clock)
    fs.files["/d/L1-0002.csv"] = (100, 1, 2)
    t.hint(Path("/d/L1-0002.csv"))
    fs.files["/d/L1-0001.csv"] = (100, 1, 1)
    t.hint(Path("/d/L1-0001.csv"), moved=True)
    assert [p.name for p in t.look()] == ["L1-0001.csv"]


def test_the_wait_is_bounded_and_said_once(caplog: pytest.LogCaptureFixture) -> None:
    """A smaller name that never settles holds a finished file at most hold_seconds; the log says it once and
    later files no longer wait for it."""
    fs = FakeFS()
    t = SettleTracker(1.0, stat=fs.stat, clock=fs.clock, hold_seconds=10.0)
    fs.files["/d/a.csv"] = (1, 1, 1)
    t.hint(Path("/d/a.csv"))
    fs.files["/d/b.csv"] = (1, 1, 2)
    t.hint(Path("/d/b.csv"), moved=True)
    out: list[str] = []
    with caplog.at_level(logging.WARNING, logger="lotwarden.watcher"):
        for i in range(0, 24):
            fs.now = i * 0.5
            fs.files["/d/a.csv"] = (1 + i, 1 + i, 1)       # a.csv grows forever
            got = [p.name for p in t.look()]
            out += [f"{fs.now}:{n}" for n in got]
            if i == 22:
                fs.files["/d/c.csv"] = (1, 1, 3)
                t.hint(Path("/d/c.csv"), moved=True)
    assert out == ["10.0:b.csv", "11.5:c.csv"]             # b held 10 s; c, arriving later, not held at all
    said = [r for r in caplog.records if "a.csv" in r.getMessage()]
    assert len(said) == 1 and "name (export) order" in said[0].getMessage()


def test_a_held_file_that_changes_settles_again() -> None:
    """A renamed file that changes while held is no longer finished: it settles like any other file."""
    fs = FakeFS()
    t = SettleTracker(2.0, stat=fs.stat, clock=fs.clock)
    fs.files["/d/a.csv"] = (1, 1, 1)
    t.hint(Path("/d/a.csv"))
    fs.files["/d/b.csv"] = (1, 1, 2)
    t.hint(Path("/d/b.csv"), moved=True)
    assert t.look() == []
    fs.now, fs.files["/d/b.csv"] = 1.0, (2, 2, 2)
    assert t.look() == []
    fs.now = 3.0                                # a.csv settled (unchanged since 0); b.csv only for 2 s
    assert [p.name for p in t.look()] == ["a.csv", "b.csv"]


def test_default_bound() -> None:
    """max(60 s, 10 × settle_seconds)."""
    assert hold_limit(0.5) == 60.0 and hold_limit(30.0) == 300.0
