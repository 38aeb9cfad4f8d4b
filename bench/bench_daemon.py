"""Daemon figures: file-finished → hold-alert latency, idle CPU with native watching, peak memory on 1M rows.

Each figure is taken from a real `lotwarden run` subprocess on a temporary plant folder and set against a
baseline measured in the same run (the settle time for latency, an idle Python process for CPU, the idle
daemon's own peak for memory). Run: ``python bench/bench_daemon.py [--quick]``.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np

SETTLE = 0.5
TICKS = os.sysconf("SC_CLK_TCK")
RULE = textwrap.dedent("""\
    name = "oat-500"
    products = ["OAT-500"]
    target = 500.0
    unit = "g"
    alternative = "two-sided"
    alpha = 0.05
    min_n = 5
    idle_minutes = 600

    [normality]
    on_fail = "ignore"      # every bench lot is far off target: each must raise a hold, not a review
    """)
HEADER = "timestamp,line,product,lot,head,value,unit\n"


def make_plant(root: Path) -> Path:
    for d in ("drop", "rules"):
        (root / d).mkdir(parents=True, exist_ok=True)
    (root / "rules" / "oat-500.toml").write_text(RULE)
    cfg = root / "lotwarden.toml"
    cfg.write_text(textwrap.dedent(f"""\
        rules_dir = "rules"

        [watch]
        folder = "drop"
        settle_seconds = {SETTLE}
        polling = false
        rescan_seconds = 60

        [state]
        folder = "state"

        [alerts.log]
        path = "alerts.jsonl"

        [profiles.bench]
        match = ["bench-*.csv"]
        end_of_lot = "END"
        """))
    return cfg


def start(cfg: Path, log: Path) -> subprocess.Popen:
    fh = open(log, "wb")
    p = subprocess.Popen([sys.executable, "-m", "monitor", "run", "--config", str(cfg)], stderr=fh,
                         stdout=subprocess.DEVNULL)
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        if b" started:" in log.read_bytes():
            return p
        if p.poll() is not None:
            raise SystemExit(f"daemon exited at start: {log.read_text()}")
        time.sleep(0.05)
    raise SystemExit("daemon did not start in 30 s")


def stop(p: subprocess.Popen) -> int:
    p.send_signal(signal.SIGTERM)
    return p.wait(30)


def cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / TICKS     # utime + stime (proc(5))


def peak_rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def hold_lots(alert_log: Path) -> dict[str, float]:
    out: dict[str, float] = {}
    if alert_log.exists():
        for raw in alert_log.read_text().splitlines():
            a = json.loads(raw)
            if a["kind"] == "hold":
                out.setdefault(a["lot"], time.monotonic())
    return out


def bench_latency(root: Path, drops: int) -> tuple[float, float]:
    cfg = make_plant(root)
    p = start(cfg, root / "daemon.log")
    rng = np.random.default_rng(7)
    seen: dict[str, float] = {}
    lat: list[float] = []
    try:
        for i in range(drops):
            lot = f"H{i:03d}"
            vals = np.round(rng.normal(496.0, 1.0, 20), 1)
            text = HEADER + "".join(f"2026-11-30T06:00:{k:02d},L1,OAT-500,{lot},H1,{v},g\n"
                                    for k, v in enumerate(vals))
            text += f"2026-11-30T06:00:59,L1,OAT-500,END,,,g\n"
            target = root / "drop" / f"bench-{i:03d}.csv"
            with open(target, "w") as fh:
                fh.write(text)
            finished = time.monotonic()                     # the writer closed the file: it is finished
            deadline = finished + 30
            while lot not in seen and time.monotonic() < deadline:
                time.sleep(0.005)
                for k, t in hold_lots(root / "alerts.jsonl").items():
                    seen.setdefault(k, t)
            if lot not in seen:
                raise SystemExit(f"no hold alert for {lot} within 30 s; see {root / 'daemon.log'}")
            lat.append(seen[lot] - finished)
    finally:
        rc = stop(p)
    lat.sort()
    med = statistics.median(lat)
    p95 = lat[int(round(0.95 * (len(lat) - 1)))]
    print(f"latency file finished -> hold alert in log over {drops} drops: median {med:.3f} s, p95 {p95:.3f} s "
          f"(settle {SETTLE} s; p95 - settle = {p95 - SETTLE:.3f} s, must be < 1 s; exit {rc})")
    return med, p95


def bench_idle_cpu(root: Path, seconds: float) -> float:
    cfg = make_plant(root)
    base = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(1e6)"])
    p = start(cfg, root / "daemon.log")
    try:
        time.sleep(2.0)                                     # let start-up work finish
        c0, b0, t0 = cpu_seconds(p.pid), cpu_seconds(base.pid), time.monotonic()
        time.sleep(seconds)
        c1, b1, t1 = cpu_seconds(p.pid), cpu_seconds(base.pid), time.monotonic()
    finally:
        stop(p)
        base.kill()
        base.wait()
    pct = 100 * (c1 - c0) / (t1 - t0)
    base_pct = 100 * (b1 - b0) / (t1 - t0)
    print(f"idle CPU over {t1 - t0:.1f} s, native watching: {pct:.2f} % of one core "
          f"(baseline sleeping python {base_pct:.2f} %; must be < 1 %)")
    return pct


def bench_memory(root: Path, rows: int, judge: bool = False) -> tuple[float, float]:
    """Peak RSS of the daemon taking one export of ``rows`` values of one lot; with ``judge`` the export
    ends with an end-of-lot row, so the million-value lot is also read back and judged in the same run."""
    cfg = make_plant(root)
    p = start(cfg, root / "daemon.log")
    try:
        time.sleep(1.0)
        idle_peak = peak_rss_mb(p.pid)
        rng = np.random.default_rng(11)
        vals = np.round(rng.normal(500.0, 1.2, rows), 1)
        name = "bench-big.csv" if judge else "big.csv"   # bench-*.csv: the profile with end-of-lot rows
        big = root / (name + ".part")
        with open(big, "w") as fh:
            fh.write(HEADER)
            chunk = 100_000
            for s in range(0, rows, chunk):
                part = vals[s:s + chunk]
                fh.write("".join(f"2026-11-30T06:00:00,L1,OAT-500,M1,H{k % 8 + 1},{v},g\n"
                                 for k, v in enumerate(part, start=s)))
            if judge:
                fh.write("2026-11-30T06:00:59,L1,OAT-500,END,,,g\n")
        del vals
        t0 = time.monotonic()
        os.replace(big, root / "drop" / name)
        db = root / "state" / "lotwarden.db"
        import sqlite3
        deadline = time.monotonic() + 600
        while time.monotonic() < deadline:
            try:
                with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5) as conn:
                    if conn.execute("SELECT count(*) FROM files WHERE state='done'").fetchone()[0]:
                        break
            except sqlite3.Error:
                pass
            time.sleep(0.2)
        took = time.monotonic() - t0
        peak = peak_rss_mb(p.pid)
    finally:
        stop(p)
    what = "taking and judging" if judge else "taking"
    print(f"peak memory {what} a {rows:,}-row export: {peak:.0f} MB (idle daemon peak {idle_peak:.0f} MB, "
          f"ratio {peak / idle_peak:.1f}x; must be < 500 MB); took {took:.1f} s")
    return peak, idle_peak


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="fewer drops, shorter idle window, 200k rows")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="lotwarden-bench-") as tmp:
        root = Path(tmp)
        bench_latency(root / "latency", 10 if args.quick else 50)
        bench_idle_cpu(root / "idle", 5 if args.quick else 20)
        bench_memory(root / "memory", 200_000 if args.quick else 1_000_000)
        bench_memory(root / "memory-judged", 200_000 if args.quick else 1_000_000, judge=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
