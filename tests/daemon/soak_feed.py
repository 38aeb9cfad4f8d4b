"""The kill soak's parts: invented exports of several lines with an independent hold expectation, an SMTP inbox
on loopback, and a `lotwarden run` subprocess that can be SIGKILLed."""

from __future__ import annotations

import asyncio
import email
import hashlib
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats

HEADER = "timestamp,line,product,lot,head,value,unit\n"
TARGET = 500.0          # the rule written by plant.make_plant: OAT-500, target 500 g, two-sided, alpha 0.05
ALPHA = 0.05
ALERT_MARK = "soak-alert"
# Operator templates (the documented `[alerts] templates` override) that list each alert of a message on a
# line of its own, so the inbox can be counted per alert.
TEMPLATES = {
    "hold.body.txt": "{% for it in alerts %}" + ALERT_MARK + " {{ it.kind }} {{ it.dedup_key }}\n{% endfor %}",
    "group.body.txt": "{% for it in alerts %}" + ALERT_MARK + " {{ it.kind }} {{ it.dedup_key }}\n{% endfor %}",
}


@dataclass(frozen=True)
class Lot:
    """One invented lot: its line, code, the values written and whether it was drifted."""

    line: str
    code: str
    values: tuple[float, ...]
    drifted: bool


@dataclass
class Feed:
    """The exports of a soak run, in drop order, and the lots they hold."""

    files: list[tuple[str, bytes]] = field(default_factory=list)
    lots: list[Lot] = field(default_factory=list)
    last_lot: dict[str, str] = field(default_factory=dict)   # per line: the lot left open at the end

    def closed_lots(self) -> list[Lot]:
        return [lot for lot in self.lots if self.last_lot[lot.line] != lot.code]


def draw_lot(rng: np.random.Generator, drifted: bool) -> tuple[float, ...]:
    """Normal values with a clear verdict: Shapiro-Wilk well above any gate, and a t-test p-value far from
    alpha (a drifted lot below 1e-6, an on-target lot above 0.3), so the expectation is not borderline."""
    while True:
        n = int(rng.integers(12, 21))
        shift = float(rng.choice([-1.0, 1.0])) * float(rng.uniform(4.0, 7.0)) if drifted else 0.0
        vals = np.round(rng.normal(TARGET + shift, 1.5, n), 2)
        p_t = stats.ttest_1samp(vals, TARGET).pvalue       # scipy.stats, the independent reference
        p_sw = stats.shapiro(vals).pvalue
        if p_sw > 0.2 and ((drifted and p_t < 1e-6) or (not drifted and p_t > 0.3)):
            return tuple(float(v) for v in vals)


def make_feed(seed: int, lines: int = 4, files_per_line: int = 80, drift_share: float = 0.3) -> Feed:
    """Lines L1.. each with a stream of lots cut into files of 3-12 rows, so lots span files and files span
    lots; files of the lines interleaved, each line's files in export order."""
    rng = np.random.default_rng(seed)
    feed = Feed()
    per_line: list[list[tuple[str, bytes]]] = []
    for li in range(1, lines + 1):
        line = f"L{li}"
        rows: list[str] = []
        k = 0
        # enough lots for files_per_line files of at most 12 rows
        while len(rows) < files_per_line * 12:
            k += 1
            values = draw_lot(rng, bool(rng.random() < drift_share))
            # the expectation, from scipy.stats.ttest_1samp on the values as written (two-sided, alpha 0.05)
            lot = Lot(line, f"{line}-K{k:03d}", values,
                      drifted=bool(stats.ttest_1samp(values, TARGET).pvalue < ALPHA))
            feed.lots.append(lot)
            for v in lot.values:
                t = len(rows)
                rows.append(f"2026-11-30T{6 + t // 3600:02d}:{t // 60 % 60:02d}:{t % 60:02d},{line},OAT-500,"
                            f"{lot.code},H{1 + t % 4},{v!r},g\n")
        files: list[tuple[str, bytes]] = []
        pos = 0
        for f in range(files_per_line):
            take = int(rng.integers(3, 13))
            files.append((f"{line}-{f:04d}.csv", (HEADER + "".join(rows[pos:pos + take])).encode()))
            pos += take
        # lots whose values were never written are dropped from the expectation; the lot of the last row
        # written stays open (no next lot arrives on its line), and its tail beyond the last file is cut
        used = rows[:pos]
        seen = {r.split(",")[3] for r in used}
        last = used[-1].split(",")[3]
        feed.lots = [lt for lt in feed.lots if lt.line != line or lt.code in seen]
        n_last = sum(1 for r in used if r.split(",")[3] == last)
        feed.lots = [lt if lt.code != last else Lot(lt.line, lt.code, lt.values[:n_last], lt.drifted)
                     for lt in feed.lots]
        feed.last_lot[line] = last
        per_line.append(files)
    # interleave: a random line's next file each time
    idx = [0] * lines
    while any(i < len(per_line[j]) for j, i in enumerate(idx)):
        j = int(rng.choice([j for j in range(lines) if idx[j] < len(per_line[j])]))
        feed.files.append(per_line[j][idx[j]])
        idx[j] += 1
    return feed


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Inbox:
    """The aiosmtpd handler: every message received, as (Message-ID, [(kind, dedup_key), ...]).

    ``stall_every``: every so many messages, the server keeps the message and waits ``stall_seconds`` before
    it answers (a slow server: a kill then falls between the send and its record more often).
    ``stall_on_hold``: the first message with a hold is kept and answered only after ``stall_seconds``.
    """

    def __init__(self, stall_every: int = 0, stall_seconds: float = 0.0, stall_on_hold: bool = False) -> None:
        self.messages: list[tuple[str, list[tuple[str, str]]]] = []
        self.lock = threading.Lock()
        self.stall_every = stall_every
        self.stall_seconds = stall_seconds
        self.stall_on_hold = stall_on_hold
        self.stalled = threading.Event()      # a stall has begun (once set, stays set)
        self.in_stall = threading.Event()     # a message is held unanswered right now
        self.stalls = 0                       # stalls begun so far

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        msg = email.message_from_bytes(envelope.original_content or envelope.content)
        text = ""
        for part in msg.walk():
            if part.get_content_type() == "text/plain":
                payload = part.get_payload(decode=True)
                text = payload.decode("utf-8", "replace") if isinstance(payload, bytes) else ""
                break
        items = [(w[1], w[2]) for w in (ln.split() for ln in text.splitlines()) if len(w) == 3
                 and w[0] == ALERT_MARK]
        with self.lock:
            self.messages.append((str(msg["Message-ID"]).strip(), items))
            count = len(self.messages)
        stall = ((self.stall_every and count % self.stall_every == 0)
                 or (self.stall_on_hold and not self.stalled.is_set() and any(k == "hold" for k, _ in items)))
        if stall:
            self.stalled.set()
            self.stalls += 1
            self.in_stall.set()
            try:
                await asyncio.sleep(self.stall_seconds)
            finally:
                self.in_stall.clear()
        return "250 OK"

    def snapshot(self) -> list[tuple[str, list[tuple[str, str]]]]:
        with self.lock:
            return list(self.messages)


class Daemon:
    """One `lotwarden run` subprocess, its stderr appended to a log file."""

    def __init__(self, cfg: Path, log: Path) -> None:
        self.log = log
        self.offset = log.stat().st_size if log.exists() else 0
        self.fh = open(log, "ab")  # noqa: SIM115 (lives as long as the process writing to it)
        self.p = subprocess.Popen([sys.executable, "-m", "monitor", "run", "--config", str(cfg)],
                                  stdout=subprocess.DEVNULL, stderr=self.fh, env=dict(os.environ))

    def text(self) -> str:
        return self.log.read_bytes()[self.offset:].decode("utf-8", "replace")

    def kill(self) -> None:
        self.p.send_signal(signal.SIGKILL)
        self.p.wait(10)
        self.fh.close()

    def terminate(self, timeout: float = 20) -> int:
        self.p.send_signal(signal.SIGTERM)
        rc = self.p.wait(timeout)
        self.fh.close()
        return rc

    def ensure_dead(self) -> None:
        if self.p.poll() is None:
            self.p.kill()
            self.p.wait(10)
        if not self.fh.closed:
            self.fh.close()


def query(db: Path, sql: str, *args: object) -> list[tuple[Any, ...]]:
    """Rows of ``sql`` on the daemon's state file, read-only; [] before the schema exists."""
    if not db.exists():
        return []
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10)
    try:
        return conn.execute(sql, args).fetchall()
    except sqlite3.OperationalError:
        return []
    finally:
        conn.close()


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()
