"""A real `lotwarden run` over a small two-line plant, for the record commands' tests (lots, show, dispose,
report): the daemon takes the exports, judges the lots, is stopped with SIGTERM, and its state is what the
commands read. The numbers are test data of our own; tests compute what they expect from ``RecordRun.values``
independently of lotwarden (Python's statistics, scipy)."""

from __future__ import annotations

import math
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
from dataclasses import dataclass, field
from pathlib import Path
from statistics import NormalDist

from monitor.polling import wait_until

HEADER = "timestamp,line,product,lot,head,value,unit\n"
TARGET, NOMINAL, COST, CURRENCY = 502.0, 500.0, 0.004, "EUR"
RULE = f"""\
name = "oat-500"
products = ["OAT-500"]
target = {TARGET}
unit = "g"
nominal = {NOMINAL}
alternative = "two-sided"
alpha = 0.05
min_n = 5
idle_minutes = 600
cost_per_unit = {COST}
currency = "{CURRENCY}"
"""
HEADS = ("H1", "H2", "H3", "H4")


def _values(centre: float, n: int, spread: float = 0.6, drift_head: str | None = None,
            drift: float = 0.0) -> list[tuple[str, float]]:
    """``n`` (head, value) pairs around ``centre``: the normal distribution's quantiles at (i + 0.5) / n in a
    fixed shuffled order (no randomness), heads in turn; the values of ``drift_head`` are ``drift`` higher."""
    z = [NormalDist().inv_cdf((i + 0.5) / n) for i in range(n)]
    step = next(s for s in (7, 5, 3, 1) if math.gcd(s, n) == 1)
    out = []
    for i in range(n):
        head = HEADS[i % len(HEADS)]
        v = centre + spread * z[(i * step) % n] + (drift if head == drift_head else 0.0)
        out.append((head, round(v, 2)))
    return out


# (line, lot) -> (head, value) pairs, in export order. Expected verdicts (checked by the tests from the
# numbers, not taken from here): A1 on target, A2 low (hold), A3 three packs (review: below min_n 5),
# B1 on target, B2 0.7 g high with head H3 0.6 g higher still (hold). Z1 / Z2 stay open (no next lot closes them).
LOTS: dict[tuple[str, str], list[tuple[str, float]]] = {
    ("L1", "A1"): _values(502.0, 24),
    ("L1", "A2"): _values(499.6, 24),
    ("L1", "A3"): _values(502.0, 3),
    ("L1", "Z1"): _values(502.0, 2),
    ("L2", "B1"): _values(502.0, 32),
    ("L2", "B2"): _values(502.7, 32, drift_head="H3", drift=0.6),
    ("L2", "Z2"): _values(502.0, 2),
}
CLOSED = [k for k in LOTS if not k[1].startswith("Z")]


@dataclass
class RecordRun:
    """The plant after the daemon ran: its config, database and what was exported."""

    root: Path
    config: Path
    db: Path
    values: dict[tuple[str, str], list[float]] = field(default_factory=dict)
    heads: dict[tuple[str, str], list[str]] = field(default_factory=dict)
    stderr: str = ""


def write_plant(root: Path, *, extra: str = "") -> Path:
    """rules/oat-500.toml, drop/ and lotwarden.toml (alert log, quick rescans; ``extra`` appended)."""
    for d in ("drop", "rules"):
        (root / d).mkdir(parents=True, exist_ok=True)
    (root / "rules" / "oat-500.toml").write_text(RULE, encoding="utf-8")
    cfg = root / "lotwarden.toml"
    cfg.write_text(textwrap.dedent("""\
        rules_dir = "rules"
        timezone = "Europe/Berlin"

        [watch]
        folder = "drop"
        settle_seconds = 0.1
        poll_interval = 0.1
        rescan_seconds = 1.0

        [alerts]
        drain_seconds = 0.2

        [alerts.log]
        path = "alerts.jsonl"

        [state]
        folder = "state"
        """) + textwrap.dedent(extra), encoding="utf-8")
    return cfg


def export_text(line: str) -> str:
    """One export of every lot of ``line``, in LOTS order, a timestamp a second from 06:00 on 2026-11-30."""
    rows, i = [HEADER], 0
    for (ln, lot), pairs in LOTS.items():
        if ln != line:
            continue
        for head, v in pairs:
            rows.append(f"2026-11-30T06:{i // 60:02d}:{i % 60:02d},{line},OAT-500,{lot},{head},{v!r},g\n")
            i += 1
    return "".join(rows)


def count_verdicts(db: Path) -> int:
    if not db.exists():
        return 0
    try:
        conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10)
        try:
            return int(conn.execute("SELECT count(*) FROM verdicts").fetchone()[0])
        finally:
            conn.close()
    except sqlite3.OperationalError:
        return 0


class Daemon:
    """A `lotwarden run` subprocess with its stderr in a file; stop() sends SIGTERM and waits."""

    def __init__(self, cfg: Path, env: dict[str, str] | None = None) -> None:
        self.log = cfg.parent / "daemon.stderr"
        self.fh = open(self.log, "ab")
        self.p = subprocess.Popen([sys.executable, "-m", "monitor", "run", "--config", str(cfg)],
                                  stdout=subprocess.DEVNULL, stderr=self.fh, env={**os.environ, **(env or {})})

    def text(self) -> str:
        return self.log.read_bytes().decode("utf-8", "replace")

    def wait_started(self, timeout: float = 30) -> None:
        assert wait_until(lambda: " started:" in self.text() or self.p.poll() is not None, timeout), self.text()
        assert self.p.poll() is None, self.text()

    def stop(self, timeout: float = 20) -> int:
        if self.p.poll() is None:
            self.p.send_signal(signal.SIGTERM)
        try:
            return self.p.wait(timeout)
        finally:
            if self.p.poll() is None:
                self.p.kill()
                self.p.wait(10)
            self.fh.close()


def drop_exports(root: Path) -> None:
    """Write both lines' exports into the drop folder (written beside it, then renamed in)."""
    for line in ("L1", "L2"):
        tmp = root / f".{line}.tmp"
        tmp.write_text(export_text(line), encoding="utf-8")
        os.replace(tmp, root / "drop" / f"{line}-2026-11-30.csv")


def run_plant(root: Path, *, extra: str = "", keep_running: bool = False) -> tuple[RecordRun, Daemon | None]:
    """Write the plant, run the daemon until every closed lot has its verdict, stop it (unless
    ``keep_running``: the caller stops the returned daemon)."""
    cfg = write_plant(root, extra=extra)
    daemon = Daemon(cfg)
    run = RecordRun(root=root, config=cfg, db=root / "state" / "lotwarden.db")
    try:
        daemon.wait_started()
        drop_exports(root)
        assert wait_until(lambda: count_verdicts(run.db) >= len(CLOSED), 60), daemon.text()
    except BaseException:
        daemon.stop()
        raise
    if not keep_running:
        daemon.stop()
        run.stderr = daemon.text()
    for key, pairs in LOTS.items():
        run.heads[key] = [h for h, _ in pairs]
        run.values[key] = [v for _, v in pairs]
    return run, (daemon if keep_running else None)
