"""`lotwarden dispose`: record what a person decided about a held or reviewed lot (release, rework, scrap).

One write transaction stores the disposition, its audit record and a `disposition` alert in the outbox; a
running daemon delivers that alert. Dispositions are only ever added: a later one supersedes for display.
"""

from __future__ import annotations

import argparse
from datetime import UTC, datetime

from monitor.alerts import kinds
from monitor.commands.stateaccess import add_config_flag, open_state
from monitor.daemon.reminders import verdict_summary
from monitor.errors import LotwardenError
from monitor.record import DISPOSABLE, entry, parse_lot_name
from monitor.state import audit, dispositions, history, outbox
from monitor.state.database import utc_iso


class DisposeError(LotwardenError):
    """The lot cannot be disposed of (unknown, or its latest verdict is not a hold or review)."""


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser("dispose", help="record the decision about a held or reviewed lot",
                       description="Record what was decided about a lot whose latest verdict is hold or "
                                   "review: release, rework or scrap. The decision is kept (never replaced; a "
                                   "later one supersedes it for display) and told on the alert channels.")
    p.add_argument("lot", metavar="LINE/PRODUCT/LOT", help="the lot, as `lotwarden lots` names it")
    p.add_argument("action", choices=dispositions.ACTIONS, help="what was decided")
    p.add_argument("--by", required=True, metavar="NAME", help="who decided (required)")
    p.add_argument("--note", required=True, metavar="TEXT", help="why, or what was done (required)")
    add_config_flag(p)
    return p


def _required_text(value: str, flag: str) -> str:
    text = value.strip()
    if not text:
        raise DisposeError("must not be empty or blank", key=flag, hint=f"give {flag} a text")
    return text


def run(args: argparse.Namespace) -> int:
    by = _required_text(args.by, "--by")
    note = _required_text(args.note, "--note")
    try:
        line, product, lot = parse_lot_name(args.lot)
    except ValueError:
        raise DisposeError(f"lot {args.lot!r} is not LINE/PRODUCT/LOT",
                           hint="name the lot as `lotwarden lots` shows it") from None
    name = f"{line}/{product}/{lot}"
    with open_state(args.config) as (config, db):
        at = utc_iso(datetime.now(UTC))
        with db.write() as conn:            # the check and the writes in one transaction
            rows = history.verdicts_of_lot(conn, line, product, lot)
            if not rows:
                raise DisposeError(f"lot {name} has no verdict (latest verdict: none); only a hold or "
                                   "review can be disposed of", hint="`lotwarden lots` lists the lots")
            latest = entry(rows[-1])
            if latest.verdict not in DISPOSABLE:
                raise DisposeError(f"lot {name} cannot be disposed of: its latest verdict is {latest.verdict} "
                                   f"(decided {latest.decided_at}); only a hold or review can be")
            disposition_id = dispositions.insert(conn, at=at, line=line, product=product, lot=lot,
                                                 verdict_id=latest.verdict_id, action=args.action, by=by,
                                                 note=note)
            audit.append(conn, at, "disposition", line=line, product=product, lot=lot, detail={
                "disposition_id": disposition_id, "action": args.action, "by": by, "note": note,
                "verdict_id": latest.verdict_id, "verdict": latest.verdict})
            alert = kinds.disposition(line=line, product=product, lot=lot, disposition_id=disposition_id,
                                      action=args.action, by=by, note=note, at=at,
                                      verdict=verdict_summary(latest))
            outbox.enqueue(conn, alert, config.alerts.channels)
    print(f"{name}: {args.action} by {by} at {at} (disposes of its {latest.verdict} of {latest.decided_at})")
    return 0
