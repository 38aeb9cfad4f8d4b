"""Start-up backlog: files/s through ``Intake.process`` against a bare pandas + scipy script, same process.

A drop folder holds N export files of 100 values each (one lot per file, so every file closes and judges
the previous lot). The baseline reads each file with ``pandas.read_csv`` and runs ``scipy.stats.ttest_1samp``
and ``scipy.stats.shapiro`` on its values — no state, no archive, no audit. Intake does the full job:
SHA-256, dedup check, reader, values and lots in SQLite (WAL, synchronous=FULL), verdict, audit, outbox,
archive move. The figure is the ratio of the two rates; the target is at least 0.5.
Run: ``python bench/bench_backlog.py [--files 10000]``.
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import shutil
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np

RULE = textwrap.dedent("""\
    name = "oat-500"
    products = ["OAT-500"]
    target = 500.0
    unit = "g"
    alpha = 0.01
    min_n = 20
    """)


def make_plant(root: Path, n_files: int, seed: int = 20261201) -> Path:
    """Config, one rule and ``n_files`` exports of 100 values (invented Brackenfield line L1 data)."""
    rng = np.random.default_rng(seed)
    drop, rules = root / "drop", root / "rules"
    drop.mkdir()
    rules.mkdir()
    (rules / "oat-500.toml").write_text(RULE)
    cfg = root / "lotwarden.toml"
    cfg.write_text('rules_dir = "rules"\n[watch]\nfolder = "drop"\n[state]\nfolder = "state"\n'
                   '[alerts.log]\npath = "state/alerts.jsonl"\n')
    for i in range(n_files):
        shift = 1.5 if i % 10 == 0 else 0.0  # every tenth lot drifts, so holds and alerts happen too
        vals = rng.normal(500.0 + shift, 2.0, 100)
        lines = "".join(f"2026-11-30T06:{j // 60:02d}:{j % 60:02d},L1,OAT-500,OAT-{i:06d},H{j % 4 + 1},{v:.1f},g\n"
                        for j, v in enumerate(vals))
        (drop / f"L1-oat-{i:06d}.csv").write_text("timestamp,line,product,lot,head,value,unit\n" + lines)
    return cfg


def run_baseline(files: list[Path]) -> float:
    """Seconds for the bare script over ``files``."""
    import pandas as pd
    import scipy.stats

    t0 = time.perf_counter()
    for p in files:
        v = pd.read_csv(p)["value"].to_numpy(dtype=np.float64)
        scipy.stats.ttest_1samp(v, 500.0)
        scipy.stats.shapiro(v)
    return time.perf_counter() - t0


def run_parts(files: list[Path]) -> tuple[float, float]:
    """Seconds for the reader alone and the engine alone over ``files`` (where the intake time goes; the
    rest of the intake's time is its own part: hashing, SQLite, lots, audit, outbox, archive)."""
    from monitor.engine import evaluate
    from monitor.ingest import read_export_bytes
    from monitor.lot import LotData, LotKey
    from monitor.rulebook import Rule

    t0 = time.perf_counter()
    exports = [read_export_bytes(p.read_bytes(), name=str(p)) for p in files]
    t_read = time.perf_counter() - t0
    rule = Rule.adhoc(target=500.0, unit="g", alpha=0.01, min_n=20)
    t0 = time.perf_counter()
    for e in exports:  # with heads and file, as the intake hands a lot to the engine
        evaluate(LotData(key=LotKey("L1", "OAT-500", "x"), values=e.rows["value"].to_numpy(),
                         heads=tuple(e.rows["head"].tolist()), files=(e.path,)), rule)
    return t_read, time.perf_counter() - t0


def run_intake(cfg_path: Path, files: list[Path], profile: bool, batch: int = 1) -> tuple[float, dict[str, int]]:
    """Seconds for Intake.process (``batch`` = 1) or Intake.process_batch over ``files`` (state, archive
    and audit included), and a few counts."""
    from monitor.daemon.config import load_config, load_rule_set
    from monitor.daemon.intake import Intake
    from monitor.state.database import Database as Store

    cfg = load_config(cfg_path)
    store = Store.open(cfg.state.folder)
    intake = Intake(cfg, load_rule_set(cfg), store)
    prof = cProfile.Profile() if profile else None
    t0 = time.perf_counter()
    if prof:
        prof.enable()
    statuses: dict[str, int] = {}
    for i in range(0, len(files), batch):
        outs = [intake.process(files[i])] if batch == 1 else intake.process_batch(files[i:i + batch])
        for o in outs:
            statuses[o.status] = statuses.get(o.status, 0) + 1
    intake.flush()
    if prof:
        prof.disable()
    elapsed = time.perf_counter() - t0
    counts = {f"files {k}": v for k, v in statuses.items()}
    for name, sql in (("values", "SELECT count(*) FROM lot_values"), ("verdicts", "SELECT count(*) FROM verdicts"),
                      ("alerts", "SELECT count(*) FROM alerts"), ("audit", "SELECT count(*) FROM audit")):
        counts[name] = store.conn.execute(sql).fetchone()[0]
    store.close()
    if prof:
        pstats.Stats(prof).sort_stats("cumulative").print_stats(25)
    return elapsed, counts


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--files", type=int, default=10_000)
    ap.add_argument("--batch", type=int, default=64, help="files per process_batch call (second figure)")
    ap.add_argument("--profile", action="store_true", help="print a cProfile of the intake runs")
    args = ap.parse_args(argv)
    root = Path(tempfile.mkdtemp(prefix="lotwarden-backlog-"))
    try:
        t0 = time.perf_counter()
        plants = {}
        for name in ("baseline", "one", "batch"):
            (root / name).mkdir()
            plants[name] = make_plant(root / name, args.files)
        print(f"wrote 3 x {args.files} files of 100 values in {time.perf_counter() - t0:.1f} s")
        files = {name: sorted((root / name / "drop").glob("*.csv")) for name in plants}
        base = run_baseline(files["baseline"])
        one, counts = run_intake(plants["one"], files["one"], args.profile, batch=1)
        many, counts_b = run_intake(plants["batch"], files["batch"], args.profile, batch=args.batch)
        n = args.files
        base_rate = n / base
        print(f"baseline (pandas.read_csv + ttest_1samp + shapiro): {base_rate:8.1f} files/s ({base:.1f} s)")
        for label, took in ((f"Intake.process, one commit per file:", one),
                            (f"Intake.process_batch, {args.batch} files per commit:", many)):
            print(f"{label:52s}{n / took:8.1f} files/s ({took:.1f} s)  ratio {base / took:.2f}", flush=True)
        t_read, t_engine = run_parts(files["baseline"])
        own = many - t_read - t_engine
        print(f"where the batch time goes, ms per file: reader {1e3 * t_read / n:.2f}, engine {1e3 * t_engine / n:.2f},"
              f" the rest (hash, SQLite, lots, audit, outbox, archive) {1e3 * own / n:.2f};"
              f" baseline {1e3 * base / n:.2f}")
        print("counts (one): " + ", ".join(f"{k} {v}" for k, v in counts.items()))
        print("counts (batch): " + ", ".join(f"{k} {v}" for k, v in counts_b.items()))
        ok = base / many >= 0.5
        print(f"target: ratio >= 0.50 -> {'OK' if ok else 'TOO SLOW'} (batch path)")
        return 0 if ok else 1
    finally:
        shutil.rmtree(root, ignore_errors=True)  # the benchmark's own temporary plant, not user data


if __name__ == "__main__":
    sys.exit(main())
