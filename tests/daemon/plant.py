"""A small plant folder for daemon tests: one OAT-500 rule, a drop folder and a config naming them."""

from __future__ import annotations

import textwrap
from pathlib import Path

OAT_RULE = """\
name = "oat-500"
products = ["OAT-500"]
target = 500.0
unit = "g"
alternative = "two-sided"
alpha = 0.05
min_n = 5
idle_minutes = 30
"""
HEADER = "timestamp,line,product,lot,head,value,unit\n"


def make_plant(root: Path, *, settle: float = 0.2, polling: bool = False, rescan: float = 30.0,
               idle_minutes: int = 30, extra: str = "") -> Path:
    """Write rules/oat-500.toml, drop/, staging/ and lotwarden.toml under ``root``; return the config path."""
    for d in ("drop", "rules", "staging"):
        (root / d).mkdir(parents=True, exist_ok=True)
    rule = OAT_RULE.replace("idle_minutes = 30", f"idle_minutes = {idle_minutes}")
    (root / "rules" / "oat-500.toml").write_text(rule, encoding="utf-8")
    cfg = root / "lotwarden.toml"
    cfg.write_text(textwrap.dedent(f"""\
        rules_dir = "rules"

        [watch]
        folder = "drop"
        settle_seconds = {settle}
        polling = {str(polling).lower()}
        poll_interval = 0.1
        rescan_seconds = {rescan}

        [alerts]
        drain_seconds = 0.2

        [alerts.log]
        path = "alerts.jsonl"

        [state]
        folder = "state"
        """) + textwrap.dedent(extra), encoding="utf-8")
    return cfg


def csv_rows(line: str, lot: str, values, start: int = 0) -> str:
    """Canonical OAT-500 export rows, one timestamp a second from 06:00 plus ``start``."""
    return "".join(f"2026-11-30T06:{(start + i) // 60:02d}:{(start + i) % 60:02d},{line},OAT-500,{lot},H1,"
                   f"{float(v)!r},g\n" for i, v in enumerate(values))
