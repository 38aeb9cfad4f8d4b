"""The one file-name filter: which names in a folder are exports, for the daemon and for `check DIR`."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from monitor.daemon import archive
from monitor.daemon.watcher import NameFilter, scan
from monitor.names import export_files, is_export_name


@pytest.mark.parametrize("name", [
    "a.csv.done",            # marker file a writer drops when a.csv is complete (common practice, no source)
    "a.csv.DONE",            # letter case does not matter
    "a.csv.ready",
    "b.csv.reason.txt",      # what the daemon writes beside a quarantined file
    ".a.csv",                # hidden
    ".a.csv.partial",        # the daemon's own copy while it archives across file systems
    "a.csv.tmp", "a.csv.part", "a.csv.partial", "a.csv.crdownload", "~a.csv", "a.csv~", "a.csv.swp",
    "a.csv.filepart", "a.csv.lock",   # names writers use while a file is unfinished (common practice, no source)
    "",
])
def test_not_exports(name: str) -> None:
    """Markers, reason files, hidden and temporary names are never exports."""
    assert is_export_name(name) is False


@pytest.mark.parametrize("name", ["a.csv", "L1_OAT-500_20261201.CSV", "export.txt", "done.csv", "reason.txt.csv",
                                  "a.csv.1", "x.tsv"])
def test_exports(name: str) -> None:
    """Ordinary export names pass, also ones that merely contain a marker word."""
    assert is_export_name(name) is True


def test_a_profile_marker_suffix_is_skipped_too() -> None:
    """A feed profile's own marker suffix is a marker name as well."""
    assert is_export_name("a.csv.eot") is True
    assert is_export_name("a.csv.eot", (".eot",)) is False


def test_the_reason_file_the_daemon_writes_is_skipped(tmp_path: Path) -> None:
    """The reason file archive.write_reason really writes is refused by the filter (no name copied by hand)."""
    target = tmp_path / "L1.csv"
    target.write_text("lot,value\n")
    reason = archive.write_reason(target, "bad header")
    assert reason.exists() and not is_export_name(reason.name)
    assert export_files(tmp_path) == [target]


def test_export_files_regular_files_in_name_order(tmp_path: Path) -> None:
    """export_files lists regular files that pass the filter, by name; folders, links and FIFOs are left out."""
    for name in ("b.csv", "a.csv", "c.txt", "a.csv.done", "b.csv.reason.txt", ".hidden.csv", "d.csv.tmp"):
        (tmp_path / name).write_text("x\n")
    (tmp_path / "sub.csv").mkdir()
    os.symlink(tmp_path / "a.csv", tmp_path / "link.csv")
    os.mkfifo(tmp_path / "pipe.csv")
    assert [p.name for p in export_files(tmp_path)] == ["a.csv", "b.csv", "c.txt"]


def test_the_watcher_uses_the_same_filter(tmp_path: Path) -> None:
    """The daemon's NameFilter and scan refuse what is_export_name refuses, even with include = "*"."""
    names = NameFilter(include=("*",))
    for name in ("a.csv.done", "b.csv.reason.txt", ".a.csv", "a.csv.part"):
        assert not names.accepts(name), name
        (tmp_path / name).write_text("x\n")
    (tmp_path / "a.csv").write_text("x\n")
    assert scan(tmp_path, names) == [tmp_path / "a.csv"]
    # a hint about a built-in marker concerns no export (the profile names no such suffix)
    assert names.export_for(tmp_path / "a.csv.done") is None
