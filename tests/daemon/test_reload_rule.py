"""The reload decision as a pure function: a changed picture is reloaded once two checks agree on it."""

from __future__ import annotations

from monitor.daemon.reload import Fingerprint, decide_reload

A = Fingerprint(stats=(("cfg", 10, 1), ("a.toml", 5, 1)), rule_names=frozenset({"a.toml"}))
B = Fingerprint(stats=(("cfg", 10, 1), ("a.toml", 6, 2)), rule_names=frozenset({"a.toml"}))
GONE = Fingerprint(stats=(("cfg", 10, 1),), rule_names=frozenset())


def test_unchanged_picture_does_nothing() -> None:
    """The picture in force, seen again, needs no reload."""
    assert decide_reload(A, applied=A, seen=A, forced=False).action == "none"


def test_a_change_waits_for_a_second_look() -> None:
    """A file still being written is not reloaded on the first look at its new state."""
    assert decide_reload(B, applied=A, seen=A, forced=False).action == "wait"
    assert decide_reload(B, applied=A, seen=B, forced=False).action == "reload"


def test_a_vanished_rule_file_is_not_dropped_without_sighup() -> None:
    """A rule file gone (an editor's save-by-rename, or a slip) keeps the old rule until SIGHUP says so."""
    step = decide_reload(GONE, applied=A, seen=GONE, forced=False)
    assert step.action == "refuse-removal" and step.missing == ("a.toml",)
    assert decide_reload(GONE, applied=A, seen=None, forced=True).action == "reload"
