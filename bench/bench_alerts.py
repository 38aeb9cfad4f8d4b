"""Alert delivery figures: a burst of held lots drained to a real SMTP server on 127.0.0.1.

Reports messages sent (per recipient), seconds to drain the burst by e-mail, and peak memory, each set
against a baseline measured in the same run: draining the same burst to the JSON-lines log only.
Each drain runs in a forked child so that its peak RSS is its own.
Run: ``python bench/bench_alerts.py [--lots 500]``.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import resource
import socket
import sys
import tempfile
import time
from collections import Counter
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from monitor.alerts.alert import Alert
from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, EmailSettings, LogSettings, Route
from monitor.state import outbox
from monitor.state.database import Database

LINES = {"L1": ("JAM-340", 340.0), "L2": ("OAT-500", 500.0), "L3": ("JUICE-1L", 1000.0)}
T0 = 1_796_162_400.0


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def burst(n: int, seed: int = 20261201) -> list[Alert]:
    """``n`` invented hold alerts for the Brackenfield Foods lines, 40 values each."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        line = ("L1", "L2", "L3")[i % 3]
        product, target = LINES[line]
        values = np.round(rng.normal(target * 0.994, target * 0.002, 40), 2)
        mean, sd = float(values.mean()), float(values.std(ddof=1))
        half = 2.023 * sd / np.sqrt(40)
        data = {"files": [f"exports/{line}-{i:04d}.csv"], "line": line, "product": product, "lot": f"B{i:04d}",
                "rule": product.lower(), "rule_version": "b1", "n": 40, "mean": mean, "sd": sd, "target": target,
                "unit": "g" if line != "L3" else "mL", "alternative": "two-sided", "alpha": 0.05, "test": "t",
                "statistic": (mean - target) / (sd / np.sqrt(40)), "df": 39.0, "p_value": 1e-9,
                "ci_low": mean - half, "ci_high": mean + half,
                "normality": {"test": "shapiro", "statistic": 0.98, "p_value": 0.6, "passed": True, "note": ""},
                "power": 0.99, "n_for_power": 9, "verdict": "hold", "reason": "mean below target", "heads": [],
                "values": values.tolist()}
        out.append(Alert(kind="hold", dedup_key=f"hold|{line}|{product}|B{i:04d}|b1",
                         created_at=datetime.fromtimestamp(T0, UTC).isoformat(), data=data, line=line,
                         product=product, lot=f"B{i:04d}"))
    return out


def fill(folder: Path, alerts: list[Alert], channels: tuple[str, ...]) -> Path:
    """A state database in ``folder`` (built the daemon's way) holding ``alerts`` for ``channels``; its path."""
    with Database.open(folder) as db:
        with db.write() as conn:
            for a in alerts:
                outbox.enqueue(conn, a, channels)
        return db.path


def drain_all(db: Path, settings: AlertSettings) -> float:
    """Seconds to drain everything (the grouping window has already passed)."""
    d = Dispatcher(db, settings, seed=1)
    t = time.perf_counter()
    try:
        now = T0 + settings.group_window_seconds + 1
        while d.drain(now=now):
            now += 1
    finally:
        d.close()
    return time.perf_counter() - t


def _child(db: Path, settings: AlertSettings, conn) -> None:
    conn.send(drain_all(db, settings))
    conn.send(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)
    conn.close()


def drain_in_child(db: Path, settings: AlertSettings) -> tuple[float, float]:
    """Drain in a forked child (so its peak RSS is its own): (seconds, peak RSS MiB)."""
    ctx = mp.get_context("fork")
    parent, child = ctx.Pipe()
    proc = ctx.Process(target=_child, args=(db, settings, child))
    proc.start()
    seconds, peak = parent.recv(), parent.recv()
    proc.join()
    return seconds, peak


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--lots", type=int, default=500)
    args = ap.parse_args(argv)
    from aiosmtpd.controller import Controller

    received: list[tuple[str, list[str], int]] = []

    class Sink:
        async def handle_DATA(self, server, session, envelope):
            received.append((envelope.mail_from, list(envelope.rcpt_tos), len(envelope.content)))
            return "250 OK"

    alerts = burst(args.lots)
    port = free_port()
    ctl = Controller(Sink(), hostname="127.0.0.1", port=port)
    ctl.start()
    try:
        with tempfile.TemporaryDirectory() as tmp:
            root = Path(tmp)
            base_db = fill(root / "baseline", alerts, ("log",))
            mail_db = fill(root / "mail", alerts, ("email",))
            base_s, base_peak = drain_in_child(base_db, AlertSettings(log=LogSettings(path=root / "alerts.jsonl")))
            em = EmailSettings(host="127.0.0.1", port=port, security="none", sender="lotwarden@brackenfield.example",
                               recipients=("qa@brackenfield.example",), timeout=30,
                               routes=(Route(recipients=("l1-qa@brackenfield.example",), lines=("L1",)),))
            mail_s, mail_peak = drain_in_child(mail_db, AlertSettings(email=em))
    finally:
        ctl.stop()
    per_rcpt = Counter(r for _, rcpts, _ in received for r in rcpts)
    print(f"burst: {args.lots} held lots (3 lines, 40 values each), grouping window 60 s, group_max 50, "
          f"hourly cap 12")
    print(f"messages sent: {len(received)}  per recipient: {dict(per_rcpt)}")
    print(f"largest message: {max(s for *_, s in received) / 2**20:.2f} MiB")
    print(f"baseline (JSON-lines log only): {base_s:.2f} s, peak RSS {base_peak:.0f} MiB")
    print(f"e-mail with charts:             {mail_s:.2f} s, peak RSS {mail_peak:.0f} MiB")
    print(f"ratio e-mail / log: time {mail_s / base_s:.1f}x, peak memory {mail_peak / base_peak:.1f}x; "
          f"{mail_s / args.lots * 1000:.0f} ms per lot")
    return 0


if __name__ == "__main__":
    sys.exit(main())
