"""The daemon's wiring: one record of parts, a new record swapped in on reload, our own modules required."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

from plant import HEADER, csv_rows, make_plant
from test_service import (
    Running,
    _no_leaked_threads,  # noqa: F401  (autouse fixture: no threads left running)
    count,
    wait_for,
    write_atomically,
)


def test_reload_swaps_in_a_new_record_rebuilding_only_what_changed(tmp_path: Path) -> None:
    """An [alerts] edit brings a new dispatcher and keeps the observer; a [watch] edit brings a new observer
    and keeps the dispatcher; files dropped after each swap are still taken."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    with Running(cfg, reload_check_seconds=0.1) as r:
        first = r.daemon.components
        assert first.dispatcher is not None and first.config.alerts.drain_seconds == 0.2
        write_atomically(cfg, cfg.read_text().replace("drain_seconds = 0.2", "drain_seconds = 0.3"))
        assert wait_for(lambda: r.daemon.components is not first, 10), r.log.getvalue()
        second = r.daemon.components
        assert second.config.alerts.drain_seconds == 0.3
        assert second.dispatcher is not first.dispatcher
        assert second.watching is first.watching
        write_atomically(cfg, cfg.read_text().replace("settle_seconds = 0.2", "settle_seconds = 0.3"))
        assert wait_for(lambda: r.daemon.components is not second, 10), r.log.getvalue()
        third = r.daemon.components
        assert third.config.watch.settle_seconds == 0.3 and third.watching.tracker.settle_seconds == 0.3
        assert third.watching is not second.watching and third.dispatcher is second.dispatcher
        assert not second.watching.watcher.is_alive() and third.watching.watcher.is_alive()
        write_atomically(tmp_path / "drop" / "after.csv", HEADER + csv_rows("L1", "W1", [500.0, 500.2]))
        assert wait_for(lambda: count(db, "SELECT count(*) FROM files WHERE state = 'done'") == 1, 10)
        assert wait_for(lambda: "daemon-started" in (tmp_path / "alerts.jsonl").read_text(), 10)


def test_a_missing_module_of_ours_stops_the_start_loudly(tmp_path: Path) -> None:
    """With the alert dispatcher's module missing, `lotwarden run` does not carry on without alert channels:
    it exits non-zero naming the module, before taking the file waiting in the drop folder."""
    cfg = make_plant(tmp_path)
    (tmp_path / "drop" / "waiting.csv").write_text(HEADER + csv_rows("L1", "X1", [500.0, 500.2]))
    code = ("import sys; sys.modules['monitor.alerts.dispatch'] = None\n"   # the module cannot be imported
            "from monitor.cli import main\n"
            f"sys.exit(main(['run', '--config', {str(cfg)!r}]))\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                          cwd=tmp_path)
    assert done.returncode != 0, done.stderr
    assert "monitor.alerts.dispatch" in done.stderr and "Error" in done.stderr
    assert "started:" not in done.stderr
    assert (tmp_path / "drop" / "waiting.csv").exists() and not (tmp_path / "state").exists()
