"""`check` holds the lots the daemon would: files in the order given, runs per line, markers, reopened lots.

Each scenario is run twice on the same files: through the real `lotwarden check` subprocess and through
the daemon's real Intake on a SQLite state folder under tmp_path (every lot still open closed at the end,
as `check` does). Per lot, n and verdict must agree with the daemon's last verdict, and `runs` with the
number of times the daemon closed (and so judged) the lot. Expected n, means and runs are also counted by
hand from the rows written, and means checked with Python's statistics module.
"""

from __future__ import annotations

import csv
import statistics
import textwrap
from pathlib import Path

import pytest

from .conftest import lotwarden

RULES = {
    "oat-500.toml": 'name = "oat-500"\nproducts = ["OAT-500"]\ntarget = 500.0\nunit = "g"\nmin_n = 5\n',
    "jam-340.toml": 'name = "jam-340"\nproducts = ["JAM-340"]\ntarget = 340.0\nunit = "g"\nmin_n = 5\n',
}
HEADER = "timestamp,line,product,lot,head,value,unit\n"
A = [501.2, 499.4, 500.8, 502.1, 498.9, 500.3, 501.7, 499.8, 500.6, 502.4]
B = [499.1, 500.9, 500.2, 501.5, 498.7, 500.4, 499.6, 501.1]
J = [340.4, 339.2, 341.0, 340.1, 339.7, 340.8]


def setup(root: Path) -> Path:
    """rules/, drop/ and a daemon config (one profile with an end-of-lot marker) under ``root``."""
    (root / "drop").mkdir()
    (root / "rules").mkdir()
    for name, text in RULES.items():
        (root / "rules" / name).write_text(text, encoding="utf-8")
    cfg = root / "lotwarden.toml"
    cfg.write_text(textwrap.dedent("""\
        rules_dir = "rules"

        [watch]
        folder = "drop"
        settle_seconds = 0

        [state]
        folder = "state"

        [alerts.log]
        path = "state/alerts.jsonl"

        [profiles.markers]
        match = ["M-*.csv"]
        end_of_lot = "END"
        """), encoding="utf-8")
    return cfg


def rows(lot: str, values: list[float], line: str = "L1", product: str = "OAT-500") -> list[tuple | None]:
    return [(line, product, lot, v) for v in values]


def write(folder: Path, name: str, items: list[tuple | None]) -> Path:
    """One export; an item None is an end-of-lot marker row ("END" alone on its line)."""
    out = []
    for i, r in enumerate(items):
        out.append("END" if r is None else f"2026-11-30T06:{i // 60:02d}:{i % 60:02d},{r[0]},{r[1]},{r[2]},"
                                           f"H{i % 4 + 1},{r[3]},g")
    p = folder / name
    p.write_text(HEADER + "\n".join(out) + "\n", encoding="utf-8")
    return p


def csv_values(paths: list[Path], lot: str) -> list[float]:
    """A lot's values over ``paths`` in order, read with Python's csv module (independent of the reader)."""
    out: list[float] = []
    for p in paths:
        with open(p, newline="", encoding="utf-8") as fh:
            out += [float(r["value"]) for r in csv.DictReader(fh) if r["lot"] == lot]
    return out


def daemon_lots(cfg_path: Path, paths: list[Path]) -> dict[str, tuple[int, str, int]]:
    """Per lot code: (n, verdict) of the daemon's last verdict and how many times it judged the lot, after
    its real Intake took ``paths`` in order and every lot still open was closed."""
    from monitor.daemon.config import load_config, load_rule_set
    from monitor.daemon.intake import Intake
    from monitor.state.database import Database as Store

    cfg = load_config(cfg_path)
    store = Store.open(cfg.state.folder)
    try:
        intake = Intake(cfg, load_rule_set(cfg), store)
        verdicts = [v for p in paths for v in intake.process(p).verdicts]
        verdicts += intake.close_idle(idle_seconds_override=0)
    finally:
        store.close()
    out: dict[str, tuple[int, str, int]] = {}
    for v in verdicts:
        out[v.key.lot] = (v.n, v.verdict, out.get(v.key.lot, (0, "", 0))[2] + 1)
    return out


def check_then_daemon(root: Path, cfg: Path, paths: list[Path]) -> tuple[dict[str, dict], dict[str, tuple]]:
    """`check --format json` on ``paths`` (by lot code), then the daemon on them (it archives the files)."""
    r = lotwarden("check", *map(str, paths), "--config", str(cfg), "--format", "json", cwd=root)
    assert r.code in (0, 1), r.err
    got = {o["lot"]: o for o in r.json()}
    return got, daemon_lots(cfg, paths)


def agree(got: dict[str, dict], daemon: dict[str, tuple]) -> None:
    assert set(got) == set(daemon)
    for lot, (n, verdict, judged) in daemon.items():
        assert (got[lot]["n"], got[lot]["verdict"], got[lot]["runs"]) == (n, verdict, judged), lot


def test_a_lot_interrupted_by_another_is_one_lot_of_two_runs(tmp_path: Path) -> None:
    """A x3, B x6, A x3 in one file: one lot A of 6 values in 2 runs (hand count), judged as the daemon
    judges it at the end (its first, 3-unit judgement is a review below min_n), and B of 6 in 1 run."""
    cfg = setup(tmp_path)
    f = write(tmp_path / "drop", "L1-a.csv", rows("A", A[:3]) + rows("B", B[:6]) + rows("A", A[3:6]))
    got, daemon = check_then_daemon(tmp_path, cfg, [f])
    assert (got["A"]["n"], got["A"]["runs"], got["B"]["n"], got["B"]["runs"]) == (6, 2, 6, 1)
    assert got["A"]["mean"] == pytest.approx(statistics.fmean(A[:6]), rel=1e-12)  # Python statistics module
    agree(got, daemon)


def test_a_lot_spanning_two_files_is_one_run(tmp_path: Path) -> None:
    """A lot that carries on in the next file stays open: one run, all values of both files in order."""
    cfg = setup(tmp_path)
    f1 = write(tmp_path / "drop", "L1-1.csv", rows("A", A[:5]))
    f2 = write(tmp_path / "drop", "L1-2.csv", rows("A", A[5:]) + rows("B", B))
    expected = csv_values([f1, f2], "A")   # before the daemon's intake archives the files
    got, daemon = check_then_daemon(tmp_path, cfg, [f1, f2])
    assert (got["A"]["n"], got["A"]["runs"]) == (len(expected), 1)
    assert got["A"]["mean"] == pytest.approx(statistics.fmean(expected), rel=1e-12)  # Python statistics
    assert got["A"]["files"] == [str(f1), str(f2)]
    agree(got, daemon)


def test_other_lines_do_not_interrupt_a_lot(tmp_path: Path) -> None:
    """Rows of line L2 between lot A's rows on line L1 leave A open: one run."""
    cfg = setup(tmp_path)
    f = write(tmp_path / "drop", "L1-a.csv",
              rows("A", A[:5]) + rows("J1", J, line="L2", product="JAM-340") + rows("A", A[5:]))
    got, daemon = check_then_daemon(tmp_path, cfg, [f])
    assert (got["A"]["n"], got["A"]["runs"], got["J1"]["runs"]) == (len(A), 1, 1)
    agree(got, daemon)


def test_a_marker_closes_the_lot_and_later_rows_reopen_it(tmp_path: Path) -> None:
    """An end-of-lot marker between A's rows closes A; the rows after it reopen A: 2 runs, all 10 values."""
    cfg = setup(tmp_path)
    f = write(tmp_path / "drop", "M-1.csv", [*rows("A", A[:5]), None, *rows("A", A[5:]), *rows("B", B)])
    got, daemon = check_then_daemon(tmp_path, cfg, [f])
    assert (got["A"]["n"], got["A"]["runs"], got["B"]["runs"]) == (len(A), 2, 1)
    agree(got, daemon)


def test_files_are_taken_in_the_order_given(tmp_path: Path) -> None:
    """b.csv (A), a.csv (B), c.csv (A) given in that order: B comes between A's rows, so A has 2 runs
    (in name order a, b, c it would have 1)."""
    cfg = setup(tmp_path)
    drop = tmp_path / "drop"
    fb, fa, fc = (write(drop, "L1-b.csv", rows("A", A[:5])), write(drop, "L1-a.csv", rows("B", B)),
                  write(drop, "L1-c.csv", rows("A", A[5:])))
    got, daemon = check_then_daemon(tmp_path, cfg, [fb, fa, fc])
    assert (got["A"]["runs"], got["B"]["runs"], got["A"]["n"]) == (2, 1, len(A))
    assert got["A"]["files"] == [str(fb), str(fc)]
    agree(got, daemon)


def test_table_notes_a_lot_of_several_runs(tmp_path: Path) -> None:
    """The table's notes say how many runs made a lot when there were two or more, and not otherwise."""
    cfg = setup(tmp_path)
    f = write(tmp_path / "drop", "L1-a.csv", rows("A", A[:5]) + rows("B", B) + rows("A", A[5:]))
    r = lotwarden("check", str(f), "--config", str(cfg), cwd=tmp_path)
    assert r.code in (0, 1), r.err
    line_a = next(ln for ln in r.out.splitlines() if ln.split()[1:2] == ["A"])
    line_b = next(ln for ln in r.out.splitlines() if ln.split()[1:2] == ["B"])
    assert "2 runs" in line_a and "runs" not in line_b


def test_a_rule_named_ad_hoc_keeps_its_products(tmp_path: Path) -> None:
    """A rules folder whose one rule is named "ad-hoc" judges only the products it names; another product
    is a review naming it (no rule matches)."""
    rules = tmp_path / "rules"
    rules.mkdir()
    (rules / "ad-hoc.toml").write_text('name = "ad-hoc"\nproducts = ["OAT-500"]\ntarget = 500.0\nunit = "g"\n')
    f = write(tmp_path, "x.csv", rows("A", A) + rows("R1", B, product="RICE-1K"))
    r = lotwarden("check", str(f), "--rules", str(rules), "--format", "json", cwd=tmp_path)
    got = {o["lot"]: o for o in r.json()}
    assert got["A"]["rule"] == "ad-hoc"
    assert got["R1"]["rule"] == "" and got["R1"]["verdict"] == "review" and "RICE-1K" in got["R1"]["reason"]
    assert "no rule matches" in got["R1"]["reason"]


def test_a_marker_atop_the_next_file_closes_the_lot_of_the_last(tmp_path: Path) -> None:
    """A file that opens with an end-of-lot marker naming no lot (no row above it) cannot tell which line's
    lot it ends, so it closes nothing (the policy: no open lot fits it) and lot A carries on: 1 run, all
    10 values, as the daemon holds it."""
    cfg = setup(tmp_path)
    drop = tmp_path / "drop"
    paths = [write(drop, "M-1.csv", rows("A", A[:5])), write(drop, "M-2.csv", [None, *rows("A", A[5:])])]
    got, daemon = check_then_daemon(tmp_path, cfg, paths)
    assert (got["A"]["n"], got["A"]["runs"]) == (len(A), 1)
    agree(got, daemon)


def test_a_folder_is_taken_in_name_order_without_marker_files(tmp_path: Path) -> None:
    """`check DIR` takes the folder's exports in name order (a, b, c: b's lot B comes between A's rows, so
    A has 2 runs), leaving out marker and reason files, as the daemon's intake does in that order."""
    cfg = setup(tmp_path)
    drop = tmp_path / "drop"
    paths = [write(drop, "L1-a.csv", rows("A", A[:5])), write(drop, "L1-b.csv", rows("B", B)),
             write(drop, "L1-c.csv", rows("A", A[5:]))]
    (drop / "L1-a.csv.done").write_text("")
    (drop / "L1-b.csv.reason.txt").write_text("not an export\n")
    r = lotwarden("check", str(drop), "--config", str(cfg), "--format", "json", cwd=tmp_path)
    assert r.code in (0, 1), r.err
    got = {o["lot"]: o for o in r.json()}
    assert (got["A"]["runs"], got["A"]["n"]) == (2, len(A))
    agree(got, daemon_lots(cfg, paths))


def test_no_rule_and_unit_reasons_read_as_the_daemon_writes_them(tmp_path: Path) -> None:
    """A product no rule names and grams under a mL rule without a density: `check` gives each lot the
    review reason the daemon gives it (one wording for both)."""
    cfg = setup(tmp_path)
    (tmp_path / "rules" / "juice.toml").write_text('name = "juice"\nproducts = ["JUICE-1L"]\ntarget = 1000.0\n'
                                                   'unit = "mL"\n', encoding="utf-8")
    f = write(tmp_path / "drop", "L1-x.csv", [*rows("R1", B, product="RICE-1K"),
                                               *rows("J1", A, line="L3", product="JUICE-1L")])
    r = lotwarden("check", str(f), "--config", str(cfg), "--format", "json", cwd=tmp_path)
    got = {o["lot"]: o["reason"] for o in r.json()}
    from monitor.daemon.config import load_config, load_rule_set
    from monitor.daemon.intake import Intake
    from monitor.state.database import Database as Store

    conf = load_config(cfg)
    store = Store.open(conf.state.folder)
    try:
        intake = Intake(conf, load_rule_set(conf), store)
        verdicts = [*intake.process(f).verdicts, *intake.close_idle(idle_seconds_override=0)]
    finally:
        store.close()
    daemon = {v.key.lot: v.reason for v in verdicts}
    assert "RICE-1K" in got["R1"] and "density" in got["J1"]
    assert got == daemon
