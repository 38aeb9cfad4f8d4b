"""Benchmark: read_export against plain pandas.read_csv of the same file, large and small, as ratios.

A 1,000,000-row canonical export: both are timed in this process, best of 5 with the two interleaved (so
load from other work on the machine hits both alike); the figures that matter are the ratios (reader /
baseline): wall time (the bar: at most 1.0x) and CPU time of the whole process (the reader's parser and
column work run on several threads, so its CPU time may exceed its wall time). Peak RSS is measured for each reader alone in a fresh subprocess (VmHWM), for read_export (the
reader owns the file's bytes) and for read_export_bytes with the caller keeping the bytes (as the daemon's
intake does). A 100-row file: the fixed cost per call, best per-call time of interleaved rounds.
Run: python bench/bench_reader.py [rows]
"""

from __future__ import annotations

import gc
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from monitor.ingest import read_export

ROUNDS = 5  # best of this many interleaved rounds on the large file
TARGET_RATIO = 1.0  # wall time of read_export / pandas.read_csv on the 1,000,000-row file (issue 7)
SMALL_ROWS = 100
SMALL_TARGET_MS = 1.0  # the reader's own budget per 100-row file (the daemon's backlog figure needs it)


def write_export(path: Path, rows: int, seed: int = 20261201) -> None:
    """A canonical export of the Brackenfield Foods L1 line: OAT-500 bags, 8 filler heads, 500-bag lots."""
    rng = np.random.default_rng(seed)
    i = np.arange(rows)
    stamps = pd.Timestamp("2026-12-01T06:00:00") + pd.to_timedelta(i, unit="s")
    frame = pd.DataFrame({
        "timestamp": stamps.strftime("%Y-%m-%dT%H:%M:%S"),
        "line": "L1",
        "product": "OAT-500",
        "lot": pd.Series(i // 500).map("B{:06d}".format),
        "head": (i % 8 + 1).astype(str),
        "value": np.round(rng.normal(502.0, 2.0, rows), 2),
        "unit": "g",
    })
    frame.to_csv(path, index=False)


def interleaved_best(runs: int, a: Callable[[], object], b: Callable[[], object]) -> dict[str, tuple[float, float]]:
    """Best wall and CPU time of ``a`` and of ``b`` over ``runs`` rounds, each round timing a then b.

    CPU time (time.process_time, all threads of the process) is reported too: it shows the work done, while
    wall time shows what the multi-threaded parser gains from a second core.
    """
    best = {"wall": [float("inf")] * 2, "cpu": [float("inf")] * 2}
    for _ in range(runs):
        for slot, fn in enumerate((a, b)):
            gc.collect()
            w0, c0 = time.perf_counter(), time.process_time()
            fn()
            w1, c1 = time.perf_counter(), time.process_time()
            best["wall"][slot] = min(best["wall"][slot], w1 - w0)
            best["cpu"][slot] = min(best["cpu"][slot], c1 - c0)
    return {k: (v[0], v[1]) for k, v in best.items()}


_CHILD = """
import sys
import pandas as pd
from monitor.ingest import read_export

def hwm():
    with open("/proc/self/status") as f:
        return next(int(l.split()[1]) for l in f if l.startswith("VmHWM:"))

if sys.argv[1] == "reader-bytes":  # the caller holds the bytes: they are counted in the base
    from pathlib import Path
    from monitor.ingest import read_export_bytes
    data = Path(sys.argv[2]).read_bytes()
    base = hwm()
    read_export_bytes(data, name=sys.argv[2])
else:
    base = hwm()
    pd.read_csv(sys.argv[2]) if sys.argv[1] == "pandas" else read_export(sys.argv[2])
print(base, hwm())
"""


def peak_rss_mb(which: str, path: Path) -> tuple[float, float]:
    """(RSS after imports, peak RSS after one read) in MB of a fresh interpreter reading ``path``.

    The child reads its own high-water mark (VmHWM): Linux carries getrusage's ru_maxrss over from the
    parent through fork and exec, so the child's getrusage would report the parent's peak.
    """
    out = subprocess.run([sys.executable, "-c", _CHILD, which, str(path)], capture_output=True, text=True,
                         check=True, timeout=600)
    before, after = (int(x) / 1024 for x in out.stdout.split())  # KiB
    return before, after


def per_call_best(rounds: int, calls: int, a: Callable[[], object], b: Callable[[], object]
                  ) -> dict[str, tuple[float, float]]:
    """Best per-call wall and CPU time of ``a`` and ``b``: ``rounds`` rounds of ``calls`` calls each, interleaved."""
    best = {"wall": [float("inf")] * 2, "cpu": [float("inf")] * 2}
    for fn in (a, b):  # warm up: lazy imports and first-call caches are not the per-file cost
        for _ in range(20):
            fn()
    for _ in range(rounds):
        for slot, fn in enumerate((a, b)):
            w0, c0 = time.perf_counter(), time.process_time()
            for _ in range(calls):
                fn()
            w1, c1 = time.perf_counter(), time.process_time()
            best["wall"][slot] = min(best["wall"][slot], (w1 - w0) / calls)
            best["cpu"][slot] = min(best["cpu"][slot], (c1 - c0) / calls)
    return {k: (v[0], v[1]) for k, v in best.items()}


def small_file_report(tmp: Path) -> list[str]:
    """Per-call time of read_export and pandas.read_csv on one 100-row canonical file."""
    path = tmp / "brackenfield-L1-oat500-small.csv"
    write_export(path, SMALL_ROWS)
    got = read_export(path)
    assert len(got.rows) == SMALL_ROWS and not got.bad_rows, "benchmark file must read cleanly"
    times = per_call_best(5, 400, lambda: pd.read_csv(path), lambda: read_export(path))
    out = [f"small file: {SMALL_ROWS} rows; best of 5 rounds of 400 calls, interleaved"]
    for clock, (base, ours) in times.items():
        out.append(f"[{clock:>4}] pandas.read_csv {base * 1e3:.3f} ms | read_export {ours * 1e3:.3f} ms | ratio "
                   f"{ours / base:.2f}x (target read_export < {SMALL_TARGET_MS:.1f} ms: "
                   f"{'met' if ours * 1e3 < SMALL_TARGET_MS else 'NOT met'})")
    return out


def main(rows: int = 1_000_000) -> int:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "brackenfield-L1-oat500.csv"
        write_export(path, rows)
        size_mb = path.stat().st_size / 1e6
        got = read_export(path)
        assert len(got.rows) == rows and not got.bad_rows, "benchmark file must read cleanly"
        del got
        times = interleaved_best(ROUNDS, lambda: pd.read_csv(path), lambda: read_export(path))
        rss = {which: peak_rss_mb(which, path) for which in ("pandas", "reader", "reader-bytes")}
        small = small_file_report(Path(tmp))
    print(f"file: {rows:,} rows, {size_mb:.1f} MB; best of {ROUNDS}, interleaved; {os.cpu_count()} CPU(s), load average "
          f"{os.getloadavg()[0]:.2f} at the end")
    for clock, (base, ours) in times.items():
        ratio = ours / base
        bar = (f"(bar <= {TARGET_RATIO}x: {'met' if ratio <= TARGET_RATIO else 'NOT met'})" if clock == "wall"
               else "(no bar: the work done, all threads)")
        print(f"[{clock:>4}] pandas.read_csv {base:.3f} s ({rows / base:,.0f} rows/s) | read_export {ours:.3f} s "
              f"({rows / ours:,.0f} rows/s) | ratio {ratio:.2f}x {bar}")
    wall, cpu = (times[k][1] / times[k][0] for k in ("wall", "cpu"))
    print(f"wall ratio {wall:.2f}x, CPU ratio {cpu:.2f}x")
    for which, (before, after) in rss.items():
        what = "after imports + the caller's bytes" if which == "reader-bytes" else "after imports"
        print(f"peak RSS {which:<12}: {after:.0f} MB ({after - before:.0f} MB above the {before:.0f} MB {what})")
    print(f"peak RSS (this process, incl. generating the file): "
          f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")
    print("\n".join(small))
    return 0


if __name__ == "__main__":
    sys.exit(main(int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000))
