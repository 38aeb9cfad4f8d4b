"""`lotwarden lots`: one row per lot with its latest verdict, oldest decision first, as a table, JSON or CSV."""

from __future__ import annotations

import argparse
import sys

from monitor.alerts.templates import CAUTION
from monitor.commands import recordtable as rt
from monitor.commands.stateaccess import add_config_flag, open_state
from monitor.period import parse_period
from monitor.record import LotEntry, entries, select
from monitor.state import dispositions, history

VERDICT_CHOICES = ("pass", "hold", "review", "open")
FORMATS = ("table", "json", "csv")


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "lots", help="list each lot's latest verdict with its disposition and giveaway",
        description="One row per lot with its latest verdict, oldest decision first. Works while the daemon runs.",
        epilog=CAUTION)
    add_config_flag(p)
    p.add_argument("--line", metavar="L", help="only lots of this line")
    p.add_argument("--product", metavar="P", help="only lots of this product")
    p.add_argument("--since", metavar="T",
                   help="only lots decided at or after T: an ISO date (that whole day in the config's time zone) "
                        "or date-time (without an offset: a time in the config's time zone)")
    p.add_argument("--until", metavar="T", help="only lots decided up to T (a date: up to the end of that day)")
    p.add_argument("--verdict", choices=VERDICT_CHOICES,
                   help="only lots whose latest verdict is this; open = holds and reviews not yet disposed of")
    p.add_argument("--format", choices=FORMATS, default="table", help="output format (default: table)")
    return p


def lot_entries(config_path: str, *, line: str | None = None, product: str | None = None,
                since: str | None = None, until: str | None = None, verdict: str | None = None
                ) -> tuple[list[LotEntry], str]:
    """The selected lots (oldest decision first) and the config's time zone."""
    with open_state(config_path) as (config, db):
        period = parse_period(since, until, config.timezone)
        with db.read() as conn:
            rows = history.latest_verdicts(conn, line=line, product=product)
            disps = dispositions.for_verdicts(conn, [r.id for r in rows])
    items = select(entries(rows, disps), period=period, line=line, product=product, verdict=verdict)
    return items, config.timezone


def render_table(items: list[LotEntry], zone: str) -> str:
    """The table, the caution and, last, the counts line."""
    lines = rt.table([*rt.LOT_HEADERS[:3], f"decided ({zone})", *rt.LOT_HEADERS[4:]],
                     [rt.lot_cells(e, zone) for e in items], right=rt.LOT_RIGHT)
    return "\n".join([*lines, "", CAUTION, rt.counts_line(items)]) + "\n"


def run(args: argparse.Namespace) -> int:
    items, zone = lot_entries(args.config, line=args.line, product=args.product, since=args.since,
                              until=args.until, verdict=args.verdict)
    if args.format == "json":
        sys.stdout.write(rt.to_json_text([e.to_json() for e in items]))
    elif args.format == "csv":
        sys.stdout.write(rt.lots_csv(items))
    elif not items:
        sys.stdout.write("no lots match\n")
    else:
        sys.stdout.write(render_table(items, zone))
    return 0
