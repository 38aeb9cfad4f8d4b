"""`lotwarden check` end to end against the bare pandas + scipy script a user would write, same run.

One export of 10,000 lots x 50 values (500,000 rows; invented Brackenfield Foods line L1 data, with
timestamp, line, product, lot, head, value and unit columns) is written to a temporary folder. Both
contenders run as subprocesses on it, alternately, several times; the figure is the ratio of their median
wall times (check / script). The bar is at most 0.5 (aim 0.15). The script (``SCRIPT`` below, written out
as a .py file) reads the file with ``pandas.read_csv``, groups by (line, product, lot) and runs
``scipy.stats.ttest_1samp`` and ``scipy.stats.shapiro`` per lot, printing JSON; ``check`` runs with the
normality gate on and ``--format json``.
Run: ``python bench/bench_check.py [--lots 10000] [--size 50] [--repeat 5] [--profile]``.
"""

from __future__ import annotations

import argparse
import cProfile
import json
import pstats
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

TARGET = 500.0
BAR, AIM = 0.5, 0.15

SCRIPT = '''\
"""The straightforward script: read, group, t-test and Shapiro-Wilk per lot, print JSON."""
import json
import sys

import pandas as pd
import scipy.stats

path, target = sys.argv[1], float(sys.argv[2])
df = pd.read_csv(path)
out = []
for (line, product, lot), g in df.groupby(["line", "product", "lot"], sort=False):
    v = g["value"].to_numpy(dtype=float)
    t = scipy.stats.ttest_1samp(v, target)
    w = scipy.stats.shapiro(v)
    verdict = "review" if w.pvalue < 0.05 else ("hold" if t.pvalue < 0.05 else "pass")
    out.append({"line": line, "product": product, "lot": lot, "n": int(v.size), "mean": float(v.mean()),
                "sd": float(v.std(ddof=1)), "statistic": float(t.statistic), "p_value": float(t.pvalue),
                "shapiro_w": float(w.statistic), "shapiro_p": float(w.pvalue), "verdict": verdict})
json.dump(out, sys.stdout, indent=2)
sys.stdout.write("\\n")
'''


def write_export(path: Path, lots: int, size: int, seed: int = 20261202) -> None:
    """``lots`` lots of ``size`` fills each, lots one after another, four filler heads in turn."""
    rng = np.random.default_rng(seed)
    shift = rng.normal(0.0, 0.5, lots)
    vals = rng.normal(TARGET + np.repeat(shift, size), 2.0)
    j = np.tile(np.arange(size), lots)
    lot_ids = np.repeat(np.arange(lots), size)
    with path.open("w") as fh:
        fh.write("timestamp,line,product,lot,head,value,unit\n")
        chunk = 50_000
        for a in range(0, lots * size, chunk):
            b = min(a + chunk, lots * size)
            fh.write("".join(
                f"2026-11-30T{(lot // 600) % 24:02d}:{(lot // 10) % 60:02d}:{k % 60:02d},L1,OAT-500,"
                f"OAT-{lot:06d},H{k % 4 + 1},{v:.1f},g\n"
                for lot, k, v in zip(lot_ids[a:b].tolist(), j[a:b].tolist(), vals[a:b].tolist())))


def timed(cmd: list[str], out: Path) -> float:
    """Wall seconds of one subprocess run, stdout to ``out`` (exit 0 or 1 expected)."""
    t0 = time.perf_counter()
    with out.open("w") as fh:
        proc = subprocess.run(cmd, stdout=fh, stderr=subprocess.PIPE, text=True, check=False)
    took = time.perf_counter() - t0
    if proc.returncode not in (0, 1):
        raise SystemExit(f"{cmd[:4]} failed with exit {proc.returncode}:\n{proc.stderr}")
    return took


def profile_in_process(path: Path) -> None:
    """cProfile of ``check`` in this process (where the time goes), top 30 by cumulative time."""
    import contextlib
    import io

    from monitor.cli import main

    prof = cProfile.Profile()
    with contextlib.redirect_stdout(io.StringIO()):
        prof.enable()
        main(["check", str(path), "--target", str(TARGET), "--format", "json"])
        prof.disable()
    pstats.Stats(prof).sort_stats("cumulative").print_stats(30)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--lots", type=int, default=10_000)
    ap.add_argument("--size", type=int, default=50)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--profile", action="store_true", help="also print a cProfile of check in-process")
    args = ap.parse_args(argv)
    root = Path(tempfile.mkdtemp(prefix="lotwarden-bench-check-"))
    try:
        data = root / "export.csv"
        t0 = time.perf_counter()
        write_export(data, args.lots, args.size)
        print(f"wrote {args.lots} lots x {args.size} values ({args.lots * args.size} rows, "
              f"{data.stat().st_size / 1e6:.1f} MB) in {time.perf_counter() - t0:.1f} s")
        script = root / "naive_check.py"
        script.write_text(SCRIPT)
        check_cmd = [sys.executable, "-m", "monitor", "check", str(data), "--target", str(TARGET),
                     "--format", "json"]
        naive_cmd = [sys.executable, str(script), str(data), str(TARGET)]
        times: dict[str, list[float]] = {"check": [], "script": []}
        for _ in range(args.repeat):  # alternate, so a busy moment on the machine hits both
            times["check"].append(timed(check_cmd, root / "check.json"))
            times["script"].append(timed(naive_cmd, root / "script.json"))
        got = json.loads((root / "check.json").read_text())
        ref = json.loads((root / "script.json").read_text())
        if len(got) != len(ref) or len(got) != args.lots:
            raise SystemExit(f"lot counts differ: check {len(got)}, script {len(ref)}, written {args.lots}")
        worst = max(abs(g["p_value"] - r["p_value"]) / max(abs(r["p_value"]), 1e-300)
                    for g, r in zip(got, ref) if g["p_value"] is not None)
        med = {k: statistics.median(v) for k, v in times.items()}
        for k, v in times.items():
            print(f"{k:7s} median {med[k]:.3f} s  (runs: {', '.join(f'{t:.3f}' for t in v)})")
        ratio = med["check"] / med["script"]
        print(f"largest relative p-value difference, check vs script (lots check tested): {worst:.2e}")
        print(f"ratio check / script = {ratio:.3f}  (bar <= {BAR}, aim {AIM}) -> "
              f"{'OK' if ratio <= BAR else 'TOO SLOW'}")
        if args.profile:
            profile_in_process(data)
        return 0 if ratio <= BAR else 1
    finally:
        shutil.rmtree(root, ignore_errors=True)  # the benchmark's own temporary folder, not user data


if __name__ == "__main__":
    sys.exit(main())
