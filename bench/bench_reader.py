"""Benchmark: read_export on a 1,000,000-row canonical export against plain pandas.read_csv of the same file.

Both are timed in this process, best of 3; the figure that matters is the ratio (reader / baseline).
Peak RSS of the process (resource.getrusage) is printed at the end. Run: python bench/bench_reader.py [rows]
"""

from __future__ import annotations

import gc
import resource
import sys
import tempfile
import time
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from monitor.ingest import read_export

TARGET_RATIO = 1.5


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


def best_of(runs: int, fn: Callable[[], object]) -> float:
    best = float("inf")
    for _ in range(runs):
        gc.collect()
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main(rows: int = 1_000_000) -> int:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "brackenfield-L1-oat500.csv"
        write_export(path, rows)
        size_mb = path.stat().st_size / 1e6
        got = read_export(path)
        assert len(got.rows) == rows and not got.bad_rows, "benchmark file must read cleanly"
        base = best_of(3, lambda: pd.read_csv(path))
        ours = best_of(3, lambda: read_export(path))
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux reports KiB
    ratio = ours / base
    print(f"file: {rows:,} rows, {size_mb:.1f} MB")
    print(f"pandas.read_csv : {base:.3f} s  {rows / base:,.0f} rows/s")
    print(f"read_export     : {ours:.3f} s  {rows / ours:,.0f} rows/s")
    print(f"ratio           : {ratio:.2f}x  (target < {TARGET_RATIO}x: {'met' if ratio < TARGET_RATIO else 'NOT met'})")
    print(f"peak RSS        : {peak_mb:.0f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main(int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000))
