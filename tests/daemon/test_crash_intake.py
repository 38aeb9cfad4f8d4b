"""SIGKILL at chosen points of intake, restart, finish: nothing lost, nothing doubled (real processes, real
SQLite file, real folders)."""

from __future__ import annotations

import csv
import hashlib
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
from collections import Counter
from pathlib import Path

import pytest

DRIVER = textwrap.dedent("""
    import sys
    from monitor.daemon.config import load_config, load_rule_set
    from monitor.daemon.intake import Intake
    from monitor.state.database import Database as Store

    if len(sys.argv) > 2 and sys.argv[2].endswith("-w2"):  # two-row insert windows: a file is many inserts
        from monitor.daemon import accumulate
        accumulate.CHUNK_ROWS = 2
    cfg = load_config(sys.argv[1])
    store = Store.open(cfg.state.folder)
    intake = Intake(cfg, load_rule_set(cfg), store)
    intake.recover()
    ready = [p for p in sorted(cfg.watch.folder.iterdir()) if p.is_file() and cfg.watch.accepts(p.name)]
    if len(sys.argv) > 2 and sys.argv[2].startswith("batch"):
        intake.process_batch(ready)
    else:
        for p in ready:
            intake.process(p)
    intake.close_idle(idle_seconds_override=0)
    store.close()
""")

CANON = "timestamp,line,product,lot,head,value,unit\n"


def _export(rows: list[tuple[str, str, str, float]]) -> str:
    return CANON + "".join(f"2026-11-30T06:00:{i:02d},{ln},{prod},{lot},H1,{v},g\n"
                           for i, (ln, prod, lot, v) in enumerate(rows))


def make_files(drop: Path) -> dict[str, bytes]:
    """Seven exports: a lot over two files, lot changes, a bad file, a duplicate, a product with no rule."""
    oat = lambda lot, vals: [("L1", "OAT-500", lot, v) for v in vals]  # noqa: E731
    files = {
        "01-L1-a.csv": _export(oat("OAT-A", [502.6, 501.4, 500.2, 503.2, 499.8, 501.1])),
        "02-L1-b.csv": _export(oat("OAT-A", [504.0, 503.3, 502.9, 505.1])),
        "03-L1-c.csv": _export(oat("OAT-B", [500.0, 500.5, 499.1, 501.7, 500.9])),
        "04-L2-bad.csv": "no header here\n\x00\x00\n",
        "06-L2-x.csv": _export([("L2", "MYSTERY-250", "MX-1", v) for v in (250.1, 249.8, 250.3)]),
        "07-L1-d.csv": _export(oat("OAT-C", [498.0, 499.2, 500.1, 497.9, 498.8])),
    }
    out = {name: text.encode() for name, text in files.items()}
    out["05-L1-c-copy.csv"] = out["03-L1-c.csv"]  # same bytes: a duplicate
    for name, data in out.items():
        (drop / name).write_bytes(data)
    return out


def expected_values(files: dict[str, bytes]) -> Counter:
    """(file name, value) of every good, non-duplicate file, read with Python's csv module."""
    c: Counter = Counter()
    for name, data in files.items():
        if name in ("04-L2-bad.csv", "05-L1-c-copy.csv"):
            continue
        for r in csv.DictReader(data.decode().splitlines()):
            c[(name, float(r["value"]))] += 1
    return c


def run_driver(script: Path, config: Path, crash: str | None, mode: str = "one") -> int:
    env = {k: v for k, v in os.environ.items() if k != "LOTWARDEN_CRASH_AT"}
    if crash:
        env["LOTWARDEN_CRASH_AT"] = crash
    proc = subprocess.run([sys.executable, str(script), str(config), mode], env=env, capture_output=True, timeout=120)
    if proc.returncode not in (0, -signal.SIGKILL):
        raise AssertionError(proc.stderr.decode(errors="replace"))
    return proc.returncode


def state_of(root: Path) -> dict:
    db = sqlite3.connect(str(root / "state" / "lotwarden.db"))
    try:
        values = Counter((Path(p).name, v) for p, v in db.execute(
            "SELECT f.path, v.value FROM lot_values v JOIN files f ON f.id = v.file_id"))
        alerts = sorted(db.execute("SELECT kind, dedup_key FROM alerts"))
        deliveries = db.execute("SELECT count(*) FROM deliveries").fetchone()[0]
        verdicts = sorted(db.execute("SELECT line, product, lot, n FROM verdicts"))
        files = Counter(s for (s,) in db.execute("SELECT state FROM files"))
        unarchived = db.execute("SELECT count(*) FROM files WHERE archived_at IS NULL").fetchone()[0]
    finally:
        db.close()

    def shas(folder: Path, skip_reason: bool = True) -> Counter:
        return Counter(hashlib.sha256(p.read_bytes()).hexdigest() for p in folder.rglob("*")
                       if p.is_file() and not (skip_reason and p.name.endswith(".reason.txt")))

    return {"values": values, "alerts": alerts, "deliveries": deliveries, "verdicts": verdicts, "files": files,
            "unarchived": unarchived, "archive": shas(root / "state" / "archive"),
            "quarantine": shas(root / "state" / "quarantine"),
            "reasons": sorted(p.name for p in (root / "state" / "quarantine").rglob("*.reason.txt")),
            "drop": sorted(p.name for p in (root / "drop").iterdir())}


@pytest.fixture(scope="module")
def reference(tmp_path_factory, make_setup_module) -> dict:
    """The state after one run with no crash (same driver, same files, in a subprocess)."""
    root = tmp_path_factory.mktemp("reference")
    cfg = make_setup_module(root)
    make_files(root / "drop")
    script = root / "driver.py"
    script.write_text(DRIVER)
    assert run_driver(script, cfg, None) == 0
    return state_of(root)


@pytest.fixture(scope="module")
def make_setup_module():
    from monitor.daemon import config  # noqa: F401  (import check only)
    import importlib.util

    spec = importlib.util.spec_from_file_location("daemon_conftest", Path(__file__).with_name("conftest.py"))
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod.write_setup


@pytest.mark.parametrize("crashes", [
    ["after-mark:4", "mid-values:4"],         # a bad file marked, then values of 07 rolled back
    ["after-commit:3", "after-archive:3"],    # 03 committed not moved; 06 moved not recorded
    ["mid-values:1", "before-archive:1"],     # the first file twice: rolled back, then committed not moved
    ["mid-values:7", "after-commit:1"],       # the last file rolled back; on restart committed, not moved
    ["batch", "mid-values:6", "after-archive:2"],  # one commit for all: the whole batch rolled back, then
                                                   # committed and the second file moved, not recorded
    ["batch-w2", "mid-values:1", "after-commit:1"],  # two-row windows: killed after the first window of
                                                     # the first file, then committed and not moved
])
def test_sigkill_then_restart_loses_and_doubles_nothing(tmp_path: Path, make_setup_module, reference: dict,
                                                        crashes: list[str]) -> None:
    """After SIGKILLs at the given points and a clean restart, the store matches the files exactly once."""
    cfg = make_setup_module(tmp_path)
    files = make_files(tmp_path / "drop")
    script = tmp_path / "driver.py"
    script.write_text(DRIVER)
    mode = crashes[0] if crashes[0].startswith("batch") else "one"
    for point in crashes[1:] if mode != "one" else crashes:
        assert run_driver(script, cfg, point, mode) == -signal.SIGKILL, f"hook {point} did not fire"
    assert run_driver(script, cfg, None, mode) == 0
    got = state_of(tmp_path)
    # every value exactly once, checked against Python's csv module reading the same files
    assert got["values"] == expected_values(files)
    # every file archived exactly once (the duplicate too), the bad one quarantined once with its reason
    sha = {n: hashlib.sha256(d).hexdigest() for n, d in files.items()}
    assert got["archive"] == Counter(s for n, s in sha.items() if n != "04-L2-bad.csv")
    assert got["quarantine"] == Counter([sha["04-L2-bad.csv"]])
    assert got["reasons"] == ["04-L2-bad.csv.reason.txt"]
    assert got["drop"] == [] and got["unarchived"] == 0
    assert got["files"] == Counter({"done": 5, "duplicate": 1, "rejected": 1})
    # four lots in the files (OAT-A over two files, OAT-B, OAT-C, MX-1): each judged once
    assert sorted((v[2], v[3]) for v in got["verdicts"]) == [("MX-1", 3), ("OAT-A", 10), ("OAT-B", 5), ("OAT-C", 5)]
    # every alert enqueued once: the same alerts as the run without crashes, one delivery row per channel
    kinds = Counter(k for k, _ in got["alerts"])
    assert kinds["file-rejected"] == 1 and kinds["file-duplicate"] == 1
    assert ("review", "review|L2|MYSTERY-250|MX-1|") in got["alerts"]
    assert got["alerts"] == reference["alerts"]
    assert got["deliveries"] == len(got["alerts"])  # one channel (log) configured
    assert got["values"] == reference["values"] and got["verdicts"] == reference["verdicts"]
