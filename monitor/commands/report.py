"""`lotwarden report`: one self-contained HTML page of a period's lots, written atomically to --out."""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from datetime import UTC, datetime
from pathlib import Path

from monitor.alerts.templates import CAUTION
from monitor.commands.stateaccess import add_config_flag, open_state
from monitor.errors import LotwardenError
from monitor.period import parse_period
from monitor.record import entries, select
from monitor.report.fromstate import build_report
from monitor.report.render import render_report
from monitor.state import dispositions, history, rule_texts
from monitor.state import drift as drift_store
from monitor.state.database import utc_iso


class OutError(LotwardenError):
    """--out names a place the page cannot be written to."""


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "report", help="write one self-contained HTML page of a period's lots",
        description="One HTML file (styles and charts inline, no network) of each lot's latest verdict decided "
                    "in the period, per line and product. Works while the daemon runs.",
        epilog=CAUTION)
    add_config_flag(p)
    p.add_argument("--since", metavar="T", required=True,
                   help="lots decided at or after T: an ISO date (that whole day in the config's time zone) "
                        "or date-time (without an offset: a time in the config's time zone)")
    p.add_argument("--until", metavar="T", required=True,
                   help="lots decided up to T (a date: up to the end of that day)")
    p.add_argument("--line", metavar="L", help="only lots of this line")
    p.add_argument("--product", metavar="P", help="only lots of this product")
    p.add_argument("--out", metavar="FILE.html", required=True, help="the page to write (replaced atomically)")
    return p


def _out_path(text: str) -> Path:
    out = Path(text)
    if out.is_dir():
        raise OutError(f"--out {text!r} is a folder; give a file name such as report.html")
    if not out.parent.is_dir():
        raise OutError(f"--out {text!r}: the folder {str(out.parent)!r} does not exist")
    if not os.access(out.parent, os.W_OK):
        raise OutError(f"--out {text!r}: the folder {str(out.parent)!r} is not writable")
    return out


def write_atomically(path: Path, text: str) -> None:
    """``text`` to ``path`` through a temporary file beside it and os.replace (readers never see half a page)."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def run(args: argparse.Namespace) -> int:
    out = _out_path(args.out)
    with open_state(args.config) as (config, db):
        period = parse_period(args.since, args.until, config.timezone)
        with db.read() as conn:
            rows = history.latest_verdicts(conn, line=args.line, product=args.product)
            disps = dispositions.for_verdicts(conn, [r.id for r in rows])
            items = select(entries(rows, disps), period=period, line=args.line, product=args.product)
            texts = rule_texts.by_hashes(conn, {e.rule_hash for e in items})
            signals = drift_store.signals(conn, since=utc_iso(period.start) if period.start else None,
                                          until=utc_iso(period.end) if period.end else None, line=args.line,
                                          product=args.product)
    assert period.start is not None and period.end is not None   # both flags are required
    config_path = Path(args.config).resolve()
    report = build_report(items, texts, plant=config.plant,
                          config_name=config_path.name, zone=config.timezone, start=period.start,
                          end=period.end, generated_at=datetime.now(UTC), signals=signals)
    try:
        write_atomically(out, render_report(report))
    except OSError as exc:
        raise OutError(f"--out {args.out!r} cannot be written: {exc.strerror or exc}") from None
    holds = sum(s.count_holds for s in report.sections)
    reviews = sum(s.count_reviews for s in report.sections)
    opened = sum(s.count_open for s in report.sections)
    sys.stdout.write(f"{out}\n{len(items)} lots, {holds} holds, {reviews} reviews, {opened} open "
                     f"in {len(report.sections)} line/product sections\n")
    return 0
